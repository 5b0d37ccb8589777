"""Onset files for analysis packages that do not read BIDS events: per run, a three-column text file
(onset, duration, weight) per modelled condition, and one multiple-conditions .mat file."""

from __future__ import annotations

import io

import numpy as np
import scipy.io

from seqsolve.spec import Study
from seqsolve.timing import RunSchedule

#: a .mat file opens with 116 bytes of text that scipy fills with the time of writing; we put a fixed
#: text there instead so that the same spec and seed give byte-identical files (MAT-file level 5 layout:
#: 116 bytes text, 8 bytes subsystem offset, 2 version, 2 endianness)
MAT_HEADER_TEXT = 116


def _num(x: float) -> str:
    """Seconds as short text: whole numbers without a point, else up to 6 decimals (microseconds)."""
    return f"{x:.6f}".rstrip("0").rstrip(".") if x != int(x) else f"{int(x)}"


def modelled(study: Study, sched: RunSchedule) -> list[tuple[str, np.ndarray, np.ndarray]]:
    """(condition, onsets, durations) of each non-baseline condition with trials in this run, in the
    spec's order; onsets and durations in seconds from the run's first volume, shape (n_trials,)."""
    out = []
    for c, name in enumerate(study.names):
        mask = sched.codes == c
        if c != study.facts.baseline and mask.any():
            out.append((name, sched.onsets[mask], sched.durations[mask]))
    return out


def three_column(onsets: np.ndarray, durations: np.ndarray) -> str:
    """Tab-separated onset, duration, weight (1) lines, one per trial."""
    return "".join(f"{_num(on)}\t{_num(du)}\t1\n" for on, du in zip(onsets, durations))


def conditions_mat(conditions: list[tuple[str, np.ndarray, np.ndarray]], label: str, run: int) -> bytes:
    """A multiple-conditions .mat: cell arrays names (1 x K text), onsets and durations (1 x K, each a
    column of seconds), as savemat writes them; the header text is fixed (see MAT_HEADER_TEXT)."""
    k = len(conditions)
    cells = {key: np.empty((1, k), dtype=object) for key in ("names", "onsets", "durations")}
    for i, (name, onsets, durations) in enumerate(conditions):
        cells["names"][0, i] = name
        cells["onsets"][0, i] = np.asarray(onsets, dtype=float).reshape(-1, 1)
        cells["durations"][0, i] = np.asarray(durations, dtype=float).reshape(-1, 1)
    buf = io.BytesIO()
    scipy.io.savemat(buf, cells, format="5", do_compression=False, oned_as="column")
    data = bytearray(buf.getvalue())
    text = f"MATLAB 5.0 MAT-file, seqsolve onsets of sub-{label} run {run}, seconds"[:MAT_HEADER_TEXT]
    data[:MAT_HEADER_TEXT] = text.ljust(MAT_HEADER_TEXT).encode("ascii")
    return bytes(data)


def run_onset_files(study: Study, label: str, run: int, sched: RunSchedule) -> dict[str, str | bytes]:
    """{relative path: content} of one run's onset files: onsets/sub-<label>_run-<n>_<condition>.txt
    per modelled condition with trials in the run, and onsets/sub-<label>_run-<n>_conditions.mat."""
    conditions = modelled(study, sched)
    stem = f"onsets/sub-{label}_run-{run}"
    files: dict[str, str | bytes] = {f"{stem}_{name}.txt": three_column(on, du) for name, on, du in conditions}
    files[f"{stem}_conditions.mat"] = conditions_mat(conditions, label, run)
    return files
