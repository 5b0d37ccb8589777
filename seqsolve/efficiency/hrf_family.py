"""A family of plausible response shapes around the canonical double gamma, for robust detection.

Real responses differ from the canonical shape across brain regions and people: the time to peak
varies by a few seconds and the undershoot's depth and timing vary too (Handwerker, Ollinger &
D'Esposito 2004, NeuroImage 21:1639-1651, measured this across regions and subjects; the ranges
below are ours, chosen around the canonical shape, with peak latencies of about 4-7 s as that
literature reports them, from memory, not copied from the paper's tables).

The family crosses four peak latencies with three undershoots (12 members):
  peak      gamma shape 5, 6, 7, 8 (mode 4, 5, 6, 7 s after onset; unit scale);
  undershoot  canonical (shape 16: mode 15 s, ratio 1/6), later (shape 19: mode 18 s, ratio 1/6),
              deeper (shape 16, ratio 1/3).
The first member is the canonical shape. Every member is sampled and scaled as the canonical one
(hrf.sampled_hrf: 0-32 s, unit kept area), so only the shape differs, not the plateau of a block.
A figure over the family is each member's detection (the spec's contrasts, criterion and noise
model, only the kernel changed), then their minimum ("worst") or mean.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from seqsolve.efficiency.hrf import PEAK_SHAPE, UNDERSHOOT_RATIO, UNDERSHOOT_SHAPE, sampled_hrf
from seqsolve.efficiency.setup import AnalysisSetup

#: how a detection figure reads the family: the canonical shape alone, the worst member, the mean
ROBUST_MODES = ("canonical", "worst", "mean")


@dataclass(frozen=True)
class HrfShape:
    """One double gamma: gamma shapes of peak and undershoot (unit scale, so mode = shape - 1 s)
    and the undershoot's weight."""

    peak: float
    undershoot: float
    ratio: float

    @property
    def label(self) -> str:
        """Short name: peak and undershoot modes in seconds and the ratio, e.g. 'peak 5 s, undershoot 15 s x 1/6'."""
        return f"peak {self.peak - 1:g} s, undershoot {self.undershoot - 1:g} s x 1/{1 / self.ratio:g}"

    def as_dict(self) -> dict:
        return {
            "peak_shape": self.peak,
            "undershoot_shape": self.undershoot,
            "undershoot_ratio": self.ratio,
            "peak_seconds": self.peak - 1,
            "undershoot_seconds": self.undershoot - 1,
            "label": self.label,
        }


CANONICAL = HrfShape(PEAK_SHAPE, UNDERSHOOT_SHAPE, UNDERSHOOT_RATIO)
_UNDERSHOOTS = ((UNDERSHOOT_SHAPE, UNDERSHOOT_RATIO), (19.0, UNDERSHOOT_RATIO), (UNDERSHOOT_SHAPE, 1.0 / 3.0))
#: the family, canonical first (peak latencies outer, undershoots inner)
FAMILY: tuple[HrfShape, ...] = tuple(
    sorted(
        (HrfShape(p, u, r) for p in (5.0, 6.0, 7.0, 8.0) for u, r in _UNDERSHOOTS),
        key=lambda s: s != CANONICAL,
    )
)


def family_setups(setup: AnalysisSetup) -> list[AnalysisSetup]:
    """The setup once per family member, only the kernels changed (the derivative basis kept when
    the spec asks for it). Raises ValueError for a custom HRF, which has no family."""
    if setup.hrf_kind == "custom":
        raise ValueError("a custom HRF has no family of shapes")
    derivative = setup.n_basis == 2
    return [
        setup
        if shape == CANONICAL
        else dataclasses.replace(
            setup, kernels=sampled_hrf(setup.resolution, derivative, shape=(shape.peak, shape.undershoot, shape.ratio))
        )
        for shape in FAMILY
    ]


def combine_family(det: np.ndarray, mode: str) -> np.ndarray:
    """Detection over the family, det of shape (n_members, ...) -> (...): canonical (member 0),
    worst (minimum) or mean. NaN (a part not scored) stays NaN."""
    if mode == "canonical":
        return det[0]
    if mode == "worst":
        return det.min(axis=0)
    if mode == "mean":
        return det.mean(axis=0)
    raise ValueError(f"unknown mode {mode!r}; expected one of {ROBUST_MODES}")


def family_summary(det: np.ndarray) -> dict:
    """Figures of one design over the family, det of shape (n_members,): minimum, mean and the worst member."""
    worst = int(np.argmin(det))
    return {"min": float(det.min()), "mean": float(det.mean()), "worst": FAMILY[worst].label}
