"""Hostile ordering files for audit and score: each refused with exit 2, the file, the line and what to do.

Every case here once crashed or hung (issue 10): undecodable bytes, an over-long field, a header-only
events file, non-finite or huge onsets, a file far larger than any study's.
"""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from tests.test_bad_input import BASE, CSV_HEAD, good_rows

runner = CliRunner()
EVENTS = "sub-01_task-cue_run-1_events.tsv"
EVENTS_HEAD = "onset\tduration\ttrial_type\n"
TIMED_HEAD = "participant,run,position,condition,onset\n"


def timed_rows(onset_of_third: str = "4") -> str:
    """Participant 01's two runs with onsets every 2 s; the third trial of run 1 gets the given onset."""
    rows = []
    for r in (1, 2):
        for p, c in enumerate(["gain", "loss", "rest"] * 4, start=1):
            onset = onset_of_third if (r, p) == (1, 3) else str(2 * (p - 1))
            rows.append(f"01,{r},{p},{c},{onset}\n")
    return "".join(rows)


def events_with(onset: str) -> str:
    return EVENTS_HEAD + f"0\t2\tgain\n2\t2\tloss\n{onset}\t2\tgain\n"


CASES = [
    pytest.param(
        "o.csv",
        (CSV_HEAD + good_rows()).replace("loss", "l\u00f6ss").encode("latin-1"),
        ["o.csv", "line 3", "not UTF-8", "save the file as UTF-8"],
        id="latin-1",
    ),
    pytest.param(
        "o.csv",
        (CSV_HEAD + good_rows()).replace("01,1,2,loss", "01,1,2," + "x" * 140_000, 1).encode(),
        ["o.csv", "line 3", "field limit"],
        id="field-over-csv-limit",
    ),
    pytest.param(EVENTS, EVENTS_HEAD.encode(), [EVENTS, "no trials after the header"], id="events-header-only"),
    pytest.param(
        EVENTS,
        events_with("inf").encode(),
        [EVENTS, "line 4", "got 'inf'", "SEQSOLVE_MAX_SECONDS"],
        id="events-onset-inf",
    ),
    pytest.param(EVENTS, events_with("-inf").encode(), ["line 4", "got '-inf'"], id="events-onset-minus-inf"),
    pytest.param(EVENTS, events_with("nan").encode(), ["line 4", "got 'nan'"], id="events-onset-nan"),
    pytest.param(EVENTS, events_with("3e9").encode(), ["line 4", "got '3e9'", "86,400"], id="events-onset-3e9"),
    pytest.param(
        "o.csv", (TIMED_HEAD + timed_rows("nan")).encode(), ["o.csv", "line 4", "got 'nan'"], id="csv-onset-nan"
    ),
    pytest.param(
        "o.csv", (TIMED_HEAD + timed_rows("1e308")).encode(), ["line 4", "from 0 to 86,400"], id="csv-onset-huge"
    ),
    pytest.param(
        "o.csv", (TIMED_HEAD + timed_rows("1")).encode(), ["position 3", "must not decrease"], id="csv-onsets-decrease"
    ),
    pytest.param(
        "o.csv",
        (CSV_HEAD + good_rows()).replace("01,1,2,loss", "01,1,3000000000,loss").encode(),
        ["line 3", "position from 1 to 20,000", "SEQSOLVE_MAX_TRIALS_PER_RUN"],
        id="position-3e9",
    ),
    pytest.param(
        "o.csv",
        (CSV_HEAD + good_rows()).replace("01,1,2,loss", "01,1,2," + "y" * 100_000).encode(),
        ["line 3", "[100002 characters]"],
        id="long-value-shortened",
    ),
    pytest.param(
        "o.csv",
        (CSV_HEAD + good_rows()).replace("01,1,2,loss", "01,7,2,loss").encode(),
        ["line 3", "run from 1 to 2"],
        id="run-beyond-spec",
    ),
    pytest.param(
        "sub-01_task-cue_run-9_events.tsv",
        events_with("4").encode(),
        ["run-9", "2 run(s)"],
        id="events-run-beyond-spec",
    ),
    pytest.param("o.csv", b"\x00\xff\xfe" * 1000, ["o.csv", "line 1"], id="binary"),
]


@pytest.mark.parametrize("command", ["audit", "score"])
@pytest.mark.parametrize("name, data, expected", CASES)
def test_hostile_ordering_file_is_refused_clearly(tmp_path, name, data, expected, command):
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / name
    f.write_bytes(data)
    result = runner.invoke(app, [command, str(spec), str(f)])
    assert result.exit_code == 2, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    for piece in expected:
        assert piece in result.output, (piece, result.output)
    assert len(result.output) < 3000, "long values must be shortened"


def test_file_over_the_size_limit_is_refused_before_reading(tmp_path, monkeypatch):
    monkeypatch.setenv("SEQSOLVE_MAX_FILE_MB", "0.0005")  # 500 bytes
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / "o.csv"
    f.write_text(CSV_HEAD + good_rows() * 3)
    result = runner.invoke(app, ["audit", str(spec), str(f)])
    assert result.exit_code == 2, result.output
    assert "MB" in result.output and "SEQSOLVE_MAX_FILE_MB" in result.output


def test_raising_a_limit_lets_the_file_through(tmp_path, monkeypatch):
    """The limit is a guard, not a rule: a study that needs more raises it and is served."""
    spec = tmp_path / "study.toml"
    spec.write_text(BASE)
    f = tmp_path / "o.csv"
    f.write_text(CSV_HEAD + good_rows("01") + good_rows("02"))
    monkeypatch.setenv("SEQSOLVE_MAX_PARTICIPANTS", "1")
    refused = runner.invoke(app, ["audit", str(spec), str(f)])
    assert refused.exit_code == 2 and "SEQSOLVE_MAX_PARTICIPANTS" in refused.output
    monkeypatch.setenv("SEQSOLVE_MAX_PARTICIPANTS", "2")
    served = runner.invoke(app, ["audit", str(spec), str(f)])
    assert served.exit_code in (0, 1), served.output
    assert "checked 2 participant(s)" in served.output
