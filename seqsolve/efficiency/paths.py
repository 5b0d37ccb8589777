"""The Evaluator's scoring paths, each a small named object holding exactly what its computation reads.

Full scores of many designs (`scores(codes) -> (B,)`):
  BandDetection      kernels.band_scores: detection from the trials' overlapping response products
  FirBitsEstimation  kernels.fir_bit_scores: FIR columns as bitsets of volumes, products by popcount
  FirHitsEstimation  kernels.fir_scores: FIR products walked over the volumes' (trial, lag) hits
  MatrixScores       numpy: information matrices built whole, then batch_efficiency
Neighbour scores (single changes and swaps, given as column-block updates of the current design) are
in neighbours.py. Evaluator (fast.py) chooses among them in one place each.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from seqsolve.efficiency.algebra import batch_efficiency


def kernels():
    """kernels.py, imported when a kernel is first needed: importing numba and loading the cached
    machine code costs about a second, which `import seqsolve` and the numpy paths should not pay."""
    from seqsolve.efficiency import kernels as compiled

    return compiled


def prepare_contrast(contrast: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """C' with its columns ordered by their first non-zero weight, and for each parameter i the
    number of those columns that start at or before i: the shape kernels._efficiency expects.

    Reordering contrast rows changes neither trace(C M^-1 C') nor its determinant, and with the
    rows in this order (L^-1 C')'s row i is zero beyond active[i] (C kron I for FIR is mostly zeros).
    """
    c = np.asarray(contrast, dtype=float)
    nonzero = c != 0
    first = np.where(nonzero.any(axis=1), nonzero.argmax(axis=1), c.shape[1])
    order = np.argsort(first, kind="stable")
    active = np.searchsorted(first[order], np.arange(c.shape[1]), side="right")
    return np.ascontiguousarray(c[order].T), active.astype(np.int64)


@dataclass(frozen=True)
class KernelContrast:
    """A contrast as the kernels take it: ct = C' reordered (p, q), active (p,), and the criterion."""

    ct: np.ndarray
    active: np.ndarray
    d_criterion: bool

    @classmethod
    def of(cls, contrast: np.ndarray, criterion: str) -> KernelContrast:
        ct, active = prepare_contrast(contrast)
        return cls(ct, active, criterion == "D")


@dataclass(frozen=True)
class BandDetection:
    """M = Z'(R'R)Z - Y Y' with Y = Z'R'Q (R: whitened, unfiltered trial responses).

    col, group (K,): each condition's first column (-1 unmodelled) and duration group; band
    (width, N, G, G, nb, nb): products of trial i with trial i + d (the diagonal halved); far_i,
    far_j, far: products of overlapping pairs further apart (circular runs); qr (N, G, nb, r): R'Q.
    """

    col: np.ndarray
    group: np.ndarray
    n_basis: int
    band: np.ndarray
    far_i: np.ndarray
    far_j: np.ndarray
    far: np.ndarray
    qr: np.ndarray
    contrast: KernelContrast

    def scores(self, codes: np.ndarray) -> np.ndarray:
        c = self.contrast
        return kernels().band_scores(
            codes,
            self.col,
            self.group,
            self.n_basis,
            self.band,
            self.far_i,
            self.far_j,
            self.far,
            self.qr,
            c.ct,
            c.active,
            c.d_criterion,
        )


@dataclass(frozen=True)
class FirBitsEstimation:
    """FIR information by popcounts of volume bitsets (no two trials at one volume and lag).

    fscan (N, lags): each trial's volume per lag (n_scans where outside the run); qf (N, lags, width):
    W'Q there, over the columns from qoff[trial] of Q's `rank`; diag_weights/diag_masks and
    off_weights/off_masks: the distinct entries of the tridiagonal W'W and the volumes having each.
    """

    col: np.ndarray
    fscan: np.ndarray
    qf: np.ndarray
    qoff: np.ndarray
    rank: int
    n_words: int
    diag_weights: np.ndarray
    diag_masks: np.ndarray
    off_weights: np.ndarray
    off_masks: np.ndarray
    contrast: KernelContrast

    def scores(self, codes: np.ndarray) -> np.ndarray:
        c = self.contrast
        return kernels().fir_bit_scores(
            codes,
            self.col,
            self.fscan,
            self.qf,
            self.qoff,
            self.rank,
            self.n_words,
            self.diag_weights,
            self.diag_masks,
            self.off_weights,
            self.off_masks,
            c.ct,
            c.active,
            c.d_criterion,
        )


@dataclass(frozen=True)
class FirHitsEstimation:
    """FIR information walked volume by volume: M = X'W'WX - Y Y' with Y = X'W'Q.

    scan_ptr (n + 1,), hit_trial, hit_lag: the (trial, lag) hits of each volume, grouped by volume;
    diag, off (n,): the tridiagonal W'W; qw (n, r): W'Q.
    """

    col: np.ndarray
    scan_ptr: np.ndarray
    hit_trial: np.ndarray
    hit_lag: np.ndarray
    diag: np.ndarray
    off: np.ndarray
    qw: np.ndarray
    contrast: KernelContrast

    def scores(self, codes: np.ndarray) -> np.ndarray:
        c = self.contrast
        return kernels().fir_scores(
            codes,
            self.col,
            self.scan_ptr,
            self.hit_trial,
            self.hit_lag,
            self.diag,
            self.off,
            self.qw,
            c.ct,
            c.active,
            c.d_criterion,
        )


@dataclass(frozen=True)
class MatrixScores:
    """numpy: each design's information matrix built whole (information(codes) -> (B, p, p)), then
    scored by batch_efficiency."""

    information: Callable[[np.ndarray], np.ndarray]
    contrast: np.ndarray
    criterion: str

    def scores(self, codes: np.ndarray) -> np.ndarray:
        return batch_efficiency(self.information(codes), self.contrast, self.criterion)[0]
