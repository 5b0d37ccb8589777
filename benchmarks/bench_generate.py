"""Time to the first valid ordering: seqsolve's models beside a straightforward encoding and shuffle-and-reject.

Standard rule set: max-run 2, balanced transitions within 1, run boundary; 4 runs solved jointly.
Run: python benchmarks/bench_generate.py [--quick]. Prints one table; ratios are measured in this run.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from ortools.sat.python import cp_model

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from seqsolve.rules import BalancedTransitions  # noqa: E402
from seqsolve.solve import SolveOptions, _PositionsPath, _solve_hinted, generate_orderings, solver_params  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402

RULES = [
    {"kind": "max-run", "length": 2},
    {"kind": "balanced-transitions", "tolerance": 1},
    {"kind": "run-boundary"},
]
RUNS = 4


def make(k: int, n: int, seed: int = 0):
    counts = [n // k] * k
    counts[0] += n - sum(counts)
    conds = [{"name": f"c{i}", "trials": c} for i, c in enumerate(counts)]
    data = {
        "study": {"name": "bench", "task": "bench", "participants": 1, "runs": RUNS, "seed": seed},
        "conditions": conds,
        "timing": {"tr": 2.0, "soa": 2.0},
        "rules": RULES,
    }
    return study_from_mapping(data)


def straightforward(study, limit: float) -> float | None:
    """One-hot literals and one product literal per (position, pair), every rule stated on them directly."""
    t0 = time.perf_counter()
    facts = study.facts
    cp = cp_model.CpModel()
    k = facts.n_conditions
    xs = []
    for r in range(facts.n_runs):
        n = facts.run_length(r)
        x = [[cp.new_bool_var("") for _ in range(k)] for _ in range(n)]
        for p in range(n):
            cp.add_exactly_one(x[p])
        for c in range(k):
            cp.add(sum(x[p][c] for p in range(n)) == int(facts.counts[r, c]))
            for p in range(n - 2):
                cp.add(x[p][c] + x[p + 1][c] + x[p + 2][c] <= 2)
        pair = [[[cp.new_bool_var("") for _ in range(k)] for _ in range(k)] for _ in range(n - 1)]
        for p in range(n - 1):
            for a in range(k):
                for b in range(k):
                    z = pair[p][a][b]
                    cp.add_bool_and([x[p][a], x[p + 1][b]]).only_enforce_if(z)
                    cp.add_bool_or([~x[p][a], ~x[p + 1][b], z])
        (_, low, high), *_ = BalancedTransitions(kind="balanced-transitions", tolerance=1).bounds(facts)[r : r + 1]
        for a in range(k):
            for b in range(k):
                s = sum(pair[p][a][b] for p in range(n - 1))
                cp.add(s >= int(low[a, b]))
                cp.add(s <= int(high[a, b]))
        xs.append(x)
    for r in range(facts.n_runs - 1):
        for c in range(k):
            cp.add_bool_or([~xs[r][-1][c], ~xs[r + 1][0][c]])
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 2
    solver.parameters.max_time_in_seconds = max(limit - (time.perf_counter() - t0), 0.01)
    status = solver.solve(cp)
    took = time.perf_counter() - t0
    return took if status in (cp_model.OPTIMAL, cp_model.FEASIBLE) else None


def shuffle_and_reject(study, budget: float, seed: int = 0) -> tuple[float | None, int]:
    """Reshuffle each run until it has no stretch longer than 2 (max-run alone, the lab habit)."""
    rng = np.random.default_rng(seed)
    facts = study.facts
    t0 = time.perf_counter()
    tries = 0
    for r in range(facts.n_runs):
        base = np.repeat(np.arange(facts.n_conditions), facts.counts[r])
        while True:
            tries += 1
            seq = rng.permutation(base)
            breaks = np.flatnonzero(np.diff(seq) != 0)
            longest = np.diff(np.concatenate([[-1], breaks, [len(seq) - 1]])).max()
            if longest <= 2:
                break
            if time.perf_counter() - t0 > budget:
                return None, tries
    return time.perf_counter() - t0, tries


def ours(study, reps: int) -> float:
    times = []
    for seed in range(reps):
        st = make(study.facts.n_conditions, study.facts.run_length(0), seed=seed)
        t0 = time.perf_counter()
        generate_orderings(st, SolveOptions())
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def ours_positions(study, limit: float) -> float | None:
    """seqsolve's per-position model searched whole from a shuffled start (no counts sketch)."""
    t0 = time.perf_counter()
    options = SolveOptions(time_limit=limit, work_limit=1e9)
    m, guards = _PositionsPath(study, options).full([])
    rng = np.random.default_rng(0)
    shuffled = [rng.permutation(np.repeat(np.arange(study.facts.n_conditions), n)) for n in study.facts.counts]
    solver = solver_params(0, options, time_limit=max(limit - (time.perf_counter() - t0), 0.01))
    status, _ = _solve_hinted(m, guards, shuffled, solver)
    return time.perf_counter() - t0 if status in (cp_model.OPTIMAL, cp_model.FEASIBLE) else None


def fmt(t: float | None, limit: float) -> str:
    return f"> {limit:g} s" if t is None else f"{t:.3f} s"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true", help="smaller grid, shorter limits")
    ap.add_argument("--limit", type=float, default=20.0, help="seconds allowed to each slow method per case")
    args = ap.parse_args()
    ks = [4, 6] if args.quick else [4, 6, 8, 12]
    ns = [60, 240] if args.quick else [60, 240, 1000, 2000]
    limit = 5.0 if args.quick else args.limit
    reps = 3 if args.quick else 5
    print(
        f"time to the first valid ordering, {RUNS} runs jointly, rules: max-run 2, balanced transitions +-1, run boundary"
    )
    print(
        f"seqsolve: median of {reps} (auto: counts model); others: one try each, {limit:g} s limit (a timed-out size skips larger ones)"
    )
    print("per-position: seqsolve's own per-position model searched whole, no sketch; one-hot+products: 2 workers\n")
    head = f"{'K':>3} {'N/run':>6} | {'seqsolve':>10} | {'per-position':>12} | {'one-hot+products':>16} | {'shuffle (max-run only)':>22} | {'speed-up vs one-hot':>19}"
    print(head)
    print("-" * len(head))
    for k in ks:
        slow_out = {"positions": False, "naive": False, "shuffle": False}
        for n in ns:
            study = make(k, n)
            t_ours = ours(study, reps)
            t_pos = None if slow_out["positions"] else ours_positions(study, limit)
            slow_out["positions"] |= t_pos is None
            t_naive = None if slow_out["naive"] else straightforward(study, limit)
            slow_out["naive"] |= t_naive is None
            t_shuf, tries = (None, 0) if slow_out["shuffle"] else shuffle_and_reject(study, limit)
            slow_out["shuffle"] |= t_shuf is None
            ratio = f"{t_naive / t_ours:,.0f}x" if t_naive else f"> {limit / t_ours:,.0f}x"
            shuf = fmt(t_shuf, limit) + (f" ({tries} tries)" if tries else "")
            print(
                f"{k:>3} {n:>6} | {t_ours:>8.3f} s | {fmt(t_pos, limit):>12} | {fmt(t_naive, limit):>16} | {shuf:>22} | {ratio:>19}"
            )
    print("\ntargets: K=6, N=240 under 0.5 s; K=12, N=2000 under 5 s; never slower than one-hot+products")


if __name__ == "__main__":
    main()
