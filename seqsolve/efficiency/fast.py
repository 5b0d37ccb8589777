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
from scipy import sparse

from seqsolve.efficiency.algebra import batch_efficiency, one_blas_thread
from seqsolve.efficiency.grid import Layout
from seqsolve.efficiency.neighbours import (
    Candidates,
    Current,
    DenseUpdate,
    Rank2Update,
    SchurUpdate,
    TrialProducts,
    WholeUpdate,
    WoodburyUpdate,
    block_groups,
)
from seqsolve.efficiency.nuisance import run_bases, whiten, whitening_matrix
from seqsolve.efficiency.paths import (
    BandDetection,
    FirBitsEstimation,
    FirHitsEstimation,
    KernelContrast,
    MatrixScores,
)
from seqsolve.efficiency.reference import detection_matrix, fir_matrix
from seqsolve.efficiency.regressors import fir_hits, fir_regressors, trial_responses
from seqsolve.efficiency.setup import AnalysisSetup

#: fewest candidates touching the same blocks for which the shared factorisation pays (measured)
SCHUR_MIN = 64
#: and fewest columns (below it one whole small factorisation per candidate is cheaper, measured)
SCHUR_MIN_COLUMNS = 12


def nuisance_basis(setup: AnalysisSetup, run_lengths: list[int]) -> np.ndarray:
    """Orthonormal basis Q (n_scans, rank) of the prewhitened nuisance space (intercepts, drifts)
    of these runs, in run blocks (nuisance.run_bases)."""
    return run_bases(run_lengths, setup.tr, setup.high_pass_cutoff, setup.drift_degree, setup.ar1)[0]


class DirectScorer:
    """Exact scores of single designs whose onsets depend on their labels (no fixed timing to
    precompute on): each design's matrices are built as reference.py builds them, but the model is
    reduced to X'(I - QQ')X after prewhitening, with Q the nuisance basis of the run lengths (kept
    per set of lengths), and factorised by Cholesky with the evaluator's singularity rule; no
    SVD of the whole model. BLAS is pinned to one thread."""

    def __init__(self, setup: AnalysisSetup):
        self.setup = setup
        self.c_det, self.c_est = setup.detection_contrast(), setup.estimation_contrast()
        self._bases: dict[tuple[int, ...], np.ndarray] = {}

    def _basis(self, run_lengths: list[int]) -> np.ndarray:
        key = tuple(int(n) for n in run_lengths)
        if key not in self._bases:
            self._bases[key] = nuisance_basis(self.setup, list(key))
        return self._bases[key]

    def _efficiency(self, x: np.ndarray, layout: Layout, contrast: np.ndarray) -> float:
        xw = whiten(x, self.setup.ar1, layout.run_lengths)
        q = self._basis(layout.run_lengths)
        xw = xw - q @ (q.T @ xw)
        return float(batch_efficiency((xw.T @ xw)[None], contrast, self.setup.criterion)[0][0])

    def score(self, layout: Layout, codes: np.ndarray, detection: bool = True, estimation: bool = True):
        """(detection, estimation) of one design on its own layout; NaN for a part not asked for."""
        det = est = float("nan")
        with one_blas_thread():
            if detection:
                det = self._efficiency(detection_matrix(self.setup, layout, codes), layout, self.c_det)
            if estimation:
                est = self._efficiency(fir_matrix(self.setup, layout, codes), layout, self.c_est)
        return det, est


@dataclass
class Neighbours:
    """Scores of every single change (trial i to condition c) and every swap of two trials."""

    change_detection: np.ndarray  # (n_trials, n_conditions); the current label's entry is the current score
    change_estimation: np.ndarray
    swap_pairs: np.ndarray  # (n_swaps, 2) trial indices with different labels
    swap_detection: np.ndarray
    swap_estimation: np.ndarray


class _Part:
    """One analysis (detection or estimation): each trial's whitened, unfiltered regressors per
    duration group, sparse, and the nuisance basis Q they are filtered against. The filtered
    regressors P = (I - QQ')WR are dense volumes x trials (memory growing with N^2), so they are
    never formed: X = P Z is built as (I - QQ')(WR Z), and X'P as X'WR (X is already filtered)."""

    def __init__(
        self,
        whitened: list[sparse.csc_matrix],
        q: np.ndarray,
        group: np.ndarray,
        modelled: tuple[int, ...],
        n_conditions: int,
        nb: int,
    ):
        self.whitened = whitened  # per group: W R, sparse (n_scans, N * nb), column i * nb + b
        self.q = q  # (n_scans, rank)
        self.group = group  # per condition: its group
        self.nb = nb
        self.n_trials = whitened[0].shape[1] // nb
        self.col = np.full(n_conditions, -1)  # first column of each modelled condition
        for i, c in enumerate(modelled):
            self.col[c] = i * nb
        self.p = len(modelled) * nb
        self.modelled = modelled
        self._gram: np.ndarray | None = None
        self._own: np.ndarray | None = None

    def _labels(self, codes: np.ndarray, g: int) -> np.ndarray:
        """Z of group g for one ordering: (N * nb, p) 0/1, trial i's basis b to its condition's
        column b (dense: a sparse product with a dense Z costs less than building a sparse Z)."""
        c = np.asarray(codes)
        t = np.flatnonzero((self.col[c] >= 0) & (self.group[c] == g))
        z = np.zeros((self.n_trials * self.nb, self.p))
        for b in range(self.nb):
            z[t * self.nb + b, self.col[c[t]] + b] = 1.0
        return z

    def design(self, codes: np.ndarray) -> np.ndarray:
        """X for labels codes (B, N): shape (B, n_scans, p), columns (condition, basis)."""
        codes = np.atleast_2d(codes)
        x = np.empty((codes.shape[0], self.whitened[0].shape[0], self.p))
        for k, row in enumerate(codes):
            y = np.zeros(x.shape[1:])
            for g, w in enumerate(self.whitened):
                y += w @ self._labels(row, g)
            x[k] = y - self.q @ (self.q.T @ y)
        return x

    def cross(self, x: np.ndarray) -> np.ndarray:
        """X' times each trial's filtered regressor, per group, from a filtered X (n_scans, p):
        (G, N, p, nb)."""
        return np.stack(
            [np.asarray(w.T @ x).reshape(self.n_trials, self.nb, self.p).transpose(0, 2, 1) for w in self.whitened]
        )

    def _projected(self) -> list[np.ndarray]:
        """Q'WR per group, each (rank, N * nb)."""
        return [np.asarray((w.T @ self.q).T) for w in self.whitened]

    def gram(self) -> np.ndarray:
        """All trials' filtered regressor products between groups, (G, G, N, nb, N, nb): dense,
        built on first use (the neighbour scores read it): WR'WR - (Q'WR)'(Q'WR)."""
        if self._gram is None:
            proj, n, nb = self._projected(), self.n_trials, self.nb
            self._gram = np.array(
                [
                    [((a.T @ b).toarray() - pa.T @ pb).reshape(n, nb, n, nb) for b, pb in zip(self.whitened, proj)]
                    for a, pa in zip(self.whitened, proj)
                ]
            )
        return self._gram

    def own(self) -> np.ndarray:
        """Each trial's filtered regressor products between groups, (G, G, N, nb, nb)."""
        if self._own is None:
            proj, n, nb = self._projected(), self.n_trials, self.nb
            groups = len(self.whitened)
            out = np.empty((groups, groups, n, nb, nb))
            for g, (a, pa) in enumerate(zip(self.whitened, proj)):
                for h, (b, pb) in enumerate(zip(self.whitened, proj)):
                    for i in range(nb):
                        for j in range(nb):
                            raw = np.asarray(a[:, i::nb].multiply(b[:, j::nb]).sum(axis=0)).ravel()
                            out[g, h, :, i, j] = raw - np.einsum("rn,rn->n", pa[:, i::nb], pb[:, j::nb])
            self._own = out
        return self._own


class Evaluator:
    """Exact scores of orderings on one fixed timing (onsets and durations do not change).

    Parameters
    ----------
    setup : the analysis model.
    layout : timing on the fine grid (see grid.make_layout).
    n_conditions : number of conditions (codes run from 0 to n_conditions - 1).
    circular : treat each run as presented periodically (the response wraps round).
    compiled : use the numba kernels of kernels.py where they apply (same results; False keeps
        to the numpy paths, which the tests also check).

    Memory is linear in the number of trials until neighbour scores are asked for (those read
    all trials' products, `_Part.gram` and `omega`, built then).
    """

    def __init__(
        self, setup: AnalysisSetup, layout: Layout, n_conditions: int, circular: bool = False, compiled: bool = True
    ):
        self.setup, self.layout, self.k = setup, layout, n_conditions
        self.circular = circular
        self.compiled = compiled
        with one_blas_thread():
            self.q, self.q_starts = run_bases(
                layout.run_lengths, setup.tr, setup.high_pass_cutoff, setup.drift_degree, setup.ar1
            )
            self.w = whitening_matrix(setup.ar1, layout.run_lengths)
            self.det = self._detection_part()
            self.hits = fir_hits(setup, layout, circular)
            self.fir_scan = self._fir_scans()  # (N, lags): volume index of each trial's lag, -1 outside
            lagged = self.fir_scan * setup.fir_lags + np.arange(setup.fir_lags)
            lagged = lagged[self.fir_scan >= 0]
            self.fir_unique = len(np.unique(lagged)) == len(lagged)
            fir = self._whiten(fir_regressors(setup, layout, self.hits))
            self.est = _Part(
                [fir], self.q, np.zeros(n_conditions, dtype=int), setup.modelled, n_conditions, setup.fir_lags
            )
        self._omega: np.ndarray | None = None
        self.c_det = setup.detection_contrast()
        self.c_est = setup.estimation_contrast()
        self.full_detection, self.full_estimation = self._full_paths()

    def _full_paths(self) -> tuple:
        """The one place that chooses how full scores are computed (paths.py): the compiled
        kernels where they apply, else information matrices built whole (numpy)."""
        crit = self.setup.criterion
        det = MatrixScores(self._detection_information, self.c_det, crit)
        est = MatrixScores(self._fir_information, self.c_est, crit)
        if self.compiled:
            det = self._band(KernelContrast.of(self.c_det, crit))
            if self.setup.fir_step <= self.setup.tr + 1e-9:  # one volume per FIR bin
                est = self._fir_path(KernelContrast.of(self.c_est, crit))
        return det, est

    # -- building the trial regressors ----------------------------------------------------------

    def _whiten(self, raw: sparse.csc_matrix) -> sparse.csc_matrix:
        """W raw, sparse (the AR(1) filter is bidiagonal), without stored zeros."""
        out = (self.w @ raw).tocsc()
        out.eliminate_zeros()
        return out

    def _duration_groups(self) -> tuple[list[float], np.ndarray]:
        """The distinct boxcar lengths (in order of first use) and each condition's group among them."""
        lens = self.layout.box_len
        groups, group = [], np.zeros(self.k, dtype=int)
        for c in range(self.k):
            if float(lens[c]) not in groups:
                groups.append(float(lens[c]))
            group[c] = groups.index(float(lens[c]))
        return groups, group

    def _detection_part(self) -> _Part:
        groups, group = self._duration_groups()
        regs = [self._whiten(trial_responses(self.setup, self.layout, length, self.circular)) for length in groups]
        return _Part(regs, self.q, group, self.setup.modelled, self.k, self.setup.n_basis)

    def _band(self, contrast: KernelContrast) -> BandDetection:
        """What kernels.band_scores needs: the products of trials whose whitened responses overlap,
        by diagonal (trial i with trial i + d) and, for pairs far apart in a circular run, as a
        list; and the responses' products with Q."""
        nb = self.det.nb
        flat = self.det.whitened
        n_trials = self.layout.n_trials
        prods = [[(a.T @ b).tocoo() for b in flat] for a in flat]  # exact zeros where no overlap
        gap = np.concatenate([pr.col // nb - pr.row // nb for row in prods for pr in row])
        gap = gap[gap >= 0]
        near = gap <= n_trials // 2 if self.circular else np.ones(gap.shape, dtype=bool)
        width = int(gap[near].max()) + 1 if near.any() else 1
        groups = len(flat)
        band = np.zeros((width, n_trials, groups, groups, nb, nb))
        far_keys = np.unique(
            np.concatenate(
                [
                    ((pr.row // nb) * n_trials + pr.col // nb)[pr.col // nb - pr.row // nb >= width]
                    for row in prods
                    for pr in row
                ]
            )
        )
        far = np.zeros((len(far_keys), groups, groups, nb, nb))
        for g, row in enumerate(prods):
            for h, pr in enumerate(row):
                i, j = pr.row // nb, pr.col // nb
                d = j - i
                inside = (d >= 0) & (d < width)
                band[d[inside], i[inside], g, h, pr.row[inside] % nb, pr.col[inside] % nb] = pr.data[inside]
                out = d >= width
                k = np.searchsorted(far_keys, i[out] * n_trials + j[out])
                far[k, g, h, pr.row[out] % nb, pr.col[out] % nb] = pr.data[out]
        band[0] *= 0.5  # band_scores adds each product's transpose
        qr = np.stack([np.asarray(w.T @ self.q).reshape(n_trials, nb, -1) for w in flat], axis=1)  # (N, G, nb, r)
        return BandDetection(
            self.det.col.astype(np.int64),
            self.det.group.astype(np.int64),
            nb,
            band,
            (far_keys // n_trials).astype(np.int64),
            (far_keys % n_trials).astype(np.int64),
            far,
            np.ascontiguousarray(qr),
            contrast,
        )

    def _fir_scans(self) -> np.ndarray:
        """(N, lags): the volume in each trial's lag bin, -1 outside the run (bins of one TR)."""
        out = np.full((self.layout.n_trials, self.setup.fir_lags), -1, dtype=np.int64)
        vol, trial, lag = self.hits
        out[trial, lag] = vol  # one volume per lag when the bin is one TR wide
        return out

    def _fir_bits(self, diag, off, qw, contrast: KernelContrast) -> FirBitsEstimation | None:
        """What kernels.fir_bit_scores needs, or None where it does not apply: two trials at one
        volume and lag (their columns would count 2 there), or too many distinct filter weights.

        W'Q is kept per trial and lag only over the columns of the trial's run (Q comes in run
        blocks, zero elsewhere): qf (N, lags, width) from column qoff[trial], width the widest run
        block, so its memory is linear in the trials, not trials x all runs' columns."""
        if not self.fir_unique:
            return None
        n = len(diag)
        n_words = n // 64 + 1  # room for a spare bit at n

        def masks(values, keep):
            kinds = np.unique(values[keep])
            out = np.zeros((len(kinds), n_words * 64), dtype=bool)
            for k, v in enumerate(kinds):
                out[k, :n] = keep & (values == v)
            return kinds.astype(float), np.packbits(out, axis=1, bitorder="little").view(np.uint64).reshape(
                len(kinds), n_words
            )

        dw, dmask = masks(diag, np.ones(n, dtype=bool))
        ow, omask = masks(off, off != 0.0)
        if len(dw) > 4 or len(ow) > 4:
            return None
        fscan = np.where(self.fir_scan >= 0, self.fir_scan, n)  # n: a spare bit outside every mask
        rank = qw.shape[1]
        width = int(np.diff(self.q_starts).max(initial=0))
        qoff = np.minimum(self.q_starts[self.layout.run_of], rank - width).astype(np.int64)
        qf = np.empty((len(fscan), self.setup.fir_lags, width))
        for first in np.unique(qoff):  # per run: a block of W'Q's columns, gathered at the volumes
            trials = np.flatnonzero(qoff == first)
            qf[trials] = qw[np.minimum(fscan[trials], n - 1), first : first + width]
        qf[self.fir_scan < 0] = 0.0
        col = self.est.col.astype(np.int64)
        return FirBitsEstimation(col, fscan.astype(np.int64), qf, qoff, rank, n_words, dw, dmask, ow, omask, contrast)

    def _fir_path(self, contrast: KernelContrast) -> FirBitsEstimation | FirHitsEstimation:
        """The compiled FIR path (bins of one TR): bitsets where they apply, else the volumes'
        (trial, lag) hits; both read the tridiagonal W'W of the AR(1) filter and W'Q."""
        wtw = (self.w.T @ self.w).tocsr()  # tridiagonal: W is bidiagonal within runs
        n = wtw.shape[0]
        diag, off = wtw.diagonal().copy(), np.append(wtw.diagonal(1), 0.0)
        qw = np.ascontiguousarray(self.w.T @ self.q)
        bits = self._fir_bits(diag, off, qw, contrast)
        if bits is not None:
            return bits
        t, lag = np.nonzero(self.fir_scan >= 0)
        scan = self.fir_scan[t, lag]
        order = np.argsort(scan, kind="stable")
        ptr = np.concatenate([[0], np.cumsum(np.bincount(scan, minlength=n))]).astype(np.int64)
        col = self.est.col.astype(np.int64)
        hit_t, hit_lag = t[order].astype(np.int64), lag[order].astype(np.int64)
        return FirHitsEstimation(col, ptr, hit_t, hit_lag, diag, off, qw, contrast)

    @property
    def omega(self) -> np.ndarray:
        """W'(I - QQ')W over all volumes, (n_scans, n_scans): inner products of filtered 0/1 FIR
        regressors are its entries. Dense, so built on first use (FIR neighbour scores)."""
        if self._omega is None:
            qw = np.asarray(self.w.T @ self.q)
            self._omega = (self.w.T @ self.w).toarray() - qw @ qw.T
        return self._omega

    # -- scoring ----------------------------------------------------------------------------

    def information(self, codes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(detection, estimation) information matrices of one ordering (all runs concatenated)."""
        codes = np.asarray(codes)[None]
        with one_blas_thread():
            xd, xe = self.det.design(codes)[0], self.est.design(codes)[0]
        return xd.T @ xd, xe.T @ xe

    def score_many(
        self, codes: np.ndarray, detection: bool = True, estimation: bool = True
    ) -> tuple[np.ndarray, np.ndarray]:
        """Detection and estimation efficiency of many orderings, codes (B, N) -> two arrays (B,).

        A part not asked for comes back as NaN.
        """
        codes = np.ascontiguousarray(np.atleast_2d(codes), dtype=np.int64)  # what the kernels take
        det = est = np.full(codes.shape[0], np.nan)
        with one_blas_thread():
            if detection:
                det = self.full_detection.scores(codes)
            if estimation:
                est = self.full_estimation.scores(codes)
        return det, est

    def _detection_information(self, codes: np.ndarray) -> np.ndarray:
        """Detection information for many orderings (B, p, p), from their design matrices."""
        xd = self.det.design(codes)
        return np.swapaxes(xd, 1, 2) @ xd

    def _fir_information(self, codes: np.ndarray) -> np.ndarray:
        """FIR information for many orderings: build the 0/1 design by scatter, then filter it.

        M = (WX)'(WX) - (Q'WX)'(Q'WX), with W the bidiagonal AR(1) filter: no dense n x n product.
        """
        if self.setup.fir_step > self.setup.tr + 1e-9:
            xe = self.est.design(codes)
            return np.einsum("bnp,bnq->bpq", xe, xe, optimize=True)
        b = codes.shape[0]
        raw = np.zeros((b, self.layout.n_scans, self.est.p))
        ti, tj = np.nonzero(self.fir_scan >= 0)
        cols = self.est.col[codes][:, ti]  # (B, hits)
        keep = cols >= 0
        bb = np.broadcast_to(np.arange(b)[:, None], cols.shape)[keep]
        scan = np.broadcast_to(self.fir_scan[ti, tj], cols.shape)[keep]
        if self.fir_unique:
            raw[bb, scan, (cols + tj)[keep]] = 1.0
        else:  # two trials of one condition share a volume at some lag: count both
            np.add.at(raw, (bb, scan, (cols + tj)[keep]), 1.0)
        xw = whiten(np.moveaxis(raw, 1, 0), self.setup.ar1, self.layout.run_lengths)  # (n, B, p)
        xw = np.moveaxis(xw, 0, 1)
        proj = np.einsum("nq,bnp->bqp", self.q, xw, optimize=True)
        return np.swapaxes(xw, 1, 2) @ xw - np.swapaxes(proj, 1, 2) @ proj

    def score(self, codes: np.ndarray) -> tuple[float, float]:
        det, est = self.score_many(np.asarray(codes)[None])
        return float(det[0]), float(est[0])

    def neighbours(
        self, codes: np.ndarray, swaps: bool = True, detection: bool = True, estimation: bool = True
    ) -> Neighbours:
        """Scores of every single change and every swap of differently labelled trials.

        A part not asked for comes back as NaN.
        """
        codes = np.asarray(codes)
        i, j = np.triu_indices(len(codes), 1) if swaps else (np.zeros(0, int), np.zeros(0, int))
        keep = codes[i] != codes[j]
        pairs = np.column_stack([i[keep], j[keep]])
        cd, ce = self.change_scores(codes, detection, estimation)
        sd, se = self.swap_scores(codes, pairs, detection, estimation)
        return Neighbours(cd, ce, pairs, sd, se)

    def change_scores(
        self, codes: np.ndarray, detection: bool = True, estimation: bool = True, trials: np.ndarray | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Scores after changing each trial to each condition: two arrays (n_trials, n_conditions).

        trials: only these trials (rows in that order); default all. The current label's entry is
        the current score. A part not asked for comes back as NaN.
        """
        codes = np.asarray(codes)
        trials = np.arange(len(codes)) if trials is None else np.asarray(trials, dtype=np.int64)
        nan = np.full((len(trials), self.k), np.nan)
        with one_blas_thread():
            cd = self._changes(self.det, codes, self.c_det, trials) if detection else nan
            ce = self._changes(self.est, codes, self.c_est, trials) if estimation else nan
        return cd, ce

    def swap_scores(
        self, codes: np.ndarray, pairs: np.ndarray, detection: bool = True, estimation: bool = True
    ) -> tuple[np.ndarray, np.ndarray]:
        """Scores after swapping the labels of each pair of trials (pairs (n, 2), labels differ)."""
        codes, pairs = np.asarray(codes), np.asarray(pairs, dtype=np.int64).reshape(-1, 2)
        nan = np.full(len(pairs), np.nan)
        with one_blas_thread():
            sd = self._swaps(self.det, codes, pairs, self.c_det, fir=False) if detection else nan
            se = self._swaps(self.est, codes, pairs, self.c_est, fir=True) if estimation else nan
        return sd, se

    def _changes(self, part: _Part, codes: np.ndarray, contrast: np.ndarray, trials: np.ndarray) -> np.ndarray:
        trial = np.repeat(trials, self.k)
        new = np.tile(np.arange(self.k), len(trials))
        terms = [(new, trial, 1.0), (codes[trial], trial, -1.0)]
        moves = (new, codes[trial], trial, np.full(len(trial), -1))
        cands = Candidates(terms, moves)
        return self._neighbour_scores(part, codes, cands, contrast, fir=False).reshape(len(trials), self.k)

    def _swaps(self, part: _Part, codes: np.ndarray, pairs: np.ndarray, contrast: np.ndarray, fir: bool) -> np.ndarray:
        """Swap trials i and j: condition c_j gains trial i and loses j, c_i the reverse."""
        if len(pairs) == 0:
            return np.zeros(0)
        i, j = pairs[:, 0], pairs[:, 1]
        ci, cj = codes[i], codes[j]
        terms = [(cj, i, 1.0), (cj, j, -1.0), (ci, j, 1.0), (ci, i, -1.0)]
        return self._neighbour_scores(part, codes, Candidates(terms, (cj, ci, i, j)), contrast, fir)

    def _neighbour_scores(
        self, part: _Part, codes: np.ndarray, cands: Candidates, contrast: np.ndarray, fir: bool
    ) -> np.ndarray:
        """Scores of candidates given as column-block updates of the current design: the one place
        that chooses how (neighbours.py), each fallback taking exactly what the faster path left.

        Compiled (detection, or FIR with bins of one TR): the rank-2 update where it applies (one
        regressor per condition, one duration group, A-criterion); then, per group of candidates
        touching the same blocks, the shared Schur factor when there are at least SCHUR_MIN of them
        and SCHUR_MIN_COLUMNS columns and the untouched part is regular, else a whole factorisation
        each. numpy: the 4 x 4 Woodbury update where it applies, else whole matrices.
        """
        x = part.design(codes[None])[0]
        cur = Current(part, x.T @ x, np.ascontiguousarray(part.cross(x)), contrast, self.setup.criterion)
        one_column = part.nb == 1 and self.setup.criterion == "A"
        bins_of_one_tr = self.setup.fir_step <= self.setup.tr + 1e-9
        out = np.full(len(cands), np.nan)
        if self.compiled and (part is self.det or bins_of_one_tr):
            products = self._products(part, omega=part is self.est)
            if one_column and len(part.whitened) == 1:
                rank2 = Rank2Update(cur, products).scores(cands)
                out = out if rank2 is None else rank2
            todo = np.flatnonzero(np.isnan(out))
            if len(todo) == 0:
                return out
            rest, whole = cands.subset(todo), WholeUpdate(cur, products)
            for idx, starts in block_groups(part, rest):
                sub = rest.subset(idx)
                if not starts:  # baseline trials only: the design does not change
                    out[todo[idx]] = whole.scores(sub.subset(np.arange(1)))[0]
                    continue
                done = None
                if len(idx) >= SCHUR_MIN and part.p >= SCHUR_MIN_COLUMNS:
                    done = SchurUpdate(cur, products, starts).scores(sub)
                out[todo[idx]] = whole.scores(sub) if done is None else done
            return out
        products = self._products(part, omega=fir and bins_of_one_tr)
        if one_column:
            woodbury = WoodburyUpdate(cur, products).scores(cands)
            out = out if woodbury is None else woodbury
        todo = np.flatnonzero(np.isnan(out))
        if len(todo):
            out[todo] = DenseUpdate(cur, products).scores(cands.subset(todo))
        return out

    def _products(self, part: _Part, omega: bool) -> TrialProducts:
        """Trial products from the part's Gram matrices, or (omega) from Omega at the FIR volumes."""
        if omega:
            return TrialProducts(part, self.fir_scan, lambda: self.omega)
        return TrialProducts(part)
