"""Stimulus-ready tables: one CSV per participant and run, one row per trial (baseline included),
in the order a stimulus loop presents them, with the wait after each trial spelled out."""

from __future__ import annotations

import csv
import io

import numpy as np

from seqsolve.spec import Study
from seqsolve.timing import RunSchedule

#: the fixed columns; factor columns stand between condition and onset
FIRST_COLUMNS = ("position", "condition")
TIME_COLUMNS = ("onset", "duration", "gap")


def _num(x: float) -> str:
    """Seconds as short text: whole numbers without a point, else up to 6 decimals (microseconds)."""
    return f"{x:.6f}".rstrip("0").rstrip(".") if x != int(x) else f"{int(x)}"


def trials_filename(label: str, run: int) -> str:
    """stimulus/sub-<label>_run-<n>_trials.csv, run counted from 1."""
    return f"stimulus/sub-{label}_run-{run}_trials.csv"


def factor_columns(study: Study) -> dict[str, str]:
    """{factor: column name} in the order the spec first names each factor; a factor named like a
    fixed column gets the prefix 'factor_' so no column is given twice."""
    taken = set(FIRST_COLUMNS + TIME_COLUMNS)
    out: dict[str, str] = {}
    for c in study.spec.conditions:
        for factor in c.levels:
            if factor not in out:
                out[factor] = f"factor_{factor}" if factor in taken else factor
    return out


def item_columns(study: Study, factors: dict[str, str], extra: dict[str, str] | None = None) -> dict[str, str]:
    """{attribute: column name} for the item and its attributes (files' columns); a name taken by a
    fixed, factor or extra column gets the prefix 'item_'."""
    if study.items is None:
        return {}
    taken = set(FIRST_COLUMNS + TIME_COLUMNS) | set(factors.values()) | set(extra or {}) | {"item"}
    return {"item": "item"} | {a: f"item_{a}" if a in taken else a for a in study.items.attributes}


def trials_csv(
    study: Study, sched: RunSchedule, extra: dict[str, str] | None = None, items: np.ndarray | None = None
) -> str:
    """One run as a CSV table: position (from 1), condition, one column per factor (its level, empty
    for conditions without one), the extra columns, with items the trial's item and one column per
    item attribute (empty where a trial shows none), onset and duration (seconds from the run's first
    volume), and gap (seconds from the trial's end to the next trial's onset; after the last trial, to
    the run's end, so onset + duration + gap of the last row is the run's length).

    extra: {column: value} holding for the whole run (counterbalanced factors: the run's level, the
    participant's mapping), written after the factor columns and before the item columns."""
    extra = extra or {}
    factors = factor_columns(study)
    shown = item_columns(study, factors, extra) if items is not None else {}
    cat = study.items
    values = {a: cat.names if a == "item" else cat.attributes[a] for a in shown} if shown else {}
    ends = sched.onsets + sched.durations
    nexts = list(sched.onsets[1:]) + [sched.length]
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow((*FIRST_COLUMNS, *factors.values(), *extra, *shown.values(), *TIME_COLUMNS))
    for p, (c, on, du, end, nxt) in enumerate(zip(sched.codes, sched.onsets, sched.durations, ends, nexts), start=1):
        levels = study.spec.conditions[c].levels
        gap = max(round(float(nxt - end), 6), 0.0)  # rounding: onsets are kept to the microsecond
        item = int(items[p - 1]) if items is not None else -1
        cells = [v[item] if item >= 0 else "" for v in values.values()]
        w.writerow(
            [
                p,
                study.names[c],
                *(levels.get(f, "") for f in factors),
                *extra.values(),
                *cells,
                _num(on),
                _num(du),
                _num(gap),
            ]
        )
    return buf.getvalue()
