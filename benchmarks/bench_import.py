"""Import time: `import seqsolve`, `import seqsolve.cli` and `seqsolve --help`, beside `import numpy`.

Each figure is the median wall-clock time of a fresh interpreter (python -c "import ..."), after one
untimed warm-up run that fills the bytecode and numba caches (the target is "after the first run").
The full pipeline (`from seqsolve import generate`: solver, scipy, pydantic) is shown for reference.
Run: python benchmarks/bench_import.py [--quick].
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: (label, interpreter arguments, target in seconds or None)
CASES = [
    ("python (nothing imported)", ["-c", "pass"], None),
    ("import numpy (yardstick)", ["-c", "import numpy"], None),
    ("import seqsolve", ["-c", "import seqsolve"], 0.7),
    ("import seqsolve.cli", ["-c", "import seqsolve.cli"], 0.7),
    ("seqsolve --help", ["-m", "seqsolve", "--help"], 0.7),
    ("from seqsolve import generate", ["-c", "from seqsolve import generate"], None),
]


def wall(args: list[str], repeats: int) -> float:
    """Median seconds of `python args` in fresh processes (our tree first on the path)."""
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    cmd = [sys.executable, *args]
    subprocess.run(cmd, env=env, cwd=ROOT, check=True, capture_output=True)  # warm-up: caches filled
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        subprocess.run(cmd, env=env, cwd=ROOT, check=True, capture_output=True)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    repeats = 3 if args.quick else 7
    print(
        f"import time, median of {repeats} fresh interpreters each (lower is better); x numpy = this / import numpy\n"
    )
    head = f"{'what':<32} | {'seconds':>8} | {'x numpy':>8} | {'target':>8} | {'met':>4}"
    print(head)
    print("-" * len(head))
    numpy_s = None
    for label, argv, target in CASES:
        s = wall(argv, repeats)
        numpy_s = s if label.startswith("import numpy") else numpy_s
        ratio = f"{s / numpy_s:7.1f}x" if numpy_s else f"{'':>8}"
        tgt = f"{target:7.2f}s" if target else f"{'':>8}"
        met = ("yes" if s <= target else "NO") if target else ""
        print(f"{label:<32} | {s:8.3f} | {ratio:>8} | {tgt:>8} | {met:>4}")


if __name__ == "__main__":
    main()
