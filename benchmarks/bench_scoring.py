"""Scoring speed: the fast evaluator beside the straightforward reference, on the same candidates.

4 conditions + null events (equal counts), TR 2 s, SOA 2 s, FIR over 20 s, cosine high-pass 128 s.
Run: python benchmarks/bench_scoring.py [--quick]. BLAS is pinned to one thread for every method.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from seqsolve.efficiency.fast import Evaluator  # noqa: E402
from seqsolve.efficiency.grid import make_layout  # noqa: E402
from seqsolve.efficiency.reference import covariance, detection_matrix, efficiency, fir_matrix  # noqa: E402
from seqsolve.efficiency.setup import make_setup  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402
from seqsolve.timing import make_schedules, trial_durations  # noqa: E402


def make(n_trials: int):
    per = n_trials // 5
    conds = [{"name": f"c{i}", "trials": per} for i in range(4)] + [
        {"name": "rest", "trials": n_trials - 4 * per, "baseline": True}
    ]
    data = {
        "study": {"name": "bench", "task": "bench", "participants": 1},
        "conditions": conds,
        "timing": {"tr": 2.0, "soa": 2.0},
        "analysis": {"fir_window": 20.0},
    }
    study = study_from_mapping(data)
    setup = make_setup(study)
    base = np.repeat(np.arange(5), study.facts.counts[0])
    (sched,) = make_schedules(study, [base], 0)
    layout = make_layout(setup, [sched.onsets], [sched.n_volumes], trial_durations(study))
    return study, setup, layout, base


def rate(fn, count: int, min_time: float) -> float:
    """Items per second of fn() scoring `count` items, repeated until min_time has passed.

    One untimed call first: the first call of a compiled kernel loads (or, on a new machine or
    numba version, compiles) its machine code, seconds that once made a single timed call of
    "fast, one" print 0 items/s."""
    fn()
    reps, t0 = 0, time.perf_counter()
    while True:
        fn()
        reps += 1
        took = time.perf_counter() - t0
        if took >= min_time:
            return reps * count / took


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    min_time = 0.5 if args.quick else 2.0
    sizes = [240] if args.quick else [240, 480]
    print("scoring speed, items per second (higher is better); ratio = fast / reference, measured in this run\n")
    head = f"{'N':>4} | {'analysis':>10} | {'reference':>10} | {'fast, one':>10} | {'fast, batch':>11} | {'neighbours':>11} | {'batch x':>8} | {'neigh. x':>8}"
    print(head)
    print("-" * len(head))
    kernels = []
    for n in sizes:
        study, setup, layout, base = make(n)
        rng = np.random.default_rng(0)
        cands = np.array([rng.permutation(base) for _ in range(200)])
        ev = Evaluator(setup, layout, study.facts.n_conditions)
        plain = Evaluator(setup, layout, study.facts.n_conditions, compiled=False)
        nb = ev.neighbours(cands[0])
        n_neigh = nb.change_detection.size + len(nb.swap_pairs)
        for part in ("detection", "estimation"):
            det = part == "detection"
            with threadpool_limits(1):
                if det:
                    ref = rate(
                        lambda: efficiency(
                            covariance(setup, layout, detection_matrix(setup, layout, cands[1])),
                            setup.detection_contrast(),
                        ),
                        1,
                        min_time,
                    )
                else:
                    ref = rate(
                        lambda: efficiency(
                            covariance(setup, layout, fir_matrix(setup, layout, cands[1])), setup.estimation_contrast()
                        ),
                        1,
                        min_time,
                    )
            one = rate(lambda: ev.score_many(cands[2:3], detection=det, estimation=not det), 1, min_time)
            batch = rate(lambda: ev.score_many(cands, detection=det, estimation=not det), len(cands), min_time)
            neigh = rate(lambda: ev.neighbours(cands[0], detection=det, estimation=not det), n_neigh, min_time)
            plain_batch = rate(lambda: plain.score_many(cands, detection=det, estimation=not det), len(cands), min_time)
            plain_neigh = rate(lambda: plain.neighbours(cands[0], detection=det, estimation=not det), n_neigh, min_time)
            kernels.append((n, part, batch / plain_batch, neigh / plain_neigh))
            print(
                f"{n:>4} | {part:>10} | {ref:>10,.0f} | {one:>10,.0f} | {batch:>11,.0f} | {neigh:>11,.0f} | {batch / ref:>7,.0f}x | {neigh / ref:>7,.0f}x"
            )
    print("\nwhat the compiled kernels earn: the same evaluator with and without them (numpy paths), this run")
    for n, part, b, nb_ in kernels:
        print(f"  N={n:>4} {part:>10}: batch {b:6.1f}x, neighbours {nb_:6.1f}x")
    print(f"\nneighbours: all {n_neigh:,} single changes and swaps of one design at the last N, scored together")
    print(
        "targets: batch >= 100x (detection), >= 60x (estimation); neighbours >= 5,000x (detection), >= 250x (estimation)"
    )


if __name__ == "__main__":
    main()
