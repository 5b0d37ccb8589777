"""Stimulus items: catalogue, Latin-square lists, assignment after the ordering, the check, files and errors."""

from __future__ import annotations

import csv
import io
import itertools
import json
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.errors import InfeasibleError, SpecError
from seqsolve.generate import design_study
from seqsolve.item_assign import REPEAT_RULE, assign_items, check_items
from seqsolve.items import balance_notes
from seqsolve.solve import generate_orderings
from seqsolve.spec import load_study

runner = CliRunner()
EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "melody_endings.toml"

SPEC = """
[study]
name = "items"
task = "items"
participants = {participants}
runs = {runs}
seed = 5

[[conditions]]
name = "light"
trials = {light}

[[conditions]]
name = "heavy"
trials = {heavy}

[[conditions]]
name = "probe"
trials = 1
items = ["p1", "p2", "p3", "p4", "p5", "p6"]

[[conditions]]
name = "rest"
trials = 2
baseline = true

[timing]
tr = 2.0
soa = 2.0

[objective]
iterations = 0

[items]
file = "{file}"
repeat = {repeat}
rotate = {rotate}
{rules}
"""

RUN_RULE = '[[items.rules]]\nkind = "attribute-run"\nattribute = "shape"\nlength = {length}\n'


def items_table(n: int, shapes=("cube", "ball", "cone"), sep: str = ",") -> str:
    rows = [sep.join(["item", "shape", "stim_file"])]
    rows += [sep.join([f"obj{i:02d}", shapes[i % len(shapes)], f"img/obj{i:02d}.png"]) for i in range(n)]
    return "\n".join(rows) + "\n"


def write_spec(
    tmp_path,
    *,
    n_items=12,
    light=3,
    heavy=3,
    runs=2,
    participants=4,
    repeat=False,
    rotate=None,
    length=None,
    table=None,
    file="objects.csv",
):
    (tmp_path / file).write_text(items_table(n_items) if table is None else table, encoding="utf-8")
    rotate = '["light", "heavy"]' if rotate is None else rotate
    text = SPEC.format(
        participants=participants,
        runs=runs,
        light=light,
        heavy=heavy,
        file=file,
        repeat=str(repeat).lower(),
        rotate=rotate,
        rules=RUN_RULE.format(length=length) if length else "",
    )
    spec = tmp_path / "s.toml"
    spec.write_text(text, encoding="utf-8")
    return spec


def given_items(study):
    """(participant index, runs, items) of every participant: ordering, then items."""
    out = []
    for k, p in enumerate(generate_orderings(study)):
        out.append((k, p.runs, assign_items(study.items, k, p.label, p.runs, p.seed)))
    return out


# ------------------------------------------------------------------------------------------------
# lists


def test_lists_form_a_latin_square_over_participants(tmp_path):
    # rows participants, columns the rotating conditions, entries the list each shows: with K lists
    # every K consecutive participants form a Latin square (each list once per row and per column),
    # the defining property of Latin-square counterbalancing (common practice in item-based designs)
    study = load_study(write_spec(tmp_path, n_items=12, light=3, heavy=3, participants=4))
    cat = study.items
    square = [[cat.pool.index(cat.lists(p)[c]) for c in cat.rotate] for p in range(4)]
    for start in (0, 2):
        block = np.array(square[start : start + 2])
        assert all(sorted(row) == [0, 1] for row in block)
        assert all(sorted(col) == [0, 1] for col in block.T)


def test_every_item_is_shown_once_in_each_rotating_condition_across_a_cycle(tmp_path):
    # 12 pooled items, two lists of 6; 3 trials x 2 runs = 6 per condition: each list shown whole,
    # so over 2 participants (one cycle) every item appears once as 'light' and once as 'heavy'
    study = load_study(write_spec(tmp_path, participants=4))
    seen: dict[tuple[int, int], int] = {}
    for _, runs, items in given_items(study):
        for codes, shown in zip(runs, items):
            for c, i in zip(codes, shown):
                if c in study.items.rotate:
                    seen[(int(i), int(c))] = seen.get((int(i), int(c)), 0) + 1
    pooled = [i for g in study.items.pool for i in g]
    assert {(i, c) for i in pooled for c in study.items.rotate} == set(seen)
    assert set(seen.values()) == {2}  # 4 participants = 2 cycles
    assert balance_notes(study.items, study.facts, 4) == []


def test_the_counts_that_cannot_balance_are_said(tmp_path):
    study = load_study(write_spec(tmp_path, participants=3, light=2, heavy=3))
    notes = balance_notes(study.items, study.facts, 3)
    assert any("3 participants (not a multiple of 2)" in n and "1 or 2 time(s)" in n for n in notes)
    assert any("'light' shows 4 of its list's 6 items" in n for n in notes)
    out = tmp_path / "o"
    result = runner.invoke(app, ["generate", str(tmp_path / "s.toml"), "-o", str(out)])
    assert result.exit_code == 0, result.output
    assert "note: items rotate over 2 conditions but there are 3 participants" in result.output


# ------------------------------------------------------------------------------------------------
# assignment and the check


def test_items_come_from_the_lists_without_repeats(tmp_path):
    study = load_study(write_spec(tmp_path))
    for k, runs, items in given_items(study):
        lists = study.items.lists(k)
        flat_c, flat_i = np.concatenate(runs), np.concatenate(items)
        for c, i in zip(flat_c, flat_i):
            assert (i in lists[c]) if lists[c] else i == -1
        shown = flat_i[flat_i >= 0]
        assert len(set(shown.tolist())) == len(shown)
        assert check_items(study.items, k, runs, items) == []


def test_repeated_items_are_shown_equally_often(tmp_path):
    # 4 items per list for 3 x 3 = 9 trials: each item 2 or 3 times (floor and ceil of 9 / 4)
    study = load_study(write_spec(tmp_path, n_items=8, light=3, heavy=3, runs=3, repeat=True))
    for k, runs, items in given_items(study):
        flat_c, flat_i = np.concatenate(runs), np.concatenate(items)
        for c in study.items.rotate:
            uses = np.bincount(flat_i[flat_c == c], minlength=len(study.items.names))[list(study.items.lists(k)[c])]
            assert sorted(set(uses.tolist())) == [2, 3]


def test_same_seed_same_items(tmp_path):
    study = load_study(write_spec(tmp_path, length=1))
    first = [np.concatenate(i) for _, _, i in given_items(study)]
    again = [np.concatenate(i) for _, _, i in given_items(study)]
    assert all(np.array_equal(a, b) for a, b in zip(first, again))
    assert not all(np.array_equal(first[0], b) for b in first[1:]), "participants get their own draws"


def test_check_names_each_broken_item_rule(tmp_path):
    study = load_study(write_spec(tmp_path, length=1, participants=2))
    k, runs, items = given_items(study)[0]
    cat = study.items
    bad = [i.copy() for i in items]
    heavy = cat.rotate[1]
    p = int(np.flatnonzero(runs[0] == heavy)[0])
    bad[0][p] = cat.lists(1)[heavy][0]  # the other participant's list
    found = check_items(cat, k, runs, bad)
    assert any("not in its list for this participant" in v.found for v in found)
    # the same item twice
    bad = [i.copy() for i in items]
    q = int(np.flatnonzero(runs[1] == heavy)[0])
    bad[1][q] = bad[0][p] = items[0][p]
    assert any(v.rule == REPEAT_RULE for v in check_items(cat, k, runs, bad))
    # an item for a trial of the baseline, which has none
    bad = [i.copy() for i in items]
    rest = int(np.flatnonzero(runs[0] == study.facts.baseline)[0])
    bad[0][rest] = 0
    assert any("condition without items" in v.found for v in check_items(cat, k, runs, bad))


def test_check_finds_a_run_of_one_shape_against_a_hand_count():
    # runs_of against a plain groupby count (itertools, no project code)
    from seqsolve.item_assign import _run_violations
    from seqsolve.items import ItemCatalogue
    from seqsolve.spec import AttributeRun

    shapes = ("cube", "cube", "ball", "cube", "", "cube")
    cat = ItemCatalogue(
        tuple(f"i{n}" for n in range(6)), {"shape": shapes}, ((0, 1, 2, 3, 4, 5),), (), (), False, (), ""
    )
    rule = AttributeRun(kind="attribute-run", attribute="shape", length=1)
    for order in itertools.permutations(range(6), 6):
        seq = [shapes[i] for i in order]
        longest = max((len(list(g)) for v, g in itertools.groupby(seq) if v), default=0)
        assert bool(_run_violations(cat, rule, [np.array(order)])) == (longest > 1)


@settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture]
)
@given(st.integers(1, 3), st.integers(2, 4), st.integers(1, 3), st.booleans(), st.integers(0, 10_000))
def test_assigned_items_always_pass_the_check_or_are_proven_impossible(
    tmp_path, length, trials, n_shapes, repeat, seed
):
    """Hypothesis: whatever the counts, shapes and length, the items given pass the independent check;
    when the assignment says impossible, a brute force over every way to give the shapes agrees."""
    shapes = ("cube", "ball", "cone")[:n_shapes]
    n_items = 2 * trials * 2 if not repeat else 2 * max(1, trials - 1)
    table = items_table(n_items, shapes)
    folder = tmp_path / f"h{seed}_{length}_{trials}_{n_shapes}_{repeat}"
    folder.mkdir()
    study = load_study(
        write_spec(
            folder,
            n_items=n_items,
            light=trials,
            heavy=trials,
            repeat=repeat,
            length=length,
            table=table,
            participants=2,
        )
    )
    for k, p in enumerate(generate_orderings(study)):
        try:
            items = assign_items(study.items, k, p.label, p.runs, seed)
        except InfeasibleError:
            assert not _some_assignment_passes(study, k, p.runs), "the item model missed a valid assignment"
            continue
        assert check_items(study.items, k, p.runs, items) == []


def _some_assignment_passes(study, k, runs) -> bool:
    """Brute force: is there any way to give each item trial a shape (as many of each as the lists hold)
    with no more than `length` of one shape in a row? Small runs only."""
    cat = study.items
    rule = cat.rules[0]
    flat = np.concatenate(runs)
    shape = np.array(cat.attributes["shape"] + ("",), dtype=object)
    lists = cat.lists(k)
    slots = [t for t in range(len(flat)) if lists[flat[t]]]
    pools = {c: [shape[i] for i in lists[c]] for c in set(flat[slots].tolist())}
    needs = {c: int((flat == c).sum()) for c in pools}
    choices = []
    for c in pools:  # the multiset of shapes each condition's trials can show (each item floor/ceil times)
        whole, part = divmod(needs[c], len(pools[c]))
        options = set()
        for extra in itertools.combinations(range(len(pools[c])), part):
            options.add(tuple(sorted(pools[c] * whole + [pools[c][e] for e in extra])))
        choices.append((c, options))
    for picked in itertools.product(*[o for _, o in choices]):
        by_c = {c: list(m) for (c, _), m in zip(choices, picked)}
        orders = [set(itertools.permutations(by_c[c])) for c, _ in choices]
        for arrangement in itertools.product(*orders):
            given = dict(zip([c for c, _ in choices], [list(a) for a in arrangement]))
            seq = np.array([""] * len(flat), dtype=object)
            for t in slots:
                seq[t] = given[flat[t]].pop(0)
            ok = True
            start = 0
            for run in runs:
                part = seq[start : start + len(run)]
                start += len(run)
                if max((len(list(g)) for v, g in itertools.groupby(part) if v), default=0) > rule.length:
                    ok = False
            if ok:
                return True
    return False


def test_an_ordering_that_leaves_the_item_rule_no_room_is_explained(tmp_path):
    # every 'light' item is a cube, and min-run keeps 'light' trials in stretches of 2 or more: the
    # ordering leaves "never two cubes in a row" no room, and the message says what to change
    table = "item,condition,shape\n" + "".join(f"a{i},light,cube\n" for i in range(6))
    table += "".join(f"b{i},heavy,ball\n" for i in range(6))
    spec = write_spec(tmp_path, runs=1, participants=1, light=6, heavy=6, rotate="[]", length=1, table=table)
    text = spec.read_text().replace(
        "[items]\n", '[[rules]]\nkind = "min-run"\nlength = 2\nconditions = ["light"]\n\n[items]\n'
    )
    spec.write_text(text)
    result = runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out")])
    assert result.exit_code == 1, result.output
    assert "no way to give the trials items" in result.output
    assert "two trials in a row never show items of the same 'shape'" in result.output
    assert "give the conditions rules that do" in result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


# ------------------------------------------------------------------------------------------------
# outputs and audit


def test_items_go_into_every_output_and_audit_reads_them_back(tmp_path):
    spec = write_spec(tmp_path, length=1, participants=2)
    out = tmp_path / "designs"
    result = runner.invoke(app, ["generate", str(spec), "-o", str(out)])
    assert result.exit_code == 0, result.output
    table = list(csv.DictReader(io.StringIO((out / "orderings.csv").read_text())))
    assert all(r["item"] == "" for r in table if r["condition"] == "rest")
    assert all(r["item"].startswith(("obj", "p")) for r in table if r["condition"] != "rest")
    events = (out / "sub-01" / "sub-01_task-items_run-1_events.tsv").read_text().splitlines()
    assert events[0].split("\t") == ["onset", "duration", "trial_type", "item", "stim_file"]
    probe = [e.split("\t") for e in events[1:] if e.split("\t")[2] == "probe"]
    assert probe and all(row[4] == "n/a" for row in probe)  # inline items have no stim_file (BIDS: n/a)
    stim = (out / "stimulus" / "sub-01_run-1_trials.csv").read_text().splitlines()[0]
    assert stim == "position,condition,item,shape,stim_file,onset,duration,gap"
    for files in ([out / "orderings.csv"], sorted(out.glob("sub-*/*_events.tsv"))):
        audit = runner.invoke(app, ["audit", str(spec), *map(str, files)])
        assert audit.exit_code == 0, audit.output
        assert "its items" in audit.output and "not checked" not in audit.output
    # the same item twice: audit exits 1 naming it
    rows = (out / "orderings.csv").read_text().splitlines()
    objs = [n for n, r in enumerate(rows) if ",obj" in r and r.startswith("01,")]
    rows[objs[1]] = rows[objs[1]].rsplit(",", 1)[0] + "," + rows[objs[0]].rsplit(",", 1)[1]
    (tmp_path / "tampered.csv").write_text("\n".join(rows) + "\n")
    audit = runner.invoke(app, ["audit", str(spec), str(tmp_path / "tampered.csv")])
    assert audit.exit_code == 1 and "is shown 2 times" in audit.output, audit.output


def test_generating_twice_gives_the_same_bytes(tmp_path):
    spec = write_spec(tmp_path, length=1, participants=2)
    for name in ("a", "b"):
        assert runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / name)]).exit_code == 0
    for f in (
        "orderings.csv",
        "sub-02/sub-02_task-items_run-2_events.tsv",
        "stimulus/sub-02_run-1_trials.csv",
        "manifest.json",
    ):
        assert (tmp_path / "a" / f).read_bytes() == (tmp_path / "b" / f).read_bytes(), f


def test_the_example_gives_each_melody_once_and_never_one_instrument_twice_in_a_row():
    study = load_study(EXAMPLE)
    designs = design_study(study)
    inst = study.items.attributes["instrument"]
    for d in designs:
        flat = np.concatenate(d.items)
        shown = flat[flat >= 0]
        assert len(set(shown.tolist())) == len(shown) == 2 * (6 + 6 + 2)
        for run in d.items:
            seq = [inst[i] if i >= 0 else "" for i in run]
            assert all(not (a and a == b) for a, b in zip(seq, seq[1:]))


# ------------------------------------------------------------------------------------------------
# bad items: the file, the line or field, what to do; exit 2, no traceback

BAD = [
    pytest.param(
        "item;shape\nobj00;cube\n",
        "objects.csv",
        ["objects.csv", "line 1", "no 'item' column", "delimiter"],
        id="wrong-delimiter",
    ),
    pytest.param(
        "item,shape\nobj00,cube\nobj00,ball\n", "objects.csv", ["line 3", "'obj00' is given twice"], id="duplicate-item"
    ),
    pytest.param(
        "item,condition\nobj00,ligth\n",
        "objects.csv",
        ["objects.csv", "line 2", "unknown condition 'ligth'"],
        id="unknown-condition",
    ),
    pytest.param("item,shape\n,cube\n", "objects.csv", ["line 2", "item column is empty"], id="empty-item"),
    pytest.param(
        "item,shape,shape\nobj00,a,b\n", "objects.csv", ["line 1", "'shape' is named twice"], id="duplicate-column"
    ),
    pytest.param("item,shape\n", "objects.csv", ["no items after the header"], id="header-only"),
    pytest.param(
        'item,shape\n"obj\n00",cube\n', "objects.csv", ["line 2", "printable characters"], id="newline-in-name"
    ),
    pytest.param(
        "item,shape\nobj00,cube,extra\n", "objects.csv", ["line 2", "3 fields but the header names 2"], id="extra-field"
    ),
    pytest.param("item\tshape\n" + "x" * 250 + "\tcube\n", "objects.tsv", ["line 2", "at most 200"], id="long-name"),
    pytest.param(
        "item,shape\nobj00," + "y" * 140_000 + "\n",
        "objects.csv",
        ["line 2", "cannot be read as a table"],
        id="huge-field",
    ),
    pytest.param("item,shape\nobj00,cube\x00\n", "objects.csv", ["line 2"], id="nul-byte"),
]


@pytest.mark.parametrize("table, file, expected", BAD)
def test_bad_items_files_are_refused_with_file_and_line(tmp_path, table, file, expected):
    spec = write_spec(tmp_path, table=table, file=file)
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2, result.output
    for text in expected:
        assert text in result.output, (text, result.output)
    assert "Traceback" not in result.output


def test_items_file_not_utf8_or_missing(tmp_path):
    spec = write_spec(tmp_path)
    (tmp_path / "objects.csv").write_bytes("item,shape\nobj\u00e9,cube\n".encode("latin-1"))
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2 and "not UTF-8" in result.output, result.output
    (tmp_path / "objects.csv").unlink()
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2 and "items file not found" in result.output, result.output


@pytest.mark.parametrize(
    "kwargs, expected",
    [
        (dict(n_items=11), ["items.rotate", "number 11, not a multiple of the 2", "add 1 or drop 1"]),
        (
            dict(n_items=8),
            ["items.rotate", "'light' has 6 trials per participant but its list holds 4", "repeat = true"],
        ),
        (dict(rotate='["light", "lihgt"]'), ["items.rotate[2]", "unknown condition 'lihgt'"]),
        (dict(rotate='["light"]'), ["items.rotate", "at least 2 conditions"]),
        (dict(rotate="[]"), ["line 2", "name no condition and [items] rotate names none"]),
        (dict(length=0), ["items.rules[1].length", "greater than or equal to 1"]),
    ],
    ids=["uneven-pool", "too-few-items", "unknown-rotate", "one-rotate", "no-condition", "length-zero"],
)
def test_items_that_do_not_fit_the_spec_name_the_field(tmp_path, kwargs, expected):
    spec = write_spec(tmp_path, **kwargs)
    if kwargs.get("length") == 0:
        spec.write_text(spec.read_text() + RUN_RULE.format(length=0))
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2, result.output
    for text in expected:
        assert text in result.output, (text, result.output)


def test_a_rule_on_an_attribute_the_file_lacks_is_named(tmp_path):
    spec = write_spec(tmp_path, length=1)
    spec.write_text(spec.read_text().replace('attribute = "shape"', 'attribute = "colour"'))
    with pytest.raises(SpecError) as err:
        load_study(spec)
    assert "items.rules[1].attribute" in str(err.value) and "shape, stim_file" in str(err.value)


def test_too_few_inline_items_are_named_at_their_condition(tmp_path):
    spec = write_spec(tmp_path, runs=7)  # probe: 7 trials, 6 inline items; pool lists too small as well
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2
    assert "conditions[3].items" in result.output and "'probe' has 7 trials per participant" in result.output


def test_the_baseline_cannot_show_items(tmp_path):
    spec = write_spec(tmp_path, rotate='["light", "rest"]')
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2 and "items.rotate" in result.output and "baseline 'rest'" in result.output


def test_audit_of_a_participant_the_spec_does_not_name_checks_items_against_every_list(tmp_path):
    spec = write_spec(tmp_path, length=1, participants=2)
    out = tmp_path / "designs"
    assert runner.invoke(app, ["generate", str(spec), "-o", str(out)]).exit_code == 0
    text = (out / "orderings.csv").read_text().replace("01,", "77,").replace("sub-01", "sub-77")
    (tmp_path / "other.csv").write_text(text)
    audit = runner.invoke(app, ["audit", str(spec), str(tmp_path / "other.csv")])
    assert audit.exit_code == 0, audit.output  # its list is unknown: any list of the condition will do
    # but a probe item in a rotating condition is in no list of it
    rows = text.splitlines()
    n = next(i for i, r in enumerate(rows) if r.startswith("77,") and ",light," in r)
    rows[n] = rows[n].rsplit(",", 1)[0] + ",p1"
    (tmp_path / "other.csv").write_text("\n".join(rows) + "\n")
    audit = runner.invoke(app, ["audit", str(spec), str(tmp_path / "other.csv")])
    assert audit.exit_code == 1 and "item 'p1', not in its list" in audit.output, audit.output


COUNTERBALANCE = """
[[counterbalance]]
name = "timbre"
levels = ["sine", "square"]
design = "latin"

[[counterbalance]]
name = "hand"
levels = ["left", "right"]
scope = "participants"
"""


def test_items_beside_counterbalanced_columns_in_every_table(tmp_path):
    """Column order: the fixed columns, then the counterbalanced factors, then the items (last)."""
    spec = write_spec(tmp_path, length=1, participants=4)
    spec.write_text(spec.read_text(encoding="utf-8") + COUNTERBALANCE, encoding="utf-8")
    out = tmp_path / "designs"
    result = runner.invoke(app, ["generate", str(spec), "-o", str(out)])
    assert result.exit_code == 0, result.output
    head = (out / "orderings.csv").read_text().splitlines()[0]
    assert head == "participant,run,position,condition,onset,duration,participant_id,timbre,hand,item"
    events = (out / "sub-01" / "sub-01_task-items_run-1_events.tsv").read_text().splitlines()
    assert events[0].split("\t") == ["onset", "duration", "trial_type", "timbre", "item", "stim_file"]
    assert all(len(e.split("\t")) == 6 for e in events[1:])
    stim = (out / "stimulus" / "sub-01_run-1_trials.csv").read_text().splitlines()[0]
    assert stim == "position,condition,timbre,hand,item,shape,stim_file,onset,duration,gap"
    sidecar = json.loads((out / "task-items_events.json").read_text())
    assert {"timbre", "item", "stim_file"} <= set(sidecar)
    # the folder: orderings with their items, and participants.tsv against [[counterbalance]]
    audit = runner.invoke(app, ["audit", str(spec), str(out), "--rank", "0"])
    assert audit.exit_code == 0, audit.output
    assert "its items" in audit.output and "assignment against its 2 counterbalanced" in audit.output
    # some runs absent: the items of the runs present are still checked, with their run numbers
    tampered = [r for r in (out / "orderings.csv").read_text().splitlines() if not r.startswith("02,1,")]
    objs = [n for n, r in enumerate(tampered) if ",obj" in r and r.startswith("02,2,")]
    tampered[objs[1]] = tampered[objs[1]].rsplit(",", 1)[0] + "," + tampered[objs[0]].rsplit(",", 1)[1]
    (tmp_path / "partial.csv").write_text("\n".join(tampered) + "\n")
    audit = runner.invoke(app, ["audit", str(spec), str(tmp_path / "partial.csv"), "--json", "--rank", "0"])
    assert audit.exit_code == 1, audit.output
    report = json.loads(audit.output)
    assert report["absent_runs"] == {"02": [1]}
    repeats = [v for v in report["violations"] if v["rule"] == REPEAT_RULE]
    assert [(v["participant"], v["run"]) for v in repeats] == [("02", 1)]  # run index 1: the spec's run 2
