"""How fast candidate moves are judged: local compiled checks (seqsolve.moves) beside the full rule checks.

A 4-condition + baseline spec with 4 runs of 240 trials and five rules: max-run 2, balanced transitions
within 1 (repeats free), run boundary, no two c0 in a row (min-gap) and rest first. From one valid design,
random same-run swaps are judged three ways, in one run:

  full checks    Judge.ok on the swapped design (every rule's check; how the search judged before)
  local, batch   MoveChecker.valid on a batch of pairs (one compiled call per batch)
  local, loop    the compiled search loop (tracked_moves): judge, score the valid ones, move

Run: python benchmarks/bench_moves.py [--quick]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from seqsolve.moves import MoveChecker, compile_moves  # noqa: E402
from seqsolve.objective import References, Scorer, Weights  # noqa: E402
from seqsolve.search import Judge  # noqa: E402
from seqsolve.solve import sample_orderings  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402
from seqsolve.tracking import NO_FIR_TRACK, detection_track, fir_track  # noqa: E402


def study(runs: int = 4, per: int = 48):
    conds = [{"name": f"c{i}", "trials": per} for i in range(4)] + [{"name": "rest", "trials": per, "baseline": True}]
    rules = [
        {"kind": "max-run", "length": 2},
        {"kind": "balanced-transitions", "tolerance": 1, "exclude_repeats": True},
        {"kind": "run-boundary"},
        {"kind": "min-gap", "conditions": ["c0"], "gap": 1},
        {"kind": "position", "conditions": ["rest"], "placement": "always", "first": 1},
    ]
    data = {
        "study": {"name": "moves", "task": "bench", "participants": 1, "runs": runs, "seed": 1},
        "conditions": conds,
        "timing": {"tr": 2.0, "soa": 2.0},
        "rules": rules,
        "analysis": {"fir_window": 20.0},
    }
    return study_from_mapping(data, source="<bench_moves>")


def timed(fn, seconds: float) -> tuple[int, float]:
    """Repeat fn (which returns how many it judged) for about `seconds`; (judged, elapsed)."""
    n, t0 = 0, time.perf_counter()
    while time.perf_counter() - t0 < seconds:
        n += fn()
    return n, time.perf_counter() - t0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="0.5 s per measurement instead of 3 s")
    args = ap.parse_args()
    span = 0.5 if args.quick else 3.0
    s = study()
    runs = sample_orderings(s, 1, 1)[0]
    codes = np.concatenate(runs).astype(np.int64)
    lengths = [len(r) for r in runs]
    starts = np.concatenate([[0], np.cumsum(lengths)])
    rng = np.random.default_rng(0)

    def draw(n):
        r = rng.integers(len(runs), size=n)
        pairs = starts[r][:, None] + rng.integers(0, lengths[0], size=(n, 2))
        return pairs[codes[pairs[:, 0]] != codes[pairs[:, 1]]]

    judge = Judge(s, [])
    checker = MoveChecker(compile_moves(s.rules, s.facts), [], codes)
    checker.valid(draw(8))  # compile (or load the cache) outside the clock
    pool = draw(4096)
    valid_share = float(checker.valid(pool).mean())

    def full():
        i, j = pool[rng.integers(len(pool))]
        c = codes.copy()
        c[i], c[j] = c[j], c[i]
        judge.ok(np.split(c, starts[1:-1]))
        return 1

    def local():
        checker.valid(pool)
        return len(pool)

    scorer = Scorer(s, Weights.of(1.0, 0.0), References(1.0, 1, 1.0), 1)
    ev = scorer.evaluator(runs)
    track = detection_track(ev, scorer.setup, codes)
    fir = fir_track(ev, scorer.setup, codes)
    kernels = checker.kernels
    late = np.full(50, -1.0)
    ends = starts[1:].astype(np.int64)

    def loop(fir_part):
        def go():
            best = codes.copy()
            out = kernels.tracked_moves(
                checker.tables,
                checker.state,
                track,
                fir_part or NO_FIR_TRACK,
                1.0,
                1.0 if fir_part else 0.0,
                200,  # moves
                96,  # swaps drawn per move (the search's default)
                0,  # of them between trials with the same neighbours
                8,  # estimation scored exactly for the 8 most promising
                late,
                0,
                -1.0,
                -1.0,
                best,
                ends,
                7,
            )
            return int(out[3])

        go()
        return go

    rows = [
        ("full checks (Judge.ok per swap)", *timed(full, span)),
        ("local checks, batch of 4096", *timed(local, span)),
        ("search loop, detection", *timed(loop(None), span)),
        ("search loop, detection + estimation", *timed(loop(fir), span)),
    ]
    base = rows[0][1] / rows[0][2]
    print(
        f"candidate swaps judged per second, one core; 4 runs x 240 trials, 5 rules; {valid_share:.0%} of swaps valid"
    )
    print(f"{'method':<40}{'judged/s':>14}{'vs full':>10}")
    for name, n, dt in rows:
        rate = n / dt
        print(f"{name:<40}{rate:>14,.0f}{rate / base:>9.0f}x")
    print("target: >= 10,000 valid candidate moves judged per second per core (the search loop rows also score them)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
