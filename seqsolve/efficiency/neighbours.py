"""Scores of a design's neighbours (single changes and swaps) as updates of the current design.

A neighbour adds sign x (a trial's filtered regressor) to some conditions' column blocks, so its
information is M' = M + A + A' + D (A = X'd, D = d'd). Each path below scores a batch of such
candidates its own way; Evaluator._neighbour_scores (fast.py) is the one place that chooses:

  Rank2Update    kernels.rank2_scores: one regressor per condition, A-criterion: a rank-2 Woodbury
                 update in 2 x 2 algebra (NaN where the update nearly cancels)
  SchurUpdate    kernels.schur_scores: candidates touching the same one or two blocks share the
                 Cholesky factor of the untouched blocks; each factorises only its Schur complement
  WholeUpdate    kernels.update_scores: each candidate's matrix assembled and factorised whole
  WoodburyUpdate numpy: one regressor per condition, A-criterion, 4 x 4 algebra (NaN where it cancels)
  DenseUpdate    numpy: each candidate's matrix assembled whole, then batch_efficiency
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
from scipy.linalg import solve_triangular

from seqsolve.efficiency.algebra import batch_efficiency, regular_cholesky
from seqsolve.efficiency.paths import kernels, prepare_contrast


@dataclass(frozen=True)
class Candidates:
    """Candidate designs as terms: per term a, (condition (n,), trial (n,), sign): candidate k adds
    sign x (trial[k]'s regressor) to condition[k]'s column block; moves: the same candidates as
    (gaining condition, losing condition, trial, trial taken away or -1), each (n,). The stacked
    arrays the kernels take are built only when a path asks (the rank-2 path reads moves only)."""

    terms: list[tuple[np.ndarray, np.ndarray, float]]
    moves: tuple[np.ndarray, ...]

    def __len__(self) -> int:
        return len(self.terms[0][0])

    def subset(self, idx) -> Candidates:
        return Candidates([(c[idx], t[idx], sg) for c, t, sg in self.terms], tuple(v[idx] for v in self.moves))

    @cached_property
    def conds(self) -> np.ndarray:
        """(n, n_terms) int64."""
        return np.ascontiguousarray(np.stack([c for c, _, _ in self.terms], axis=1), dtype=np.int64)

    @cached_property
    def trials(self) -> np.ndarray:
        """(n, n_terms) int64."""
        return np.ascontiguousarray(np.stack([t for _, t, _ in self.terms], axis=1), dtype=np.int64)

    @property
    def signs(self) -> np.ndarray:
        """(n_terms,)."""
        return np.array([sg for _, _, sg in self.terms], dtype=float)


@dataclass(frozen=True)
class Current:
    """The current design every update starts from: its part (fast._Part: columns, groups, trial
    products), information m (p, p), X'P per trial xp (G, N, p, nb), the contrast and criterion."""

    part: Any
    m: np.ndarray
    xp: np.ndarray
    contrast: np.ndarray
    criterion: str


@dataclass(frozen=True)
class TrialProducts:
    """Where products of two trials' filtered regressors come from: the part's Gram matrices, or,
    for FIR columns with bins of one TR, Omega = W'(I - QQ')W at the trials' volumes (fir_scan
    (N, lags), -1 outside the run; omega () -> (n_scans, n_scans), built on first call)."""

    part: Any
    fir_scan: np.ndarray | None = None
    omega: Any = None

    def pair(self, c1, c2, t1, t2) -> np.ndarray:
        """Products of trial t1's regressor (group of c1) with trial t2's (group of c2): (B, nb, nb)."""
        part = self.part
        if self.fir_scan is not None:
            s1, s2 = self.fir_scan[t1], self.fir_scan[t2]  # (B, lags)
            vals = self.omega()[np.maximum(s1, 0)[:, :, None], np.maximum(s2, 0)[:, None, :]]
            return vals * ((s1 >= 0)[:, :, None] & (s2 >= 0)[:, None, :])
        if np.array_equal(t1, t2):
            return part.own()[part.group[c1], part.group[c2], t1]
        return part.gram()[part.group[c1], part.group[c2], t1, :, t2, :]

    def kernel_source(self) -> tuple:
        """(kind, gram, omega, fir_scan) as kernels.update_scores and schur_scores read them."""
        if self.fir_scan is not None:
            return 1, np.zeros((1, 1, 1, 1, 1, 1)), self.omega(), self.fir_scan
        return 0, self.part.gram(), np.zeros((1, 1)), np.zeros((1, 1), dtype=np.int64)


@dataclass(frozen=True)
class Rank2Update:
    """kernels.rank2_scores (one regressor per condition, one duration group, A-criterion)."""

    current: Current
    products: TrialProducts

    def scores(self, cands: Candidates) -> np.ndarray | None:
        """Scores, NaN where the update nearly cancels; None when the current design is singular."""
        cur, part = self.current, self.current.part
        if regular_cholesky(cur.m) is None:
            return None
        minv = np.linalg.inv(cur.m)
        minv = (minv + minv.T) / 2
        cm = cur.contrast @ minv
        h = cm.T @ cm
        x1 = np.ascontiguousarray(cur.xp[0, :, :, 0])
        gains, loses, t1, t2 = (np.ascontiguousarray(v, dtype=np.int64) for v in cands.moves)
        return kernels().rank2_scores(
            minv,
            h,
            float(np.trace(cm @ cur.contrast.T)),
            x1,
            x1 @ minv,
            x1 @ h,
            part.gram()[0, 0, :, 0, :, 0],
            part.col.astype(np.int64),
            gains,
            loses,
            t1,
            t2,
        )


@dataclass(frozen=True)
class WholeUpdate:
    """kernels.update_scores: each candidate's matrix updated and factorised whole."""

    current: Current
    products: TrialProducts

    def scores(self, cands: Candidates) -> np.ndarray:
        cur, part = self.current, self.current.part
        ct, active = prepare_contrast(cur.contrast)
        return kernels().update_scores(
            cur.m,
            cur.xp,
            *self.products.kernel_source(),
            part.col.astype(np.int64),
            part.group.astype(np.int64),
            part.nb,
            cands.conds,
            cands.trials,
            cands.signs,
            ct,
            active,
            cur.criterion == "D",
        )


@dataclass(frozen=True)
class SchurUpdate:
    """kernels.schur_scores for candidates that all touch the blocks starting at columns `starts`."""

    current: Current
    products: TrialProducts
    starts: tuple[int, ...]

    def scores(self, cands: Candidates) -> np.ndarray | None:
        """Scores; None when the untouched part of the current design is singular."""
        cur, part = self.current, self.current.part
        m, xp, nb = cur.m, cur.xp, part.nb
        s_idx = np.concatenate([np.arange(c, c + nb) for c in self.starts])
        r_idx = np.setdiff1d(np.arange(part.p), s_idx)
        ct = np.asarray(cur.contrast, dtype=float).T  # (p, q)
        if len(r_idx):
            l_rr = regular_cholesky(m[np.ix_(r_idx, r_idx)])
            if l_rr is None:
                return None
            li = solve_triangular(l_rr, np.eye(len(r_idx)), lower=True, check_finite=False)
        else:
            li = np.zeros((0, 0))
        a0 = m[np.ix_(s_idx, r_idx)] @ li.T
        g_r = li @ ct[r_idx]  # (r, q)
        h0 = ct[s_idx] - a0 @ g_r
        e = np.einsum("rk,gnkb->gnbr", li, xp[:, :, r_idx, :], optimize=True)
        eg = e @ g_r
        us = np.ascontiguousarray(xp[:, :, s_idx, :])
        # order the contrasts by their first non-zero row in S (zeros are structural)
        used = (h0 != 0) | (eg != 0).any(axis=(0, 1, 2))[None, :]
        first = np.where(used.any(axis=0), used.argmax(axis=0), len(s_idx))
        order = np.argsort(first, kind="stable")
        active = np.searchsorted(first[order], np.arange(len(s_idx)), side="right").astype(np.int64)
        g_r = g_r[:, order]
        const = g_r.T @ g_r if cur.criterion == "D" else np.array([[np.sum(g_r * g_r)]])
        block = np.full(part.p + 1, -1, dtype=np.int64)
        for b, c in enumerate(self.starts):
            block[c] = b
        blocks = block[np.where(part.col[cands.conds] >= 0, part.col[cands.conds], part.p)]
        return kernels().schur_scores(
            np.ascontiguousarray(m[np.ix_(s_idx, s_idx)]),
            np.ascontiguousarray(a0),
            np.ascontiguousarray(h0[:, order]),
            active,
            np.ascontiguousarray(const),
            np.ascontiguousarray(e),
            np.ascontiguousarray(eg[..., order]),
            us,
            *self.products.kernel_source(),
            part.group.astype(np.int64),
            nb,
            cands.conds,
            np.ascontiguousarray(blocks),
            cands.trials,
            cands.signs,
            cur.criterion == "D",
        )


@dataclass(frozen=True)
class WoodburyUpdate:
    """numpy, one regressor per condition, A-criterion: each candidate changes M by U S U' with U of
    4 columns (two unit vectors and two X'd vectors), so trace(C M'^-1 C') follows from 4 x 4 algebra."""

    current: Current
    products: TrialProducts

    def scores(self, cands: Candidates) -> np.ndarray | None:
        """Scores, NaN where the update nearly cancels M's rank; None if M itself is singular."""
        cur, part = self.current, self.current.part
        if regular_cholesky(cur.m) is None:
            return None
        minv = np.linalg.inv(cur.m)
        h = minv @ cur.contrast.T @ cur.contrast @ minv
        t0 = float(np.trace(cur.contrast @ minv @ cur.contrast.T))
        # merge the terms into two blocks: (condition a, vector va) and (condition b, vector vb)
        blocks = _two_blocks(cands.terms)
        n_cand = len(cands)
        cols, avec = [], []
        for cond, members in blocks:
            has = part.col[cond] >= 0
            a = sum(sg * cur.xp[part.group[cond], t][:, :, 0] for t, sg in members) * has[:, None]  # (B, p)
            cols.append((np.maximum(part.col[cond], 0), has))
            avec.append(a)
        dm = np.zeros((n_cand, 2, 2))
        for x_, (cond1, mem1) in enumerate(blocks):
            for y_, (cond2, mem2) in enumerate(blocks):
                has = (part.col[cond1] >= 0) & (part.col[cond2] >= 0)
                for t1, s1 in mem1:
                    for t2, s2 in mem2:
                        dm[:, x_, y_] += s1 * s2 * self.products.pair(cond1, cond2, t1, t2)[:, 0, 0] * has

        # U = [e_a, e_b, A_a, A_b]; the products U' Minv U and U' H U, entry by entry
        def unit_prod(mat, c1, c2):
            return mat[c1[0], c2[0]] * c1[1] * c2[1]

        def mixed(mat_a, c1):  # e_c' (mat a) for each candidate
            return mat_a[np.arange(n_cand), c1[0]] * c1[1]

        us = []
        for mat in (minv, h):
            ma = [a @ mat for a in avec]  # rows: a' mat (mat symmetric)
            g = np.empty((n_cand, 4, 4))
            for x_ in range(2):
                for y_ in range(2):
                    g[:, x_, y_] = unit_prod(mat, cols[x_], cols[y_])
                    g[:, x_, 2 + y_] = mixed(ma[y_], cols[x_])
                    g[:, 2 + y_, x_] = g[:, x_, 2 + y_]
                    g[:, 2 + x_, 2 + y_] = np.einsum("bp,bp->b", ma[x_], avec[y_])
            us.append(g)
        umu, uhu = us
        s_inv = np.zeros((n_cand, 4, 4))
        s_inv[:, 0:2, 2:4] = np.eye(2)
        s_inv[:, 2:4, 0:2] = np.eye(2)
        s_inv[:, 2:4, 2:4] = -dm
        kmat = s_inv + umu
        ok = np.abs(np.linalg.det(kmat)) > 1e-8
        safe = np.where(ok[:, None, None], kmat, np.eye(4))
        trace = t0 - np.einsum("bii->b", np.linalg.solve(safe, uhu))
        return np.where(ok, 1.0 / trace, np.nan)


@dataclass(frozen=True)
class DenseUpdate:
    """numpy: each candidate's information assembled whole, then batch_efficiency, in chunks that
    stay in cache."""

    current: Current
    products: TrialProducts

    def scores(self, cands: Candidates) -> np.ndarray:
        p = self.current.part.p
        chunk = max(1, 2_000_000 // (p * p))
        out = np.empty(len(cands))
        for lo in range(0, len(cands), chunk):
            sub = cands.subset(slice(lo, lo + chunk))
            out[lo : lo + len(sub)] = batch_efficiency(
                self.matrices(sub), self.current.contrast, self.current.criterion
            )[0]
        return out

    def matrices(self, cands: Candidates) -> np.ndarray:
        """Information matrices (n, p, p) after each candidate's terms.

        With A = X'd and D = d'd for the touched blocks: M' = (X + d)'(X + d) = M + A + A' + D, added
        block by block. Candidates are grouped by the conditions they touch, so every addition is a
        plain slice of the same columns.
        """
        cur, part = self.current, self.current.part
        terms = cands.terms
        nb, n_cand = part.nb, len(cands)
        a = [cur.xp[part.group[cond], trial] * sign for cond, trial, sign in terms]  # each (B, p, nb)
        d = {
            (t1, t2): s1 * s2 * self.products.pair(c1, c2, tr1, tr2)
            for t1, (c1, tr1, s1) in enumerate(terms)
            for t2, (c2, tr2, s2) in enumerate(terms)
        }
        mm = np.broadcast_to(cur.m, (n_cand,) + cur.m.shape).copy()
        keys, group = np.unique(cands.conds, axis=0, return_inverse=True)
        for g, key in enumerate(keys):
            idx = np.flatnonzero(group.ravel() == g)
            sub = mm[idx]
            blocks = [slice(part.col[c], part.col[c] + nb) if part.col[c] >= 0 else None for c in key]
            for t, blk in enumerate(blocks):
                if blk is None:
                    continue
                sub[:, :, blk] += a[t][idx]
                sub[:, blk, :] += np.swapaxes(a[t][idx], 1, 2)
            for (t1, t2), dd in d.items():
                if blocks[t1] is not None and blocks[t2] is not None:
                    sub[:, blocks[t1], blocks[t2]] += dd[idx]
            mm[idx] = sub
        return mm


def block_groups(part: Any, cands: Candidates):
    """Candidates touching the same condition blocks: (indices, starts) per group, starts the first
    columns of the one or two modelled blocks touched (empty: baseline trials only)."""
    cols = part.col[cands.conds]
    lo = np.where(cols >= 0, cols, part.p).min(axis=1)
    hi = cols.max(axis=1)
    key = lo * (part.p + 1) + np.maximum(hi, 0)
    for k in np.unique(key):
        idx = np.flatnonzero(key == k)
        first, last = int(lo[idx[0]]), int(hi[idx[0]])
        starts = () if first == part.p else (first,) if first == last else (first, last)
        yield idx, starts


def _two_blocks(terms):
    """Group (condition, trial, sign) terms into the two condition blocks they touch.

    Changes: (new, +), (old, -); swaps: (c_j, +i), (c_j, -j), (c_i, +j), (c_i, -i).
    """
    if len(terms) == 2:
        return [(terms[0][0], [(terms[0][1], terms[0][2])]), (terms[1][0], [(terms[1][1], terms[1][2])])]
    return [
        (terms[0][0], [(terms[0][1], terms[0][2]), (terms[1][1], terms[1][2])]),
        (terms[2][0], [(terms[2][1], terms[2][2]), (terms[3][1], terms[3][2])]),
    ]
