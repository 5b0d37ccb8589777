"""Search quality at equal wall-clock time: seqsolve's steered search, shuffle-and-reject and a genetic algorithm.

Every method scores with the same Scorer (the weighted score of seqsolve.objective) on the same
timing, one participant, one process; methods run one after the other, never side by side, so
each has the same core. Each method runs once per budget (a method may plan by its budget), plus
a long run of every method at `--long` times the largest budget: the best any method finds there
is the yardstick of "99 % of the best any method finds in 10x the time" (issue 9).

Scenarios are our own:

  tight       6 conditions (a rare one, 20 trials; a baseline), 2 runs x 240 trials, max-run 1,
              balanced transitions without repeats (tolerance 1), at least 4 trials between two of
              the rare condition; detection and estimation (shuffles never pass these rules)
  jitter      4 conditions + baseline, 160 trials, 1.5 s trials, gaps from a truncated exponential
              (1 to 8 s, mean 2.5 s), max-run 3; detection only
  estimation  7 conditions + baseline, 280 trials, SOA 2 s, max-run 4; estimation 1.0, detection 0.25
  standard    4 conditions + baseline, 2 runs x 200 trials, max-run 3, balanced transitions,
              run boundary; detection and estimation
  tight-study     the tight rules at study size: 4 runs x 240 trials; detection 1.0, estimation 0.25
  standard-study  the standard rules at study size: 4 runs x 240 trials (48 of each condition and
                  of the baseline a run); detection 1.0, estimation 0.25

The first four weigh estimation as much as detection or more (estimation 1.0). Estimation varies
little between valid designs: every method's estimation share is within a few percent of every
other's (random orderings are already efficient for FIR estimation), so the weighted scores of
good designs differ little and the headroom lines below show how much any method could gain. The
two study-size scenarios weigh detection, where designs differ more, at the size of a typical
session (four runs of eight minutes at a 2 s SOA).

Targets (issue 9): seqsolve >= 1.03x the genetic algorithm and >= 1.3x shuffle-and-reject (where
shuffles find valid designs) at 10 s and 30 s; seqsolve at 30 s >= 99 % of the best any method
finds in 10x the time. Evaluations are designs (or neighbours) scored exactly, counted at the Scorer.

Run: python benchmarks/bench_search.py [--quick] [--scenarios tight,jitter] [--budgets 10,30] [--long 10]
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from seqsolve.baselines import genetic, shuffle_and_reject  # noqa: E402
from seqsolve.efficiency.setup import make_setup  # noqa: E402
from seqsolve.objective import References, Scorer, Weights  # noqa: E402
from seqsolve.search import Judge, Search, SearchOptions  # noqa: E402
from seqsolve.solve import derive_seed, sample_orderings  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402
from seqsolve.timing import draw_gaps  # noqa: E402

SCENARIOS = ("tight", "jitter", "estimation", "standard", "tight-study", "standard-study")
METHODS = ("seqsolve", "genetic algorithm", "shuffle-and-reject")


def _conditions(counts: dict[str, int], baseline: str) -> list[dict]:
    return [{"name": n, "trials": t, **({"baseline": True} if n == baseline else {})} for n, t in counts.items()]


def scenario(name: str):
    """(study, (detection weight, estimation weight)) of one scenario."""
    timing: dict = {"tr": 2.0, "soa": 2.0}
    analysis = {"fir_window": 20.0, "contrasts": "each-vs-baseline"}
    # the study-size scenarios: 4 runs, weighted toward detection
    runs, weights = (4, (1.0, 0.25)) if name.endswith("-study") else (2, (1.0, 1.0))
    if name in ("tight", "tight-study"):
        conds = _conditions({"c0": 45, "c1": 45, "c2": 45, "c3": 45, "rare": 20, "rest": 40}, "rest")
        rules = [
            {"kind": "max-run", "length": 1},
            {"kind": "balanced-transitions", "tolerance": 1, "exclude_repeats": True},
            {"kind": "min-gap", "conditions": ["rare"], "gap": 4},
        ]
    elif name == "jitter":
        conds = _conditions({f"c{i}": 32 for i in range(4)} | {"rest": 32}, "rest")
        rules = [{"kind": "max-run", "length": 3}]
        iti = {"distribution": "exponential", "min": 1.0, "max": 8.0, "mean": 2.5}
        timing = {"tr": 2.0, "trial_duration": 1.5, "iti": iti}
        runs, weights = 1, (1.0, 0.0)
    elif name == "estimation":
        conds = _conditions({f"c{i}": 32 for i in range(7)} | {"rest": 56}, "rest")
        rules = [{"kind": "max-run", "length": 4}]
        runs, weights = 1, (0.25, 1.0)
    elif name in ("standard", "standard-study"):
        per_run = 40 if name == "standard" else 48
        conds = _conditions({f"c{i}": per_run for i in range(4)} | {"rest": per_run}, "rest")
        rules = [
            {"kind": "max-run", "length": 3},
            {"kind": "balanced-transitions", "tolerance": 1},
            {"kind": "run-boundary"},
        ]
    else:
        raise SystemExit(f"unknown scenario '{name}'; scenarios: {', '.join(SCENARIOS)}")
    data = {
        "study": {"name": f"bench {name}", "task": "bench", "participants": 1, "runs": runs, "seed": 3},
        "conditions": conds,
        "timing": timing,
        "rules": rules,
        "analysis": analysis,
    }
    return study_from_mapping(data, source=f"<scenario {name}>"), weights


class CountingScorer(Scorer):
    """The Scorer, counting the designs and neighbours it scores (shared by its gap variants)."""

    def __init__(self, *args, counter: list[int] | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        self.counter = counter if counter is not None else [0]

    def with_gaps(self, gaps):
        out = CountingScorer(self.study, self.weights, self.refs, self.seed, gaps, self.setup, counter=self.counter)
        return out

    def score_many(self, designs):
        self.counter[0] += len(designs)
        return super().score_many(designs)

    def swap_gains(self, runs, pairs, exact=16):
        self.counter[0] += len(np.asarray(pairs).reshape(-1, 2))
        return super().swap_gains(runs, pairs, exact)

    def change_gains(self, runs, trials=None):
        n = len(np.concatenate(runs)) if trials is None else len(trials)
        self.counter[0] += n * self.study.facts.n_conditions
        return super().change_gains(runs, trials)


@dataclass
class Outcome:
    score: float | None  # best score (None: no valid design found)
    evaluations: int
    seconds: float


def prepare(name: str):
    """Study, scorer (evaluator built outside every clock) and the participant's seed."""
    study, (wd, we) = scenario(name)
    setup = make_setup(study)
    seed = derive_seed(study.spec.study.seed, 0)
    first = sample_orderings(study, seed, 1)[0]
    refs = References.for_study(study, setup, seed)
    scorer = CountingScorer(study, Weights.of(wd, we), refs, seed, draw_gaps(study, first, seed), setup)
    scorer.score(first)
    return study, scorer, seed


def run_method(method: str, study, scorer: CountingScorer, seed: int, budget: float) -> Outcome:
    judge = Judge(study, [])
    t0 = time.perf_counter()
    if method == "seqsolve":
        scorer.counter[0] = 0
        options = SearchOptions(iterations=10**9, stall=10**9, budget=budget)
        res = Search(study, scorer, "bench", seed, [], options).run()
        # designs scored through the Scorer, plus swaps judged (and, when valid, scored) in compiled code
        return Outcome(res.figures.score, scorer.counter[0] + res.judged, time.perf_counter() - t0)
    run = genetic if method == "genetic algorithm" else shuffle_and_reject
    trace = run(study, scorer, judge, seed, budget=budget)
    score = None if trace.runs is None else trace.score
    return Outcome(score, trace.evaluations, time.perf_counter() - t0)


def load_line(when: str = "machine load (1, 5, 15 min):") -> str:
    """The machine's load averages, to print beside figures measured on a shared machine."""
    return f"{when} {' '.join(f'{x:.2f}' for x in os.getloadavg())} on {os.cpu_count()} cores"


def fmt(v: float | None) -> str:
    return "none valid" if v is None else f"{v:.4f}"


def ratio(a: float | None, b: float | None) -> str:
    if a is None:
        return "n/a (seqsolve found nothing)"
    if b is None:
        return "inf (no valid design)"
    return f"{a / b:.3f}"


def report(name: str, budgets: list[float], long: float | None, out: dict) -> None:
    """One scenario's table: score and evaluations/s per method and budget, then the ratios."""
    cols = budgets + ([long] if long else [])
    print("  " + "method".ljust(20) + "".join(f"{b:>11g} s" + " " * 11 for b in cols))
    print("  " + " " * 20 + "".join(f"{'score':>13}{'eval/s':>11}" for _ in cols))
    for method in METHODS:
        cells = ""
        for b in cols:
            o = out[method, b]
            cells += f"{fmt(o.score):>13}{o.evaluations / max(o.seconds, 1e-9):>11.0f}"
        print("  " + method.ljust(20) + cells)
    for b in budgets[:2]:
        ours = out["seqsolve", b].score
        ga, shuf = out["genetic algorithm", b].score, out["shuffle-and-reject", b].score
        print(f"  at {b:g} s: seqsolve / GA {ratio(ours, ga)} (target >= 1.03);", end=" ")
        note = "" if shuf is not None else ", shuffles found no valid design: target does not apply"
        print(f"seqsolve / shuffle {ratio(ours, shuf)} (target >= 1.30{note})")
    if long:
        found = [o.score for (m, b), o in out.items() if b == long and o.score is not None]
        best_any = max(found) if found else None
        top = budgets[-1]
        print(
            f"  seqsolve at {top:g} s / best any method at {long:g} s: "
            f"{ratio(out['seqsolve', top].score, best_any)} (target >= 0.99)"
        )
        # headroom: a 1.03x lead over the GA at budget b needs a design 1.03x the GA's; when even the
        # best any method finds in the long run is not that far ahead, the lead is capped by it
        for b in budgets[:2]:
            ga = out["genetic algorithm", b].score
            print(f"  headroom at {b:g} s: best any method at {long:g} s / GA at {b:g} s {ratio(best_any, ga)}")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a smoke run: budgets 1 and 3 s, long run 2x (about 4 min)")
    ap.add_argument("--scenarios", default=",".join(SCENARIOS), help=f"comma-separated, of {', '.join(SCENARIOS)}")
    ap.add_argument("--budgets", default=None, help="comma-separated seconds per participant (default 10,30)")
    ap.add_argument(
        "--long", type=float, default=None, help="long run at this factor of the largest budget (default 10; 0: none)"
    )
    args = ap.parse_args()
    budgets = [1.0, 3.0] if args.quick else [10.0, 30.0]
    factor = 2.0 if args.quick else 10.0
    if args.budgets:
        budgets = sorted(float(b) for b in args.budgets.split(","))
    if args.long is not None:
        factor = args.long
    long = factor * budgets[-1] if factor > 0 else None
    print(load_line())
    print(f"budgets {budgets} s per participant; long run {long} s; methods run one at a time")
    for name in args.scenarios.split(","):
        study, scorer, seed = prepare(name)
        t0 = time.perf_counter()
        out = {}
        for b in budgets + ([long] if long else []):
            for method in METHODS:
                out[method, b] = run_method(method, study, scorer, seed, b)
        print(f"\nscenario {name} ({time.perf_counter() - t0:.0f} s)")
        report(name, budgets, long, out)
        sys.stdout.flush()
    print("\n" + load_line("machine load at the end:"))
    return 0


if __name__ == "__main__":
    np.seterr(all="ignore")
    sys.exit(main())
