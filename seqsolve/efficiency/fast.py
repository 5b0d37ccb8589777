"""Fast scoring for fixed onsets: batched full evaluation and all single changes and swaps at once.

For a fixed timing every trial has, per condition, a regressor that does not depend on the other
trials' labels. After prewhitening and removing the nuisance space once, these 'trial regressors'
P (volumes x trials x basis) give every design's information matrix as M = X'X with X = P Z
(Z the one-hot labels), and a change at one trial alters X in two column blocks only, so all
changes are scored from M, X'P and the trials' own cross-products without rebuilding anything.
FIR regressors are 0/1 before filtering, so their products are gathered from the filtered
identity Omega = W'(I - QQ')W. Exactness against reference.py is tested to 1e-9.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from seqsolve.efficiency.grid import Layout, fir_bins
from seqsolve.efficiency.nuisance import block_nuisance, residual_basis, whiten
from seqsolve.efficiency.setup import AnalysisSetup

#: information matrices with a smaller reciprocal condition number count as singular
RCOND = 1e-10


def batch_efficiency(m: np.ndarray, contrast: np.ndarray, criterion: str = "A") -> tuple[np.ndarray, np.ndarray]:
    """Efficiency of each information matrix in m (B, p, p) for contrast (q, p).

    Returns (efficiency (B,), singular (B,) bool); singular designs get efficiency 0.
    """
    m = np.asarray(m, dtype=float)
    eig = np.linalg.eigvalsh(m)
    singular = eig[:, 0] <= RCOND * np.maximum(eig[:, -1], 1e-300)
    safe = np.where(singular[:, None, None], np.eye(m.shape[1]), m)
    sol = np.linalg.solve(safe, np.broadcast_to(contrast.T, (m.shape[0],) + contrast.T.shape))
    v = contrast @ sol  # (B, q, q)
    if criterion == "D":
        sign, logdet = np.linalg.slogdet(v)
        eff = np.where(sign > 0, np.exp(-logdet / v.shape[1]), 0.0)
    else:
        eff = 1.0 / np.trace(v, axis1=1, axis2=2)
    return np.where(singular, 0.0, eff), singular


@dataclass
class Neighbours:
    """Scores of every single change (trial i to condition c) and every swap of two trials."""

    change_detection: np.ndarray  # (n_trials, n_conditions); the current label's entry is the current score
    change_estimation: np.ndarray
    swap_pairs: np.ndarray  # (n_swaps, 2) trial indices with different labels
    swap_detection: np.ndarray
    swap_estimation: np.ndarray


class _Part:
    """One analysis (detection or estimation): filtered trial regressors per duration group."""

    def __init__(self, regs: list[np.ndarray], group: np.ndarray, modelled: tuple[int, ...], n_conditions: int):
        self.regs = regs  # per group: (n_scans, n_trials, n_basis)
        self.group = group  # per condition: its group
        self.nb = regs[0].shape[2]
        self.col = np.full(n_conditions, -1)  # first column of each modelled condition
        for i, c in enumerate(modelled):
            self.col[c] = i * self.nb
        self.p = len(modelled) * self.nb
        self.modelled = modelled

    def design(self, codes: np.ndarray) -> np.ndarray:
        """X for labels codes (B, N): shape (B, n_scans, p)."""
        b = codes.shape[0]
        n = self.regs[0].shape[0]
        x = np.empty((b, n, self.p))
        for c in self.modelled:
            pc = self.regs[self.group[c]]
            mask = (codes == c).astype(float)  # (B, N)
            # sum of the trial regressors of c's trials
            xc = np.einsum("bi,nik->bnk", mask, pc, optimize=True)
            x[:, :, self.col[c] : self.col[c] + self.nb] = xc
        return x


class Evaluator:
    """Exact scores of orderings on one fixed timing (onsets and durations do not change).

    Parameters
    ----------
    setup : the analysis model.
    layout : timing on the fine grid (see grid.make_layout).
    n_conditions : number of conditions (codes run from 0 to n_conditions - 1).
    circular : treat each run as presented periodically (the response wraps round).
    """

    def __init__(self, setup: AnalysisSetup, layout: Layout, n_conditions: int, circular: bool = False):
        self.setup, self.layout, self.k = setup, layout, n_conditions
        self.circular = circular
        with threadpool_limits(1):
            nuis = block_nuisance(layout.run_lengths, setup.tr, setup.high_pass_cutoff, setup.drift_degree)
            self.q = residual_basis(whiten(nuis, setup.ar1, layout.run_lengths))
            self.det = self._detection_part()
            self.fir_scan = self._fir_scans()  # (N, lags): volume index of each trial's lag, -1 outside
            self.est = _Part(
                [self._filter(self._fir_raw())], np.zeros(n_conditions, dtype=int), setup.modelled, n_conditions
            )
            self.omega = self._omega()
        self.c_det = setup.detection_contrast()
        self.c_est = setup.estimation_contrast()

    # -- building the filtered trial regressors ------------------------------------------------

    def _filter(self, raw: np.ndarray) -> np.ndarray:
        """Prewhiten and remove the nuisance space: (n_scans, N, nb) -> same shape."""
        n, t, nb = raw.shape
        w = whiten(raw.reshape(n, t * nb), self.setup.ar1, self.layout.run_lengths)
        w -= self.q @ (self.q.T @ w)
        return w.reshape(n, t, nb)

    def _responses(self, box_len: int) -> np.ndarray:
        """Unfiltered response of every trial to a boxcar of box_len samples: (n_scans, N, n_basis)."""
        lay, res = self.layout, self.setup.resolution
        steps = np.cumsum(self.setup.kernels, axis=1) * res  # step responses
        kl = steps.shape[1]

        def step_at(j):
            j = np.asarray(j)
            inside = np.clip(j, 0, kl - 1)
            return np.where(j[None] < 0, 0.0, steps[:, inside])

        out = np.zeros((lay.n_scans, lay.n_trials, steps.shape[0]))
        row = 0
        for r, scans in enumerate(lay.scan_idx):
            trials = np.flatnonzero(lay.run_of == r)
            d = scans[:, None] - lay.onset_idx[None, trials]  # (n_r, N_r)
            if self.circular:
                d = d % lay.run_fine[r]
                wraps = int(np.ceil((kl + box_len) / lay.run_fine[r])) + 1
                resp = sum(
                    step_at(d + m * lay.run_fine[r]) - step_at(d + m * lay.run_fine[r] - box_len) for m in range(wraps)
                )
            else:
                resp = step_at(d) - step_at(d - box_len)
            out[row : row + len(scans)][:, trials, :] = np.moveaxis(resp, 0, -1)
            row += len(scans)
        return out

    def _detection_part(self) -> _Part:
        lens = self.layout.box_len
        groups, group = [], np.zeros(self.k, dtype=int)
        for c in range(self.k):
            if lens[c] not in groups:
                groups.append(int(lens[c]))
            group[c] = groups.index(int(lens[c]))
        regs = [self._filter(self._responses(L)) for L in groups]
        return _Part(regs, group, self.setup.modelled, self.k)

    def _fir_scans(self) -> np.ndarray:
        lay = self.layout
        edges = fir_bins(self.setup)
        out = np.full((lay.n_trials, self.setup.fir_lags), -1, dtype=np.int64)
        row = 0
        for r, scans in enumerate(lay.scan_idx):
            for i in np.flatnonzero(lay.run_of == r):
                d = scans - lay.onset_idx[i]
                if self.circular:
                    d = d % lay.run_fine[r]
                lag = np.searchsorted(edges, d, side="right") - 1
                for v in np.flatnonzero((d >= 0) & (lag < self.setup.fir_lags)):
                    out[i, lag[v]] = row + v  # one volume per lag when the bin is one TR wide
            row += len(scans)
        return out

    def _fir_raw(self) -> np.ndarray:
        lay = self.layout
        raw = np.zeros((lay.n_scans, lay.n_trials, self.setup.fir_lags))
        i, j = np.nonzero(self.fir_scan >= 0)
        raw[self.fir_scan[i, j], i, j] = 1.0
        if self.setup.fir_step > self.setup.tr + 1e-9:
            # bins wider than a TR hold several volumes: count them with the reference's rule
            raw = self._fir_raw_wide()
        return raw

    def _fir_raw_wide(self) -> np.ndarray:
        lay = self.layout
        edges = fir_bins(self.setup)
        raw = np.zeros((lay.n_scans, lay.n_trials, self.setup.fir_lags))
        row = 0
        for r, scans in enumerate(lay.scan_idx):
            for i in np.flatnonzero(lay.run_of == r):
                d = scans - lay.onset_idx[i]
                if self.circular:
                    d = d % lay.run_fine[r]
                lag = np.searchsorted(edges, d, side="right") - 1
                hit = np.flatnonzero((d >= 0) & (lag < self.setup.fir_lags))
                raw[row + hit, i, lag[hit]] += 1.0
            row += len(scans)
        return raw

    def _omega(self) -> np.ndarray:
        """W'(I - QQ')W over all volumes: inner products of filtered 0/1 regressors are its entries."""
        eye = np.eye(self.layout.n_scans)
        w = whiten(eye, self.setup.ar1, self.layout.run_lengths)
        rw = w - self.q @ (self.q.T @ w)
        return rw.T @ rw

    # -- scoring ----------------------------------------------------------------------------

    def information(self, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(detection, estimation) information matrices of one ordering (all runs concatenated)."""
        codes = np.asarray(codes)[None]
        with threadpool_limits(1):
            xd, xe = self.det.design(codes)[0], self.est.design(codes)[0]
        return xd.T @ xd, xe.T @ xe

    def score_many(self, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Detection and estimation efficiency of many orderings, codes (B, N) -> two arrays (B,)."""
        codes = np.atleast_2d(codes)
        with threadpool_limits(1):
            xd = self.det.design(codes)
            md = np.einsum("bnp,bnq->bpq", xd, xd, optimize=True)
            me = self._fir_information(codes)
            det, _ = batch_efficiency(md, self.c_det, self.setup.criterion)
            est, _ = batch_efficiency(me, self.c_est, self.setup.criterion)
        return det, est

    def _fir_information(self, codes: np.ndarray) -> np.ndarray:
        """FIR information for many orderings from Omega, without forming X: M = S' Omega S with S 0/1."""
        b = codes.shape[0]
        p = self.est.p
        # raw 0/1 design as (B, n_scans, p) built by scatter, then X' Omega X
        raw = np.zeros((b, self.layout.n_scans, p))
        cols = self.est.col[codes]  # (B, N)
        ti, tj = np.nonzero(self.fir_scan >= 0)
        if self.setup.fir_step > self.setup.tr + 1e-9:
            xe = self.est.design(codes)
            return np.einsum("bnp,bnq->bpq", xe, xe, optimize=True)
        for bb in range(b):
            keep = cols[bb, ti] >= 0
            np.add.at(raw[bb], (self.fir_scan[ti[keep], tj[keep]], cols[bb, ti[keep]] + tj[keep]), 1.0)
        om = raw.transpose(0, 2, 1) @ self.omega  # (B, p, n)
        return om @ raw

    def score(self, codes: np.ndarray) -> tuple[float, float]:
        det, est = self.score_many(np.asarray(codes)[None])
        return float(det[0]), float(est[0])

    def neighbours(self, codes: np.ndarray, swaps: bool = True) -> Neighbours:
        """Scores of every single change and every swap of differently labelled trials."""
        codes = np.asarray(codes)
        with threadpool_limits(1):
            cd = self._changes(self.det, codes, self.c_det)
            ce = self._changes(self.est, codes, self.c_est)
            if swaps:
                i, j = np.triu_indices(len(codes), 1)
                keep = codes[i] != codes[j]
                pairs = np.column_stack([i[keep], j[keep]])
                sd = self._swaps(self.det, codes, pairs, self.c_det, fir=False)
                se = self._swaps(self.est, codes, pairs, self.c_est, fir=True)
            else:
                pairs, sd, se = np.zeros((0, 2), dtype=int), np.zeros(0), np.zeros(0)
        return Neighbours(cd, ce, pairs, sd, se)

    def _changes(self, part: _Part, codes: np.ndarray, contrast: np.ndarray) -> np.ndarray:
        n_trials = len(codes)
        x = part.design(codes[None])[0]  # (n, p)
        m = x.T @ x
        nb = part.nb
        # X'P for each group, and each trial's own products per pair of groups
        xp = [np.einsum("np,nib->ipb", x, reg, optimize=True) for reg in part.regs]  # (N, p, nb)
        own = {
            (g, h): np.einsum("nib,nic->ibc", part.regs[g], part.regs[h], optimize=True)
            for g in range(len(part.regs))
            for h in range(len(part.regs))
        }
        trial = np.repeat(np.arange(n_trials), self.k)
        new = np.tile(np.arange(self.k), n_trials)
        old = codes[trial]
        mm = np.broadcast_to(m, (len(trial),) + m.shape).copy()
        b = np.arange(len(trial))[:, None, None]
        rows = np.arange(part.p)[None, :, None]
        for cond, sign in ((new, 1.0), (old, -1.0)):
            col0 = part.col[cond]
            has = col0 >= 0
            g = part.group[cond]
            a = np.stack([xp[gg][tt] for gg, tt in zip(g, trial)]) if len(part.regs) > 1 else xp[0][trial]
            a = a * has[:, None, None] * sign  # (B, p, nb)
            cols = (np.maximum(col0, 0)[:, None] + np.arange(nb)[None, :])[:, None, :]
            # X'delta and its transpose
            np.add.at(mm, (b, rows, cols), a)
            np.add.at(mm, (b, cols.transpose(0, 2, 1), rows.transpose(0, 2, 1)), a.transpose(0, 2, 1))
        # delta'delta
        for c1, s1 in ((new, 1.0), (old, -1.0)):
            for c2, s2 in ((new, 1.0), (old, -1.0)):
                has = (part.col[c1] >= 0) & (part.col[c2] >= 0)
                blk = np.stack([own[(part.group[u], part.group[v])][t] for u, v, t in zip(c1, c2, trial)])
                blk = blk * (s1 * s2) * has[:, None, None]
                r1 = (np.maximum(part.col[c1], 0)[:, None] + np.arange(nb))[:, :, None]
                r2 = (np.maximum(part.col[c2], 0)[:, None] + np.arange(nb))[:, None, :]
                np.add.at(mm, (b, r1, r2), blk)
        eff, _ = batch_efficiency(mm, contrast, self.setup.criterion)
        return eff.reshape(n_trials, self.k)

    def _swaps(self, part: _Part, codes: np.ndarray, pairs: np.ndarray, contrast: np.ndarray, fir: bool) -> np.ndarray:
        """Swap trials i and j: condition ci gains trial j and loses i, cj the reverse."""
        if len(pairs) == 0:
            return np.zeros(0)
        x = part.design(codes[None])[0]
        m = x.T @ x
        nb = part.nb
        xp = [np.einsum("np,nib->ipb", x, reg, optimize=True) for reg in part.regs]
        i, j = pairs[:, 0], pairs[:, 1]
        ci, cj = codes[i], codes[j]
        mm = np.broadcast_to(m, (len(pairs),) + m.shape).copy()
        b = np.arange(len(pairs))[:, None, None]
        rows = np.arange(part.p)[None, :, None]
        # delta in block of cj: p_i - p_j (regressors of cj's group); in block of ci: p_j - p_i
        blocks = ((cj, i, j), (ci, j, i))
        for cond, gain, lose in blocks:
            has = part.col[cond] >= 0
            g = part.group[cond]
            a = (
                np.stack([xp[gg][t1] - xp[gg][t2] for gg, t1, t2 in zip(g, gain, lose)])
                if len(part.regs) > 1
                else xp[0][gain] - xp[0][lose]
            )
            a = a * has[:, None, None]
            cols = (np.maximum(part.col[cond], 0)[:, None] + np.arange(nb)[None, :])[:, None, :]
            np.add.at(mm, (b, rows, cols), a)
            np.add.at(mm, (b, cols.transpose(0, 2, 1), rows.transpose(0, 2, 1)), a.transpose(0, 2, 1))
        for c1, g1, l1 in blocks:
            for c2, g2, l2 in blocks:
                has = (part.col[c1] >= 0) & (part.col[c2] >= 0)
                blk = (
                    self._cross(part, c1, c2, g1, g2, fir)
                    - self._cross(part, c1, c2, g1, l2, fir)
                    - self._cross(part, c1, c2, l1, g2, fir)
                    + self._cross(part, c1, c2, l1, l2, fir)
                )
                blk = blk * has[:, None, None]
                r1 = (np.maximum(part.col[c1], 0)[:, None] + np.arange(nb))[:, :, None]
                r2 = (np.maximum(part.col[c2], 0)[:, None] + np.arange(nb))[:, None, :]
                np.add.at(mm, (b, r1, r2), blk)
        eff, _ = batch_efficiency(mm, contrast, self.setup.criterion)
        return eff

    def _cross(self, part: _Part, c1, c2, t1, t2, fir: bool) -> np.ndarray:
        """Products of trial t1's regressor (group of c1) with trial t2's (group of c2): (B, nb, nb)."""
        if fir and self.setup.fir_step <= self.setup.tr + 1e-9:
            s1, s2 = self.fir_scan[t1], self.fir_scan[t2]  # (B, lags)
            vals = self.omega[np.maximum(s1, 0)[:, :, None], np.maximum(s2, 0)[:, None, :]]
            return vals * ((s1 >= 0)[:, :, None] & (s2 >= 0)[:, None, :])
        out = np.empty((len(t1), part.nb, part.nb))
        for g in range(len(part.regs)):
            for h in range(len(part.regs)):
                sel = (part.group[c1] == g) & (part.group[c2] == h)
                if sel.any():
                    out[sel] = np.einsum(
                        "nbx,nby->bxy", part.regs[g][:, t1[sel]], part.regs[h][:, t2[sel]], optimize=True
                    )
        return out
