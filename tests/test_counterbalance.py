"""Counterbalancing across participants: the designs' defining properties (checked here from first
principles, not through counterbalance.py's own checks), the assignment from the seed, the outputs,
the audit of a study's assignment with broken assignments (mutants), and bad specs."""

from __future__ import annotations

import csv
import itertools
import json
import math
import random
from collections import Counter
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from seqsolve import spec as spec_module
from seqsolve.audit import assignment_violations
from seqsolve.cli import app
from seqsolve.counterbalance import (
    NAME_PATTERN,
    Counterbalance,
    assign,
    assign_study,
    assignment_problems,
    crossing,
    design_rows,
    latin_rows,
    sentence,
    williams_rows,
)
from seqsolve.errors import SeqsolveError, SpecError
from seqsolve.generate import generate
from seqsolve.search import SearchOptions
from seqsolve.spec import load_study, study_from_mapping
from tests.fuzzing import mutate_spec, mutate_table

runner = CliRunner()


def _pairs(rows) -> Counter:
    """How often each ordered pair (a, b) of levels stands side by side (a directly before b)."""
    return Counter((a, b) for row in rows for a, b in zip(row, row[1:]))


# ---------------------------------------------------------------------------------------------
# 1. the designs, against their definitions


@pytest.mark.parametrize("n", range(2, 13))
def test_williams_design_is_latin_and_balances_first_order_carry_over(n):
    """Williams (1949, Aust. J. Sci. Res. A2:149): for even n, n orders in which every level directly
    follows every other level exactly once; for odd n, 2n orders (a square and its mirror image) in
    which it does so exactly twice. Each order uses each level once, and each level stands at each
    position equally often (n/n_rows per position: once for even n, twice for odd n)."""
    rows = williams_rows(n)
    assert len(rows) == (n if n % 2 == 0 else 2 * n)
    assert all(sorted(r) == list(range(n)) for r in rows)
    per_position = len(rows) // n
    for pos in range(n):
        assert Counter(r[pos] for r in rows) == {lev: per_position for lev in range(n)}
    pairs = _pairs(rows)
    assert set(pairs) == {(a, b) for a in range(n) for b in range(n) if a != b}  # no level follows itself
    assert set(pairs.values()) == {1 if n % 2 == 0 else 2}


def test_williams_square_of_four_is_the_textbook_one():
    """The 4 x 4 Williams square as textbooks print it (from memory; the zig-zag first row A B D C and
    its cyclic shifts): ABDC, BCAD, CDBA, DACB."""
    printed = {"ABDC", "BCAD", "CDBA", "DACB"}
    assert {"".join("ABCD"[i] for i in row) for row in williams_rows(4)} == printed


@pytest.mark.parametrize("n", range(2, 9))
def test_latin_rows_form_a_latin_square(n):
    """A Latin square: each level once in every row and once in every column."""
    rows = latin_rows(n)
    assert len(rows) == n
    assert all(sorted(r) == list(range(n)) for r in rows)
    assert all(sorted(col) == list(range(n)) for col in zip(*rows))


def test_cyclic_latin_square_of_four_does_not_balance_carry_over():
    """Why Williams exists: in the cyclic square A always precedes B (three times) and never C (fact of
    the trade: cyclic squares are the standard example of unbalanced carry-over)."""
    pairs = _pairs(latin_rows(4))
    assert pairs[(0, 1)] == 3 and pairs[(0, 2)] == 0


@pytest.mark.parametrize("n", range(2, 7))
def test_permutations_are_all_n_factorial_orders(n):
    section = Counterbalance(name="f", levels=[f"l{i}" for i in range(n)], design="permutations")
    rows = design_rows(section)
    assert len(rows) == math.factorial(n) == len(set(rows))
    assert all(sorted(r) == list(range(n)) for r in rows)


# ---------------------------------------------------------------------------------------------
# 2. the assignment


def _section(**kw) -> Counterbalance:
    return Counterbalance(**{"name": "set", "levels": ["a", "b", "c", "d"], **kw})


@pytest.mark.parametrize("design", ["williams", "latin", "permutations"])
def test_every_order_is_taken_equally_often_and_passes_the_audit(design):
    section = _section(design=design)
    n_rows = len(design_rows(section))
    (a,) = assign([section], 2 * n_rows, 4, seed=11)
    assert set(Counter(a.row_of).values()) == {2}
    orders = {str(p): tuple(a.levels_of(p)) for p in range(2 * n_rows)}
    assert assignment_problems(section, orders) == []


def test_assignment_repeats_with_the_seed_and_changes_with_another():
    section = _section()
    one = assign([section], 8, 4, seed=5)[0].row_of
    assert assign([section], 8, 4, seed=5)[0].row_of == one
    assert any(assign([section], 8, 4, seed=s)[0].row_of != one for s in range(6, 12))


def test_runs_repeat_the_order_in_blocks():
    (a,) = assign([_section(levels=["x", "y"])], 2, 6, seed=0)
    first = a.levels_of(0)
    assert first[:2] == first[2:4] == first[4:] and sorted(first[:2]) == ["x", "y"]


def test_uneven_counts_differ_by_at_most_one_when_accepted():
    section = _section(accept_imbalance=True)
    (a,) = assign([section], 10, 4, seed=3)
    assert sorted(Counter(a.row_of).values()) == [2, 2, 3, 3]
    orders = {str(p): tuple(a.levels_of(p)) for p in range(10)}
    assert assignment_problems(section, orders) == []
    strict = _section()
    assert "cannot be balanced" in assignment_problems(strict, orders)[0][1]


def _hand(**kw) -> Counterbalance:
    return Counterbalance(**{"name": "hand", "levels": ["left", "right"], "scope": "participants", **kw})


def test_sections_are_crossed_when_the_count_allows():
    """8 participants, 4 Williams orders x 2 hands: every combination once (no order always with one hand)."""
    a, b = assign([_section(), _hand()], 8, 4, seed=2)
    assert len(set(zip(a.row_of, b.row_of))) == 8
    assert "each of the 8 combinations of their orders goes to 1 participant(s)" in crossing([a, b])


@pytest.mark.parametrize("n_participants", [4, 12, 20])
def test_each_section_stays_balanced_when_crossing_cannot_be_full(n_participants):
    """4 participants cannot cross 4 x 2 orders; each section alone still has every order equally often."""
    a, b = assign([_section(), _hand()], n_participants, 4, seed=2)
    assert len(set(Counter(a.row_of).values())) == 1 and len(set(Counter(b.row_of).values())) == 1
    if n_participants % 8:
        assert "crossed in part" in crossing([a, b])


@given(st.lists(st.integers(2, 5), min_size=1, max_size=3), st.integers(1, 4), st.integers(0, 1000))
@settings(max_examples=60, deadline=None, derandomize=True)
def test_assignment_balances_each_section_for_any_common_multiple(levels, times, seed):
    """Whatever the sections, with a participant count that each section's orders divide, each alone is
    balanced (its own audit passes), and with a multiple of their product every combination is equal."""
    sections = [
        _hand(name=f"f{i}", levels=[f"l{j}" for j in range(n)])
        if i % 2
        else _section(name=f"f{i}", levels=[f"l{j}" for j in range(n)])
        for i, n in enumerate(levels)
    ]
    sizes = [len(design_rows(sec)) for sec in sections]
    n_participants = math.lcm(*sizes) * times
    found = assign(sections, n_participants, max(levels) * math.lcm(*levels), seed)
    for a in found:
        orders = {str(p): tuple(a.levels_of(p)[: len(a.rows[0])]) for p in range(n_participants)}
        assert assignment_problems(a.section, orders) == []
    if n_participants % math.prod(sizes) == 0:
        assert len(set(Counter(zip(*(a.row_of for a in found))).values())) == 1


def test_accepted_imbalance_still_needs_every_order():
    """Five participants all on one order: within one of each other, trivially, yet three orders unused."""
    section = _section(accept_imbalance=True)
    orders = {str(p): ("a", "b", "d", "c") for p in range(5)}
    assert "differ by more than one" in assignment_problems(section, orders)[0][1]


# ---------------------------------------------------------------------------------------------
# 3. a study: spec, outputs, audit

BASE = {
    "study": {"name": "cb", "task": "cb", "participants": 8, "runs": 4, "seed": 9},
    "conditions": [{"name": "go", "trials": 6}, {"name": "stop", "trials": 2}],
    "timing": {"soa": 1.0},
    "counterbalance": [
        {"name": "sound", "levels": ["sine", "square", "saw", "tri"]},
        {"name": "hand", "levels": ["left", "right"], "scope": "participants"},
    ],
}


def _spec(**changes) -> dict:
    data = json.loads(json.dumps(BASE))
    for key, value in changes.items():
        section, _, field = key.partition("__")
        if field:
            data[section][field] = value
        else:
            data[section] = value
    return data


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A generated study (no TR, no search) written to a folder, with its spec file beside it."""
    root = tmp_path_factory.mktemp("cb")
    spec = root / "spec.toml"
    spec.write_text(_toml(BASE))
    study = study_from_mapping(BASE, source=str(spec))
    generate(study, root / "out", search=SearchOptions(iterations=0))
    return spec, root / "out"


def _toml(data: dict) -> str:
    """The small spec above as TOML (strings, numbers, lists of strings only)."""

    def value(v):
        return json.dumps(v)

    lines = []
    for key in ("study", "timing"):
        lines.append(f"[{key}]")
        lines += [f"{k} = {value(v)}" for k, v in data[key].items()]
    for key in ("conditions", "counterbalance"):
        for table in data[key]:
            lines.append(f"[[{key}]]")
            lines += [f"{k} = {value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


def _read_tsv(path: Path) -> list[dict]:
    with path.open(newline="") as fh:
        return list(csv.DictReader(fh, delimiter="\t"))


def test_outputs_carry_each_participants_levels(folder):
    spec, out = folder
    people = _read_tsv(out / "participants.tsv")
    manifest = json.loads((out / "manifest.json").read_text())
    by_name = {c["name"]: c for c in manifest["counterbalance"]}
    for row in people:
        label = row["participant_id"][4:]
        runs = by_name["sound"]["participants"][label]
        assert row["sound"] == "-".join(runs) and row["hand"] == by_name["hand"]["participants"][label][0]
        for r, level in enumerate(runs, start=1):
            events = _read_tsv(out / f"sub-{label}" / f"sub-{label}_task-cb_run-{r}_events.tsv")
            assert {e["sound"] for e in events} == {level} and "hand" not in events[0]
            with (out / "stimulus" / f"sub-{label}_run-{r}_trials.csv").open(newline="") as fh:
                trials = list(csv.DictReader(fh))
            assert {(t["sound"], t["hand"]) for t in trials} == {(level, row["hand"])}
    assert set(json.loads((out / "participants.json").read_text())) == {"sound", "hand"}
    assert "sound" in json.loads((out / "task-cb_events.json").read_text())


def test_pybids_reads_the_extra_columns(folder):
    bids = pytest.importorskip("bids")  # pybids, in the test extra
    _, out = folder
    layout = bids.BIDSLayout(out, validate=True)
    assert len(layout.get(suffix="events", extension=".tsv")) == 8 * 4
    validator = pytest.importorskip("bids_validator").BIDSValidator()
    assert validator.is_bids("/participants.json") and validator.is_bids("/participants.tsv")


def test_audit_accepts_the_folder_and_the_table(folder):
    spec, out = folder
    for target in (out, out / "participants.tsv"):
        result = runner.invoke(app, ["audit", str(spec), str(target)])
        assert result.exit_code == 0, result.output
        assert "counterbalanced factor(s) (sound, hand)" in result.output


def test_audit_of_orderings_alone_says_the_assignment_was_not_checked(folder):
    spec, out = folder
    result = runner.invoke(app, ["audit", str(spec), str(out / "orderings.csv")])
    assert result.exit_code == 0, result.output
    assert "not its 2 counterbalanced factor(s) (sound, hand): give the output folder" in result.output


def _mutated(out: Path, tmp_path: Path, change) -> Path:
    rows = _read_tsv(out / "participants.tsv")
    change(rows)
    path = tmp_path / "participants.tsv"
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), delimiter="\t", lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    return path


def _set(column, value, who=0):
    def change(rows):
        rows[who][column] = value

    return change


def _cyclic(rows):
    """Every participant onto the cyclic Latin square (2 each): equal counts, Latin, not Williams."""
    for i, row in enumerate(rows):
        levels = ["sine", "square", "saw", "tri"]
        row["sound"] = "-".join(levels[(i % 4 + j) % 4] for j in range(4))


def _same_start(rows):
    """Four orders twice each, all opening with sine: equal counts, positions unbalanced."""
    orders = ["sine-square-saw-tri", "sine-square-tri-saw", "sine-saw-square-tri", "sine-tri-saw-square"]
    for i, row in enumerate(rows):
        row["sound"] = orders[i % 4]


def _one_hand(rows):
    for row in rows:
        row["hand"] = "left"


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda rows: rows[0].update(sound=rows[1]["sound"]), "not taken equally often"),
        (_cyclic, "carry-over between runs is not balanced"),
        (_same_start, "run position 1 is not balanced"),
        (_set("sound", "sine-sine-saw-tri"), "repeats a level"),
        (_set("sound", "sine-square-saw"), "3 level(s) given"),
        (_set("hand", "middle"), "unknown level 'middle'"),
        (_one_hand, "possible order(s) unused"),
        (lambda rows: rows.pop(), "7 participants cannot be balanced"),
    ],
    ids=["moved", "cyclic", "same-start", "repeat", "short", "unknown", "one-hand", "dropped"],
)
def test_audit_catches_a_broken_assignment(folder, tmp_path, change, message):
    spec, out = folder
    result = runner.invoke(app, ["audit", str(spec), str(_mutated(out, tmp_path, change))])
    assert result.exit_code == 1, result.output
    assert message in result.output


@pytest.mark.parametrize(
    "content, message",
    [
        ("participant_id\tsound\nsub-01\tsine-square-saw-tri\n", "missing column(s) hand"),
        ("participant_id\tsound\thand\n01\tsine-square-saw-tri\tleft\n", "must look like sub-01"),
        ("participant_id\tsound\thand\nsub-01\t\tleft\n", "column sound"),
        ("participant_id\tsound\thand\n", "no participants"),
        (
            "participant_id\tsound\thand\nsub-01\tsine-square-saw-tri\tleft\nsub-01\tsine-square-saw-tri\tleft\n",
            "listed twice",
        ),
    ],
    ids=["column", "id", "empty-value", "no-rows", "twice"],
)
def test_audit_refuses_an_unusable_table_with_the_line(folder, tmp_path, content, message):
    spec, _ = folder
    path = tmp_path / "participants.tsv"
    path.write_text(content)
    result = runner.invoke(app, ["audit", str(spec), str(path)])
    assert result.exit_code == 2, result.output
    assert message in result.output and "Traceback" not in result.output


def test_check_prints_a_sentence_per_section(folder):
    spec, _ = folder
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 0, result.output
    assert "follows a Williams design" in result.output and "4 orders, each taken by 2 participant(s)" in result.output
    assert "'hand' (left, right) is assigned between participants: each level to 4 participant(s)" in result.output


def test_same_seed_same_files(folder, tmp_path):
    spec, out = folder
    study = study_from_mapping(BASE, source=str(spec))
    generate(study, tmp_path / "again", search=SearchOptions(iterations=0))
    for name in ("participants.tsv", "orderings.csv", "manifest.json"):
        assert (tmp_path / "again" / name).read_bytes() == (out / name).read_bytes(), name


# ---------------------------------------------------------------------------------------------
# 4. bad specs: each message names the field and what to do


@pytest.mark.parametrize(
    "changes, where, message",
    [
        ({"study__participants": 6}, "counterbalance[1].accept_imbalance", "multiple of 4 participants (e.g. 8)"),
        ({"study__runs": 3}, "counterbalance[1].levels", "give study.runs a multiple of 4"),
        (
            {"counterbalance": [{"name": "go_", "levels": ["a", "b"], "scope": "participants", "design": "latin"}]},
            "counterbalance[1]",
            "leave it out with scope = 'participants'",
        ),
        (
            {"counterbalance": [{"name": "f", "levels": list("abcdefg"), "design": "permutations"}]},
            "counterbalance[1]",
            "5,040 orders",
        ),
        ({"counterbalance": [{"name": "onset", "levels": ["a", "b"]}]}, "counterbalance[1].name", "already a column"),
        ({"counterbalance": [{"name": "f", "levels": ["a", "a"]}]}, "counterbalance[1].levels", "must differ"),
    ],
    ids=["participants", "runs", "design-scope", "too-many", "name", "levels"],
)
def test_bad_counterbalance_sections_are_named(changes, where, message):
    with pytest.raises(SpecError) as info:
        study_from_mapping(_spec(**changes))
    text = str(info.value)
    assert where in text and message in text, text


def test_accept_imbalance_lets_uneven_counts_through_and_says_so():
    data = _spec(study__participants=6)
    data["counterbalance"][0]["accept_imbalance"] = True
    study = study_from_mapping(data)
    assert "each taken by 1 to 2 participant(s) (unequal: accept_imbalance = true)" in sentence(assign_study(study)[0])


def test_name_pattern_is_the_specs():
    assert NAME_PATTERN == spec_module.NAME_PATTERN


def test_every_order_of_a_small_design_is_a_permutation_of_its_levels():
    for n in range(2, 5):
        for design in ("williams", "latin", "permutations"):
            rows = design_rows(_section(levels=[f"l{i}" for i in range(n)], design=design))
            assert set(rows) <= set(itertools.permutations(range(n)))


# ---------------------------------------------------------------------------------------------
# 5. fuzzing: whatever the section or the table, only our errors come out (tests/fuzzing.py's mutations)

FUZZ = settings(max_examples=100, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
LEVEL_NAMES = ["sine", "square", "saw", "tri", "left", "right", "go"]


@FUZZ
@given(st.integers(0, 2**32 - 1))
def test_a_mutated_counterbalanced_spec_loads_or_raises_our_error(seed):
    data = mutate_spec(json.loads(json.dumps(BASE)), random.Random(seed), LEVEL_NAMES)
    try:
        study = study_from_mapping(data, source="fuzzed.toml")
    except SeqsolveError:
        return
    for a in assign_study(study):  # what loads is usable, and its own assignment passes its audit
        orders = {str(p): tuple(a.levels_of(p)[: len(a.rows[0])]) for p in range(len(study.participants))}
        assert assignment_problems(a.section, orders) == []


@FUZZ
@given(st.integers(0, 2**32 - 1))
def test_a_mutated_participants_table_reads_or_raises_our_error(folder, tmp_path_factory, seed):
    spec, out = folder
    study = load_study(spec)
    path = tmp_path_factory.mktemp("table") / "participants.tsv"
    path.write_bytes(mutate_table((out / "participants.tsv").read_text(), random.Random(seed), LEVEL_NAMES, "\t"))
    try:
        assignment_violations(study, path)
    except SeqsolveError:
        pass
