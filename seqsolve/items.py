"""Stimulus items: the catalogue (conditions' `items` and the [items] file), each participant's lists.

Items are a second stage after the ordering: the ordering says which condition each trial has,
then seqsolve/item_assign.py gives each trial an item of its condition's list (with its own CP-SAT
model when [[items.rules]] limit item attributes), and `check_items` there judges the result
independently. Item rules therefore never change the ordering; if an ordering leaves them no room
the assignment says so and suggests a rule on conditions that would.

Lists (Latin square): the items of the conditions named in `[items] rotate` (and items given no
condition in the file) form one pool, split in declared order into as many equal lists as there are
rotating conditions. Participant p (counted from 0 in the spec's order) shows list (j + p) mod K in
rotating condition j, so over any K consecutive participants each item appears once in each of the
K conditions (a cyclic Latin square of lists and conditions, common practice in item-based designs).
"""

from __future__ import annotations

import csv
import hashlib
import io
import re
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

from seqsolve.errors import Problem, SpecError, shorten
from seqsolve.io import limits
from seqsolve.rules.base import StudyFacts

#: the items file's own columns; every other column is an attribute of the item
ITEM_COLUMN = "item"
CONDITION_COLUMN = "condition"
#: an attribute column written to events.tsv too (BIDS' optional stim_file column)
STIM_FILE = "stim_file"
MAX_TEXT = 200  # an item's name or attribute value
MAX_PROBLEMS = 20
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")  # tabs and line breaks would break the TSV and CSV outputs


@dataclass(frozen=True)
class ItemCatalogue:
    """Every item of a study, with its attributes, and which condition lists hold it.

    names[i] is item i's name; attributes[column][i] its value ('' when not given);
    own[c] the items of condition c that do not rotate; pool the rotating lists, each a tuple of
    item indices; rotate the condition codes the lists rotate over (list g in rotate[g] for the
    first participant).
    """

    names: tuple[str, ...]
    attributes: dict[str, tuple[str, ...]]
    own: tuple[tuple[int, ...], ...]
    pool: tuple[tuple[int, ...], ...]
    rotate: tuple[int, ...]
    repeat: bool
    rules: tuple  # spec.AttributeRun, in the spec's order
    content: str  # what was read (for the spec hash)

    def lists(self, participant: int) -> list[tuple[int, ...]]:
        """Per condition code, the items its trials may show for the participant at this index (from 0)."""
        out = list(self.own)
        k = len(self.rotate)
        for j, code in enumerate(self.rotate):
            out[code] = self.pool[(j + participant) % k]
        return out

    @cached_property
    def _by_name(self) -> dict[str, int]:
        return {n: i for i, n in enumerate(self.names)}

    def index(self, name: str) -> int | None:
        """The index of the item with this name, or None."""
        return self._by_name.get(name)

    def with_items(self) -> list[int]:
        """Condition codes whose trials get an item."""
        return [c for c, own in enumerate(self.own) if own or c in self.rotate]

    def digest(self) -> str:
        return "sha256:" + hashlib.sha256(self.content.encode()).hexdigest()


def load_items(spec, spec_path: Path, facts: StudyFacts) -> ItemCatalogue | None:
    """The catalogue of a validated spec, or None when it names no items.

    Raises
    ------
    SpecError
        Naming the items file and line, or the spec field, and what to do.
    """
    section = spec.items
    inline = [(i, c.items) for i, c in enumerate(spec.conditions) if c.items]
    if section is None and not inline:
        return None
    rows: list[tuple[str, int | None, dict[str, str], str]] = []  # name, condition, attributes, where
    for i, names in inline:
        rows += [(n.strip(), i, {}, f"conditions[{i + 1}].items") for n in names]
    columns: list[str] = []
    content = repr(inline)
    if section is not None and section.file:
        path = Path(section.file) if Path(section.file).is_absolute() else spec_path.parent / section.file
        file_rows, columns, text = _read_file(path, facts)
        rows += file_rows
        content += text
    problems = _check_names(rows)
    rotate = _rotate_codes(section, facts, problems)
    problems += _check_baseline(rows, rotate, facts)
    problems += [] if problems else _check_pool(rows, rotate)
    if not rows:
        problems.append(Problem("items", "no items given: list them in conditions' items or in [items] file"))
    if problems:
        raise SpecError(str(spec_path), problems)
    catalogue = _build(rows, columns, rotate, section, facts, content)
    problems = _check_room(catalogue, facts) + _check_rules(catalogue)
    if problems:
        raise SpecError(str(spec_path), problems)
    return catalogue


def _build(rows, columns, rotate, section, facts, content) -> ItemCatalogue:
    names = tuple(r[0] for r in rows)
    attributes = {col: tuple(r[2].get(col, "") for r in rows) for col in columns}
    own: list[list[int]] = [[] for _ in facts.names]
    pooled: list[int] = []
    for i, (_, cond, _, _) in enumerate(rows):
        if cond is None or cond in rotate:
            pooled.append(i)
        else:
            own[cond].append(i)
    k = len(rotate)
    size = len(pooled) // k if k else 0
    pool = tuple(tuple(pooled[g * size : (g + 1) * size]) for g in range(k))
    return ItemCatalogue(
        names=names,
        attributes=attributes,
        own=tuple(tuple(o) for o in own),
        pool=pool,
        rotate=tuple(rotate),
        repeat=bool(section.repeat) if section is not None else False,
        rules=tuple(section.rules) if section is not None else (),
        content=content,
    )


def _check_names(rows) -> list[Problem]:
    """Item names: non-empty, short, printable, and each given once."""
    problems = []
    seen: dict[str, str] = {}
    for name, _, _, where in rows:
        if not name or len(name) > MAX_TEXT or _CONTROL.search(name):
            problems.append(
                Problem(where, f"an item name must be 1 to {MAX_TEXT} printable characters; got {shorten(name)}")
            )
        elif name in seen:
            problems.append(
                Problem(where, f"item {shorten(name)} is given twice (first at {seen[name]}); names differ")
            )
        else:
            seen[name] = where
        if len(problems) >= MAX_PROBLEMS:
            break
    return problems


def _check_baseline(rows, rotate: list[int], facts: StudyFacts) -> list[Problem]:
    """The baseline's trials are left out of the events files (as analysis tools expect), so an item
    given to one could not be read back: refused, naming where it was given."""
    base = facts.baseline
    if base is None:
        return []
    where = next((w for _, cond, _, w in rows if cond == base), "items.rotate" if base in rotate else None)
    if where is None:
        return []
    return [
        Problem(
            where,
            f"the baseline '{facts.names[base]}' is left out of the events files, so its trials show no items; "
            "give the items to another condition, or drop baseline = true",
        )
    ]


def _rotate_codes(section, facts: StudyFacts, problems: list[Problem]) -> list[int]:
    if section is None:
        return []
    codes = []
    for j, name in enumerate(section.rotate, start=1):
        if name not in facts.names:
            problems.append(
                Problem(
                    f"items.rotate[{j}]", f"unknown condition {shorten(name)}; conditions: {', '.join(facts.names)}"
                )
            )
        elif facts.code(name) in codes:
            problems.append(Problem(f"items.rotate[{j}]", f"'{name}' is named twice"))
        else:
            codes.append(facts.code(name))
    if len(section.rotate) == 1:
        problems.append(Problem("items.rotate", "name at least 2 conditions for items to rotate over (or none)"))
    return codes


def _check_pool(rows, rotate: list[int]) -> list[Problem]:
    """Items without a condition need lists to join; the pool must split into equal lists."""
    loose = [where for _, cond, _, where in rows if cond is None]
    if loose and not rotate:
        return [
            Problem(
                loose[0],
                f"{len(loose)} item(s) name no condition and [items] rotate names none; give each item's "
                "condition, or name the conditions the items rotate over",
            )
        ]
    k = len(rotate)
    pooled = sum(1 for _, cond, _, _ in rows if cond is None or cond in rotate)
    if k and pooled == 0:
        return [Problem("items.rotate", "no items for these conditions: list them or give them in the file")]
    if k and pooled % k:
        return [
            Problem(
                "items.rotate",
                f"the items of the rotating conditions (and those given no condition) number {pooled}, not a "
                f"multiple of the {k} conditions they rotate over; add {k - pooled % k} or drop {pooled % k} "
                "item(s) so that every list has as many",
            )
        ]
    return []


def _check_room(cat: ItemCatalogue, facts: StudyFacts) -> list[Problem]:
    """Enough items for every condition's trials per participant (unless items may repeat)."""
    problems = []
    for c, name in enumerate(facts.names):
        items = cat.pool[cat.rotate.index(c)] if c in cat.rotate else cat.own[c]
        need = int(facts.counts[:, c].sum())
        if items and not cat.repeat and need > len(items):
            where = "items.rotate" if c in cat.rotate else f"conditions[{c + 1}].items"
            what = "its list holds" if c in cat.rotate else "it has"
            problems.append(
                Problem(
                    where,
                    f"'{name}' has {need} trials per participant but {what} {len(items)} item(s); add items "
                    "or set [items] repeat = true",
                )
            )
    return problems


def _check_rules(cat: ItemCatalogue) -> list[Problem]:
    problems = []
    for j, rule in enumerate(cat.rules, start=1):
        if rule.attribute not in cat.attributes:
            known = ", ".join(cat.attributes) or "none (give an items file with attribute columns)"
            problems.append(
                Problem(
                    f"items.rules[{j}].attribute",
                    f"no item attribute {shorten(rule.attribute)}; the items file's columns: {known}",
                )
            )
    return problems


def balance_notes(cat: ItemCatalogue | None, facts: StudyFacts, n_participants: int) -> list[str]:
    """What the item lists cannot balance for these counts: said in the manifest, never silently."""
    if cat is None or not cat.rotate:
        return []
    k = len(cat.rotate)
    notes = []
    if n_participants % k:
        notes.append(
            f"items rotate over {k} conditions but there are {n_participants} participants (not a multiple of "
            f"{k}): each item appears in each of those conditions {n_participants // k} or "
            f"{n_participants // k + 1} time(s), not equally often"
        )
    size = len(cat.pool[0])
    for c in cat.rotate:
        need = int(facts.counts[:, c].sum())
        if need < size and not cat.repeat:
            notes.append(
                f"'{facts.names[c]}' shows {need} of its list's {size} items to each participant (chosen at "
                "random): the lists rotate evenly, the items shown may not"
            )
        elif cat.repeat and need % size:
            notes.append(
                f"'{facts.names[c]}' has {need} trials for a list of {size} items: some items are shown once "
                "more than others"
            )
    return notes


# ----------------------------------------------------------------------------------------------
# the items file: CSV or TSV, UTF-8, streamed, every field bounded


def _read_file(path: Path, facts: StudyFacts) -> tuple[list, list[str], str]:
    """Rows (name, condition code or None, attributes, where) of the items file, its attribute
    columns in file order, and its text for the hash."""
    text = _file_text(path)
    delimiter = "\t" if path.suffix.lower() in (".tsv", ".tab", ".txt") else ","
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    problems: list[Problem] = []
    try:
        header = [h.strip() for h in next(reader, [])]
        cols = _columns(header, path)
        rows = []
        ended = 1  # the line the previous record ended on: a record starts on the next
        for row in reader:
            line, ended = ended + 1, reader.line_num
            if len(problems) >= MAX_PROBLEMS:
                break
            if not any(cell.strip() for cell in row):
                continue
            if len(rows) >= limits.ITEMS.value():
                problems.append(Problem(f"line {line}", f"too many items; {limits.ITEMS.hint()}"))
                break
            rows.append(_row(row, cols, header, facts, f"{path.name} line {line}", problems))
    except csv.Error as exc:
        raise SpecError(str(path), [Problem(f"line {reader.line_num}", f"cannot be read as a table ({exc})")]) from None
    if not rows and not problems:
        problems.append(Problem("", "no items after the header line; give one row per item"))
    if problems:
        raise SpecError(str(path), problems)
    attributes = [h for h in header if h not in (ITEM_COLUMN, CONDITION_COLUMN)]
    return rows, attributes, text


def _file_text(path: Path) -> str:
    try:
        if not path.is_file():
            raise SpecError(str(path), [Problem("", "items file not found; [items] file is relative to the spec")])
        size = path.stat().st_size
        if size > limits.FILE_MB.value() * 1e6:
            raise SpecError(str(path), [Problem("", f"the file has {size / 1e6:,.1f} MB; {limits.FILE_MB.hint()}")])
        return path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise SpecError(
            str(path), [Problem("", "not UTF-8 text; save the items table as UTF-8 (in a spreadsheet: 'CSV UTF-8')")]
        ) from None
    except (OSError, ValueError) as exc:
        raise SpecError(str(path), [Problem("", f"cannot be read ({getattr(exc, 'strerror', None) or exc})")]) from None


def _columns(header: list[str], path: Path) -> dict[str, int]:
    problems = []
    if ITEM_COLUMN not in header:
        problems.append(
            Problem(
                "line 1",
                f"no '{ITEM_COLUMN}' column; the first line names the columns: item, optionally condition, "
                "then any attributes (e.g. item,condition,category); is the delimiter right (.csv: comma, .tsv: tab)?",
            )
        )
    for j, h in enumerate(header):
        if not h or len(h) > 64 or _CONTROL.search(h):
            problems.append(Problem("line 1", f"column {j + 1} needs a short name; got {shorten(h)}"))
        elif header.index(h) != j:
            problems.append(Problem("line 1", f"column {shorten(h)} is named twice"))
    if problems:
        raise SpecError(str(path), problems[:MAX_PROBLEMS])
    return {h: j for j, h in enumerate(header)}


def _row(row, cols, header, facts: StudyFacts, where: str, problems: list[Problem]):
    if len(row) > len(header):
        problems.append(Problem(where, f"{len(row)} fields but the header names {len(header)} columns"))
    values = {h: (row[j].strip() if j < len(row) else "") for h, j in cols.items()}
    for h, v in values.items():
        if len(v) > MAX_TEXT or _CONTROL.search(v):
            problems.append(Problem(where, f"{h} must be at most {MAX_TEXT} printable characters; got {shorten(v)}"))
            values[h] = ""
    cond = values.get(CONDITION_COLUMN, "")
    code = None
    if cond:
        if cond in facts.names:
            code = facts.code(cond)
        else:
            problems.append(
                Problem(where, f"unknown condition {shorten(cond)}; the spec's conditions: {', '.join(facts.names)}")
            )
    attrs = {h: v for h, v in values.items() if h not in (ITEM_COLUMN, CONDITION_COLUMN)}
    name = values.get(ITEM_COLUMN, "")
    if not name:
        problems.append(Problem(where, "the item column is empty; every row names one item"))
    return name, code, attrs, where
