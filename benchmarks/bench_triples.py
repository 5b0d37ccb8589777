"""balanced-triples: seconds to a participant's first valid ordering, with and without the wide-model settings.

The per-position model carries K^3 triple literals per position; for such models the driver skips
CP-SAT's probing, symmetry detection and LP relaxation (seqsolve/solve.py, _PositionsPath._params). This prints, side by
side in one run, the time with those settings and with CP-SAT's defaults, and beside them the same study
under balanced-transitions (the counts model) for scale. Rules: balanced-triples within 1 (or
balanced-transitions within 1) and max-run 3; 4 runs.
Then the search's side: candidate swaps judged per second by the compiled local checks
(MoveChecker.valid) under balanced-triples beside balanced-transitions, and the full checks (Judge.ok)
beside both, on one valid design of 4 conditions x 96 trials, 4 runs.
Run: python benchmarks/bench_triples.py [--quick].
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402

from seqsolve import solve  # noqa: E402
from seqsolve.moves import MoveChecker, compile_moves  # noqa: E402
from seqsolve.search import Judge  # noqa: E402
from seqsolve.solve import SolveOptions, generate_orderings  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402


def make(k: int, per_condition: int, kind: str):
    data = {
        "study": {"name": "bench", "task": "bench", "participants": 1, "runs": 4, "seed": 3},
        "conditions": [{"name": f"c{i}", "trials": per_condition} for i in range(k)],
        "timing": {"tr": 2.0, "soa": 2.0},
        "rules": [{"kind": kind, "tolerance": 1}, {"kind": "max-run", "length": 3}],
        "objective": {"iterations": 0},
    }
    return study_from_mapping(data)


def seconds(study, wide: bool) -> float:
    """Wall seconds of generate_orderings, with the wide-model settings on or off."""
    original = solve._PositionsPath.__init__

    def init(self, *args, **kwargs):
        original(self, *args, **kwargs)
        self.wide = wide and self.wide

    solve._PositionsPath.__init__ = init
    try:
        t0 = time.perf_counter()
        (found,) = generate_orderings(study, SolveOptions(time_limit=600, work_limit=600))
        out = time.perf_counter() - t0
    finally:
        solve._PositionsPath.__init__ = original
    assert not [v for r in study.rules for v in r.check(study.facts, found.runs)]
    return out


def rate(call, span: float) -> float:
    """Calls' items per second over about span seconds (call returns how many it did)."""
    done, t0 = 0, time.perf_counter()
    while time.perf_counter() - t0 < span:
        done += call()
    return done / (time.perf_counter() - t0)


def swaps_per_second(study, span: float) -> tuple[float, float, float]:
    """(local swaps judged per second, full checks per second, share of swaps valid) on one valid design."""
    (found,) = generate_orderings(study)
    codes = np.concatenate(found.runs).astype(np.int64)
    starts = np.cumsum([0] + [len(r) for r in found.runs])
    rng = np.random.default_rng(0)
    run = rng.integers(len(found.runs), size=4096)
    pairs = starts[run][:, None] + rng.integers(0, len(found.runs[0]), size=(4096, 2))
    pairs = pairs[codes[pairs[:, 0]] != codes[pairs[:, 1]]]
    checker = MoveChecker(compile_moves(study.rules, study.facts), [], codes)
    valid = checker.valid(pairs)  # compiles (or loads the cache) outside the clock
    judge = Judge(study, [])

    def full():
        i, j = pairs[rng.integers(len(pairs))]
        c = codes.copy()
        c[i], c[j] = c[j], c[i]
        judge.ok(np.split(c, starts[1:-1]))
        return 1

    return rate(lambda: len(checker.valid(pairs)), span), rate(full, span), float(valid.mean())


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    quick = parser.parse_args().quick
    cases = [(3, 16), (4, 24)] if quick else [(3, 16), (3, 32), (4, 24), (4, 48), (5, 40)]
    print(f"{'K':>3} {'trials/run':>10} {'triples, wide':>14} {'triples, default':>17} {'ratio':>6} {'pairs':>7}")
    for k, n in cases:
        study = make(k, n, "balanced-triples")
        wide, default = seconds(study, True), seconds(study, False)
        pairs = seconds(make(k, n, "balanced-transitions"), True)
        print(f"{k:>3} {k * n:>10} {wide:>13.2f}s {default:>16.2f}s {default / wide:>5.1f}x {pairs:>6.2f}s")
    span = 0.5 if quick else 3.0
    print("\nswaps judged per second, one core; 4 conditions x 96 trials, 4 runs (with max-run 3)")
    print(f"{'rule':>22} {'local':>12} {'full checks':>12} {'ratio':>7} {'valid':>6}")
    for kind in ("balanced-triples", "balanced-transitions"):
        local, full, share = swaps_per_second(make(4, 24, kind), span)
        print(f"{kind:>22} {local:>12,.0f} {full:>12,.0f} {local / full:>6.0f}x {share:>6.0%}")


if __name__ == "__main__":
    main()
