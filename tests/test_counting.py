"""Conflicts proven by counting: named at once, with the arithmetic, and only the rules that conflict."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app

runner = CliRunner()

SPEC = """
[study]
name = "oddball"
task = "odd"
participants = 2
[[conditions]]
name = "rare"
trials = 6
[[conditions]]
name = "common"
trials = 60
[timing]
tr = 2.0
soa = 1.0
[[rules]]
kind = "min-gap"
conditions = ["rare"]
gap = 12
[[rules]]
kind = "max-run"
length = 20
conditions = ["common"]
"""
NEVER_FIRST = '[[rules]]\nkind = "position"\nconditions = ["rare"]\nplacement = "never"\nfirst = 3\n'


def check(tmp_path, text):
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    return runner.invoke(app, ["check", str(spec), "--time-limit", "20"])


def test_rare_trials_spaced_beyond_the_open_positions_are_named_by_counting(tmp_path):
    # pigeonhole: 6 trials with 12 others between any two take 5 x 13 + 1 = 66 positions; the run has
    # 66, of which the position rule leaves 63 open
    result = check(tmp_path, SPEC + NEVER_FIRST)
    assert result.exit_code == 1, result.output
    assert "= 66 positions; run 1 has 66, of which 63 are open" in result.output
    assert "rules[1]" in result.output and "rules[3]" in result.output
    assert "rules[2]" not in result.output, "the max-run rule has nothing to do with it"
    assert "dropping any one of them makes the rest possible" in result.output


@pytest.mark.parametrize("text", [SPEC, SPEC.replace("gap = 12", "gap = 11") + NEVER_FIRST], ids=["no-trim", "gap-11"])
def test_the_counted_bound_is_tight(tmp_path, text):
    # with 66 open positions (or a gap of 11: 5 x 12 + 1 = 61 <= 63) the solver finds an ordering,
    # so the count above is no stricter than the truth
    result = check(tmp_path, text)
    assert result.exit_code == 0, result.output


def test_more_participants_than_distinct_orderings_is_named_by_counting(tmp_path):
    # the multinomial coefficient: 4 trials a, a, b, b have 4! / (2! 2!) = 6 orderings, too few for 7
    text = (
        '[study]\nname = "t"\ntask = "t"\nparticipants = 7\n'
        '[[conditions]]\nname = "a"\ntrials = 2\n[[conditions]]\nname = "b"\ntrials = 2\n'
        '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "participants-differ"\n[objective]\niterations = 0\n'
    )
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    result = runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out")])
    assert result.exit_code == 1, result.output
    assert "4! / (2! 2!) = 6 distinct ordering(s) for 7 participants" in result.output
    assert "cannot all hold" in result.output and not (tmp_path / "out").exists()
    spec.write_text(text.replace("participants = 7", "participants = 6"))  # exactly enough: all six found
    assert runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out6")]).exit_code == 0
