"""Haemodynamic response shapes on a fine time grid."""

from __future__ import annotations

import numpy as np
from scipy.special import gammaln, xlogy

#: canonical double gamma: peak shape 6, undershoot shape 16, undershoot ratio 1/6 (common practice)
PEAK_SHAPE = 6.0
UNDERSHOOT_SHAPE = 16.0
UNDERSHOOT_RATIO = 1.0 / 6.0
LENGTH = 32.0  # seconds of response kept


def double_gamma(
    t: np.ndarray, peak: float = PEAK_SHAPE, undershoot: float = UNDERSHOOT_SHAPE, ratio: float = UNDERSHOOT_RATIO
) -> np.ndarray:
    """A double-gamma response at times t (seconds), not normalised: gamma densities of unit scale
    and shapes `peak` and `undershoot` (modes at shape - 1 seconds), the second weighted `ratio`.
    The defaults are the canonical shape (its integral is 5/6)."""
    t = np.asarray(t, dtype=float)
    return gamma_pdf(t, peak) - ratio * gamma_pdf(t, undershoot)


def gamma_pdf(t: np.ndarray, shape: float) -> np.ndarray:
    """Density of the gamma distribution of unit scale at t >= 0 (0 below): t^(a-1) e^-t / Gamma(a).

    The formula scipy.stats.gamma uses (in logs), written out because importing scipy.stats costs
    about 0.4 s; tests/test_efficiency_external.py holds it to scipy.stats.gamma.pdf."""
    t = np.asarray(t, dtype=float)
    inside = t >= 0
    safe = np.where(inside, t, 1.0)
    return np.where(inside, np.exp(xlogy(shape - 1.0, safe) - safe - gammaln(shape)), 0.0)


def sampled_hrf(
    resolution: float,
    derivative: bool = False,
    custom: tuple[np.ndarray, float] | None = None,
    shape: tuple[float, float, float] | None = None,
) -> np.ndarray:
    """Response kernels on a grid of `resolution` seconds, shape (n_basis, n_samples).

    The canonical shape is sampled at 0, resolution, ... below LENGTH (32 s; the tail beyond is
    undershoot of area -1.3e-4 of the whole) and scaled so that what is kept has unit area by the rectangle rule:
    sum(h) * resolution = 1, so a long block reaches a plateau of exactly 1 (nilearn scales its
    kernel the same way, to a unit sum on its grid). The temporal derivative (optional second row)
    is the finite difference of the first, scaled to the same sum of squares. A custom shape
    (samples, step) is interpolated onto the grid and scaled the same way (unless its area is 0);
    `shape` (peak shape, undershoot shape, ratio) replaces the canonical double gamma's parameters.
    """
    t = np.arange(0.0, LENGTH, resolution)
    if custom is None:
        h = double_gamma(t) if shape is None else double_gamma(t, *shape)
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
