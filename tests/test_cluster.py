"""generate --cluster: a Dask cluster gives the same files as worker processes, keeps participants
apart, stops on Ctrl-C with the best designs so far, and says what is wrong with a bad --cluster."""

from __future__ import annotations

import json
import logging
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from tests.conftest import end_session, processes_left

ROOT = Path(__file__).resolve().parents[1]

# the optimum of this tiny study is reached from most seeds (all 11,550 orderings are enumerated in
# test_search.py), so participants searched on their own collide and the pass in participant order
# has to search some again: the cluster must leave that pass to the main process. The stall (60
# rounds) outlasts the search's kicks (after 20 rounds without gain), which carry it to the optimum.
TINY = (
    '[study]\nname = "t"\ntask = "t"\nparticipants = 3\nruns = 1\nseed = 0\n'
    '[[conditions]]\nname = "a"\ntrials = 4\n[[conditions]]\nname = "b"\ntrials = 4\n'
    '[[conditions]]\nname = "rest"\ntrials = 3\nbaseline = true\n'
    '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "max-run"\nlength = 2\n'
    '[[rules]]\nkind = "participants-differ"\n'
    "[analysis]\nfir_window = 6.0\nhigh_pass_cutoff = 0.0\n[objective]\niterations = 100\nstall = 60\n"
)

# long searches, for stopping one midway
LONG = (
    '[study]\nname = "t"\ntask = "t"\nparticipants = 5\nruns = 2\n'
    '[[conditions]]\nname = "a"\ntrials = 20\n[[conditions]]\nname = "b"\ntrials = 20\n'
    '[[conditions]]\nname = "rest"\ntrials = 20\nbaseline = true\n'
    '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "max-run"\nlength = 2\n'
    "[objective]\niterations = 100000\nstall = 100000\n"
)


def folder_bytes(folder: Path) -> dict[str, bytes]:
    """Every file of an output folder by relative path."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def run_cli(args: list[str], env_tree: bool = True) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT)) if env_tree else None
    cmd = [sys.executable, "-m", "seqsolve", *args]
    return subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=600)


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """The tiny spec and its files from one worker process (the reference every run is held to)."""
    folder = tmp_path_factory.mktemp("tiny")
    spec = folder / "tiny.toml"
    spec.write_text(TINY)
    done = run_cli(["generate", str(spec), "-o", str(folder / "one"), "--workers", "1"])
    assert done.returncode == 0, done.stderr
    return spec, folder_bytes(folder / "one")


def test_local_cluster_writes_the_same_files_as_worker_processes(tiny, tmp_path):
    spec, one = tiny
    done = run_cli(["generate", str(spec), "-o", str(tmp_path / "two"), "--workers", "2"])
    assert done.returncode == 0, done.stderr
    done = run_cli(
        ["generate", str(spec), "-o", str(tmp_path / "dask"), "--cluster", "local", "--cluster-workers", "2"]
    )
    assert done.returncode == 0, done.stderr
    assert "on a local Dask cluster of 2 worker process(es)" in done.stderr
    # every file, the manifest included: it holds no timing or host field, so nothing may differ
    assert folder_bytes(tmp_path / "dask") == one
    assert folder_bytes(tmp_path / "two") == one
    for k in range(1, 4):  # progress: participant k of P, with the time left until the last
        assert f"participant {k} of 3 searched" in done.stderr
    assert "left" in done.stderr.split("participant 2 of 3 searched")[1].splitlines()[0]


def test_participants_differ_across_the_cluster(tiny):
    # the premise: searched on their own (as cluster workers search them), participants collide
    from seqsolve.efficiency.setup import make_setup
    from seqsolve.objective import References
    from seqsolve.search import SearchOptions
    from seqsolve.seeds import reference_seed
    from seqsolve.solve import derive_seed
    from seqsolve.spec import load_study
    from seqsolve.workers import Job, search_participant

    spec, one = tiny
    study = load_study(spec)
    refs = References.for_study(study, make_setup(study), reference_seed(0))
    alone = {
        tuple(search_participant(study, refs, SearchOptions(), Job(i, label, derive_seed(0, i))).runs[0].tolist())
        for i, label in enumerate(study.participants)
    }
    assert len(alone) < 3
    rows = [row.split(",") for row in one["orderings.csv"].decode().splitlines()[1:]]
    by_participant: dict[str, list[str]] = {}
    for row in rows:  # participant, run, position, condition, ...: the conditions in position order
        by_participant.setdefault(row[0], []).append(row[3])
    assert len(by_participant) == 3 and all(len(v) == 11 for v in by_participant.values())
    # all different, and the cluster's files are these bytes (the test above)
    assert len({tuple(v) for v in by_participant.values()}) == 3


def test_running_scheduler_by_address_gives_the_same_files(tiny, tmp_path):
    from distributed import LocalCluster

    spec, one = tiny
    with LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
        silence_logs=logging.ERROR,
    ) as cluster:  # fmt: skip
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")
        done = run_cli(
            ["generate", str(spec), "-o", str(tmp_path / "out"), "--cluster", address, "--cluster-workers", "2"]
        )
    assert done.returncode == 0, done.stderr
    assert f"on the Dask scheduler at {address}" in done.stderr
    assert folder_bytes(tmp_path / "out") == one


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc to find leftover processes")
@pytest.mark.parametrize("signum, group, code", [(signal.SIGINT, True, 130), (signal.SIGTERM, False, 143)])
def test_ctrl_c_on_a_cluster_writes_the_best_designs_so_far(tmp_path, signum, group, code):
    # group: the signal reaches every process of the command (the cluster's workers too), as a
    # terminal's Ctrl-C does; 128 + the signal's number is the shell's convention for a run cut short
    spec = tmp_path / "s.toml"
    spec.write_text(LONG)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "seqsolve", "generate", str(spec), "-o", str(out), "--cluster", "local"]
    cmd += ["--cluster-workers", "2"]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(
        cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True, env=env
    )
    try:
        for line in proc.stderr:  # wait until a search reports a step, then stop the command
            if "best" in line:
                break
        if group:
            os.killpg(proc.pid, signum)
        else:
            proc.send_signal(signum)
        stdout, _ = proc.communicate(timeout=300)
        left = processes_left(proc.pid)
    finally:
        end_session(proc)
    assert proc.returncode == code, stdout
    assert not left, f"processes left running: {left}"
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["objective"]["interrupted"] is True
    stopped = [p["search"]["stopped"] for p in manifest["participants"] if p.get("search")]
    assert "interrupted" in stopped  # a running search kept its best design so far
    audit = CliRunner().invoke(app, ["audit", str(spec), str(out / "orderings.csv")])
    assert audit.exit_code == 0, audit.output


@pytest.mark.parametrize(
    "args, match",
    [
        (["--cluster", "somewhere"], "--cluster: 'somewhere' is neither 'local' nor a scheduler address"),
        (["--cluster-workers", "2"], "--cluster-workers needs --cluster"),
        (["--cluster", "local", "--workers", "2"], "give --workers or --cluster, not both"),
        (["--cluster", "local", "--cluster-workers", "0"], "--cluster-workers"),
    ],
)
def test_bad_cluster_options_say_what_to_do(tmp_path, args, match):
    spec = tmp_path / "s.toml"
    spec.write_text(TINY)
    result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out"), *args])
    assert result.exit_code == 2, result.output
    assert match in result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


def test_no_scheduler_at_the_address_is_a_clear_error(tmp_path, monkeypatch):
    import socket

    import seqsolve.cluster

    monkeypatch.setattr(seqsolve.cluster, "CONNECT_TIMEOUT", 2.0)
    with socket.socket() as s:  # a loopback port that nothing listens on (bound, never accepting)
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
        spec = tmp_path / "s.toml"
        spec.write_text(TINY)
        address = f"tcp://127.0.0.1:{port}"
        result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out"), "--cluster", address])
    assert result.exit_code == 2, result.output
    assert f"no Dask scheduler answered at '{address}'" in result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


def test_without_dask_the_error_says_how_to_install_it(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed now raises ImportError
    spec = tmp_path / "s.toml"
    spec.write_text(TINY)
    result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out"), "--cluster", "local"])
    assert result.exit_code == 2, result.output
    assert 'pip install "seqsolve[cluster]"' in result.output
    assert not (tmp_path / "out").exists()


def test_a_worker_on_other_versions_is_refused():
    from seqsolve.cluster import ClusterError, check_versions

    mine = {"python": "3.11.7", "seqsolve": "0.1.0", "numpy": "2.1.0"}
    check_versions(mine, {"tcp://127.0.0.1:1": dict(mine), "tcp://127.0.0.1:2": dict(mine)})
    other = dict(mine, numpy="1.26.4")
    with pytest.raises(ClusterError, match=r"worker tcp://127.0.0.1:2 runs other versions \(numpy 1.26.4 there"):
        check_versions(mine, {"tcp://127.0.0.1:1": dict(mine), "tcp://127.0.0.1:2": other})
    with pytest.raises(ClusterError, match="seqsolve missing there"):
        check_versions(mine, {"tcp://127.0.0.1:1": {"python": "3.11.7", "numpy": "2.1.0"}})
