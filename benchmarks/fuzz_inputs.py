"""Fuzz the command line with mutated specs and ordering files; count tracebacks, bugs and hangs.

Every input runs in this process through the CLI (typer's CliRunner), as a user would run it:
specs through `check` (and a share of the accepted ones through `generate`), ordering files through
`audit` and `score`. An outcome is fine when the command exits 0, 1 or 2 with no exception; an
exception that escapes (a traceback), exit 3 (an internal error: a bug) or an input that runs
longer than --hang seconds is counted and the first few are shown with the input saved.

    python benchmarks/fuzz_inputs.py                       # 10,000 specs and 2,500 ordering files
    python benchmarks/fuzz_inputs.py --specs 500 --files 200 --seed 1

Peak memory is the process's maximum resident set (getrusage), over every input.
"""

from __future__ import annotations

import argparse
import random
import resource
import signal
import sys
import tempfile
import time
import tomllib
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from typer.testing import CliRunner  # noqa: E402

from seqsolve.cli import app  # noqa: E402
from tests.fuzzing import mutate_table, spec_variant  # noqa: E402
from tests.test_bad_input import BASE  # noqa: E402

runner = CliRunner()


class Hang(BaseException):
    """Raised by the alarm when one input runs past the hang limit (not an Exception: nothing catches it)."""


def _alarm(signum, frame):
    raise Hang


class Tally:
    """Outcomes by kind, with the first few bad inputs kept for a report."""

    def __init__(self, keep: Path):
        self.counts: Counter[str] = Counter()
        self.slowest = 0.0
        self.keep = keep
        self.shown = 0

    def run(self, args: list[str], hang: float, label: str, payload: bytes) -> int | None:
        signal.setitimer(signal.ITIMER_REAL, hang)
        started = time.perf_counter()
        try:
            result = runner.invoke(app, args)
        except Hang:
            self._bad("hang", label, payload, f"over {hang} s")
            return None
        finally:
            signal.setitimer(signal.ITIMER_REAL, 0)
        self.slowest = max(self.slowest, time.perf_counter() - started)
        if result.exception is not None and not isinstance(result.exception, SystemExit):
            self._bad("traceback", label, payload, repr(result.exception)[:300])
            return None
        if result.exit_code in (130, 143):  # the fuzzer itself was interrupted: the CLI's handler took it
            raise KeyboardInterrupt
        if result.exit_code == 3:
            self._bad("internal error (exit 3)", label, payload, result.output.strip()[:300])
            return 3
        self.counts[f"exit {result.exit_code}"] += 1
        return result.exit_code

    def _bad(self, kind: str, label: str, payload: bytes, detail: str) -> None:
        self.counts[kind] += 1
        if self.shown < 10:
            self.shown += 1
            saved = self.keep / f"{kind.split()[0]}-{self.shown}-{label}"
            saved.write_bytes(payload)
            print(f"  {kind}: {label}: {detail} (saved as {saved})", flush=True)


def fuzz_specs(n: int, rng: random.Random, tally: Tally, work: Path, hang: float, generate_every: int) -> None:
    seeds = [tomllib.loads(BASE)] + [tomllib.loads(p.read_text()) for p in sorted((ROOT / "examples").glob("*.toml"))]
    accepted = 0
    for i in range(n):
        data = seeds[i % len(seeds)]
        names = [c.get("name", "x") for c in data.get("conditions", []) if isinstance(c, dict)]
        text = spec_variant(data, rng, names)
        spec = work / "spec.toml"
        spec.write_bytes(text.encode("utf-8", errors="replace"))
        code = tally.run(["check", str(spec), "--time-limit", "1"], hang, f"spec{i}.toml", spec.read_bytes())
        if code in (0, 1):
            accepted += 1
            if accepted % generate_every == 0:
                args = ["generate", str(spec), "-o", str(work / "out"), "--force", "--iterations", "3"]
                tally.run(args + ["--time-limit", "5", "--budget", "5"], hang, f"spec{i}-generate.toml", text.encode())
        if (i + 1) % 1000 == 0:
            print(f"  specs: {i + 1}/{n}  {dict(tally.counts)}", flush=True)


def _base_files(work: Path) -> tuple[Path, str, str, list[str]]:
    spec = work / "base.toml"
    spec.write_text(BASE)
    out = work / "designs"
    result = runner.invoke(app, ["generate", str(spec), "-o", str(out), "--force", "--iterations", "0"])
    assert result.exit_code == 0, result.output
    events = next(out.glob("sub-01/*run-1_events.tsv")).read_text()
    return spec, (out / "orderings.csv").read_text(), events, ["gain", "loss", "rest"]


def fuzz_files(n: int, rng: random.Random, tally: Tally, work: Path, hang: float) -> None:
    spec, orderings, events, names = _base_files(work)
    for i in range(n):
        if i % 2 == 0:
            path = work / "orderings.csv"
            path.write_bytes(mutate_table(orderings, rng, names, ","))
        else:
            run = rng.choice(["1", "1", "2", "0", "7", "999999"])
            path = work / f"sub-01_task-cue_run-{run}_events.tsv"
            path.write_bytes(mutate_table(events, rng, names, "\t"))
        payload = path.read_bytes()
        # --rank 3: the ranking's path runs on every hostile file too, at a small sample
        tally.run(["audit", str(spec), str(path), "--rank", "3"], hang, f"file{i}-{path.name}", payload)
        tally.run(["score", str(spec), str(path), "--no-references"], hang, f"file{i}-{path.name}", payload)
        path.unlink()
        if (i + 1) % 500 == 0:
            print(f"  files: {i + 1}/{n}  {dict(tally.counts)}", flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--specs", type=int, default=10_000)
    parser.add_argument("--files", type=int, default=2_500)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--hang", type=float, default=60.0, help="seconds after which one input counts as hung")
    parser.add_argument("--generate-every", type=int, default=10, help="also generate every n-th accepted spec")
    args = parser.parse_args()
    signal.signal(signal.SIGALRM, _alarm)
    rng = random.Random(args.seed)
    keep = Path(tempfile.mkdtemp(prefix="seqsolve-fuzz-kept-"))
    started = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        specs = Tally(keep)
        fuzz_specs(args.specs, rng, specs, work, args.hang, args.generate_every)
        files = Tally(keep)
        fuzz_files(args.files, rng, files, work, args.hang)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(
        f"\nfuzzed {args.specs} specs and {args.files} ordering files (seed {args.seed}) "
        f"in {time.perf_counter() - started:.0f} s"
    )
    for name, t in (("specs", specs), ("ordering files", files)):
        bad = {k: t.counts[k] for k in ("traceback", "internal error (exit 3)", "hang")}
        print(
            f"  {name}: outcomes {dict(sorted(t.counts.items()))}; slowest input {t.slowest:.1f} s; "
            f"tracebacks {bad['traceback']}, internal errors {bad['internal error (exit 3)']}, hangs {bad['hang']}"
        )
    print(f"  peak memory of the whole run: {peak_mb:.0f} MB (target under 1024 MB)")
    print(f"  bad inputs kept in {keep}")


if __name__ == "__main__":
    main()
