"""audit checks onsets against the spec's [timing]: run length from the declared volumes, the fixed
soa's grid, overlapping trials; and names rules by their label."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqsolve.audit import TIMING_RULE, audit
from seqsolve.cli import app
from seqsolve.generate import generate
from seqsolve.search import SearchOptions
from seqsolve.spec import load_study

ROOT = Path(__file__).resolve().parents[1]
READING = ROOT / "examples" / "word_reading.toml"  # 180 volumes of TR 1.5 s: runs of 270 s, jittered gaps
CUE = ROOT / "examples" / "reward_cue.toml"  # fixed soa of 3 s after a 6 s lead-in


@pytest.fixture(scope="module")
def reading(tmp_path_factory):
    study = load_study(READING)
    out = tmp_path_factory.mktemp("reading") / "designs"
    generate(study, out, search=SearchOptions(iterations=0))
    return study, out


def _rows(path: Path) -> list[dict]:
    with path.open(newline="") as fh:
        return list(csv.DictReader(fh))


def _write(path: Path, rows: list[dict]) -> Path:
    with path.open("w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(rows)
    return path


def test_generated_timing_passes(reading):
    study, out = reading
    report = audit(study, [out / "orderings.csv"])
    assert report.valid, [v.describe() for v in report.violations]
    assert TIMING_RULE in report.rules


def test_a_hand_made_timing_that_ends_early_is_reported(reading, tmp_path):
    """The gaps of participant p01's run 1 shrunk so the run ends at 235.5 s instead of 270 s."""
    study, out = reading
    rows = _rows(out / "orderings.csv")
    run = [r for r in rows if r["participant"] == "p01" and r["run"] == "1"]
    onsets = np.array([float(r["onset"]) for r in run])
    durations = np.array([float(r["duration"]) for r in run])
    gaps = np.diff(onsets) - durations[:-1]
    lead_out = study.spec.timing.lead_out
    assert onsets[-1] + durations[-1] + lead_out == pytest.approx(270.0)  # 180 volumes x 1.5 s
    gaps *= (gaps.sum() - 34.5) / gaps.sum()
    new = onsets[0] + np.concatenate([[0.0], np.cumsum(durations[:-1] + gaps)])
    for r, on in zip(run, new):
        r["onset"] = f"{on:.6f}"
    report = audit(study, [_write(tmp_path / "early.csv", rows)])
    assert [(v.participant, v.run, v.rule) for v in report.violations] == [("p01", 0, TIMING_RULE)]
    text = report.violations[0].describe()
    assert "ends at 235.5 s" in text and "180 volumes" in text and "270 s" in text, text


def test_overlapping_trials_and_off_grid_onsets_are_reported(tmp_path):
    study = load_study(CUE)
    out = tmp_path / "cue"
    generate(study, out, search=SearchOptions(iterations=0))
    rows = _rows(out / "orderings.csv")
    target = next(r for r in rows if r["participant"] == "02" and r["run"] == "3" and r["position"] == "5")
    target["onset"] = str(float(target["onset"]) - 2.5)  # 0.5 s after the previous trial's start: overlaps it
    report = audit(study, [_write(tmp_path / "moved.csv", rows)])
    found = sorted(v.describe() for v in report.violations)
    assert len(found) == 2, found
    assert all(t.startswith("participant 02; run 3; position 5:") for t in found)
    assert any("before the previous trial ends" in t for t in found)
    assert any("lead_in 6 s + (position - 1) x soa 3 s" in t for t in found)


def test_audit_names_rules_by_their_label(tmp_path):
    """rules/README.md: a rule's label is shown in reports instead of its sentence."""
    text = CUE.read_text().replace('kind = "position"', 'kind = "position"\nlabel = "fixation opens each run"')
    spec = tmp_path / "labelled.toml"
    spec.write_text(text)
    (tmp_path / "rules").mkdir()
    (tmp_path / "rules" / "standard.toml").write_text((ROOT / "rules" / "standard.toml").read_text())
    lines = ["participant,run,position,condition"]
    for run in (1, 2, 3):  # every run opens with a win trial instead of fixation
        order = ["win"] + ["avoid", "neutral", "fixation", "win"] * 15 + ["avoid", "neutral", "fixation"]
        lines += [f"01,{run},{p},{c}" for p, c in enumerate(order, start=1)]
    (tmp_path / "o.csv").write_text("\n".join(lines) + "\n")
    result = CliRunner().invoke(app, ["audit", str(spec), str(tmp_path / "o.csv")])
    assert result.exit_code == 1, result.output
    assert "(rule: fixation opens each run)" in result.output


def test_audit_header_counts_the_rules_as_check_lists_them(reading):
    study, out = reading
    result = CliRunner().invoke(app, ["audit", str(READING), str(out / "orderings.csv"), "--rank", "0"])
    assert result.exit_code == 0, result.output
    assert f"against the spec's {len(study.rules)} rule(s), its trial counts and its timing" in result.output
