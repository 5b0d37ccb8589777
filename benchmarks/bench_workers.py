"""Study size: generate end to end on the shipped example and on a 24-participant study, and what
`--workers 2` earns (same designs, less wall-clock time).

1. examples/reward_cue.toml (6 participants x 3 runs x 64 trials), design_study with 1 and 2
   worker processes: wall-clock time, speed-up, and whether the designs are the same.
2. `seqsolve generate` as a user runs it (a fresh process, `--workers 2`): the example, and
   benchmarks/specs/study24.toml (24 participants x 4 runs x 66 trials, default search), with the
   mean and lowest score from the manifest.
   --against REV also runs REV's generate on participant 01 of the 24-participant study at 100
   search steps of that revision's engine (the yardstick "100 search steps' worth of quality" of
   issue 9), exported from this repository to a temporary folder.

Targets (issue 9, on 2 cores): the example in <= 15 s; the 24-participant study in <= 3 min with at
least the quality of 100 steps of the earlier engine. Run: python benchmarks/bench_workers.py
[--quick] [--against 44cb7f9]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from seqsolve.generate import design_study  # noqa: E402
from seqsolve.search import SearchOptions  # noqa: E402
from seqsolve.spec import load_study  # noqa: E402

EXAMPLE = ROOT / "examples" / "reward_cue.toml"
STUDY24 = ROOT / "benchmarks" / "specs" / "study24.toml"


def generate_cli(spec: Path, tree: Path, extra: list[str]) -> tuple[float, list[float]]:
    """Wall-clock seconds of `seqsolve generate` in a fresh process from source tree `tree`, and
    the participants' scores from its manifest."""
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "designs"
        env = {**os.environ, "PYTHONPATH": str(tree)}
        t0 = time.perf_counter()
        done = subprocess.run(
            [sys.executable, "-m", "seqsolve", "generate", str(spec), "-o", str(out), *extra],
            env=env,
            capture_output=True,
            text=True,
            cwd=tree,
        )
        took = time.perf_counter() - t0
        if done.returncode != 0:
            raise SystemExit(f"generate failed ({done.returncode}): {done.stderr[-600:]}")
        manifest = json.loads((out / "manifest.json").read_text())
    scores = [p["score"]["score"] for p in manifest["participants"] if p.get("score")]
    return took, scores


def yardstick(rev: str) -> float:
    """Participant 01's score from `rev`'s engine at 100 search steps on the 24-participant spec."""
    with tempfile.TemporaryDirectory() as tmp:
        tree = Path(tmp) / "tree"
        tree.mkdir()
        archive = subprocess.run(["git", "archive", rev], cwd=ROOT, capture_output=True, check=True).stdout
        subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
        one = tree / "one.toml"
        text = STUDY24.read_text().replace("participants = 24", "participants = 1")
        one.write_text(text.replace('include = ["standard"]', f'include = ["{ROOT / "rules" / "standard.toml"}"]'))
        took, scores = generate_cli(one, tree, ["--iterations", "100"])
    print(f"  {rev} engine, participant 01, 100 steps: score {scores[0]:.4f} in {took:.1f} s")
    return scores[0]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="the example only, 5 rounds")
    ap.add_argument("--against", default=None, help="a git revision whose engine gives the quality yardstick")
    args = ap.parse_args()
    study = load_study(EXAMPLE)
    rounds = 5 if args.quick else None
    print(f"1. design_study on {EXAMPLE.name}: {len(study.participants)} participants (wall clock)")
    times, designs = {}, {}
    for workers in (1, 2):
        t0 = time.perf_counter()
        designs[workers] = design_study(study, search=SearchOptions(iterations=rounds, workers=workers))
        times[workers] = time.perf_counter() - t0
        print(f"  {workers} worker(s): {times[workers]:7.1f} s")
    same = all(np.array_equal(np.concatenate(a.runs), np.concatenate(b.runs)) for a, b in zip(designs[1], designs[2]))
    print(f"  speed-up with 2 workers: {times[1] / times[2]:.2f}x; same designs: {'yes' if same else 'NO'}")
    if args.quick:
        return 0 if same else 1
    print("\n2. seqsolve generate --workers 2, a fresh process each (interpreter start included)")
    took, scores = generate_cli(EXAMPLE, ROOT, ["--workers", "2"])
    print(f"  {EXAMPLE.name}: {took:.1f} s (target <= 15 s); scores {min(scores):.4f} to {max(scores):.4f}")
    took, scores = generate_cli(STUDY24, ROOT, ["--workers", "2"])
    print(
        f"  {STUDY24.name}: {took:.1f} s (target <= 180 s); mean score {np.mean(scores):.4f}, lowest {min(scores):.4f}"
    )
    if args.against:
        ref = yardstick(args.against)
        print(f"  lowest participant / {args.against}'s 100 steps: {min(scores) / ref:.3f} (target >= 1)")
    return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
