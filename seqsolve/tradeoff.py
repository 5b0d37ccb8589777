"""The detection/estimation trade-off front: one search per weighting, for one participant's timing."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from seqsolve.efficiency.setup import make_setup
from seqsolve.objective import Figures, References, Scorer, Weights
from seqsolve.search import Progress, Search, SearchOptions
from seqsolve.solve import derive_seed
from seqsolve.spec import Study
from seqsolve.timing import draw_gaps


@dataclass
class FrontPoint:
    weights: Weights
    figures: Figures
    runs: list[np.ndarray]
    dominated: bool = False  # another point is at least as good on both figures and better on one


def front_weights(n_points: int) -> list[tuple[float, float]]:
    """(detection, estimation) weights from all-detection to all-estimation, n_points >= 2."""
    return [(1.0 - a, a) for a in np.linspace(0.0, 1.0, n_points)]


def trade_off_front(
    study: Study,
    n_points: int,
    search: SearchOptions | None = None,
    participant: int = 0,
    on_step: Callable[[Progress], None] | None = None,
) -> list[FrontPoint]:
    """Search once per weighting from the same diverse starts (the study's counterbalance weight kept).

    Raises
    ------
    ValueError
        When n_points < 2.
    """
    if n_points < 2:
        raise ValueError("a front needs at least 2 points")
    search = search or SearchOptions()
    setup = make_setup(study)
    seed = derive_seed(study.spec.study.seed, participant)
    starts = Search.sample_starts(study, seed, [], search)
    gaps = draw_gaps(study, starts[0], seed)
    refs = References.for_study(study, setup, seed)
    cb = study.spec.objective.counterbalance
    points = []
    for i, (wd, we) in enumerate(front_weights(n_points)):
        weights = Weights.of(wd, we, cb)
        scorer = Scorer(study, weights, refs, seed, gaps, setup)
        label = f"front point {i + 1}/{n_points}"
        result = Search(study, scorer, label, seed, [], search, on_step).run(starts)
        points.append(FrontPoint(weights, result.figures, result.runs))
    mark_dominated(points)
    return points


def mark_dominated(points: list[FrontPoint]) -> None:
    for p in points:
        a = (p.figures.detection, p.figures.estimation)
        p.dominated = any(
            (q.figures.detection >= a[0] and q.figures.estimation >= a[1])
            and (q.figures.detection > a[0] or q.figures.estimation > a[1])
            for q in points
            if q is not p
        )


def front_tsv(study: Study, points: list[FrontPoint]) -> str:
    """One row per point: weights, figures, and each run's ordering as condition names."""
    n_runs = len(points[0].runs) if points else 0
    head = [
        "point",
        "weight_detection",
        "weight_estimation",
        "detection",
        "detection_vs_block",
        "estimation",
        "estimation_vs_random",
        "dominated",
    ] + [f"run{r + 1}" for r in range(n_runs)]
    lines = ["\t".join(head)]
    for i, p in enumerate(points, start=1):
        f = p.figures
        row = [
            str(i),
            f"{p.weights.detection:.4f}",
            f"{p.weights.estimation:.4f}",
            f"{f.detection:.9g}",
            f"{f.detection_vs_block:.6f}",
            f"{f.estimation:.9g}",
            f"{f.estimation_vs_random:.6f}",
            "yes" if p.dominated else "no",
        ] + [" ".join(study.names[int(c)] for c in run) for run in p.runs]
        lines.append("\t".join(row))
    return "\n".join(lines) + "\n"
