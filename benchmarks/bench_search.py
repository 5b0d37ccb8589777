"""Search quality at equal wall-clock time: seqsolve's steered search, shuffle-and-reject and a genetic algorithm.

Every method scores with the same Scorer (weighted score of seqsolve.objective) on the same
timing, and runs once per scenario for the longest budget; its best score at each checkpoint
is read off its own record of when it improved. Scenarios are our own:

  A  4 conditions + baseline, 240 trials, TR 2 s, SOA 2 s, max-run 3, balanced transitions +-1
  B  6 conditions (baseline one of them), 2 runs of 200 trials, max-run 3, run boundary
  C  3 event types + baseline, 255 trials, no rules, estimation only (an m-sequence fits)
  D  4 conditions + baseline, 240 trials, max-run 12 (blocks allowed), detection only

Run: python benchmarks/bench_search.py [--quick] [--scenarios A,B] [--budgets 10,30,60,300]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from seqsolve.baselines import genetic, shuffle_and_reject  # noqa: E402
from seqsolve.efficiency.limits import estimation_bound_identity  # noqa: E402
from seqsolve.efficiency.setup import make_setup  # noqa: E402
from seqsolve.families import block_designs, m_sequence_designs  # noqa: E402
from seqsolve.objective import References, Scorer, Weights  # noqa: E402
from seqsolve.search import Judge, Search, SearchOptions  # noqa: E402
from seqsolve.solve import derive_seed, sample_orderings  # noqa: E402
from seqsolve.spec import study_from_mapping  # noqa: E402
from seqsolve.timing import draw_gaps  # noqa: E402


def scenario(name: str):
    """(study, weights) of one scenario."""
    timing = {"tr": 2.0, "soa": 2.0}
    analysis = {"fir_window": 20.0, "contrasts": "each-vs-baseline"}
    if name == "A":
        conds = [{"name": f"c{i}", "trials": 48} for i in range(4)] + [{"name": "rest", "trials": 48, "baseline": True}]
        rules = [{"kind": "max-run", "length": 3}, {"kind": "balanced-transitions", "tolerance": 1}]
        runs, weights = 1, (1.0, 1.0)
    elif name == "B":
        conds = [{"name": f"c{i}", "trials": 34} for i in range(5)] + [{"name": "rest", "trials": 30, "baseline": True}]
        rules = [{"kind": "max-run", "length": 3}, {"kind": "run-boundary"}]
        runs, weights = 2, (1.0, 1.0)
    elif name == "C":
        conds = [{"name": f"c{i}", "trials": 64} for i in range(3)] + [{"name": "rest", "trials": 63, "baseline": True}]
        rules = []
        runs, weights = 1, (0.0, 1.0)
    elif name == "D":
        conds = [{"name": f"c{i}", "trials": 48} for i in range(4)] + [{"name": "rest", "trials": 48, "baseline": True}]
        rules = [{"kind": "max-run", "length": 12}]
        runs, weights = 1, (1.0, 0.0)
    else:
        raise SystemExit(f"unknown scenario {name}")
    data = {
        "study": {"name": f"scenario {name}", "task": "bench", "participants": 1, "runs": runs, "seed": 3},
        "conditions": conds,
        "timing": timing,
        "rules": rules,
        "analysis": analysis,
    }
    return study_from_mapping(data, source=f"<scenario {name}>"), weights


def best_at(curve: list[tuple[float, float]], t: float) -> float | None:
    best = None
    for s, v in curve:
        if s <= t:
            best = v
    return best


def run_scenario(name: str, budgets: list[float]) -> dict:
    study, (wd, we) = scenario(name)
    setup = make_setup(study)
    seed = derive_seed(study.spec.study.seed, 0)
    first = sample_orderings(study, seed, 1)[0]
    refs = References.for_study(study, setup, seed)
    scorer = Scorer(study, Weights.of(wd, we), refs, seed, draw_gaps(study, first, seed), setup)
    scorer.score(first)  # build the evaluator outside every method's clock
    judge = Judge(study, [])
    top = max(budgets)
    curves = {}
    res = Search(study, scorer, name, seed, [], SearchOptions(iterations=10**9, stall=10**9, budget=top)).run()
    curves["seqsolve"] = [(t, s) for _, t, s in res.history]
    curves["shuffle-and-reject"] = shuffle_and_reject(study, scorer, judge, seed, budget=top).curve
    curves["genetic algorithm"] = genetic(study, scorer, judge, seed, budget=top).curve
    extra = {}
    if name == "C":
        fam = m_sequence_designs(study, seed)
        extra["m-sequence estimation"] = max(scorer.figures(d).estimation for d in fam.designs)
        extra["seqsolve estimation"] = scorer.figures(res.runs).estimation
        counts = study.facts.counts[0][list(setup.modelled)]
        bound = estimation_bound_identity(counts, int(study.facts.counts.sum()), setup.fir_lags, once_through_runs=1)
        # the score here is estimation / random mean: no method can score above this
        extra["highest score possible (estimation bound, limits.py)"] = bound / refs.random_estimation
    if name == "D":
        fam = block_designs(study)
        extra["block detection (valid sizes)"] = max(scorer.figures(d).detection for d in fam.designs)
        extra["seqsolve detection"] = scorer.figures(res.runs).detection
    return {"curves": curves, "extra": extra, "iterations": res.iterations}


def fmt(v: float | None) -> str:
    return "none valid" if v is None else f"{v:.4f}"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="budgets 2, 5, 10, 20 s instead of 10, 30, 60, 300 s")
    ap.add_argument("--scenarios", default="A,B,C,D")
    ap.add_argument("--budgets", default=None, help="comma-separated seconds, e.g. 10,30,60,300")
    args = ap.parse_args()
    budgets = [2.0, 5.0, 10.0, 20.0] if args.quick else [10.0, 30.0, 60.0, 300.0]
    if args.budgets:
        budgets = [float(b) for b in args.budgets.split(",")]
    mid = budgets[2] if len(budgets) >= 3 else budgets[-1]  # the "60 s" checkpoint
    print(
        f"budgets {budgets} s; ratios at {mid:g} s; the 'best any' column is the best of all methods at {budgets[-1]:g} s"
    )
    for name in args.scenarios.split(","):
        t0 = time.perf_counter()
        out = run_scenario(name, budgets)
        curves = out["curves"]
        print(f"\nscenario {name} ({time.perf_counter() - t0:.0f} s; seqsolve made {out['iterations']} steps)")
        print("  " + "method".ljust(20) + "".join(f"{b:>12g} s" for b in budgets))
        for method, curve in curves.items():
            print("  " + method.ljust(20) + "".join(f"{fmt(best_at(curve, b)):>14}" for b in budgets))
        ours = best_at(curves["seqsolve"], mid)
        best_any = max(v for c in curves.values() if (v := best_at(c, budgets[-1])) is not None)
        for method in ("shuffle-and-reject", "genetic algorithm"):
            theirs = best_at(curves[method], mid)
            ratio = "inf (it found no valid design)" if theirs is None else f"{ours / theirs:.3f}"
            print(f"  seqsolve / {method} at {mid:g} s: {ratio}")
        print(f"  seqsolve at {mid:g} s / best any method at {budgets[-1]:g} s: {ours / best_any:.3f}")
        for k, v in out["extra"].items():
            print(f"  {k}: {v:.6g}")
        if "m-sequence estimation" in out["extra"]:
            e = out["extra"]
            print(f"  seqsolve / m-sequence estimation: {e['seqsolve estimation'] / e['m-sequence estimation']:.3f}")
        if "block detection (valid sizes)" in out["extra"]:
            e = out["extra"]
            print(
                f"  seqsolve / block design detection: {e['seqsolve detection'] / e['block detection (valid sizes)']:.3f}"
            )
        sys.stdout.flush()
    return 0


if __name__ == "__main__":
    np.seterr(all="ignore")
    sys.exit(main())
