"""Reading a participants table (BIDS participants.tsv) back: each participant's counterbalanced levels."""

from __future__ import annotations

import re
from pathlib import Path

from seqsolve.counterbalance import MOST_LEVELS, ORDER_SEPARATOR
from seqsolve.errors import OrderingFileError, Problem, shorten
from seqsolve.io import limits
from seqsolve.io.tables import MAX_NAME_CHARS, MAX_PROBLEMS, _check_file, _header, _rows
from seqsolve.spec import Study

PARTICIPANTS_FILE = "participants.tsv"
#: the longest value a counterbalanced column can hold: a run order of the most levels, each a name
LONGEST_VALUE = MOST_LEVELS * (MAX_NAME_CHARS + 1)


def is_participants_table(path: Path) -> bool:
    """A participants table is told by its BIDS name (participants.tsv, any folder)."""
    return path.name == PARTICIPANTS_FILE


def read_assignment(study: Study, path: str | Path) -> dict[str, dict[str, tuple[str, ...]]]:
    """{factor: {participant label: its levels}} for every [[counterbalance]] section of the spec.

    A value is a level, or a run order of levels joined by '-' (run 1 first), as generate writes them.
    Levels are not judged here (counterbalance.assignment_problems does that); the table must be
    readable, have participant_id and one column per counterbalanced factor, and no participant twice.

    Raises
    ------
    OrderingFileError
        Naming the file, the line and what to do.
    """
    path = Path(path)
    _check_file(path)
    names = [c.name for c in study.spec.counterbalance]
    if not names:
        raise OrderingFileError(
            str(path),
            [Problem("", "the spec has no [[counterbalance]] section, so there is no assignment to check here")],
        )
    rows = _rows(path, "\t")
    hint = f"participants.tsv is tab-separated with participant_id and a column per counterbalanced factor ({', '.join(names)})"
    cols = _header(path, rows, ("participant_id", *names), hint)
    out: dict[str, dict[str, tuple[str, ...]]] = {n: {} for n in names}
    problems: list[Problem] = []
    for line, row in rows:
        if len(problems) >= MAX_PROBLEMS:
            break
        if not any(cell.strip() for cell in row):
            continue
        label = _participant(row, cols, f"line {line}", problems)
        if label is None:
            continue
        if label in out[names[0]]:
            problems.append(Problem(f"line {line}", f"participant {shorten(label)} is listed twice"))
            continue
        if len(out[names[0]]) >= limits.PARTICIPANTS.value():
            problems.append(Problem(f"line {line}", f"too many participants; {limits.PARTICIPANTS.hint()}"))
            break
        for n in names:
            value = row[cols[n]].strip() if cols[n] < len(row) else ""
            if not value or len(value) > LONGEST_VALUE:
                problems.append(
                    Problem(f"line {line}", f"column {n}: a level or a run order is needed; got {shorten(value)}")
                )
                break
            out[n][label] = tuple(v.strip() for v in value.split(ORDER_SEPARATOR))
    if not problems and not out[names[0]]:
        problems.append(Problem("", "no participants after the header line"))
    if problems:
        raise OrderingFileError(str(path), problems)
    return out


def _participant(row: list[str], cols: dict[str, int], where: str, problems: list[Problem]) -> str | None:
    """The label of a row's participant_id ('sub-01' gives '01'), or None with a problem noted."""
    i = cols["participant_id"]
    given = row[i].strip() if i < len(row) else ""
    if len(given) > MAX_NAME_CHARS or not re.fullmatch(r"sub-[A-Za-z0-9]+", given):
        problems.append(Problem(where, f"participant_id must look like sub-01; got {shorten(given)}"))
        return None
    return given[4:]
