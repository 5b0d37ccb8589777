"""EEG/behavioural specs without timing.tr: the objective steers by counterbalance only, fMRI-only
settings are refused with the field named, and outputs that need volumes degrade cleanly."""

from __future__ import annotations

import json

import numpy as np
import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.efficiency.metrics import counterbalance_deviation
from seqsolve.errors import SpecError
from seqsolve.generate import generate
from seqsolve.objective import References, Scorer, Weights
from seqsolve.search import SearchOptions
from seqsolve.spec import study_from_mapping

runner = CliRunner()

BASE = {
    "study": {"name": "eeg", "task": "eeg", "participants": 2, "runs": 2, "seed": 4},
    "conditions": [{"name": "frequent", "trials": 12}, {"name": "rare", "trials": 4}],
    "timing": {"trial_duration": 0.2, "iti": {"distribution": "uniform", "min": 0.8, "max": 1.2}, "grid": 0.01},
    "rules": [{"kind": "min-gap", "conditions": ["rare"], "gap": 2}],
}


def _spec(**sections) -> dict:
    data = json.loads(json.dumps(BASE))
    for key, value in sections.items():
        if isinstance(value, dict) and isinstance(data.get(key), dict):
            data[key].update(value)
        else:
            data[key] = value
    return data


def test_without_tr_the_objective_is_counterbalance_only():
    o = study_from_mapping(_spec()).spec.objective
    assert (o.detection, o.estimation, o.counterbalance) == (0.0, 0.0, 1.0)


@pytest.mark.parametrize(
    "sections, where, message",
    [
        ({"objective": {"detection": 1.0}}, "objective.detection", "needs timing.tr"),
        ({"objective": {"estimation": 2.0, "counterbalance": 1.0}}, "objective.estimation", "set estimation = 0"),
        ({"analysis": {"contrasts": ["rare - frequent"]}}, "analysis", "give timing.tr, or leave [analysis] out"),
        ({"timing": {"volumes": 100}}, "timing", "give 'tr' too"),
    ],
    ids=["detection", "estimation", "analysis", "volumes"],
)
def test_fmri_settings_without_tr_are_refused_by_name(sections, where, message):
    with pytest.raises(SpecError) as info:
        study_from_mapping(_spec(**sections))
    assert where in str(info.value) and message in str(info.value), str(info.value)


def test_scorer_without_tr_is_the_counterbalance_figure():
    """The score is 1 / (1 + RMS deviation of the pair counts from ideal), here recomputed by hand:
    pair counts (a then b) of each run against (n - 1) n_a n_b / n^2, the usual expectation of a
    random ordering (common practice; the same ideal as rules/README.md's balanced-transitions)."""
    study = study_from_mapping(_spec())
    scorer = Scorer(study, Weights.from_study(study), References.for_study(study, None, 0), seed=1)
    rng = np.random.default_rng(0)
    runs = [rng.permutation(np.repeat([0, 1], [12, 4])) for _ in range(2)]
    dev = []
    for seq in runs:
        counts = np.bincount(seq, minlength=2)
        n = len(seq)
        seen = np.zeros((2, 2))
        np.add.at(seen, (seq[:-1], seq[1:]), 1)
        dev.append(seen - (n - 1) * np.outer(counts, counts) / n**2)
    rms = np.sqrt(np.mean(np.square(np.sum(dev, axis=0))))
    assert rms == pytest.approx(counterbalance_deviation(runs, study.facts.counts)["rms"])
    assert scorer.score(runs) == pytest.approx(1 / (1 + rms))
    f = scorer.figures(runs)
    assert f.detection == f.estimation == 0 and f.score == pytest.approx(f.counterbalance)


def test_generate_without_tr_writes_events_and_no_volumes(tmp_path):
    study = study_from_mapping(_spec(objective={"iterations": 2}))
    designs = generate(study, tmp_path / "out", search=SearchOptions())
    assert all(d.figures is not None for d in designs)
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    entry = manifest["participants"][0]
    assert [r["volumes"] for r in entry["runs"]] == [None, None]
    assert set(entry["score"]) == {"score", "counterbalance"}
    assert set(entry["metrics"]["all"]) == {"counterbalance_max", "entropy_bits"}
    assert manifest["objective"]["references"] is None
    sidecar = json.loads((tmp_path / "out" / "task-eeg_events.json").read_text())
    assert "start of the run" in sidecar["onset"]["Description"]
    events = (tmp_path / "out" / "sub-01" / "sub-01_task-eeg_run-1_events.tsv").read_text().splitlines()
    assert events[0] == "onset\tduration\ttrial_type" and len(events) == 17


def test_searched_designs_without_tr_pass_every_rule_and_repeat_with_the_seed(tmp_path):
    study = study_from_mapping(_spec(objective={"iterations": 3}))
    generate(study, tmp_path / "a", search=SearchOptions())
    generate(study, tmp_path / "b", search=SearchOptions())
    assert (tmp_path / "a" / "orderings.csv").read_bytes() == (tmp_path / "b" / "orderings.csv").read_bytes()


@pytest.mark.parametrize("command", [["score"], ["compare"], ["generate", "--front", "2"]])
def test_fmri_commands_without_tr_say_what_to_do(tmp_path, command):
    spec = tmp_path / "eeg.toml"
    spec.write_text(
        '[study]\nname = "eeg"\ntask = "eeg"\nparticipants = 1\n'
        '[[conditions]]\nname = "a"\ntrials = 4\n[[conditions]]\nname = "b"\ntrials = 4\n'
        "[timing]\nsoa = 1.0\n[objective]\niterations = 0\n"
    )
    args = [*command[:1], str(spec), *command[1:]]
    if command[0] == "score":
        orderings = tmp_path / "o.csv"
        orderings.write_text("participant,run,position,condition\n01,1,1,a\n")
        args.append(str(orderings))
    if command[0] == "generate":
        args += ["-o", str(tmp_path / "out")]
    result = runner.invoke(app, args)
    assert result.exit_code == 2, result.output
    assert "timing.tr" in result.output and "Traceback" not in result.output
