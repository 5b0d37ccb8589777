"""Scale-out: what a local Dask cluster costs per participant, beside `--workers 2` (issue 12, item 4).

benchmarks/specs/study200.toml (200 participants x 2 runs x 34 trials, 10 search rounds each, a
participants-differ rule, the run order of two timbres counterbalanced, item lists rotated across
participants), designed by design_study in this process three ways, one after the
other in the same run: 2 worker processes (generate --workers 2), a LocalCluster of 2 worker
processes (generate --cluster local --cluster-workers 2), and (not with --quick) 1 process for the
scale. For each: wall-clock seconds split into
  - start-up: from the call until the jobs are submitted (the shared references, then processes
    or the cluster started and the kernels loaded there),
  - searches: from submission until the last participant's search is back (per participant too),
  - the rest: the pass in participant order (participants-differ) and evening out, in this process;
and whether the output files (output_files: every file generate writes) are byte for byte the
same. Dask's overhead per participant: the difference of the totals / participants (and of the
searches alone; --workers starts its processes lazily, inside its searches, a cluster before them).

Target: the cluster's files equal --workers 2's; its overhead per participant small beside a
participant's search. The machine is shared: the load average is printed with the figures.
Run: python benchmarks/bench_cluster.py [--quick]   (--quick: 40 participants, 5 rounds)
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from seqsolve.cluster import ClusterOptions  # noqa: E402
from seqsolve.generate import design_study, output_files  # noqa: E402
from seqsolve.search import SearchOptions, warm_up  # noqa: E402
from seqsolve.spec import load_study  # noqa: E402

STUDY200 = ROOT / "benchmarks" / "specs" / "study200.toml"
ITEMS = STUDY200.with_name("glide_items.tsv")


def timed_design(study, search: SearchOptions, cluster: ClusterOptions | None) -> tuple[dict, dict]:
    """design_study with the moments of its progress calls: ({phase: seconds}, output files)."""
    marks: dict[int, float] = {}

    def progress(done: int, total: int, label: str) -> None:
        marks.setdefault(done, time.perf_counter())  # the first time each count is reached

    t0 = time.perf_counter()
    designs = design_study(study, search=search, progress=progress, cluster=cluster)
    end = time.perf_counter()
    n = len(study.participants)
    phases = {"start-up": marks[0] - t0, "searches": marks[n] - marks[0], "rest": end - marks[n], "total": end - t0}
    return phases, output_files(study, designs)


def subset(n: int | None):
    """The study, or its first n participants (a spec of the same text with a smaller count)."""
    if n is None:
        return load_study(STUDY200)
    text = STUDY200.read_text().replace("participants = 200", f"participants = {n}")
    with tempfile.TemporaryDirectory() as tmp:
        small = Path(tmp) / STUDY200.name
        small.write_text(text)
        (Path(tmp) / ITEMS.name).write_bytes(ITEMS.read_bytes())  # the spec names its items file relatively
        return load_study(small)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="40 participants, 5 rounds, no 1-process run")
    args = ap.parse_args()
    study = subset(40 if args.quick else None)
    n = len(study.participants)
    rounds = 5 if args.quick else None
    search1, search2 = SearchOptions(iterations=rounds, workers=1), SearchOptions(iterations=rounds, workers=2)
    warm_up(study)  # the main process's kernels loaded before any timing, for every way alike
    ways = [("--workers 2", search2, None), ("--cluster local (2 workers)", search1, ClusterOptions("local", 2))]
    if not args.quick:
        ways.append(("--workers 1", search1, None))
    print(f"{STUDY200.name}: {n} participants, {rounds or study.spec.objective.iterations} rounds each")
    print(f"  load average before: {' '.join(f'{x:.1f}' for x in os.getloadavg())} on {os.cpu_count()} cores")
    head = f"  {'':28s} {'start-up':>9s} {'searches':>9s} {'per participant':>16s} {'rest':>7s} {'total':>8s}"
    print(head)
    phases, files = {}, {}
    for name, search, cluster in ways:
        phases[name], files[name] = timed_design(study, search, cluster)
        p = phases[name]
        print(
            f"  {name:28s} {p['start-up']:8.1f}s {p['searches']:8.1f}s {p['searches'] / n:15.3f}s "
            f"{p['rest']:6.1f}s {p['total']:7.1f}s",
            flush=True,
        )
    local, dask = phases["--workers 2"], phases["--cluster local (2 workers)"]
    same = files["--cluster local (2 workers)"] == files["--workers 2"]
    same_one = "--workers 1" not in files or files["--workers 1"] == files["--workers 2"]
    print(f"  load average after: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    print(
        f"  Dask beside --workers 2: all told {dask['total'] - local['total']:+.1f} s, "
        f"{(dask['total'] - local['total']) / n:+.3f} s per participant; the searches alone "
        f"{(dask['searches'] - local['searches']) / n:+.3f} s per participant "
        f"({dask['searches'] / local['searches']:.2f}x; --workers starts its processes inside them); "
        f"start-up {dask['start-up'] - local['start-up']:+.1f} s"
    )
    print(
        f"  same files ({len(files['--workers 2'])} files, manifest included): "
        f"cluster vs --workers 2 {'yes' if same else 'NO'}"
        + ("" if args.quick else f"; --workers 1 vs --workers 2 {'yes' if same_one else 'NO'}")
    )
    return 0 if same and same_one else 1


if __name__ == "__main__":
    sys.exit(main())
