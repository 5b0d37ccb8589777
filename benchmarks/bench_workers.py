"""Participants searched side by side: generate's wall-clock time with 1 and 2 worker processes.

The shipped example (examples/reward_cue.toml, 6 participants) at a fixed number of search steps;
the designs must come out the same, which this script checks. Run:
python benchmarks/bench_workers.py [--quick].
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from seqsolve.generate import design_study  # noqa: E402
from seqsolve.search import SearchOptions  # noqa: E402
from seqsolve.spec import load_study  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    steps = 40 if args.quick else 150
    study = load_study(ROOT / "examples" / "reward_cue.toml")
    print(f"generate, {len(study.participants)} participants, {steps} search steps each (wall clock)\n")
    times, designs = {}, {}
    for workers in (1, 2):
        t0 = time.perf_counter()
        designs[workers] = design_study(study, search=SearchOptions(iterations=steps, workers=workers))
        times[workers] = time.perf_counter() - t0
        print(f"  {workers} worker(s): {times[workers]:7.1f} s")
    same = all(np.array_equal(np.concatenate(a.runs), np.concatenate(b.runs)) for a, b in zip(designs[1], designs[2]))
    print(f"\nspeed-up with 2 workers: {times[1] / times[2]:.2f}x; same designs: {'yes' if same else 'NO'}")
    print("(each worker starts its own Python, ~2 s; the spread rescue after the searches runs in one process)")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
