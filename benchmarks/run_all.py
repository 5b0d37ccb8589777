"""Run every benchmark in this folder, one after the other: python benchmarks/run_all.py [--quick]."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main() -> int:
    extra = sys.argv[1:]
    status = 0
    for script in sorted(HERE.glob("bench_*.py")):
        print(f"\n=== {script.name} ===", flush=True)
        status |= subprocess.call([sys.executable, str(script), *extra])
    return status


if __name__ == "__main__":
    sys.exit(main())
