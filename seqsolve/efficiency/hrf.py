"""Haemodynamic response shapes on a fine time grid."""

from __future__ import annotations

import numpy as np
from scipy import stats

#: canonical double gamma: peak shape 6, undershoot shape 16, undershoot ratio 1/6 (common practice)
PEAK_SHAPE = 6.0
UNDERSHOOT_SHAPE = 16.0
UNDERSHOOT_RATIO = 1.0 / 6.0
LENGTH = 32.0  # seconds of response kept


def double_gamma(t: np.ndarray) -> np.ndarray:
    """The canonical response at times t (seconds), not normalised (its integral is 5/6)."""
    t = np.asarray(t, dtype=float)
    return stats.gamma.pdf(t, PEAK_SHAPE) - UNDERSHOOT_RATIO * stats.gamma.pdf(t, UNDERSHOOT_SHAPE)


def sampled_hrf(
    resolution: float, derivative: bool = False, custom: tuple[np.ndarray, float] | None = None
) -> np.ndarray:
    """Response kernels on a grid of `resolution` seconds, shape (n_basis, n_samples).

    The canonical shape is scaled to unit area, so a long block reaches a plateau of 1. The
    temporal derivative (optional second row) is the finite difference of the first, scaled to
    the same sum of squares. A custom shape (samples, step) is interpolated onto the grid and
    scaled to unit area.
    """
    t = np.arange(0.0, LENGTH, resolution)
    if custom is None:
        h = double_gamma(t) / (1.0 - UNDERSHOOT_RATIO)
    else:
        samples, step = custom
        ts = np.arange(len(samples)) * step
        t = np.arange(0.0, ts[-1] + resolution / 2, resolution)
        h = np.interp(t, ts, samples)
        area = h.sum() * resolution
        h = h / area if abs(area) > 1e-12 else h
    if not derivative:
        return h[None, :]
    d = np.gradient(h, resolution)
    d *= np.linalg.norm(h) / np.linalg.norm(d)
    return np.vstack([h, d])
