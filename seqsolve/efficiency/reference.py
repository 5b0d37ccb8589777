"""The straightforward computation: build each design matrix on the fine grid, invert the whole model.

Slow and plain on purpose: every fast path in fast.py is tested against it.
"""

from __future__ import annotations

import numpy as np

from seqsolve.efficiency.grid import Layout, fir_bins
from seqsolve.efficiency.nuisance import block_nuisance, whiten
from seqsolve.efficiency.setup import AnalysisSetup


def detection_matrix(setup: AnalysisSetup, layout: Layout, codes: np.ndarray, circular: bool = False) -> np.ndarray:
    """Regressors of the modelled conditions (boxcars convolved with each kernel), shape (n_scans, n_modelled * n_basis)."""
    blocks = []
    for r, scans in enumerate(layout.scan_idx):
        in_run = layout.run_of == r
        longest = int(np.ceil(layout.box_len.max()))
        n_fine = max(scans.max() + 1, layout.onset_idx[in_run].max(initial=0) + longest + 1)
        if circular:
            n_fine = layout.run_fine[r]
        cols = []
        for c in setup.modelled:
            box = np.zeros(n_fine)
            whole = int(np.floor(layout.box_len[c]))
            for a in layout.onset_idx[in_run & (codes == c)]:
                box[a : a + whole] = 1.0
                if a + whole < n_fine:  # the partly covered last sample (frac 0: nothing)
                    box[a + whole] += layout.box_len[c] - whole
            for h in setup.kernels:
                full = np.convolve(box, h) * setup.resolution
                if circular:
                    folded = np.zeros(n_fine)
                    np.add.at(folded, np.arange(full.size) % n_fine, full)
                    full = folded
                cols.append(full[scans])
        blocks.append(np.column_stack(cols))
    return np.vstack(blocks)


def fir_matrix(setup: AnalysisSetup, layout: Layout, codes: np.ndarray, circular: bool = False) -> np.ndarray:
    """FIR regressors: column (condition, lag j) counts trials whose onset lies j bins before the volume."""
    edges = fir_bins(setup)
    blocks = []
    for r, scans in enumerate(layout.scan_idx):
        in_run = layout.run_of == r
        x = np.zeros((len(scans), len(setup.modelled) * setup.fir_lags))
        for ci, c in enumerate(setup.modelled):
            for a in layout.onset_idx[in_run & (codes == c)]:
                d = scans - a
                if circular:
                    d = d % layout.run_fine[r]
                lag = np.searchsorted(edges, d, side="right") - 1
                hit = (d >= 0) & (lag < setup.fir_lags)
                np.add.at(x, (np.flatnonzero(hit), ci * setup.fir_lags + lag[hit]), 1.0)
        blocks.append(x)
    return np.vstack(blocks)


def covariance(setup: AnalysisSetup, layout: Layout, x: np.ndarray) -> np.ndarray | None:
    """Covariance (up to noise variance) of the task estimates in the whole model [X, nuisance],
    after AR(1) prewhitening; None when the model is not of full rank."""
    nuis = block_nuisance(layout.run_lengths, setup.tr, setup.high_pass_cutoff, setup.drift_degree)
    full = whiten(np.hstack([x, nuis]), setup.ar1, layout.run_lengths)
    xtx = full.T @ full
    if np.linalg.matrix_rank(full) < full.shape[1]:
        return None
    return np.linalg.inv(xtx)[: x.shape[1], : x.shape[1]]


def efficiency(cov: np.ndarray | None, contrast: np.ndarray, criterion: str = "A") -> float:
    """1 / trace(C cov C') (A) or det(C cov C')^(-1/q) (D); 0 for a rank-deficient model."""
    if cov is None:
        return 0.0
    v = contrast @ cov @ contrast.T
    if criterion == "D":
        sign, logdet = np.linalg.slogdet(v)
        return float(np.exp(-logdet / v.shape[0])) if sign > 0 else 0.0
    return float(1.0 / np.trace(v))


def reference_scores(
    setup: AnalysisSetup, layout: Layout, codes: np.ndarray, circular: bool = False
) -> tuple[float, float]:
    """(detection, estimation) efficiency of one ordering, the straightforward way."""
    det = efficiency(
        covariance(setup, layout, detection_matrix(setup, layout, codes, circular)),
        setup.detection_contrast(),
        setup.criterion,
    )
    est = efficiency(
        covariance(setup, layout, fir_matrix(setup, layout, codes, circular)),
        setup.estimation_contrast(),
        setup.criterion,
    )
    return det, est
