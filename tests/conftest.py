"""Shared helpers: small studies built in code, and the solver run with an ordering fixed in."""

from __future__ import annotations

import os
import signal
import time
from pathlib import Path

import numpy as np
import pytest
from ortools.sat.python import cp_model

from seqsolve.flow import FlowModel
from seqsolve.model import OrderingModel
from seqsolve.rules import StudyFacts
from seqsolve.spec import study_from_mapping

NAMES = tuple("abcdefghijklmnop")


def make_facts(counts, runs: int = 1, baseline: int | None = None, grouped: bool = False) -> StudyFacts:
    """Facts for conditions a, b, ... with counts per run; grouped adds factor f: x = {a, b}, y = rest."""
    k = len(counts)
    levels = {"f": {"x": (0, 1), "y": tuple(range(2, k))}} if grouped else {}
    return StudyFacts(NAMES[:k], np.tile(np.asarray(counts, dtype=np.int64), (runs, 1)), baseline, levels)


def make_study(
    counts,
    rules=(),
    runs=1,
    participants=1,
    baseline=None,
    grouped=False,
    seed=0,
    timing=None,
    analysis=None,
    durations=None,
    objective=None,
):
    """A study in code. objective: the [objective] section; by default no search (iterations 0),
    so tests of the solver stay quick; tests of the search pass their own."""
    conds = []
    for i, n in enumerate(counts):
        c = {"name": NAMES[i], "trials": int(n)}
        if grouped:
            c["levels"] = {"f": "x" if i < 2 else "y"}
        if baseline == i:
            c["baseline"] = True
        if durations is not None:
            c["duration"] = float(durations[i])
        conds.append(c)
    data = {
        "study": {"name": "t", "task": "t", "participants": participants, "runs": runs, "seed": seed},
        "conditions": conds,
        "timing": timing or {"tr": 2.0, "soa": 2.0},
        "rules": [r.model_dump(exclude_none=True) if hasattr(r, "model_dump") else r for r in rules],
        "analysis": analysis or {},
        "objective": {"iterations": 0} if objective is None else objective,
    }
    return study_from_mapping(data)


def fixed_feasible(facts: StudyFacts, rules, runs) -> bool:
    """Is the ordering feasible when fixed into the per-position model with the rules enforced?"""
    m = OrderingModel(facts)
    for rule in rules:
        g = m.new_guard("r")
        m.cp.add(g == 1)
        rule.encode(m, g)
    m.fix([np.asarray(r) for r in runs])
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1
    status = solver.solve(m.cp)
    assert status in (cp_model.OPTIMAL, cp_model.FEASIBLE, cp_model.INFEASIBLE)
    return status != cp_model.INFEASIBLE


def counts_model_feasible(facts: StudyFacts, rules) -> bool | None:
    """Feasibility of the rules in the transition-count model (None if a rule cannot be said there).

    Connectivity cuts are not added here; callers use small cases or compare with generation.
    """
    f = FlowModel(facts)
    for rule in rules:
        g = f.new_guard("r")
        f.cp.add(g == 1)
        if not rule.encode_flow(f, g):
            return None
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1
    return solver.solve(f.cp) != cp_model.INFEASIBLE


def random_ordering(facts: StudyFacts, rng) -> list[np.ndarray]:
    return [rng.permutation(np.repeat(np.arange(facts.n_conditions), facts.counts[r])) for r in range(facts.n_runs)]


@pytest.fixture
def tmp_cwd(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    return tmp_path


def end_session(proc) -> None:
    """Kill whatever is left of a command started with start_new_session=True, wait for it and close
    its pipes, so that no process of a test outlives it."""
    try:
        os.killpg(proc.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    proc.wait()
    proc.stdout.close()
    proc.stderr.close()


def session_processes(sid: int) -> list[int]:
    """Processes of a session still alive (Linux /proc; field 6 of stat is the session id)."""
    out = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[3]) == sid and fields[0] != "Z":
            out.append(int(stat.parent.name))
    return out


def processes_left(sid: int, wait: float = 20.0) -> list[int]:
    """Processes of session sid still alive after waiting up to `wait` seconds for them to end."""
    deadline = time.monotonic() + wait
    while session_processes(sid) and time.monotonic() < deadline:
        time.sleep(0.2)
    return session_processes(sid)
