"""audit of files holding some of the runs, its rank among valid designs, and rules named by label
the same way in check, audit, the manifest and the report."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqsolve.audit import audit, audit_orderings
from seqsolve.cli import app
from seqsolve.generate import generate
from seqsolve.ranking import RANK_STREAM, percentile, rank_designs
from seqsolve.search import SearchOptions
from seqsolve.seeds import derive_seed, reference_seed
from seqsolve.spec import load_study

SPEC = """
[study]
name = "four runs"
task = "fourruns"
participants = 2
runs = 4
seed = 11

[[conditions]]
name = "go"
trials = 6
[[conditions]]
name = "stop"
trials = 6
[[conditions]]
name = "rest"
trials = 6
baseline = true

[timing]
tr = 2.0
soa = 2.0

[[rules]]
kind = "max-run"
length = 1
label = "noRepeats"

[[rules]]
kind = "run-boundary"

[[rules]]
kind = "position"
conditions = ["rest"]
placement = "always"
first = 1
runs = [3]
label = "restOpensRun3"

[objective]
iterations = 0
"""


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    root = tmp_path_factory.mktemp("partial")
    (root / "spec.toml").write_text(SPEC)
    study = load_study(root / "spec.toml")
    generate(study, root / "designs", search=SearchOptions(iterations=0))
    with (root / "designs" / "orderings.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    return study, root, rows


def _write(path: Path, rows: list[dict]) -> Path:
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    return path


def _runs(rows, participant, runs) -> list[dict]:
    return [dict(r) for r in rows if r["participant"] == participant and int(r["run"]) in runs]


def test_one_run_of_four_is_checked_and_the_others_named(made, tmp_path):
    study, root, rows = made
    report = audit(study, [_write(tmp_path / "one.csv", _runs(rows, "01", {3}))])
    assert report.valid, [v.describe() for v in report.violations]
    assert report.absent == {"01": [1, 2, 4]}
    result = CliRunner().invoke(app, ["audit", str(root / "spec.toml"), str(tmp_path / "one.csv"), "--rank", "0"])
    assert result.exit_code == 0, result.output
    assert "participant 01: run(s) 1, 2, 4 not in the files" in result.output


def test_a_broken_run_of_a_subset_is_reported_with_the_specs_run_number(made, tmp_path):
    study, _, rows = made
    run3 = _runs(rows, "01", {3})
    # the opening rest moved to second place: the run-3 position rule breaks (and go/stop repeats may appear)
    run3[0]["condition"], run3[1]["condition"] = run3[1]["condition"], run3[0]["condition"]
    report = audit(study, [_write(tmp_path / "bad.csv", run3)])
    broken = [v for v in report.violations if v.rule == "restOpensRun3"]
    assert broken and broken[0].run == 2 and broken[0].positions == (0,)  # 0-based run 3, position 1


def test_run_boundaries_are_checked_only_between_neighbouring_runs_present(made):
    """A condition that ends run 2 and starts run 3 is a violation; runs 2 and 4 are not neighbours."""
    study, _, _ = made
    go, stop, rest = 0, 1, 2
    run_a = np.array([rest, go, stop] * 6)  # ends with stop
    run_b = np.array([stop, rest, go] * 6)  # starts with stop
    runs = [None, run_a, run_b, None]
    found = audit_orderings(study, {"01": runs}).violations
    boundary = [v for v in found if "run-boundary" in v.rule or "ends run" in v.found]
    assert len(boundary) == 1 and "ends run 2 and starts run 3" in boundary[0].found
    apart = audit_orderings(study, {"01": [None, run_a, None, run_b]}).violations
    assert not [v for v in apart if "ends run" in v.found]


def test_participants_differ_on_the_runs_present():
    """Two participants whose only present runs are equal clash, named by the spec's run numbers."""
    from tests.conftest import make_study

    study = make_study([3, 3], runs=3, participants=2, rules=[{"kind": "participants-differ"}])
    same = np.array([0, 1, 0, 1, 0, 1])
    other = np.array([1, 0, 1, 0, 1, 0])
    found = audit_orderings(study, {"01": [None, same, other], "02": [same, None, None]}).violations
    assert len(found) == 1
    assert found[0].participant == "02" and "run 1 differs from participant 01's run 2" in found[0].found


def test_percentile_counts_the_sample_at_or_below():
    rng = np.random.default_rng(5)
    sample = rng.integers(0, 20, size=200).astype(float)  # ties on purpose
    for own in (-1.0, 0.0, 7.0, 7.5, 19.0, 30.0):
        assert percentile(own, sample) == pytest.approx(100.0 * sum(s <= own for s in sample) / len(sample))


def test_rank_equals_a_brute_force_count_on_the_same_sample(made):
    """The same seed gives the same sample; each sampled design scored on its own (Scorer.figures, not the
    batched path) and counted by hand gives the reported percentile."""
    from seqsolve.efficiency.setup import make_setup
    from seqsolve.objective import References, Scorer, Weights
    from seqsolve.solve import sample_orderings
    from seqsolve.timing import draw_gaps

    study, root, _ = made
    designs = {"01": [(c, None) for c in _design_codes(study, root, "01")]}
    (rank,) = rank_designs(study, designs, 30)
    sample = sample_orderings(study, derive_seed(study.spec.study.seed, RANK_STREAM), 30)
    setup = make_setup(study)
    refs = References.for_study(study, setup, reference_seed(study.spec.study.seed))
    seed = derive_seed(study.spec.study.seed, 0)
    codes = [c for c, _ in designs["01"]]
    scorer = Scorer(study, Weights.from_study(study), refs, seed, draw_gaps(study, codes, seed), setup)
    own = scorer.figures(codes).score
    below = sum(scorer.figures(d).score <= own + 1e-12 for d in sample)
    assert rank.samples == len(sample) and rank.score == pytest.approx(own, rel=1e-9)
    assert rank.percentile == pytest.approx(100.0 * below / len(sample))
    assert rank_designs(study, designs, 30) == [rank]  # seeded: the same again


def _design_codes(study, root, label) -> list[np.ndarray]:
    from seqsolve.io.tables import read_orderings

    return read_orderings(study, [root / "designs" / "orderings.csv"])[label]


def test_labels_are_shown_in_check_audit_manifest_and_report(made, tmp_path):
    study, root, rows = made
    check = CliRunner().invoke(app, ["check", str(root / "spec.toml")])
    assert "noRepeats (rules[1]): no more than 1 trial of any one condition in a row" in check.output
    run = _runs(rows, "01", {1, 2, 3, 4})
    run[1]["condition"] = run[2]["condition"]  # positions 2 and 3 the same: a repeat
    result = CliRunner().invoke(
        app, ["audit", str(root / "spec.toml"), str(_write(tmp_path / "r.csv", run)), "--rank", "0"]
    )
    assert result.exit_code == 1 and "(rule: noRepeats)" in result.output
    manifest = json.loads((root / "designs" / "manifest.json").read_text())
    assert [r["label"] for r in manifest["rules"]] == ["noRepeats", None, "restOpensRun3"]
    assert "restOpensRun3 (rules[3])" in (root / "designs" / "report.html").read_text()


def test_audit_header_counts_the_rules_check_lists(made, tmp_path):
    _, root, _ = made
    check = CliRunner().invoke(app, ["check", str(root / "spec.toml")])
    audited = CliRunner().invoke(
        app, ["audit", str(root / "spec.toml"), str(root / "designs" / "orderings.csv"), "--rank", "5"]
    )
    listed = len([line for line in check.output.splitlines() if line.strip().startswith("- ")])
    said = int(re.search(r"against the spec's (\d+) rule\(s\)", audited.output).group(1))
    assert listed == said == 3
    assert "rank among 5 valid designs" in audited.output


def test_singular_sentences():
    from tests.conftest import make_study

    study = make_study(
        [4, 4], rules=[{"kind": "max-run", "length": 1}, {"kind": "min-gap", "conditions": ["a"], "gap": 1}]
    )
    sentences = [r.sentence(study.facts) for r in study.rules]
    assert sentences[0] == "no more than 1 trial of any one condition in a row"
    assert sentences[1] == "at least 1 trial between two trials of 'a'"


def test_a_design_with_other_counts_is_not_ranked_and_says_why(made, tmp_path):
    """A run with one trial more than the spec's cannot be scored on the spec's timing: no rank, a note."""
    study, _, rows = made
    one = _runs(rows, "01", {1, 2, 3, 4}) + _runs(rows, "02", {1, 2, 3, 4})
    extra = dict(one[-1], position=str(int(one[-1]["position"]) + 1))
    report = audit(study, [_write(tmp_path / "more.csv", one + [extra])], rank_samples=5)
    assert [r.participant for r in report.ranks] == ["01"]
    assert any("02 not ranked" in n for n in report.notes)


def test_an_impossible_rule_is_named_by_its_label(tmp_path):
    spec = tmp_path / "c.toml"
    spec.write_text(
        '[study]\nname = "c"\ntask = "c"\nparticipants = 1\n[[conditions]]\nname = "a"\ntrials = 10\n'
        '[[conditions]]\nname = "b"\ntrials = 2\n[timing]\ntr = 2.0\nsoa = 2.0\n'
        '[[rules]]\nkind = "max-run"\nlength = 2\nlabel = "shortRuns"\n'
    )
    result = CliRunner().invoke(app, ["check", str(spec)])
    assert result.exit_code == 1
    assert "  - shortRuns (rules[1]): no more than 2 trials of any one condition in a row" in result.output


def test_audit_json_keeps_progress_off_stdout(made):
    _, root, _ = made
    args = ["audit", str(root / "spec.toml"), str(root / "designs" / "orderings.csv"), "--rank", "3", "--json"]
    result = CliRunner().invoke(app, args)
    report = json.loads(result.stdout)  # progress lines went to stderr
    assert report["valid"] and [r["participant"] for r in report["ranks"]] == ["01", "02"]
    assert all(r["samples"] == 3 and 0 <= r["percentile"] <= 100 for r in report["ranks"])
    assert "ranking: valid design 3 of 3" in result.stderr
