"""What the HTML report adds to generate: the README example end to end beside the report alone.

Measured side by side in one run, each in a fresh interpreter after one untimed warm-up (bytecode,
numba and matplotlib font caches filled):
- `seqsolve generate examples/reward_cue.toml` (the README example, report included), wall clock;
- the report of that folder built in a process that has already loaded what generate has loaded
  (numpy, scipy, the efficiency code) but not matplotlib: what the report costs inside generate;
- the same build once more in that process (matplotlib loaded: the drawing alone);
- a large folder (4 conditions x 2000 trials x 4 runs, `--iterations 0`), the report the same way.
Target: the report under about 2 s (from the issue: generate's ~10 s must stay about that).
Run: python benchmarks/bench_report.py [--quick].
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TARGET_S = 2.0

#: builds the report of a folder twice in one process; prints cold and warm seconds
TIMER = """
import sys, time
import numpy, scipy.special
import seqsolve.efficiency.hrf, seqsolve.rules
from seqsolve.report import read_output_folder, report_html
files = read_output_folder(sys.argv[1])
files.pop("report.html", None)
t0 = time.perf_counter(); report_html(files); t1 = time.perf_counter(); report_html(files); t2 = time.perf_counter()
print(t1 - t0, t2 - t1)
"""

LARGE = """
[study]
name = "large"
task = "large"
participants = 2
runs = 4
seed = 3
[[conditions]]
name = "a"
trials = 500
[[conditions]]
name = "b"
trials = 500
[[conditions]]
name = "c"
trials = 500
[[conditions]]
name = "rest"
trials = 500
baseline = true
[timing]
tr = 2.0
soa = 2.0
[[rules]]
kind = "max-run"
length = 3
"""


def env() -> dict:
    return dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))


def run_generate(spec: Path, out: Path, extra: list[str]) -> float:
    cmd = [sys.executable, "-m", "seqsolve", "generate", str(spec), "-o", str(out), "--force", *extra]
    t0 = time.perf_counter()
    subprocess.run(cmd, env=env(), cwd=ROOT, check=True, capture_output=True)
    return time.perf_counter() - t0


def report_times(folder: Path) -> tuple[float, float]:
    done = subprocess.run(
        [sys.executable, "-c", TIMER, str(folder)], env=env(), cwd=ROOT, check=True, capture_output=True, text=True
    )
    cold, warm = map(float, done.stdout.split())
    return cold, warm


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--quick", action="store_true")
    repeats = 1 if ap.parse_args().quick else 3
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        example = ROOT / "examples" / "reward_cue.toml"
        run_generate(example, tmp / "ex", [])  # warm-up
        gen = statistics.median(run_generate(example, tmp / "ex", []) for _ in range(repeats))
        ex = [report_times(tmp / "ex") for _ in range(repeats)]
        (tmp / "large.toml").write_text(LARGE)
        big_gen = run_generate(tmp / "large.toml", tmp / "big", ["--iterations", "0"])
        big = [report_times(tmp / "big") for _ in range(repeats)]
    cold, warm = statistics.median(c for c, _ in ex), statistics.median(w for _, w in ex)
    bcold, bwarm = statistics.median(c for c, _ in big), statistics.median(w for _, w in big)
    print(f"{'case':<52}{'seconds':>9}{'share of generate':>20}")
    print(f"{'generate, README example (report included)':<52}{gen:>9.2f}{'':>20}")
    print(f"{'  its report, as inside generate (matplotlib cold)':<52}{cold:>9.2f}{cold / gen:>19.1%}")
    print(f"{'  its report, drawing only (matplotlib loaded)':<52}{warm:>9.2f}{warm / gen:>19.1%}")
    print(f"{'generate --iterations 0, 4 x 2000 trials x 4 runs':<52}{big_gen:>9.2f}{'':>20}")
    print(f"{'  its report, as inside generate':<52}{bcold:>9.2f}{bcold / big_gen:>19.1%}")
    print(f"{'  its report, drawing only':<52}{bwarm:>9.2f}{bwarm / big_gen:>19.1%}")
    worst = max(cold, bcold)
    print(f"target: report under {TARGET_S:.0f} s: {'met' if worst < TARGET_S else 'NOT met'} (worst {worst:.2f} s)")


if __name__ == "__main__":
    main()
