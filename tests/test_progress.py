"""generate's progress: participant k of P with the time left, and after a stop the participants not
reached get a line, a valid design and their figures (table and manifest)."""

from __future__ import annotations

import json

import pytest
from typer.testing import CliRunner

from seqsolve.cli import _designs_table, app
from seqsolve.efficiency.setup import make_setup
from seqsolve.generate import design_study, manifest
from seqsolve.objective import Scorer
from seqsolve.search import SearchOptions
from seqsolve.timing import draw_gaps
from tests.conftest import make_study

SPEC = (
    '[study]\nname = "t"\ntask = "t"\nparticipants = 3\nruns = 1\nseed = 4\n'
    '[[conditions]]\nname = "a"\ntrials = 8\n[[conditions]]\nname = "b"\ntrials = 8\n'
    '[[conditions]]\nname = "rest"\ntrials = 8\nbaseline = true\n'
    '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "max-run"\nlength = 2\n'
    "[objective]\niterations = 2\n"
)


def test_the_participants_not_reached_get_a_line_a_design_and_figures():
    study = make_study([8, 8, 8, 8], [{"kind": "max-run", "length": 2}], baseline=3, participants=4)
    notes = []

    def stop_in_the_first_search(p):
        if p.iteration == 2:
            raise KeyboardInterrupt

    designs = design_study(
        study, search=SearchOptions(iterations=50), on_step=stop_in_the_first_search, on_note=notes.append
    )
    assert designs.interrupted and notes == ["building first valid designs for the 3 participant(s) not reached"]
    setup = make_setup(study)
    for d in designs[1:]:
        assert d.search["stopped"] == "not reached"
        # the figures are the Scorer's of that design, on its own timing, against the study's references
        again = Scorer(study, designs.weights, designs.references, d.seed, draw_gaps(study, d.runs, d.seed), setup)
        assert d.figures.score == pytest.approx(again.figures(d.runs).score, rel=1e-12)
    table = _designs_table(designs)
    assert table.count("not reached (first valid design)") == 3 and " - " not in table
    entries = manifest(study, designs)["participants"]
    assert all("score" in e for e in entries)
    assert any("participants 02, 03, 04 got a valid design without search" in n for n in designs.notes)


def test_generate_says_which_participant_of_how_many(tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text(SPEC)
    result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    assert "participant 1 of 3 (01): round" in result.output  # stderr, mixed into the runner's output
    manifest_ = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert len(manifest_["participants"]) == 3
