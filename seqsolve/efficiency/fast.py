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
from scipy.linalg import solve_triangular
from threadpoolctl import ThreadpoolController

from seqsolve.efficiency.grid import Layout
from seqsolve.efficiency.nuisance import run_bases, whiten, whitening_matrix
from seqsolve.efficiency.paths import (
    BandDetection,
    FirBitsEstimation,
    FirHitsEstimation,
    KernelContrast,
    MatrixScores,
    prepare_contrast,
)
from seqsolve.efficiency.paths import kernels as _kernels
from seqsolve.efficiency.reference import detection_matrix, fir_matrix
from seqsolve.efficiency.regressors import fir_hits, fir_regressors, trial_responses
from seqsolve.efficiency.setup import AnalysisSetup

#: information matrices with a smaller reciprocal condition number count as singular
RCOND = 1e-10

#: fewest candidates touching the same blocks for which the shared factorisation pays (measured)
SCHUR_MIN = 64
#: and fewest columns (below it one whole small factorisation per candidate is cheaper, measured)
SCHUR_MIN_COLUMNS = 12

_THREADPOOLS: ThreadpoolController | None = None


def one_blas_thread():
    """Context pinning BLAS to one thread: on small, many products a threaded BLAS is far slower
    under load (measured), and processes, not threads, are how seqsolve uses both cores."""
    global _THREADPOOLS
    if _THREADPOOLS is None:
        _THREADPOOLS = ThreadpoolController()  # finding the libraries is the slow part: once
    return _THREADPOOLS.limit(limits=1)


def batch_efficiency(m: np.ndarray, contrast: np.ndarray, criterion: str = "A") -> tuple[np.ndarray, np.ndarray]:
    """Efficiency of each information matrix in m (B, p, p) for contrast (q, p).

    Returns (efficiency (B,), singular (B,) bool); singular designs get efficiency 0. A matrix is
    singular when a Cholesky pivot squared falls below RCOND times its diagonal entry (or the
    factorisation fails, in which case eigenvalues decide for the whole batch).
    """
    m = np.asarray(m, dtype=float)
    try:
        chol = np.linalg.cholesky(m)
        pivots = np.diagonal(chol, axis1=1, axis2=2) ** 2
        singular = (pivots <= RCOND * np.maximum(np.diagonal(m, axis1=1, axis2=2), 1e-300)).any(axis=1)
    except np.linalg.LinAlgError:
        eig = np.linalg.eigvalsh(m)
        singular = eig[:, 0] <= RCOND * np.maximum(eig[:, -1], 1e-300)
        m = np.where(singular[:, None, None], np.eye(m.shape[1]), m)
        chol = np.linalg.cholesky(m)
    chol = np.where(singular[:, None, None], np.eye(m.shape[1]), chol)
    rhs = np.broadcast_to(contrast.T, (m.shape[0],) + contrast.T.shape)
    # L^-1 C': scipy's triangular solve loops in Python per matrix, numpy's general solve in C;
    # the first wins for large matrices, the second for small ones (measured)
    if m.shape[1] > 16:
        half = solve_triangular(chol, rhs, lower=True, check_finite=False)
    else:
        half = np.linalg.solve(chol, rhs)
    if criterion == "D":
        sign, logdet = np.linalg.slogdet(np.swapaxes(half, 1, 2) @ half)
        eff = np.where(sign > 0, np.exp(-logdet / contrast.shape[0]), 0.0)
    else:
        eff = 1.0 / np.einsum("bij,bij->b", half, half)
    return np.where(singular, 0.0, eff), singular


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

    def _labels(self, codes: np.ndarray, g: int) -> sparse.csr_matrix:
        """Z of group g for one ordering: (N * nb, p), trial i's basis b to its condition's column b."""
        c = np.asarray(codes)
        keep = (self.col[c] >= 0) & (self.group[c] == g)
        t = np.flatnonzero(keep)
        rows = (t[:, None] * self.nb + np.arange(self.nb)).ravel()
        cols = (self.col[c[t]][:, None] + np.arange(self.nb)).ravel()
        return sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(self.n_trials * self.nb, self.p))

    def design(self, codes: np.ndarray) -> np.ndarray:
        """X for labels codes (B, N): shape (B, n_scans, p), columns (condition, basis)."""
        codes = np.atleast_2d(codes)
        x = np.empty((codes.shape[0], self.whitened[0].shape[0], self.p))
        for k, row in enumerate(codes):
            y = np.zeros(x.shape[1:])
            for g, w in enumerate(self.whitened):
                y += (w @ self._labels(row, g)).toarray()
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

    def _duration_groups(self) -> tuple[list[int], np.ndarray]:
        """The distinct boxcar lengths (in order of first use) and each condition's group among them."""
        lens = self.layout.box_len
        groups, group = [], np.zeros(self.k, dtype=int)
        for c in range(self.k):
            if lens[c] not in groups:
                groups.append(int(lens[c]))
            group[c] = groups.index(int(lens[c]))
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
        return self._score_terms(part, codes, terms, contrast, fir=False, moves=moves).reshape(len(trials), self.k)

    def _swaps(self, part: _Part, codes: np.ndarray, pairs: np.ndarray, contrast: np.ndarray, fir: bool) -> np.ndarray:
        """Swap trials i and j: condition c_j gains trial i and loses j, c_i the reverse."""
        if len(pairs) == 0:
            return np.zeros(0)
        i, j = pairs[:, 0], pairs[:, 1]
        ci, cj = codes[i], codes[j]
        terms = [(cj, i, 1.0), (cj, j, -1.0), (ci, j, 1.0), (ci, i, -1.0)]
        return self._score_terms(part, codes, terms, contrast, fir=fir, moves=(cj, ci, i, j))

    def _score_terms(
        self, part: _Part, codes: np.ndarray, terms, contrast: np.ndarray, fir: bool, moves=None
    ) -> np.ndarray:
        """Scores of candidates given as column-block updates, in chunks that stay in cache.

        moves: the same candidates as (gaining condition, losing condition, trial, trial taken
        away or -1), for the rank-2 path of kernels.rank2_scores."""
        n_cand = len(terms[0][0])
        chunk = max(1, 2_000_000 // (part.p * part.p))
        x = part.design(codes[None])[0]
        m = x.T @ x
        xp = part.cross(x)  # (G, N, p, nb)
        if self.compiled and (part is self.det or self.setup.fir_step <= self.setup.tr + 1e-9):
            if moves is not None and part.nb == 1 and len(part.whitened) == 1 and self.setup.criterion == "A":
                out = self._rank2(part, m, xp, moves, contrast)
                if out is not None:
                    redo = np.flatnonzero(np.isnan(out))
                    if len(redo):
                        out[redo] = self._compiled_terms(
                            part, m, xp, [(c[redo], t[redo], sg) for c, t, sg in terms], contrast
                        )
                    return out
            return self._compiled_terms(part, m, xp, terms, contrast)
        if part.nb == 1 and self.setup.criterion == "A":
            fast = self._woodbury(part, m, xp, terms, contrast, fir)
            if fast is not None:
                return fast
        out = np.empty(n_cand)
        for lo in range(0, n_cand, chunk):
            sl = slice(lo, lo + chunk)
            sub = [(c[sl], t[sl], sg) for c, t, sg in terms]
            out[sl] = batch_efficiency(self._updated(part, m, xp, sub, fir), contrast, self.setup.criterion)[0]
        return out

    def _rank2(self, part: _Part, m: np.ndarray, xp: np.ndarray, moves, contrast: np.ndarray) -> np.ndarray | None:
        """kernels.rank2_scores; None when the current design is singular."""
        if _regular_cholesky(m) is None:
            return None
        minv = np.linalg.inv(m)
        minv = (minv + minv.T) / 2
        cm = contrast @ minv
        h = cm.T @ cm
        x1 = np.ascontiguousarray(xp[0, :, :, 0])
        gains, loses, t1, t2 = (np.ascontiguousarray(v, dtype=np.int64) for v in moves)
        return _kernels().rank2_scores(
            minv,
            h,
            float(np.trace(cm @ contrast.T)),
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

    def _cross_source(self, part: _Part) -> tuple:
        """Where the compiled kernels read trial products: FIR's from Omega at the trials' volumes
        (bins of one TR), detection's from the trials' Gram matrix."""
        if part is self.est:
            return 1, np.zeros((1, 1, 1, 1, 1, 1)), self.omega, self.fir_scan
        return 0, part.gram(), np.zeros((1, 1)), np.zeros((1, 1), dtype=np.int64)

    def _compiled_terms(self, part: _Part, m: np.ndarray, xp: np.ndarray, terms, contrast: np.ndarray) -> np.ndarray:
        """Compiled scores of candidates given as (condition, trial, sign) terms.

        Candidates that touch the same condition blocks are scored together through the Cholesky
        factor of the untouched blocks (kernels.schur_scores) when there are enough of them to pay
        for its set-up; the rest, and designs whose untouched part is singular, one by one through
        a whole factorisation (kernels.update_scores)."""
        conds = np.ascontiguousarray(np.stack([c for c, _, _ in terms], axis=1), dtype=np.int64)
        trials = np.ascontiguousarray(np.stack([t for _, t, _ in terms], axis=1), dtype=np.int64)
        signs = np.array([sg for _, _, sg in terms], dtype=float)
        xp = np.ascontiguousarray(xp)
        source = self._cross_source(part)
        d_crit = self.setup.criterion == "D"
        out = np.full(len(conds), np.nan)
        # the blocks a candidate touches: the modelled conditions among its terms (at most two)
        cols = part.col[conds]
        lo = np.where(cols >= 0, cols, part.p).min(axis=1)
        hi = cols.max(axis=1)
        key = lo * (part.p + 1) + np.maximum(hi, 0)
        prepared = prepare_contrast(contrast)

        def whole(sel: np.ndarray) -> np.ndarray:  # one whole factorisation per candidate
            return _kernels().update_scores(
                m,
                xp,
                *source,
                part.col.astype(np.int64),
                part.group.astype(np.int64),
                part.nb,
                conds[sel],
                trials[sel],
                signs,
                *prepared,
                d_crit,
            )

        for k in np.unique(key):
            idx = np.flatnonzero(key == k)
            first, last = int(lo[idx[0]]), int(hi[idx[0]])
            if first == part.p:  # baseline trials only: the design does not change
                out[idx] = whole(idx[:1])[0]
                continue
            if len(idx) >= SCHUR_MIN and part.p >= SCHUR_MIN_COLUMNS:
                starts = [first] if first == last else [first, last]
                done = self._schur(part, m, xp, source, starts, conds[idx], trials[idx], signs, contrast)
                if done is not None:
                    out[idx] = done
                    continue
            out[idx] = whole(idx)
        return out

    def _schur(self, part, m, xp, source, starts, conds, trials, signs, contrast) -> np.ndarray | None:
        """kernels.schur_scores for candidates that touch the blocks starting at columns `starts`;
        None when the untouched part of the current design is singular."""
        nb = part.nb
        s_idx = np.concatenate([np.arange(c, c + nb) for c in starts])
        r_idx = np.setdiff1d(np.arange(part.p), s_idx)
        ct = np.asarray(contrast, dtype=float).T  # (p, q)
        if len(r_idx):
            l_rr = _regular_cholesky(m[np.ix_(r_idx, r_idx)])
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
        const = g_r.T @ g_r if self.setup.criterion == "D" else np.array([[np.sum(g_r * g_r)]])
        block = np.full(part.p + 1, -1, dtype=np.int64)
        for b, c in enumerate(starts):
            block[c] = b
        blocks = block[np.where(part.col[conds] >= 0, part.col[conds], part.p)]
        return _kernels().schur_scores(
            np.ascontiguousarray(m[np.ix_(s_idx, s_idx)]),
            np.ascontiguousarray(a0),
            np.ascontiguousarray(h0[:, order]),
            active,
            np.ascontiguousarray(const),
            np.ascontiguousarray(e),
            np.ascontiguousarray(eg[..., order]),
            us,
            *source,
            part.group.astype(np.int64),
            nb,
            conds,
            np.ascontiguousarray(blocks),
            trials,
            signs,
            self.setup.criterion == "D",
        )

    def _woodbury(self, part: _Part, m: np.ndarray, xp: np.ndarray, terms, contrast: np.ndarray, fir: bool):
        """One-regressor-per-condition case: each candidate changes M by U S U' with U of 4 columns
        (two unit vectors and two X'd vectors), so its trace(C M'^-1 C') follows from 4 x 4 algebra.
        Candidates whose update nearly cancels M's rank are recomputed the plain way; None if M itself
        is singular."""
        if _regular_cholesky(m) is None:
            return None
        minv = np.linalg.inv(m)
        h = minv @ contrast.T @ contrast @ minv
        t0 = float(np.trace(contrast @ minv @ contrast.T))
        # merge the terms into two blocks: (condition a, vector va) and (condition b, vector vb)
        blocks = _two_blocks(terms)
        n_cand = len(terms[0][0])
        cols, avec = [], []
        for cond, members in blocks:
            has = part.col[cond] >= 0
            a = sum(sg * xp[part.group[cond], t][:, :, 0] for t, sg in members) * has[:, None]  # (B, p)
            cols.append((np.maximum(part.col[cond], 0), has))
            avec.append(a)
        dm = np.zeros((n_cand, 2, 2))
        for x_, (cond1, mem1) in enumerate(blocks):
            for y_, (cond2, mem2) in enumerate(blocks):
                has = (part.col[cond1] >= 0) & (part.col[cond2] >= 0)
                for t1, s1 in mem1:
                    for t2, s2 in mem2:
                        dm[:, x_, y_] += s1 * s2 * self._cross(part, cond1, cond2, t1, t2, fir)[:, 0, 0] * has

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
        det_k = np.linalg.det(kmat)
        ok = np.abs(det_k) > 1e-8
        safe = np.where(ok[:, None, None], kmat, np.eye(4))
        trace = t0 - np.einsum("bii->b", np.linalg.solve(safe, uhu))
        eff = np.where(ok, 1.0 / trace, 0.0)
        if not ok.all():
            bad = np.flatnonzero(~ok)
            sub = [(c[bad], t[bad], sg) for c, t, sg in terms]
            eff[bad] = batch_efficiency(self._updated(part, m, xp, sub, fir), contrast, "A")[0]
        return eff

    def _updated(self, part: _Part, m: np.ndarray, xp: np.ndarray, terms, fir: bool) -> np.ndarray:
        """Information matrices after adding sign * (trial's regressor) to a condition's column block,
        for each (condition, trial, sign) term, one candidate per entry.

        With A = X'd and D = d'd for the touched blocks: M' = (X + d)'(X + d) = M + A + A' + D, added
        block by block. Candidates are grouped by the conditions they touch, so every addition is a
        plain slice of the same columns.
        """
        nb, n_cand = part.nb, len(terms[0][0])
        a = [xp[part.group[cond], trial] * sign for cond, trial, sign in terms]  # each (B, p, nb)
        d = {
            (t1, t2): s1 * s2 * self._cross(part, c1, c2, tr1, tr2, fir)
            for t1, (c1, tr1, s1) in enumerate(terms)
            for t2, (c2, tr2, s2) in enumerate(terms)
        }
        conds = np.stack([cond for cond, _, _ in terms], axis=1)  # (B, n_terms)
        mm = np.broadcast_to(m, (n_cand,) + m.shape).copy()
        keys, group = np.unique(conds, axis=0, return_inverse=True)
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

    def _cross(self, part: _Part, c1, c2, t1, t2, fir: bool) -> np.ndarray:
        """Products of trial t1's regressor (group of c1) with trial t2's (group of c2): (B, nb, nb)."""
        if fir and self.setup.fir_step <= self.setup.tr + 1e-9:
            s1, s2 = self.fir_scan[t1], self.fir_scan[t2]  # (B, lags)
            vals = self.omega[np.maximum(s1, 0)[:, :, None], np.maximum(s2, 0)[:, None, :]]
            return vals * ((s1 >= 0)[:, :, None] & (s2 >= 0)[:, None, :])
        if np.array_equal(t1, t2):
            return part.own()[part.group[c1], part.group[c2], t1]
        gram = part.gram()
        return gram[part.group[c1], part.group[c2], t1, :, t2, :]


def _regular_cholesky(m: np.ndarray) -> np.ndarray | None:
    """Lower Cholesky factor of m, or None when m counts as singular (the RCOND rule)."""
    try:
        chol = np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        return None
    if (np.diag(chol) ** 2 <= RCOND * np.maximum(np.diag(m), 1e-300)).any():
        return None
    return chol


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
