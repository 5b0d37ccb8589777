"""Study size: `seqsolve generate --iterations 0` (first valid designs, manifest with every run's
efficiency figures) on large studies, wall-clock seconds and peak memory of the whole command.

Each case runs in a fresh process (a small wrapper that starts the command and reads its peak
resident memory from resource.getrusage(RUSAGE_CHILDREN)), so the figures are what a user sees,
interpreter start included. Rules: the standard set (max-run 2, balanced transitions, run boundary).
Run: python benchmarks/bench_large.py [--quick] [--against REV]
--against REV also measures a git revision of this repository (exported to a temporary folder)
side by side, e.g. the commit before a change.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: (conditions, trials per condition and run, runs); the first is the target case
CASES = [(4, 500, 4), (8, 125, 4), (4, 125, 4)]
QUICK = [(4, 500, 4)]
TARGET_SECONDS, TARGET_MB = 5.0, 500.0

#: run in a fresh interpreter: the command, then its wall time and peak memory as JSON
WRAPPER = """
import json, resource, subprocess, sys, time
t0 = time.perf_counter()
done = subprocess.run(sys.argv[2:], env={**__import__('os').environ, 'PYTHONPATH': sys.argv[1]},
                      capture_output=True, text=True)
took = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024  # KiB on Linux
print(json.dumps({"seconds": took, "mb": peak, "rc": done.returncode, "err": done.stderr[-400:]}))
"""


def spec_text(k: int, per: int, runs: int) -> str:
    """A spec of k conditions (the last a null event), per trials each per run, fixed SOA."""
    conds = "".join(
        f'\n[[conditions]]\nname = "c{i}"\ntrials = {per}\n' + ("baseline = true\n" if i == k - 1 else "")
        for i in range(k)
    )
    return (
        'include = ["standard"]\n\n[study]\nname = "large"\ntask = "large"\nparticipants = 1\n'
        f"runs = {runs}\nseed = 11\n{conds}\n[timing]\ntr = 2.0\nsoa = 2.0\n\n[objective]\niterations = 0\n"
    )


def measure(root: Path, spec: Path, out: Path) -> dict:
    """Seconds and peak MB of one generate command run from the tree at root."""
    cmd = [sys.executable, "-m", "seqsolve", "generate", str(spec), "-o", str(out), "--iterations", "0"]
    done = subprocess.run(
        [sys.executable, "-c", WRAPPER, str(root), *cmd], capture_output=True, text=True, check=True, cwd=root
    )
    res = json.loads(done.stdout)
    if res["rc"] != 0:
        raise RuntimeError(f"generate failed ({root}): {res['err']}")
    return res


def export(rev: str, into: Path) -> Path:
    """The tree of git revision rev, exported under into."""
    tree = into / f"rev-{rev}"
    tree.mkdir()
    archive = subprocess.run(["git", "archive", rev], cwd=ROOT, capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(tree)], input=archive, check=True)
    return tree


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--against", metavar="REV", help="also measure this git revision, side by side")
    args = ap.parse_args()
    print("generate --iterations 0, whole command: seconds and peak resident memory (lower is better)")
    print(f"targets for 4 x 2000 x 4 runs: <= {TARGET_SECONDS:g} s, <= {TARGET_MB:g} MB (2 cores)\n")
    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        trees = [("this tree", ROOT)] + ([(args.against, export(args.against, tmp_path))] if args.against else [])
        head = f"{'conditions x trials/run x runs':>30} | {'tree':>10} | {'seconds':>8} | {'peak MB':>8} | {'met':>4}"
        print(head)
        print("-" * len(head))
        for k, per, runs in QUICK if args.quick else CASES:
            spec = tmp_path / f"large_{k}_{per}_{runs}.toml"
            spec.write_text(spec_text(k, per, runs))
            results = []
            for name, root in trees:
                measure(root, spec, tmp_path / "warm")  # caches (bytecode, numba) filled once per tree
                res = measure(root, spec, tmp_path / f"out-{len(results)}-{spec.stem}")
                results.append(res)
                target = (k, per, runs) == CASES[0]
                met = ("yes" if res["seconds"] <= TARGET_SECONDS and res["mb"] <= TARGET_MB else "NO") if target else ""
                label = f"{k} x {k * per} x {runs}"
                print(f"{label:>30} | {str(name)[:10]:>10} | {res['seconds']:8.2f} | {res['mb']:8.0f} | {met:>4}")
                shutil.rmtree(tmp_path / "warm", ignore_errors=True)
            if len(results) == 2:
                a, b = results
                print(f"{'':>30} | {'ratio':>10} | {b['seconds'] / a['seconds']:7.1f}x | {b['mb'] / a['mb']:7.1f}x |")


if __name__ == "__main__":
    main()
