"""Ordering tables: the project's orderings.csv and BIDS events.tsv files, written and read back."""

from __future__ import annotations

import csv
import difflib
import io
import math
import re
from array import array
from pathlib import Path

import numpy as np

from seqsolve.errors import OrderingFileError, Problem, shorten
from seqsolve.io import limits
from seqsolve.items import ITEM_COLUMN, STIM_FILE
from seqsolve.spec import Study
from seqsolve.timing import RunSchedule

ORDERING_COLUMNS = ("participant", "run", "position", "condition", "onset", "duration")
EVENTS_COLUMNS = ("onset", "duration", "trial_type")


def _num(x: float) -> str:
    return f"{x:.6f}".rstrip("0").rstrip(".") if x != int(x) else f"{int(x)}"


def events_filename(study: Study, label: str, run: int) -> str:
    """BIDS events file name, run counted from 1."""
    return f"sub-{label}/sub-{label}_task-{study.spec.study.task}_run-{run}_events.tsv"


def events_tsv(
    study: Study, sched: RunSchedule, extra: dict[str, str] | None = None, items: np.ndarray | None = None
) -> str:
    """BIDS events table of one run: onset, duration, trial_type, then the extra columns, then the item
    columns; the baseline's trials omitted.

    extra: {column: value} that holds for the whole run (a counterbalanced run level), on every row.
    items: each trial's item index (-1: none), adding the column item and, when the items file has
    one, BIDS' optional stim_file ('n/a' where a trial shows no item).
    """
    extra = extra or {}
    shown = item_columns(study, items)
    lines = ["\t".join([*EVENTS_COLUMNS, *extra, *shown])]
    for t, (c, on, du) in enumerate(zip(sched.codes, sched.onsets, sched.durations)):
        if c != study.facts.baseline:
            cells = [(values[items[t]] or "n/a") if items[t] >= 0 else "n/a" for values in shown.values()]
            lines.append("\t".join([_num(on), _num(du), study.names[c], *extra.values(), *cells]))
    return "\n".join(lines) + "\n"


def item_columns(study: Study, items: np.ndarray | None) -> dict[str, tuple[str, ...]]:
    """{column: value per item} of the items written to events.tsv: item, and stim_file if given."""
    cat = study.items
    if cat is None or items is None:
        return {}
    out = {ITEM_COLUMN: cat.names}
    if STIM_FILE in cat.attributes:
        out[STIM_FILE] = cat.attributes[STIM_FILE]
    return out


def orderings_csv(
    study: Study,
    designs: dict[str, list[RunSchedule]],
    extra: dict[str, list[dict[str, str]]] | None = None,
    items: dict[str, list[np.ndarray]] | None = None,
) -> str:
    """Every trial of every participant, baseline included, in one table.

    The column participant_id ('sub-01') keeps the label text for readers that turn '01' in
    the participant column into the number 1 (pandas, R, spreadsheets). Columns: participant, run,
    position, condition, onset, duration, participant_id, then the extra columns, then item; the later
    ones follow the columns earlier versions wrote, so those stay where they were.

    extra: per participant and run, {column: value} holding for the whole run (counterbalanced factors).
    items: per participant and run, each trial's item index (-1: none); adds the column item (the
    trial's stimulus item, empty where none), last.
    """
    extra = extra or {}
    names = list(next(iter(extra.values()))[0]) if extra else []
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow((*ORDERING_COLUMNS, "participant_id", *names, *([ITEM_COLUMN] if items else [])))
    for label, scheds in designs.items():
        for r, s in enumerate(scheds, start=1):
            tail = list(extra[label][r - 1].values()) if extra else []
            shown = items[label][r - 1] if items else None
            for p, (c, on, du) in enumerate(zip(s.codes, s.onsets, s.durations), start=1):
                row = [label, r, p, study.names[c], _num(on), _num(du), f"sub-{label}", *tail]
                if shown is not None:
                    row.append(study.items.names[shown[p - 1]] if shown[p - 1] >= 0 else "")
                w.writerow(row)
    return buf.getvalue()


# ----------------------------------------------------------------------------------------------
# reading: every value checked at the edge (size, encoding, field length, finite numbers, bounds)

NO_COLUMN = -2  # a trial's item when its file has no item column (-1: the trial shows no item)
MAX_PROBLEMS = 20  # a file stops being read after this many problems: the first ones show what is wrong
MAX_NAME_CHARS = 200  # condition names and participant labels are short; longer fields are not names


def read_orderings(study: Study, paths: list[str | Path]) -> dict[str, list[np.ndarray]]:
    """Orderings per participant from orderings.csv files and/or BIDS events.tsv files.

    Raises
    ------
    OrderingFileError
        Naming the file, the line and what to do.
    """
    return {label: [codes for codes, _ in runs] for label, runs in read_designs(study, paths).items()}


def read_designs(
    study: Study, paths: list[str | Path], partial: bool = False
) -> dict[str, list[tuple[np.ndarray, np.ndarray | None] | None]]:
    """Like read_orderings, with each run's onsets in seconds where the files give every one (else None).

    partial: a participant may have only some of the spec's runs; each absent run is None in the list
    (which still has one entry per declared run)."""
    return {
        label: [None if run is None else run[:2] for run in runs]
        for label, runs in read_trials(study, paths, partial).items()
    }


def read_trials(study: Study, paths: list[str | Path], partial: bool = False) -> dict[str, list[tuple | None]]:
    """Like read_designs, each run with a third entry: its trials' item indices (-1: no item), or None
    when the files give no item column (or the study has no items). partial as in read_designs: an
    absent run is None."""
    paths = [Path(p) for p in paths]
    trials = _Trials()
    for f, path in enumerate(paths):
        _check_file(path)
        if path.name.endswith("_events.tsv") or path.suffix == ".tsv":
            label, run, codes, times, items = _read_events(study, path)
            if trials.has_run(label, run):
                raise OrderingFileError(str(path), [Problem("", f"participant {label} run {run} was already read")])
            for pos, (code, onset, item) in enumerate(zip(codes, times, items), start=1):
                trials.add(label, run, pos, code, onset, f, 0, item)
        else:
            _read_csv(study, path, f, trials)
    return trials.designs(study, paths, partial)


class _Trials:
    """Every trial read so far, column by column in compact arrays (about 40 bytes a trial, so a file at
    the size limit stays far below a gigabyte), and assembled into runs once all files are read."""

    def __init__(self):
        self.labels: dict[str, int] = {}
        self.ints = {k: array("q") for k in ("label", "run", "pos", "code", "file", "line", "item")}
        self.onset = array("d")  # NaN: no onset given

    def add(
        self,
        label: str,
        run: int,
        pos: int,
        code: int,
        onset: float | None,
        file: int,
        line: int,
        item: int = NO_COLUMN,
    ) -> None:
        """item: the trial's item index, -1 for none, NO_COLUMN when the file has no item column."""
        index = self.labels.setdefault(label, len(self.labels))
        for key, value in (
            ("label", index),
            ("run", run),
            ("pos", pos),
            ("code", code),
            ("file", file),
            ("line", line),
            ("item", item),
        ):
            self.ints[key].append(value)
        self.onset.append(math.nan if onset is None else onset)

    def has_run(self, label: str, run: int) -> bool:
        if label not in self.labels:
            return False
        col = {k: np.frombuffer(self.ints[k], dtype=np.int64) for k in ("label", "run")}
        return bool(np.any((col["label"] == self.labels[label]) & (col["run"] == run)))

    def designs(self, study: Study, paths: list[Path], partial: bool = False) -> dict[str, list[tuple | None]]:
        """Runs per participant in position order, each (codes, onsets or None, items or None); a repeated
        or missing position or run raises (a missing run is None instead when partial)."""
        col = {k: np.frombuffer(v, dtype=np.int64) if len(v) else np.zeros(0, np.int64) for k, v in self.ints.items()}
        onset = np.frombuffer(self.onset, dtype=float) if len(self.onset) else np.zeros(0)
        order = np.lexsort((col["file"], col["line"], col["pos"], col["run"], col["label"]))
        col = {k: v[order] for k, v in col.items()}
        onset = onset[order]
        names = list(self.labels)
        _check_repeats(col, names, paths)
        # one block per (participant, run): the sort made them contiguous
        key = col["label"] * (study.facts.n_runs + 1) + col["run"]
        starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]]) if len(key) else np.zeros(0, np.int64)
        ends = np.r_[starts[1:], len(key)].astype(np.int64)
        where = ", ".join(map(str, paths))
        blocks: dict[int, dict[int, tuple[np.ndarray, np.ndarray | None]]] = {}
        for a, b in zip(starts, ends):
            label, run = names[col["label"][a]], int(col["run"][a])
            pos = col["pos"][a:b]
            if pos[-1] != b - a:  # sorted, unique, from 1: complete exactly when the last is the count
                gap = int(np.flatnonzero(pos != np.arange(1, b - a + 1))[0]) + 1
                raise OrderingFileError(
                    where,
                    [
                        Problem(
                            f"participant {label} run {run}", f"position {gap} is missing; positions run 1, 2, 3, ..."
                        )
                    ],
                )
            times = onset[a:b]
            items = col["item"][a:b].copy()
            blocks.setdefault(col["label"][a], {})[run] = (
                col["code"][a:b].copy(),
                None if np.isnan(times).any() else _checked_onsets(study, where, label, run, times.copy()),
                None if (items == NO_COLUMN).any() else items,
            )
        out = {}
        for index, runs in blocks.items():
            if partial:
                out[names[index]] = [runs.get(r) for r in range(1, study.facts.n_runs + 1)]
                continue
            if sorted(runs) != list(range(1, study.facts.n_runs + 1)):
                raise OrderingFileError(
                    where,
                    [
                        Problem(
                            f"participant {names[index]}",
                            f"has runs {sorted(runs)}; the spec declares {study.facts.n_runs} run(s) "
                            f"(1 to {study.facts.n_runs})",
                        )
                    ],
                )
            out[names[index]] = [runs[r] for r in sorted(runs)]
        return out


def _check_repeats(col: dict[str, np.ndarray], names: list[str], paths: list[Path]) -> None:
    """A position given twice for one participant and run, reported at its later line (columns sorted)."""
    same = np.flatnonzero(
        (col["label"][1:] == col["label"][:-1])
        & (col["run"][1:] == col["run"][:-1])
        & (col["pos"][1:] == col["pos"][:-1])
    )
    if not len(same):
        return
    problems = []
    file = int(col["file"][same[0] + 1])
    for i in same[:MAX_PROBLEMS] + 1:
        label, run, pos = names[col["label"][i]], col["run"][i], col["pos"][i]
        where = f"line {col['line'][i]}" if col["file"][i] == file else f"{paths[col['file'][i]]} line {col['line'][i]}"
        problems.append(Problem(where, f"participant {label} run {run} position {pos} appears twice"))
    raise OrderingFileError(str(paths[file]), problems)


def _checked_onsets(study: Study, where: str, label: str, run: int, times: np.ndarray) -> np.ndarray:
    """A run's onsets (seconds, position order): they must not decrease, and the run must fit the volume limit."""
    if len(times) > 1 and np.any(np.diff(times) < 0):
        p = int(np.flatnonzero(np.diff(times) < 0)[0]) + 2
        raise OrderingFileError(
            where,
            [
                Problem(
                    f"participant {label} run {run} position {p}",
                    f"onset {times[p - 1]:g} s comes before the previous position's {times[p - 2]:g} s; "
                    "onsets must not decrease with position",
                )
            ],
        )
    tr = study.spec.timing.tr  # without one (EEG/behavioural) onsets are bounded as seconds when read
    volumes = (times[-1] if len(times) else 0.0) / tr if tr is not None else 0.0
    if volumes > limits.VOLUMES_PER_RUN.value():
        raise OrderingFileError(
            where,
            [
                Problem(
                    f"participant {label} run {run}",
                    f"its last onset {times[-1]:g} s lies {volumes:,.0f} volumes of TR {study.spec.timing.tr:g} s in; "
                    f"are the onsets in seconds? {limits.VOLUMES_PER_RUN.hint()}",
                )
            ],
        )
    return times


def _check_file(path: Path) -> None:
    """A readable file within the size limit, else OrderingFileError saying what to do."""
    try:
        if not path.is_file():
            raise OrderingFileError(
                str(path), [Problem("", "file not found; give orderings.csv or *_events.tsv files")]
            )
        size = path.stat().st_size
    except (OSError, ValueError):
        raise OrderingFileError(str(path), [Problem("", "file not found or not readable")]) from None
    if size > limits.FILE_MB.value() * 1e6:
        raise OrderingFileError(str(path), [Problem("", f"the file has {size / 1e6:,.1f} MB; {limits.FILE_MB.hint()}")])


def _rows(path: Path, delimiter: str):
    """(line number, row) of a UTF-8 CSV/TSV file read as a stream (memory stays bounded by what is kept);
    undecodable bytes or a malformed line raise OrderingFileError naming the line."""
    try:
        fh = path.open(newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise OrderingFileError(str(path), [Problem("", f"cannot be read ({exc.strerror})")]) from None
    with fh:
        reader = csv.reader(fh, delimiter=delimiter)
        while True:
            try:
                row = next(reader)
            except StopIteration:
                return
            except UnicodeDecodeError:
                raise OrderingFileError(
                    str(path),
                    [
                        Problem(
                            f"line {_first_undecodable_line(path)}",
                            "holds bytes that are not UTF-8 text; save the file as UTF-8 "
                            "(in a spreadsheet: 'CSV UTF-8'), or is this not an ordering table?",
                        )
                    ],
                ) from None
            except csv.Error as exc:
                raise OrderingFileError(
                    str(path),
                    [
                        Problem(
                            f"line {reader.line_num}",
                            f"cannot be read as a table ({exc}); fields are short names and numbers: is this the right file?",
                        )
                    ],
                ) from None
            yield reader.line_num, row


def _first_undecodable_line(path: Path) -> int:
    """The first line holding bytes that are not UTF-8 (the text reader decodes in chunks, so it cannot say)."""
    with path.open("rb") as fh:
        for number, raw in enumerate(fh, start=1):
            try:
                raw.decode("utf-8")
            except UnicodeDecodeError:
                return number
    return 1


def _header(path: Path, rows, needed: tuple[str, ...], hint: str) -> dict[str, int]:
    """Column positions from the first line, or an error naming the missing columns."""
    _, head = next(rows, (1, []))
    cols = {name.strip(): i for i, name in reversed(list(enumerate(head)))}
    missing = [c for c in needed if c not in cols]
    if missing:
        raise OrderingFileError(str(path), [Problem("line 1", f"missing column(s) {', '.join(missing)}; {hint}")])
    return cols


def _field(row: list[str], cols: dict[str, int], name: str) -> str | None:
    i = cols.get(name)
    return row[i] if i is not None and i < len(row) else None


def _whole(text: str | None, low: int, high: int) -> int | None:
    """An integer in [low, high] from a field, else None."""
    if text is None or len(text) > 12:
        return None
    try:
        value = int(text)
    except ValueError:
        return None
    return value if low <= value <= high else None


def _seconds(text: str | None, what: str, where: str, problems: list[Problem]) -> float | None:
    """A finite time in [0, limit] seconds from a field; None (and a problem) otherwise."""
    try:
        value = float(text) if text is not None and len(text) <= 40 else float("nan")
    except ValueError:
        value = float("nan")
    if not math.isfinite(value) or not 0 <= value <= limits.SECONDS.value():
        problems.append(
            Problem(
                where,
                f"{what} must be a number of seconds from 0 to {limits.SECONDS.value():,g}; got {shorten(text)} "
                f"({limits.SECONDS.hint()})",
            )
        )
        return None
    return value


def _name(text: str | None) -> str:
    return (text or "").strip()


def _code(study: Study, name: str, where: str, problems: list[Problem]) -> int | None:
    if name in study.names:
        return study.names.index(name)
    for i, p in enumerate(problems):
        if isinstance(p, _Unknown) and p.name == name:
            problems[i] = _Unknown(p.where, p.message, name, p.more + 1)
            return None
    close = difflib.get_close_matches(name, study.names, n=1) if len(name) <= MAX_NAME_CHARS else []
    hint = f" (did you mean '{close[0]}'?)" if close else ""
    problems.append(
        _Unknown(
            where, f"unknown condition {shorten(name)}{hint}; the spec's conditions: {', '.join(study.names)}", name
        )
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


def _read_csv(study: Study, path: Path, file: int, trials: _Trials) -> None:
    problems: list[Problem] = []
    found = 0
    rows = _rows(path, ",")
    cols = _header(
        path,
        rows,
        ORDERING_COLUMNS[:4],
        f"an ordering table has columns {', '.join(ORDERING_COLUMNS[:4])} (onset, duration optional)",
    )
    n_runs, max_pos = study.facts.n_runs, int(limits.TRIALS_PER_RUN.value())
    for line, row in rows:
        where = f"line {line}"
        if len(problems) >= MAX_PROBLEMS:
            break
        if not any(cell.strip() for cell in row):
            continue  # blank lines, as spreadsheets leave at the end
        run, pos = _whole(_field(row, cols, "run"), 1, n_runs), _whole(_field(row, cols, "position"), 1, max_pos)
        if run is None or pos is None:
            problems.append(_bad_run_position(row, cols, n_runs, max_pos, where))
            continue
        label = _label(row, cols)
        if not label or len(label) > MAX_NAME_CHARS:
            problems.append(Problem(where, f"participant must be a short label; got {shorten(label)}"))
            continue
        if label not in trials.labels and len(trials.labels) >= limits.PARTICIPANTS.value():
            problems.append(Problem(where, f"too many participants; {limits.PARTICIPANTS.hint()}"))
            break
        code = _code(study, _name(_field(row, cols, "condition")), where, problems)
        found += code is not None
        given = (_field(row, cols, "onset") or "").strip()
        # onsets are optional; without them the spec's timing is used
        onset = _seconds(given, "onset", where, problems) if given else None
        item = _item(study, cols, row, where, problems)
        if code is not None and (onset is not None or not given) and item is not None:
            trials.add(label, run, pos, code, onset, file, line, item)
    if problems:
        raise OrderingFileError(str(path), _wrong_spec_hint(study, problems, found))


def _item(study: Study, cols: dict[str, int], row: list[str], where: str, problems: list[Problem]) -> int | None:
    """The trial's item index: -1 for an empty cell or 'n/a' (no item), NO_COLUMN without an item column
    (or a study without items); None, with a problem, for a name that is not one of the study's items."""
    if ITEM_COLUMN not in cols or study.items is None:
        return NO_COLUMN
    name = _name(_field(row, cols, ITEM_COLUMN))
    if name in ("", "n/a"):
        return -1
    index = study.items.index(name)
    if index is None:
        close = difflib.get_close_matches(name, study.items.names, n=1) if len(name) <= MAX_NAME_CHARS else []
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        problems.append(Problem(where, f"unknown item {shorten(name)}{hint}; items come from the spec's [items]"))
    return index


def _label(row: list[str], cols: dict[str, int]) -> str:
    """The participant's label: from participant_id ('sub-01') when given, since a table saved again
    by pandas or a spreadsheet may have turned the participant column's '01' into '1'."""
    given = _name(_field(row, cols, "participant_id"))
    return given[4:] if given.startswith("sub-") else _name(_field(row, cols, "participant"))


def _bad_run_position(row: list[str], cols: dict[str, int], n_runs: int, max_pos: int, where: str) -> Problem:
    run, pos = _field(row, cols, "run"), _field(row, cols, "position")
    big = _whole(pos, max_pos + 1, 10**12) is not None
    return Problem(
        where,
        f"run and position must be whole numbers, run from 1 to {n_runs} (the spec's runs), position from 1 to "
        f"{max_pos:,}; got {shorten(run)}, {shorten(pos)}" + (f" ({limits.TRIALS_PER_RUN.hint()})" if big else ""),
    )


_BIDS = re.compile(r"sub-(?P<sub>[A-Za-z0-9]+)_.*?(?:run-(?P<run>\d{1,6})_)?events\.tsv$")


def _read_events(study: Study, path: Path) -> tuple[str, int, list[int], list[float], list[int]]:
    m = _BIDS.search(path.name)
    if not m:
        raise OrderingFileError(
            str(path), [Problem("file name", "expected a BIDS name like sub-01_task-cue_run-1_events.tsv")]
        )
    label, run = m["sub"], int(m["run"] or 1)
    if not 1 <= run <= study.facts.n_runs:
        raise OrderingFileError(
            str(path), [Problem("file name", f"run-{run}, but the spec declares {study.facts.n_runs} run(s) from 1")]
        )
    problems: list[Problem] = []
    found = 0
    rows = []
    lines = _rows(path, "\t")
    cols = _header(path, lines, EVENTS_COLUMNS, "BIDS events need onset, duration, trial_type (tab-separated)")
    max_rows = int(limits.TRIALS_PER_RUN.value())
    for line, row in lines:
        if len(problems) >= MAX_PROBLEMS:
            break
        if not any(cell.strip() for cell in row):
            continue
        if len(rows) >= max_rows:
            problems.append(
                Problem(f"line {line}", f"more trials than one run may hold; {limits.TRIALS_PER_RUN.hint()}")
            )
            break
        onset = _seconds(_field(row, cols, "onset"), "onset", f"line {line}", problems)
        code = _code(study, _name(_field(row, cols, "trial_type")), f"line {line}", problems)
        found += code is not None
        item = _item(study, cols, row, f"line {line}", problems)
        if code is not None and onset is not None and item is not None:
            rows.append((onset, code, item))
    if not rows and not problems:
        problems.append(Problem("", "no trials after the header line; an events file has one row per trial"))
    if problems:
        raise OrderingFileError(str(path), _wrong_spec_hint(study, problems, found))
    rows.sort()
    codes = [c for _, c, _ in rows]
    items = [i for _, _, i in rows]
    base = study.facts.baseline
    if base is None or base in codes or study.facts.counts[run - 1, base] == 0:
        return label, run, codes, [t for t, _, _ in rows], items
    codes, items = _restore_baseline(study, path, rows, run)
    t = study.spec.timing
    return label, run, codes, [t.lead_in + k * t.soa for k in range(len(codes))], items


def _restore_baseline(
    study: Study, path: Path, rows: list[tuple[float, int, int]], run: int
) -> tuple[list[int], list[int]]:
    """Put the omitted baseline trials back into the empty slots of a fixed-SOA run: (codes, items),
    a restored trial showing no item."""
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
    max_slots = int(limits.TRIALS_PER_RUN.value())
    for onset, code, item in rows:
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
        if round(k) >= max_slots:
            raise OrderingFileError(
                str(path),
                [
                    Problem(
                        "", f"onset {onset:g} s is trial {round(k) + 1:,} of the run; {limits.TRIALS_PER_RUN.hint()}"
                    )
                ],
            )
        if int(round(k)) in slots:
            raise OrderingFileError(str(path), [Problem("", f"two trials have onset {onset:g} s")])
        slots[int(round(k))] = (code, item)
    n = max(study.facts.run_length(run - 1), max(slots) + 1)
    # a file without an item column leaves its restored trials without one too
    none = NO_COLUMN if rows[0][2] == NO_COLUMN else -1
    filled = [slots.get(k, (study.facts.baseline, none)) for k in range(n)]
    return [c for c, _ in filled], [i for _, i in filled]
