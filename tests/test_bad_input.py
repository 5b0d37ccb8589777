"""Broken specs and ordering files: each gives a message naming file, field or line, exit 2, no traceback."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app

runner = CliRunner()

BASE = """
[study]
name = "t"
task = "cue"
participants = 2
runs = 2

[[conditions]]
name = "gain"
trials = 4
levels = { valence = "good" }

[[conditions]]
name = "loss"
trials = 4
levels = { valence = "bad" }

[[conditions]]
name = "rest"
trials = 4
baseline = true

[timing]
tr = 2.0
soa = 2.0
"""


def rule(body: str) -> str:
    return BASE + "\n[[rules]]\n" + body + "\n"


# (spec text, what the message must contain); the kind a row breaks is in its id
SPECS = [
    pytest.param(rule('kind = "max-run"\nlenght = 2'), ["rules[1].lenght", "did you mean 'length'"], id="max-run-typo"),
    pytest.param(
        rule('kind = "max-run"'),
        ["rules[1].length", "missing required key", 'kind = "max-run", length = 3'],
        id="max-run-missing",
    ),
    pytest.param(rule('kind = "max-run"\nlength = "two"'), ["rules[1].length", "integer"], id="max-run-type"),
    pytest.param(
        rule('kind = "max-run"\nlength = 0'),
        ["rules[1].length", "greater than or equal to 1", "got 0"],
        id="max-run-range",
    ),
    pytest.param(
        rule('kind = "max_run"\nlength = 2'),
        ["rules[1]", "unknown rule kind 'max_run'", "did you mean 'max-run'"],
        id="kind-typo",
    ),
    pytest.param(rule("length = 2"), ["rules[1]", "every rule needs a 'kind'"], id="kind-missing"),
    pytest.param(
        rule('kind = "max-run"\nlength = 2\nconditions = ["gian"]'),
        ["rules[1]", "unknown condition 'gian'", "did you mean 'gain'"],
        id="unknown-condition",
    ),
    pytest.param(
        rule('kind = "max-run"\nlength = 2\nconditions = ["valence=happy"]'),
        ["factor 'valence' has no level 'happy'", "good"],
        id="unknown-level",
    ),
    pytest.param(
        rule('kind = "min-run"\nlength = 1'), ["rules[1].length", "greater than or equal to 2"], id="min-run-range"
    ),
    pytest.param(
        rule('kind = "balanced-transitions"\ntolerance = -1'),
        ["rules[1].tolerance", "greater than or equal to 0"],
        id="balanced-transitions-range",
    ),
    pytest.param(
        rule('kind = "balanced-triples"\ntolerance = -2'),
        ["rules[1].tolerance", "greater than or equal to 0"],
        id="balanced-triples-range",
    ),
    pytest.param(
        rule('kind = "forbidden-transition"\nfirst = "gain"'),
        ["rules[1].then", "missing required key"],
        id="forbidden-transition-missing",
    ),
    pytest.param(
        rule('kind = "min-gap"\ngap = 2'), ["rules[1].conditions", "missing required key"], id="min-gap-missing"
    ),
    pytest.param(
        rule('kind = "run-boundary"\nwindow = 0'),
        ["rules[1].window", "greater than or equal to 1"],
        id="run-boundary-range",
    ),
    pytest.param(
        rule('kind = "position"\nconditions = ["rest"]\nplacement = "always"\nfirst = 1\nlast = 1'),
        ["rules[1]", "exactly one of 'first', 'last' or 'at'"],
        id="position-both",
    ),
    pytest.param(
        rule('kind = "position"\nconditions = ["rest"]\nplacement = "sometimes"\nfirst = 1'),
        ["rules[1].placement", "'never' or 'always'"],
        id="position-placement",
    ),
    pytest.param(
        rule('kind = "even-spread"\ntolerance = 1'), ["rules[1]", "exactly one of 'segments'"], id="even-spread-missing"
    ),
    pytest.param(
        rule('kind = "participants-differ"\nmin_differences = 0'),
        ["rules[1].min_differences", "greater than or equal to 1"],
        id="participants-differ-range",
    ),
    pytest.param(
        BASE.replace("tr = 2.0", "tr = 2.0\ninclude = ['standard']"),
        ["timing.include", "top-level key"],
        id="include-in-section",
    ),
    pytest.param(
        "include = ['nonesuch']\n" + BASE, ["include[1]", "no rule set 'nonesuch'", "standard"], id="include-unknown"
    ),
    pytest.param(
        BASE.replace("soa = 2.0", "soa = 2.0\niti = { distribution = 'fixed', value = 1.0 }"),
        ["timing", "exactly one of 'soa'"],
        id="soa-and-iti",
    ),
    pytest.param(
        BASE.replace("soa = 2.0", "trial_duration = 1.0\niti = { distribution = 'gamma', value = 1.0 }"),
        ["timing.iti", "fixed, uniform, exponential, choice"],
        id="iti-unknown",
    ),
    pytest.param(
        BASE.replace('name = "loss"', 'name = "gain"'),
        ["conditions[2].name", "declared twice"],
        id="duplicate-condition",
    ),
    pytest.param(
        BASE.replace('name = "rest"', 'name = "null"'),
        ["conditions[3].name", "missing value"],
        id="missing-marker-name",
    ),
    pytest.param(
        BASE.replace('trials = 4\nlevels = { valence = "good" }', 'share = 0.7\nlevels = { valence = "good" }'),
        ["study.trials_per_run"],
        id="share-without-length",
    ),
    pytest.param(
        BASE.replace("participants = 2", "participants = ['p-1']"), ["study.participants[1]", "pattern"], id="bad-label"
    ),
    pytest.param(BASE.replace("[timing]", "[timing\n"), ["TOML syntax error", "line"], id="toml-syntax"),
    pytest.param(
        BASE.replace("tr = 2.0\n", "") + "\n[objective]\ndetection = 1.0\n",
        ["objective.detection", "needs timing.tr"],
        id="detection-without-tr",
    ),
    pytest.param(
        BASE + "\n[analysis]\ncontrasts = ['gain - lost']\n",
        ["analysis.contrasts[1]", "'lost'", "modelled: gain, loss"],
        id="contrast-name",
    ),
    pytest.param(
        BASE + "\n[analysis]\ncontrasts = ['gain * loss']\n", ["analysis.contrasts[1]", "linear"], id="contrast-product"
    ),
    pytest.param(
        BASE + "\n[analysis]\ncontrasts = ['gain - (loss']\n",
        ["analysis.contrasts[1]", "missing ')'"],
        id="contrast-paren",
    ),
    pytest.param(
        BASE + "\n[analysis]\ncontrasts = ['gain; loss']\n",
        ["analysis.contrasts[1]", "unexpected ';'"],
        id="contrast-symbol",
    ),
    pytest.param(BASE + "\n[analysis]\nar1 = 1.5\n", ["analysis.ar1", "less than 1"], id="analysis-ar1"),
    pytest.param(
        BASE + "\n[objective]\ndetection = 0\nestimation = 0\n",
        ["objective", "at least one of detection, estimation, counterbalance"],
        id="objective-no-weight",
    ),
    pytest.param(BASE + "\n[objective]\nestimaton = 1.0\n", ["objective.estimaton", "estimation"], id="objective-typo"),
    pytest.param(BASE + "\n[objective]\niterations = -5\n", ["objective.iterations"], id="objective-iterations"),
]


@pytest.mark.parametrize("text, expected", SPECS)
@pytest.mark.parametrize("command", ["check", "generate", "score"])
def test_broken_spec_gives_clear_error(tmp_path, text, expected, command):
    spec = tmp_path / "study.toml"
    spec.write_text(text)
    args = [command, str(spec)] + {"generate": ["-o", str(tmp_path / "out")], "score": [str(tmp_path / "o.csv")]}.get(
        command, []
    )
    result = runner.invoke(app, args)
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output
    assert result.exception is None or isinstance(result.exception, SystemExit)
    assert "study.toml" in result.output
    for piece in expected:
        assert piece in result.output, (piece, result.output)
    assert not (tmp_path / "out").exists()


def test_missing_spec_file(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2 and "file not found" in result.output


CSV_HEAD = "participant,run,position,condition\n"


def good_rows(label="01"):
    return "".join(
        f"{label},{r},{p},{c}\n" for r in (1, 2) for p, c in enumerate(["gain", "loss", "rest"] * 4, start=1)
    )


ORDERINGS = [
    pytest.param(
        "o.csv",
        CSV_HEAD + good_rows().replace("01,1,2,loss", "01,1,2,los"),
        ["o.csv", "line 3", "unknown condition 'los'", "did you mean 'loss'"],
        id="unknown-condition",
    ),
    pytest.param(
        "o.csv",
        "participant,run,position,cond\n01,1,1,gain\n",
        ["o.csv", "line 1", "missing column(s) condition"],
        id="missing-column",
    ),
    pytest.param(
        "o.csv",
        CSV_HEAD + good_rows().replace("01,1,2,loss\n", ""),
        ["participant 01 run 1", "position 2 is missing"],
        id="missing-position",
    ),
    pytest.param(
        "o.csv",
        CSV_HEAD + good_rows().replace("01,1,2,loss", "01,1,2,loss\n01,1,2,gain"),
        ["line 4", "appears twice"],
        id="duplicate-position",
    ),
    # a file without some of the runs is no longer refused: audit checks the runs present and names the
    # others (tests/test_audit_partial.py)
    pytest.param(
        "o.csv",
        CSV_HEAD + good_rows().replace("01,1,2,loss", "01,x,2,loss"),
        ["line 3", "whole numbers"],
        id="bad-number",
    ),
    pytest.param(
        "events.tsv", "onset\tduration\ttrial_type\n0\t2\tgain\n", ["events.tsv", "BIDS name"], id="events-name"
    ),
    pytest.param(
        "sub-01_task-cue_run-1_events.tsv", "onset\tduration\n0\t2\n", ["line 1", "trial_type"], id="events-columns"
    ),
    pytest.param(
        "sub-01_task-cue_run-1_events.tsv",
        "onset\tduration\ttrial_type\nsoon\t2\tgain\n",
        ["line 2", "onset must be a number"],
        id="events-onset",
    ),
    pytest.param(
        "sub-01_task-cue_run-1_events.tsv",
        "onset\tduration\ttrial_type\n1.3\t2\tgain\n",
        ["onset 1.3 s is not on the spec's grid"],
        id="events-off-grid",
    ),
]


@pytest.mark.parametrize("name, text, expected", ORDERINGS)
def test_broken_ordering_file_gives_clear_error(tmp_path, name, text, expected):
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / name
    f.write_text(text)
    result = runner.invoke(app, ["audit", str(spec), str(f)])
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output
    for piece in expected:
        assert piece in result.output, (piece, result.output)


def test_good_ordering_file_is_read(tmp_path):
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / "o.csv"
    f.write_text(CSV_HEAD + good_rows())
    result = runner.invoke(app, ["audit", str(spec), str(f)])
    assert result.exit_code == 0, result.output


def test_events_file_without_baseline_rows_is_restored_on_the_soa_grid(tmp_path):
    spec = tmp_path / "study.toml"
    spec.write_text(BASE.replace("runs = 2", "runs = 1"))
    rows = "".join(f"{2.0 * k}\t2\t{c}\n" for k, c in enumerate(["gain", "loss", "rest"] * 4) if c != "rest")
    f = tmp_path / "sub-01_task-cue_run-1_events.tsv"
    f.write_text("onset\tduration\ttrial_type\n" + rows)
    result = runner.invoke(app, ["audit", str(spec), str(f)])
    assert result.exit_code == 0, result.output


def test_every_rule_kind_has_an_invalid_example_here():
    from seqsolve.rules import RULE_KINDS

    ids = {p.id for p in SPECS}
    for kind in RULE_KINDS:
        assert any(i.startswith(kind) for i in ids), f"add a broken-spec row for rule kind {kind}"


def test_ordering_for_another_spec_is_named_as_such(tmp_path):
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / "o.csv"
    f.write_text(CSV_HEAD + "".join(f"01,1,{p},{c}\n" for p, c in enumerate(["up", "down"] * 6, start=1)))
    result = runner.invoke(app, ["audit", str(spec), str(f)])
    assert result.exit_code == 2
    assert "line 2 (and 5 more line(s)): unknown condition 'up'" in result.output
    assert "is this the spec the ordering was made for?" in result.output
