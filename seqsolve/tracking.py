"""Scores the search keeps current through its swaps (compiled in seqsolve.move_kernels).

For a fixed timing each trial has one filtered regressor r_t (prewhitened, nuisance removed; the
Evaluator's), so a design's information is X'X = Z'(R'R)Z with Z its one-hot labels. The search keeps
R'R (trials x trials), X'X and X'R; a swap then costs O(p^2) to score and O(N p) to make, instead of
the Evaluator's set-up per call. Applies to the A criterion with one regressor per condition and one
duration for all modelled conditions (otherwise the search scores through the Evaluator).

Estimation (FIR with bins of one TR) works the same way in volume space: each (trial, lag) is a
filtered 0/1 column, whose products are entries of Omega = W'(I - QQ')W; the search keeps X'X and
(0/1 design)' Omega, and a swap moves one volume per lag between two condition blocks.
"""

from __future__ import annotations

from collections import namedtuple

import numpy as np

from seqsolve.efficiency.fast import Evaluator
from seqsolve.efficiency.hrf_family import combine_family
from seqsolve.efficiency.setup import AnalysisSetup

#: more trials than this and R'R (8 bytes per pair) is no longer small: the Evaluator scores instead
MAX_TRIALS = 4000

Track = namedtuple("Track", ["gram", "col", "contrast", "m", "s"])
FirTrack = namedtuple("FirTrack", ["omega", "scan", "col", "contrast", "m", "tv"])

#: what the compiled loop takes for a part it does not score
NO_TRACK = Track(np.zeros((0, 0)), np.zeros(0, np.int64), np.zeros((0, 0)), np.zeros((0, 0)), np.zeros((0, 0)))
NO_FIR_TRACK = FirTrack(
    np.zeros((0, 0)),
    np.zeros((0, 0), np.int64),
    np.zeros(0, np.int64),
    np.zeros((0, 0)),
    np.zeros((0, 0)),
    np.zeros((0, 0)),
)


def detection_track(evaluator: Evaluator, setup: AnalysisSetup, codes: np.ndarray) -> Track | None:
    """The tracked detection state of a design (runs concatenated), or None where it does not apply."""
    part = evaluator.det
    n = part.n_trials
    groups = {int(part.group[c]) for c in part.modelled}  # the baseline's own duration does not matter
    if len(groups) != 1 or part.nb != 1 or setup.criterion != "A" or n > MAX_TRIALS:
        return None
    # products of the filtered regressors (I - QQ')WR: (WR)'WR - (Q'WR)'(Q'WR)
    wr = part.whitened[groups.pop()]
    proj = np.asarray((wr.T @ part.q).T)
    p = part.p
    track = Track(
        gram=np.ascontiguousarray((wr.T @ wr).toarray() - proj.T @ proj),
        col=part.col.astype(np.int64),
        contrast=np.ascontiguousarray(setup.detection_contrast(), dtype=float),
        m=np.zeros((p, p)),
        s=np.zeros((p, n)),
    )
    refresh(track, codes)
    return track


def refresh(track: Track, codes: np.ndarray) -> None:
    """Recompute X'R and X'X of a design from scratch (no drift from many updates)."""
    cols = track.col[codes]
    z = np.zeros((len(codes), track.m.shape[0]))
    inside = np.flatnonzero(cols >= 0)
    z[inside, cols[inside]] = 1.0
    track.s[:] = z.T @ track.gram
    track.m[:] = track.s @ z


def fir_track(evaluator: Evaluator, setup: AnalysisSetup, codes: np.ndarray) -> FirTrack | None:
    """The tracked estimation state of a design, or None where it does not apply (FIR bins wider
    than one TR, a circular evaluator, the D criterion, very many volumes)."""
    if setup.fir_step > setup.tr + 1e-9 or evaluator.circular or setup.criterion != "A":
        return None
    if evaluator.layout.n_scans > MAX_TRIALS:
        return None
    part = evaluator.est
    track = FirTrack(
        omega=np.ascontiguousarray(evaluator.omega),
        scan=np.ascontiguousarray(evaluator.fir_scan, dtype=np.int64),
        col=part.col.astype(np.int64),
        contrast=np.ascontiguousarray(setup.estimation_contrast(), dtype=float),
        m=np.zeros((part.p, part.p)),
        tv=np.zeros((part.p, evaluator.layout.n_scans)),
    )
    refresh_fir(track, codes)
    return track


def refresh_fir(track: FirTrack, codes: np.ndarray) -> None:
    """Recompute X'X and (0/1 design)' Omega of a design from scratch."""
    lags = track.scan.shape[1]
    z = np.zeros((track.m.shape[0], track.omega.shape[0]))  # (columns, volumes): the 0/1 design, transposed
    cols = track.col[codes]
    for lag in range(lags):
        keep = (cols >= 0) & (track.scan[:, lag] >= 0)
        np.add.at(z, (cols[keep] + lag, track.scan[keep, lag]), 1.0)
    track.tv[:] = z @ track.omega
    track.m[:] = track.tv @ z.T


class FamilyTracks:
    """One tracked detection state per HRF family member (hrf_family.py), for a detection figure
    read over the family: a swap is scored under each member by the compiled kernels and the
    figures combined as objective.hrf_robust says (worst or mean), so it equals the Scorer's."""

    def __init__(self, tracks: list[Track], mode: str):
        self.tracks, self.mode = tracks, mode

    def swap_scores(self, kernels, codes: np.ndarray, pairs: np.ndarray) -> np.ndarray:
        """Combined detection after each swap of pairs (n, 2) of the current design, shape (n,)."""
        return combine_family(
            np.array([kernels.detection_swap_scores(t, codes, pairs) for t in self.tracks]), self.mode
        )

    def apply(self, kernels, codes: np.ndarray, i: int, j: int) -> None:
        """Bring every member's state up to date for the swap of i and j (codes: labels before it)."""
        for t in self.tracks:
            kernels.detection_apply(t, codes, i, j)

    def refresh(self, codes: np.ndarray) -> None:
        for t in self.tracks:
            refresh(t, codes)


def family_tracks(evaluators: list[Evaluator], setups: list[AnalysisSetup], codes: np.ndarray, mode: str):
    """Tracked detection under each family member (canonical first), or None where tracking does
    not apply to one of them (see detection_track)."""
    tracks = [detection_track(ev, setup, codes) for ev, setup in zip(evaluators, setups)]
    return None if any(t is None for t in tracks) else FamilyTracks(tracks, mode)


__all__ = [
    "FamilyTracks",
    "family_tracks",
    "MAX_TRIALS",
    "NO_FIR_TRACK",
    "NO_TRACK",
    "FirTrack",
    "Track",
    "detection_track",
    "fir_track",
    "refresh",
    "refresh_fir",
]
