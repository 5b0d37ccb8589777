"""Faults: internal errors, signals and a refusing disk each keep the exit-code contract and the
previous output (issue 10)."""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

import seqsolve.generate  # noqa: F401 - loads the module patched below
import seqsolve.io.atomic as atomic
import seqsolve.solve  # noqa: F401 - loads the module patched below
from seqsolve.cli import app
from tests.conftest import end_session, processes_left
from tests.test_bad_input import BASE

runner = CliRunner()
QUICK = ["--iterations", "0"]


def spec_file(tmp_path: Path, text: str = BASE) -> Path:
    spec = tmp_path / "study.toml"
    spec.write_text(text)
    return spec


# ----------------------------------------------------------------------------------------------
# internal errors: one line, the spec hash, exit 3, no traceback


@pytest.mark.parametrize(
    "target, exc",
    [
        ("seqsolve.solve.check_study", AssertionError("flow.py: trail does not close")),
        ("seqsolve.solve.check_study", ValueError("solve.py: unexpected status")),
        ("seqsolve.solve.check_study", RecursionError("maximum recursion depth exceeded")),
    ],
    ids=["assertion", "value-error", "recursion"],
)
def test_an_internal_failure_is_one_line_with_the_spec_hash_and_exit_3(tmp_path, monkeypatch, target, exc):
    def broken(*args, **kwargs):
        raise exc

    monkeypatch.setattr(target, broken)
    result = runner.invoke(app, ["check", str(spec_file(tmp_path))])
    assert result.exit_code == 3, result.output
    assert isinstance(result.exception, SystemExit)
    assert "this is a bug in seqsolve (spec sha256:" in result.output
    assert type(exc).__name__ in result.output and "Traceback" not in result.output
    assert len(result.output.strip().splitlines()) == 1


def test_an_internal_failure_during_generate_writes_nothing(tmp_path, monkeypatch):
    def broken(*args, **kwargs):
        raise ValueError("boom")

    monkeypatch.setattr(sys.modules["seqsolve.generate"], "design_study", broken)
    out = tmp_path / "out"
    result = runner.invoke(app, ["generate", str(spec_file(tmp_path)), "-o", str(out), *QUICK])
    assert result.exit_code == 3, result.output
    assert "this is a bug in seqsolve" in result.output and not out.exists()


def test_bad_time_options_are_refused(tmp_path):
    for value in ("inf", "nan", "-1"):
        result = runner.invoke(app, ["check", str(spec_file(tmp_path)), "--time-limit", value])
        assert result.exit_code == 2, (value, result.output)
        assert "--time-limit" in result.output


# ----------------------------------------------------------------------------------------------
# output faults: a clear message, exit 2, the previous output intact


def _generate(tmp_path: Path, out: Path, *extra: str):
    spec = tmp_path / "study.toml"
    if not spec.exists():
        spec_file(tmp_path)
    return runner.invoke(app, ["generate", str(spec), "-o", str(out), *QUICK, *extra])


def _snapshot(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): p.read_text() for p in sorted(folder.rglob("*")) if p.is_file()}


def _refusing_write(err: int):
    def write_text(self, *args, **kwargs):
        raise OSError(err, os.strerror(err), str(self))

    return write_text


@pytest.mark.parametrize(
    "err, words",
    [(errno.ENOSPC, "disk is full"), (errno.EROFS, "read-only"), (errno.EACCES, "permission denied")],
    ids=["full-disk", "read-only", "no-permission"],
)
def test_a_refusing_disk_keeps_the_previous_output(tmp_path, monkeypatch, err, words):
    out = tmp_path / "out"
    assert _generate(tmp_path, out).exit_code == 0
    before = _snapshot(out)
    monkeypatch.setattr(Path, "write_text", _refusing_write(err))
    result = _generate(tmp_path, out, "--force", "--seed", "5")
    monkeypatch.undo()
    assert result.exit_code == 2, result.output
    assert words in result.output and "previous output" in result.output
    assert _snapshot(out) == before
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out.")], "staging folder left behind"


def test_a_busy_mount_point_keeps_the_previous_output(tmp_path, monkeypatch):
    out = tmp_path / "out"
    assert _generate(tmp_path, out).exit_code == 0
    before = _snapshot(out)
    real = os.replace

    def replace(src, dst):
        if Path(src) == out:  # renaming a mount point fails with EBUSY
            raise OSError(errno.EBUSY, "Device or resource busy", str(src))
        return real(src, dst)

    monkeypatch.setattr(atomic.os, "replace", replace)
    result = _generate(tmp_path, out, "--force", "--seed", "5")
    monkeypatch.undo()
    assert result.exit_code == 2, result.output
    assert "mount point" in result.output
    assert _snapshot(out) == before


def test_a_failed_swap_puts_the_previous_output_back(tmp_path, monkeypatch):
    out = tmp_path / "out"
    atomic.write_folder(out, {"a.txt": "old"})
    real = os.replace

    def replace(src, dst):
        if ".partial-" in Path(src).name:
            raise OSError(errno.ENOSPC, "No space left on device", str(src))
        return real(src, dst)

    monkeypatch.setattr(atomic.os, "replace", replace)
    with pytest.raises(atomic.OutputWriteError, match="disk is full"):
        atomic.write_folder(out, {"a.txt": "new"}, force=True)
    monkeypatch.undo()
    assert (out / "a.txt").read_text() == "old"


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_stale_partial_folders_of_a_killed_run_are_removed_and_a_living_ones_kept(tmp_path):
    out = tmp_path / "out"
    dead = _dead_pid()
    stale = tmp_path / f".out.partial-{dead}-x1y2"
    stale.mkdir()
    (stale / "orderings.csv").write_text("half")
    living = tmp_path / f".out.partial-{os.getpid()}-z3"
    living.mkdir()
    other = tmp_path / f".other.partial-{dead}-q"  # another output's: not ours to touch
    other.mkdir()
    atomic.write_folder(out, {"a.txt": "new"})
    assert not stale.exists() and living.exists() and other.exists()
    assert (out / "a.txt").read_text() == "new"


def test_a_run_killed_mid_swap_gets_its_previous_output_back(tmp_path):
    out = tmp_path / "out"
    aside = tmp_path / f".out.old-{_dead_pid()}"
    aside.mkdir()
    (aside / "a.txt").write_text("previous")
    with pytest.raises(atomic.OutputExistsError):  # restored, so not empty: --force is needed again
        atomic.write_folder(out, {"a.txt": "new"})
    assert (out / "a.txt").read_text() == "previous" and not aside.exists()


# ----------------------------------------------------------------------------------------------
# signals: SIGTERM like Ctrl-C, the best designs written, exit 143, no process left


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc to find leftover processes")
def test_sigterm_with_workers_writes_the_best_designs_and_exits_143(tmp_path):
    spec = spec_file(
        tmp_path,
        '[study]\nname = "t"\ntask = "t"\nparticipants = 3\nruns = 2\n'
        '[[conditions]]\nname = "a"\ntrials = 20\n[[conditions]]\nname = "b"\ntrials = 20\n'
        '[[conditions]]\nname = "rest"\ntrials = 20\nbaseline = true\n'
        '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "max-run"\nlength = 2\n'
        "[objective]\niterations = 100000\nstall = 100000\n",
    )
    out = tmp_path / "out"
    cmd = [sys.executable, "-c", "from seqsolve.cli import main; main()", "generate", str(spec), "-o", str(out)]
    cmd += ["--workers", "2"]
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    proc = subprocess.Popen(
        cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True, env=env
    )
    try:
        for line in proc.stderr:  # wait for the first search step, then terminate the main process only
            if "best" in line:
                break
        proc.send_signal(signal.SIGTERM)
        stdout, _ = proc.communicate(timeout=300)
        left = processes_left(proc.pid)
    finally:
        end_session(proc)
    assert proc.returncode == 143, stdout
    assert not left, f"processes left running: {left}"
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["objective"]["interrupted"] is True
    audit = runner.invoke(app, ["audit", str(spec), str(out / "orderings.csv")])
    assert audit.exit_code == 0, audit.output


# ----------------------------------------------------------------------------------------------
# check says exactly what it decided


def test_check_says_it_decides_every_participant_when_no_rule_ties_them(tmp_path):
    result = runner.invoke(app, ["check", str(spec_file(tmp_path))])
    assert result.exit_code == 0, result.output
    assert "can all hold for each of the 2 participant(s)" in result.output


def test_check_says_participants_differ_is_left_to_generate(tmp_path):
    text = BASE + '\n[[rules]]\nkind = "participants-differ"\nmin_differences = 3\n'
    result = runner.invoke(app, ["check", str(spec_file(tmp_path, text))])
    assert result.exit_code == 0, result.output
    assert "for one participant" in result.output and "not decided by check" in result.output
    assert "rules[1]" in result.output


HADAMARD_SPEC = """
[study]
name = "h"
task = "h"
participants = 30
runs = 1
[[conditions]]
name = "a"
trials = 8
[[conditions]]
name = "b"
trials = 8
[timing]
tr = 2.0
soa = 2.0
[[rules]]
kind = "participants-differ"
min_differences = 8
[objective]
iterations = 0
"""


def hadamard_orderings() -> str:
    """30 orderings of 8 a's and 8 b's, pairwise differing in >= 8 of 16 positions, by construction.

    Sylvester's Hadamard matrix H_16 (H_2k = [[H, H], [H, -H]]): any two rows agree in exactly 8
    places, so rows and their negations form a code of distance 8; every row but the first has eight
    +1 and eight -1 (textbook fact of Hadamard matrices), which gives 15 rows and 15 negations.
    """
    import numpy as np

    h = np.array([[1]])
    while len(h) < 16:
        h = np.block([[h, h], [h, -h]])
    words = [row for row in h[1:]] + [-row for row in h[1:]]
    lines = ["participant,run,position,condition"]
    for i, word in enumerate(words, start=1):
        lines += [f"{i:02d},1,{p},{'a' if v > 0 else 'b'}" for p, v in enumerate(word, start=1)]
    return "\n".join(lines) + "\n"


def test_a_feasible_study_is_never_called_impossible(tmp_path):
    spec = spec_file(tmp_path, HADAMARD_SPEC)
    designs = tmp_path / "hadamard.csv"
    designs.write_text(hadamard_orderings())
    audit = runner.invoke(app, ["audit", str(spec), str(designs)])
    assert audit.exit_code == 0, audit.output  # the study is feasible: here are 30 valid designs
    result = runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out"), "--time-limit", "20"])
    assert "cannot all hold" not in result.output, result.output
    if result.exit_code != 0:  # designed one after another, a late participant may find no room
        assert result.exit_code == 1, result.output
        assert "does not prove the study impossible" in result.output
