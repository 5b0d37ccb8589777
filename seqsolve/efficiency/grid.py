"""Where trials and volumes fall on the fine time grid: shared by the reference and the fast paths."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqsolve.efficiency.setup import AnalysisSetup


@dataclass(frozen=True)
class Layout:
    """Fixed timing of one participant's runs, on the fine grid (indices of `resolution` seconds).

    onset_idx, run_of: per trial (all runs concatenated); box_len: per condition, the duration in
    samples, float (a fractional part weighs the boxcar's last sample: see boxcar_samples);
    scan_idx: per run, the fine-grid index at which each volume is sampled; run_fine: per run,
    the number of fine samples in the run (for circular presentation).
    """

    onset_idx: np.ndarray
    run_of: np.ndarray
    box_len: np.ndarray
    scan_idx: tuple[np.ndarray, ...]
    run_fine: tuple[int, ...]

    @property
    def n_trials(self) -> int:
        return len(self.onset_idx)

    @property
    def run_lengths(self) -> list[int]:
        return [len(s) for s in self.scan_idx]

    @property
    def n_scans(self) -> int:
        return sum(self.run_lengths)


def make_layout(setup: AnalysisSetup, onsets: list[np.ndarray], n_volumes: list[int], durations: np.ndarray) -> Layout:
    """Layout from per-run onsets (seconds), volumes per run and per-condition durations (seconds)."""
    res = setup.resolution
    onset_idx = np.concatenate([np.rint(np.asarray(o) / res).astype(np.int64) for o in onsets])
    run_of = np.concatenate([np.full(len(o), r) for r, o in enumerate(onsets)]).astype(np.int64)
    box = boxcar_samples(durations, res)
    scans = tuple(np.rint((np.arange(n) * setup.tr + setup.sample_offset) / res).astype(np.int64) for n in n_volumes)
    fine = tuple(int(np.rint(n * setup.tr / res)) for n in n_volumes)
    return Layout(onset_idx, run_of, box, scans, fine)


def boxcar_samples(durations: np.ndarray, resolution: float) -> np.ndarray:
    """Durations (seconds) in fine-grid samples, kept fractional: 0.25 s at 0.1 s is 2.5 samples,
    the boxcar then covers two samples fully and the third with weight 0.5, so its integral is the
    duration exactly (it used to be rounded to whole samples, at least one: 0.03 s counted as 0.1 s).
    Values within 1e-9 of a whole number are snapped to it (2.0 / 0.1 is 19.999999999999996)."""
    n = np.asarray(durations, dtype=float) / resolution
    whole = np.rint(n)
    return np.where(np.abs(n - whole) <= 1e-9 * np.maximum(whole, 1.0), whole, n)


def fir_bins(setup: AnalysisSetup) -> np.ndarray:
    """Fine-grid edges of the FIR bins, shape (n_lags + 1,): bin j covers [edge_j, edge_j+1)."""
    return np.rint(np.arange(setup.fir_lags + 1) * setup.fir_step / setup.resolution).astype(np.int64)
