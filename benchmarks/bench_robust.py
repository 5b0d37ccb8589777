"""The block-family reference and HRF-robust steering: cost and gain, measured side by side.

1. The detection reference: the old single layout (blocks of the listed sizes, baseline after each)
   beside the whole block family (every size x eight baseline placements): seconds and the
   reference's value (how much better the best block design of the family is).
2. One participant's search steered by the canonical HRF beside one steered by the worst case over
   the HRF family (same seed, same rounds): seconds, and both designs' canonical and worst-case
   detection (from `score_design`).
Run: python benchmarks/bench_robust.py [--quick].
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from seqsolve.blocks import block_ordering  # noqa: E402
from seqsolve.efficiency.setup import make_setup  # noqa: E402
from seqsolve.generate import design_study  # noqa: E402
from seqsolve.score import _best_block, _score_orderings, score_design  # noqa: E402
from seqsolve.spec import load_study, study_from_mapping  # noqa: E402

OLD_SIZES = (1, 2, 3, 4, 5, 6, 8, 10, 12, 15, 16, 20, 24, 30, 40)


def made_study(per: int, runs: int, mode: str = "canonical", iterations: int = 10, soa: float = 2.0):
    """Three conditions and a baseline, `per` trials each per run, 1 s trials every `soa` seconds."""
    conds = [{"name": n, "trials": per, "duration": 1.0} for n in ("a", "b", "c")]
    conds.append({"name": "rest", "trials": per, "baseline": True})
    return study_from_mapping(
        {
            "study": {"name": "b", "task": "b", "participants": 1, "runs": runs, "seed": 3},
            "conditions": conds,
            "timing": {"tr": soa, "soa": soa},
            "objective": {"detection": 1.0, "estimation": 0.0, "iterations": iterations, "hrf_robust": mode},
        }
    )


def old_reference(study, setup) -> float:
    counts = list(study.facts.counts)
    biggest = int(max(c.max() for c in counts))
    sizes = sorted({b for b in OLD_SIZES if b <= biggest} | {biggest})
    designs = [[block_ordering(c, study.facts.baseline, b) for c in counts] for b in sizes]
    return float(_score_orderings(study, setup, designs, 0, estimation=False)[0].max())


def bench_reference(quick: bool) -> None:
    cases = [("example reward_cue", load_study(ROOT / "examples" / "reward_cue.toml"))]
    cases += [
        (f"4 conditions x {n} trials x 4 runs", made_study(n, 4)) for n in ((40, 100) if quick else (40, 100, 250))
    ]
    print(f"{'reference':<36} {'old s':>7} {'family s':>9} {'old value':>10} {'family value':>13} {'ratio':>6}")
    for label, study in cases:
        setup = make_setup(study)
        old_reference(study, setup)  # warm-up: compiled kernels loaded
        t0 = time.perf_counter()
        old = old_reference(study, setup)
        t1 = time.perf_counter()
        new = _best_block(study, setup, list(study.facts.counts), 0)[1]
        t2 = time.perf_counter()
        print(f"{label:<36} {t1 - t0:>7.2f} {t2 - t1:>9.2f} {old:>10.4g} {new:>13.4g} {new / old:>6.3f}")


def bench_steering(quick: bool) -> None:
    per, rounds = (20, 5) if quick else (40, 10)
    print(f"\n{'steered by (one participant)':<30} {'seconds':>8} {'canonical det':>14} {'worst-case det':>15}")
    out = {}
    for mode in ("canonical", "worst"):
        study = made_study(per, 2, mode, rounds)
        t0 = time.perf_counter()
        d = design_study(study)[0]
        seconds = time.perf_counter() - t0
        row = score_design(study, d.label, d.runs, d.schedules, with_references=False)[-1]
        out[mode] = (seconds, row.detection, row.hrf_family["min"])
        print(f"{mode:<30} {seconds:>8.1f} {row.detection:>14.4g} {row.hrf_family['min']:>15.4g}")
    (tc, _, wc), (tw, _, ww) = out["canonical"], out["worst"]
    print(f"worst-case steering: time x{tw / tc:.2f}, worst case x{ww / wc:.4f} (same seed and {rounds} rounds)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    bench_reference(args.quick)
    bench_steering(args.quick)


if __name__ == "__main__":
    main()
