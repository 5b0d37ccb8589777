"""Every spec in examples/ runs as the README says: generate succeeds (or check explains a conflict)."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.spec import load_study

EXAMPLES = sorted((Path(__file__).resolve().parents[1] / "examples").glob("*.toml"))
runner = CliRunner()


def test_there_are_examples():
    assert len(EXAMPLES) >= 2


@pytest.mark.parametrize("spec", EXAMPLES, ids=[p.stem for p in EXAMPLES])
def test_example_runs(spec, tmp_path):
    if spec.stem.startswith("conflicting"):
        result = runner.invoke(app, ["check", str(spec)])
        assert result.exit_code == 1 and "cannot all hold" in result.output, result.output
        return
    out = tmp_path / "designs"
    # the main example runs as the README gives it; the others with a short search
    short = [] if spec.stem == "reward_cue" else ["--iterations", "10"]
    result = runner.invoke(app, ["generate", str(spec), "-o", str(out), *short])
    assert result.exit_code == 0, result.output
    audit = runner.invoke(app, ["audit", str(spec), str(out / "orderings.csv"), "--rank", "5"])  # a small sample
    assert audit.exit_code == 0, audit.output
    whole = runner.invoke(app, ["audit", str(spec), str(out)])  # with participants.tsv: the counterbalancing
    assert whole.exit_code == 0, whole.output
    score = runner.invoke(app, ["score", str(spec), str(out / "orderings.csv"), "--no-references"])
    if load_study(spec).spec.timing.tr is None:  # an EEG/behavioural spec: no fMRI figures, said plainly
        assert score.exit_code == 2 and "timing.tr" in score.output, score.output
        return
    assert score.exit_code == 0, score.output
