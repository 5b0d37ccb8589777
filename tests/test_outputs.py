"""The output folder as labs use it: a BIDS dataset that pybids' validating layout loads, participant
labels kept as text, stimulus-ready trial tables, and onset files for analysis packages."""

from __future__ import annotations

import csv
import fnmatch
import json
from pathlib import Path

import numpy as np
import pytest
import scipy.io

from seqsolve.generate import generate
from seqsolve.search import SearchOptions
from seqsolve.spec import load_study

ROOT = Path(__file__).resolve().parents[1]
#: fixed soa with a baseline and one factor; jittered gaps with two factors and text labels (p01);
#: stimulus items with attributes and a stim_file column
EXAMPLES = {
    "reward_cue": ROOT / "examples" / "reward_cue.toml",
    "word_reading": ROOT / "examples" / "word_reading.toml",
    "melody_endings": ROOT / "examples" / "melody_endings.toml",
}


@pytest.fixture(scope="module", params=sorted(EXAMPLES))
def made(request, tmp_path_factory):
    """(study, output folder) of a generate without search (iterations 0: quick, same files), with
    the onset files."""
    study = load_study(EXAMPLES[request.param])
    out = tmp_path_factory.mktemp(request.param) / "designs"
    generate(study, out, search=SearchOptions(iterations=0), onset_files=True)
    return study, out


def _files(out: Path) -> list[str]:
    return sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())


def _ignored(rel: str, patterns: list[str]) -> bool:
    """Whether .bidsignore's patterns (gitignore style: a trailing / is a folder) cover rel."""
    for pat in patterns:
        if pat.endswith("/") and rel.startswith(pat):
            return True
        if fnmatch.fnmatch(rel, pat):
            return True
    return False


# ---------------------------------------------------------------------------------------------
# 1. a BIDS dataset skeleton


def test_pybids_validating_layout_loads_the_folder_and_finds_every_events_file(made):
    bids = pytest.importorskip("bids")  # pybids, in the test extra
    study, out = made
    layout = bids.BIDSLayout(out, validate=True)  # raises BIDSValidationError on a bad dataset_description
    events = layout.get(suffix="events", extension=".tsv", return_type="filename")
    assert len(events) == len(study.participants) * study.facts.n_runs
    assert sorted(layout.get_subjects()) == sorted(study.participants)
    assert layout.get_tasks() == [study.spec.study.task]
    assert sorted(layout.get_runs()) == list(range(1, study.facts.n_runs + 1))
    assert layout.get_dataset_description()["Name"] == study.spec.study.name


def test_every_file_is_bids_or_listed_in_bidsignore(made):
    """The BIDS validator's path rules (bids_validator, shipped with pybids) accept every file that
    .bidsignore does not list, and .bidsignore lists nothing that is BIDS."""
    validator = pytest.importorskip("bids_validator").BIDSValidator()
    _, out = made
    patterns = [line for line in (out / ".bidsignore").read_text().splitlines() if line.strip()]
    for rel in _files(out):
        if rel == ".bidsignore":
            continue
        assert validator.is_bids("/" + rel) != _ignored(rel, patterns), rel


def test_dataset_description_follows_the_bids_schema(made):
    """Required and allowed fields as the BIDS schema (bidsschematools, shipped with pybids) states them."""
    schema = pytest.importorskip("bidsschematools.schema").load_schema()
    study, out = made
    desc = json.loads((out / "dataset_description.json").read_text())
    meta = schema["objects"]["metadata"]
    assert {"Name", "BIDSVersion"} <= set(desc)
    assert desc["DatasetType"] in meta["DatasetType"]["enum"]
    generated = meta["GeneratedBy"]["items"]
    for entry in desc["GeneratedBy"]:
        assert set(generated["required"]) <= set(entry) <= set(generated["properties"])
    assert desc["GeneratedBy"][0]["Name"] == "seqsolve"
    assert study.spec_hash in desc["GeneratedBy"][0]["Description"]
    major, minor, _ = (int(x) for x in desc["BIDSVersion"].split("."))
    newest = tuple(int(x) for x in schema["bids_version"].split(".")[:2])
    assert (major, minor) <= newest  # a version that exists


def test_participant_labels_stay_text_in_pandas(made):
    pd = pytest.importorskip("pandas")
    study, out = made
    expected = [f"sub-{p}" for p in study.participants]
    participants = pd.read_csv(out / "participants.tsv", sep="\t")
    assert list(participants.columns)[0] == "participant_id"  # BIDS: participant_id comes first
    assert participants["participant_id"].tolist() == expected
    orderings = pd.read_csv(out / "orderings.csv")
    assert orderings["participant_id"].drop_duplicates().tolist() == expected
    # the label column read as text by the csv module: the same labels as the spec
    with (out / "orderings.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert all(r["participant_id"] == f"sub-{r['participant']}" for r in rows)
    assert [r["participant"] for r in rows[:1]] == [study.participants[0]]


def test_audit_reads_a_table_that_pandas_saved_again(made, tmp_path):
    """pandas turns '01' into 1 in the participant column; participant_id keeps the label."""
    pd = pytest.importorskip("pandas")
    from seqsolve.io.tables import read_orderings

    study, out = made
    again = tmp_path / "again.csv"
    pd.read_csv(out / "orderings.csv").to_csv(again, index=False)
    assert list(read_orderings(study, [again])) == list(study.participants)


# ---------------------------------------------------------------------------------------------
# 2. stimulus-ready trial tables


def _play(path: Path) -> list[dict]:
    """Read a trial table as a stimulus loop does (csv.DictReader, no reshaping) and 'play' it: wait
    until each trial's onset, show it for its duration, then wait its gap; returns the rows with the
    clock value at each trial's start."""
    with path.open(newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    clock = float(rows[0]["onset"])  # the lead-in: the first trial's onset after the first volume
    for row in rows:
        assert float(row["onset"]) == pytest.approx(clock, abs=1e-6), (path.name, row["position"])
        row["clock"] = clock
        clock += float(row["duration"]) + float(row["gap"])
    rows[-1]["end"] = clock
    return rows


def test_a_stimulus_loop_plays_each_run_as_the_spec_declares(made):
    study, out = made
    manifest = json.loads((out / "manifest.json").read_text())
    t = study.spec.timing
    factors = sorted({f for c in study.spec.conditions for f in c.levels})
    # with items: the item and its attributes follow the factor columns
    items = ["item", *study.items.attributes] if study.items is not None else []
    for part in manifest["participants"]:
        for run in part["runs"]:
            path = out / "stimulus" / f"sub-{part['label']}_run-{run['run']}_trials.csv"
            rows = _play(path)
            assert list(rows[0])[:2] == ["position", "condition"]
            head = list(rows[0])
            assert sorted(head[2 : len(head) - 4 - len(items)]) == factors  # one column per factor, then items
            assert head[len(head) - 4 - len(items) : -4] == items  # before the times
            assert [int(r["position"]) for r in rows] == list(range(1, len(rows) + 1))
            onsets = [float(r["onset"]) for r in rows]
            assert all(b > a for a, b in zip(onsets, onsets[1:]))
            assert onsets[0] == pytest.approx(t.lead_in)
            assert all(float(r["gap"]) >= 0 for r in rows)
            assert rows[-1]["end"] == pytest.approx(run["seconds"], abs=1e-6)  # the loop ends with the run
            if t.soa is not None:  # fixed soa: every trial starts soa after the one before
                assert all(b - a == pytest.approx(t.soa) for a, b in zip(onsets, onsets[1:]))
            declared = dict(zip(study.names, study.facts.counts[run["run"] - 1].tolist()))
            seen = {name: 0 for name in study.names}
            for r in rows:
                seen[r["condition"]] += 1
                levels = study.spec.conditions[study.names.index(r["condition"])].levels
                assert {f: r[f] for f in factors} == {f: levels.get(f, "") for f in factors}
            assert seen == declared


def test_trial_tables_agree_with_the_events_files(made):
    """The same trials as the BIDS events file of the run, baseline aside."""
    study, out = made
    base = study.names[study.facts.baseline] if study.facts.baseline is not None else None
    for events in sorted(out.rglob("*_events.tsv")):
        label, run = events.name.split("_")[0][4:], events.name.split("_run-")[1].split("_")[0]
        with events.open(newline="") as fh:
            expected = [(r["onset"], r["duration"], r["trial_type"]) for r in csv.DictReader(fh, delimiter="\t")]
        with (out / "stimulus" / f"sub-{label}_run-{run}_trials.csv").open(newline="") as fh:
            rows = [(r["onset"], r["duration"], r["condition"]) for r in csv.DictReader(fh) if r["condition"] != base]
        assert rows == expected


# ---------------------------------------------------------------------------------------------
# 3. onset files for analysis packages


def _events_by_condition(path: Path) -> dict[str, np.ndarray]:
    """{trial_type: array (n, 2) of onset, duration} from a BIDS events file, in file order."""
    with path.open(newline="") as fh:
        rows = list(csv.DictReader(fh, delimiter="\t"))
    out: dict[str, list] = {}
    for r in rows:
        out.setdefault(r["trial_type"], []).append((float(r["onset"]), float(r["duration"])))
    return {k: np.array(v) for k, v in out.items()}


def test_three_column_files_hold_the_events_of_each_condition(made):
    """Three columns onset, duration, weight, tab-separated, one file per condition and run (the custom
    three-column format common in fMRI analysis packages; from memory), read back by numpy."""
    study, out = made
    for events in sorted(out.rglob("*_events.tsv")):
        stem = "onsets/" + events.name.replace(f"_task-{study.spec.study.task}", "").replace("_events.tsv", "")
        expected = _events_by_condition(events)
        written = sorted(p.name for p in out.glob(stem + "_*.txt"))
        assert written == sorted(f"{Path(stem).name}_{c}.txt" for c in expected)
        for condition, trials in expected.items():
            path = out / f"{stem}_{condition}.txt"
            assert all(len(line.split("\t")) == 3 for line in path.read_text().splitlines())
            table = np.loadtxt(path, delimiter="\t", ndmin=2)
            np.testing.assert_allclose(table[:, :2], trials, atol=1e-6)
            assert (table[:, 2] == 1).all()


def test_conditions_mat_holds_names_onsets_durations_as_cell_arrays(made):
    """The .mat read back by scipy.io.loadmat: cell arrays names, onsets, durations (1 x K), in the
    spec's order of conditions, each cell the events file's onsets and durations."""
    study, out = made
    for events in sorted(out.rglob("*_events.tsv")):
        stem = "onsets/" + events.name.replace(f"_task-{study.spec.study.task}", "").replace("_events.tsv", "")
        expected = _events_by_condition(events)
        mat = scipy.io.loadmat(out / f"{stem}_conditions.mat")
        for key in ("names", "onsets", "durations"):
            assert mat[key].dtype == object and mat[key].shape == (1, len(expected)), key  # a cell array
        names = [str(mat["names"][0, i][0]) for i in range(len(expected))]
        assert names == [n for n in study.names if n in expected]
        for i, name in enumerate(names):
            np.testing.assert_allclose(mat["onsets"][0, i].ravel(), expected[name][:, 0], atol=1e-6)
            np.testing.assert_allclose(mat["durations"][0, i].ravel(), expected[name][:, 1], atol=1e-6)


def test_onset_files_are_optional_and_byte_identical_on_a_rerun(made, tmp_path):
    study, out = made
    again, without = tmp_path / "again", tmp_path / "without"
    generate(study, again, search=SearchOptions(iterations=0), onset_files=True)
    generate(study, without, search=SearchOptions(iterations=0))
    assert _files(again) == _files(out)
    for rel in _files(out):
        assert (again / rel).read_bytes() == (out / rel).read_bytes(), rel  # the .mat header too
    assert _files(without) == [f for f in _files(out) if not f.startswith("onsets/")]


def test_generate_command_writes_onset_files_on_request(tmp_path):
    from typer.testing import CliRunner

    from seqsolve.cli import app

    out = tmp_path / "designs"
    spec = EXAMPLES["word_reading"]
    result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(out), "--iterations", "0", "--onset-files"])
    assert result.exit_code == 0, result.output
    assert (out / "onsets" / "sub-p01_run-2_conditions.mat").is_file()
    assert len(list(out.glob("onsets/sub-p04_run-1_*.txt"))) == 4  # the four word conditions; rest is baseline
