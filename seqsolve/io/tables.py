"""Ordering tables: the project's orderings.csv and BIDS events.tsv files, written and read back."""

from __future__ import annotations

import csv
import difflib
import io
import re
from pathlib import Path

import numpy as np

from seqsolve.errors import OrderingFileError, Problem
from seqsolve.spec import Study
from seqsolve.timing import RunSchedule

ORDERING_COLUMNS = ("participant", "run", "position", "condition", "onset", "duration")
EVENTS_COLUMNS = ("onset", "duration", "trial_type")


def _num(x: float) -> str:
    return f"{x:.6f}".rstrip("0").rstrip(".") if x != int(x) else f"{int(x)}"


def events_filename(study: Study, label: str, run: int) -> str:
    """BIDS events file name, run counted from 1."""
    return f"sub-{label}/sub-{label}_task-{study.spec.study.task}_run-{run}_events.tsv"


def events_tsv(study: Study, sched: RunSchedule) -> str:
    """BIDS events table of one run: onset, duration, trial_type; the baseline's trials omitted."""
    lines = ["\t".join(EVENTS_COLUMNS)]
    for c, on, du in zip(sched.codes, sched.onsets, sched.durations):
        if c != study.facts.baseline:
            lines.append(f"{_num(on)}\t{_num(du)}\t{study.names[c]}")
    return "\n".join(lines) + "\n"


def orderings_csv(study: Study, designs: dict[str, list[RunSchedule]]) -> str:
    """Every trial of every participant, baseline included: the table a stimulus script loops over."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(ORDERING_COLUMNS)
    for label, scheds in designs.items():
        for r, s in enumerate(scheds, start=1):
            for p, (c, on, du) in enumerate(zip(s.codes, s.onsets, s.durations), start=1):
                w.writerow([label, r, p, study.names[c], _num(on), _num(du)])
    return buf.getvalue()


# ----------------------------------------------------------------------------------------------
# reading


def read_orderings(study: Study, paths: list[str | Path]) -> dict[str, list[np.ndarray]]:
    """Orderings per participant from orderings.csv files and/or BIDS events.tsv files.

    Raises
    ------
    OrderingFileError
        Naming the file, the line and what to do.
    """
    return {label: [codes for codes, _ in runs] for label, runs in read_designs(study, paths).items()}


def read_designs(study: Study, paths: list[str | Path]) -> dict[str, list[tuple[np.ndarray, np.ndarray | None]]]:
    """Like read_orderings, with each run's onsets in seconds where the files give every one (else None)."""
    trials: dict[str, dict[int, dict[int, int]]] = {}
    onsets: dict[tuple[str, int, int], float] = {}
    for path in map(Path, paths):
        if not path.is_file():
            raise OrderingFileError(str(path), [Problem("", "file not found")])
        if path.name.endswith("_events.tsv") or path.suffix == ".tsv":
            label, run, codes, times = _read_events(study, path)
            trials.setdefault(label, {})
            if run in trials[label]:
                raise OrderingFileError(str(path), [Problem("", f"participant {label} run {run} was already read")])
            trials[label][run] = dict(enumerate(codes, start=1))
            onsets.update({(label, run, p): t for p, t in enumerate(times, start=1)})
        else:
            _read_csv(study, path, trials, onsets)
    out = {}
    for label, runs in trials.items():
        if sorted(runs) != list(range(1, study.facts.n_runs + 1)):
            raise OrderingFileError(
                ", ".join(map(str, paths)),
                [
                    Problem(
                        f"participant {label}",
                        f"has runs {sorted(runs)}; the spec declares {study.facts.n_runs} run(s) (1 to {study.facts.n_runs})",
                    )
                ],
            )
        out[label] = []
        for r in sorted(runs):
            codes = np.array([runs[r][p] for p in sorted(runs[r])], dtype=np.int64)
            times = [onsets.get((label, r, p)) for p in sorted(runs[r])]
            out[label].append((codes, None if None in times else np.array(times, dtype=float)))
    return out


def _code(study: Study, name: str, where: str, problems: list[Problem]) -> int | None:
    if name in study.names:
        return study.names.index(name)
    for i, p in enumerate(problems):
        if isinstance(p, _Unknown) and p.name == name:
            problems[i] = _Unknown(p.where, p.message, name, p.more + 1)
            return None
    close = difflib.get_close_matches(name, study.names, n=1)
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    problems.append(
        _Unknown(where, f"unknown condition '{name}'{hint}; the spec's conditions: {', '.join(study.names)}", name)
    )
    return None


class _Unknown(Problem):
    """An unknown condition name, reported once with the count of further lines that use it."""

    def __init__(self, where: str, message: str, name: str, more: int = 0):
        super().__init__(where if not more else f"{where.split(' (')[0]} (and {more} more line(s))", message)
        object.__setattr__(self, "name", name)
        object.__setattr__(self, "more", more)


def _wrong_spec_hint(study: Study, problems: list[Problem], known: int) -> list[Problem]:
    if problems and known == 0 and all(isinstance(p, _Unknown) for p in problems):
        problems.append(
            Problem("", "no condition in this file is in the spec: is this the spec the ordering was made for?")
        )
    return problems


def _read_csv(study: Study, path: Path, trials: dict, onsets: dict) -> None:
    problems: list[Problem] = []
    found = 0
    with path.open(newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        missing = [c for c in ORDERING_COLUMNS[:4] if c not in (reader.fieldnames or [])]
        if missing:
            raise OrderingFileError(
                str(path),
                [
                    Problem(
                        "line 1",
                        f"missing column(s) {', '.join(missing)}; an ordering table has columns {', '.join(ORDERING_COLUMNS[:4])} (onset, duration optional)",
                    )
                ],
            )
        for line, row in enumerate(reader, start=2):
            where = f"line {line}"
            try:
                run, pos = int(row["run"]), int(row["position"])
            except (TypeError, ValueError):
                problems.append(
                    Problem(where, f"run and position must be whole numbers; got {row['run']!r}, {row['position']!r}")
                )
                continue
            if run < 1 or pos < 1:
                problems.append(Problem(where, "run and position count from 1"))
                continue
            code = _code(study, (row["condition"] or "").strip(), where, problems)
            found += code is not None
            label = (row["participant"] or "").strip()
            if not label:
                problems.append(Problem(where, "empty participant"))
                continue
            slot = trials.setdefault(label, {}).setdefault(run, {})
            if pos in slot:
                problems.append(Problem(where, f"participant {label} run {run} position {pos} appears twice"))
            elif code is not None:
                slot[pos] = code
                try:
                    onsets[(label, run, pos)] = float(row.get("onset") or "nan")
                except ValueError:
                    problems.append(Problem(where, f"onset must be a number of seconds; got {row.get('onset')!r}"))
                if onsets.get((label, run, pos)) != onsets.get((label, run, pos)):  # NaN: no onset given
                    onsets.pop((label, run, pos))
            if len(problems) >= 20:
                break
    for label, runs in trials.items():
        for run, slots in runs.items():
            if slots and sorted(slots) != list(range(1, len(slots) + 1)):
                gap = next(p for p in range(1, max(slots) + 1) if p not in slots)
                problems.append(
                    Problem(f"participant {label} run {run}", f"position {gap} is missing; positions run 1, 2, 3, ...")
                )
    if problems:
        raise OrderingFileError(str(path), _wrong_spec_hint(study, problems, found))


_BIDS = re.compile(r"sub-(?P<sub>[A-Za-z0-9]+)_.*?(?:run-(?P<run>\d+)_)?events\.tsv$")


def _read_events(study: Study, path: Path) -> tuple[str, int, list[int], list[float]]:
    m = _BIDS.search(path.name)
    if not m:
        raise OrderingFileError(
            str(path), [Problem("file name", "expected a BIDS name like sub-01_task-cue_run-1_events.tsv")]
        )
    label, run = m["sub"], int(m["run"] or 1)
    problems: list[Problem] = []
    found = 0
    rows = []
    with path.open(newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh, delimiter="\t")
        missing = [c for c in EVENTS_COLUMNS if c not in (reader.fieldnames or [])]
        if missing:
            raise OrderingFileError(
                str(path),
                [
                    Problem(
                        "line 1",
                        f"missing column(s) {', '.join(missing)}; BIDS events need onset, duration, trial_type (tab-separated)",
                    )
                ],
            )
        for line, row in enumerate(reader, start=2):
            try:
                onset = float(row["onset"])
            except (TypeError, ValueError):
                problems.append(Problem(f"line {line}", f"onset must be a number of seconds; got {row['onset']!r}"))
                continue
            code = _code(study, (row["trial_type"] or "").strip(), f"line {line}", problems)
            found += code is not None
            if code is not None:
                rows.append((onset, code))
    if problems:
        raise OrderingFileError(str(path), _wrong_spec_hint(study, problems, found))
    rows.sort()
    codes = [c for _, c in rows]
    base = study.facts.baseline
    if base is None or base in codes or study.facts.counts[min(run, study.facts.n_runs) - 1, base] == 0:
        return label, run, codes, [t for t, _ in rows]
    codes = _restore_baseline(study, path, rows, run)
    t = study.spec.timing
    return label, run, codes, [t.lead_in + k * t.soa for k in range(len(codes))]


def _restore_baseline(study: Study, path: Path, rows: list[tuple[float, int]], run: int) -> list[int]:
    """Put the omitted baseline trials back into the empty slots of a fixed-SOA run."""
    t = study.spec.timing
    if t.soa is None:
        raise OrderingFileError(
            str(path),
            [
                Problem(
                    "",
                    f"the file omits the baseline '{study.names[study.facts.baseline]}' and the spec's timing is jittered, so its trials cannot be placed; audit orderings.csv instead, or add the baseline rows",
                )
            ],
        )
    slots = {}
    for onset, code in rows:
        k = (onset - t.lead_in) / t.soa
        if abs(k - round(k)) > 1e-3 or k < -1e-9:
            raise OrderingFileError(
                str(path),
                [
                    Problem(
                        "",
                        f"onset {onset:g} s is not on the spec's grid of lead_in + k * soa ({t.lead_in:g} + k * {t.soa:g} s)",
                    )
                ],
            )
        slots[int(round(k))] = code
    n = max(study.facts.run_length(min(run, study.facts.n_runs) - 1), max(slots) + 1)
    return [slots.get(k, study.facts.baseline) for k in range(n)]
