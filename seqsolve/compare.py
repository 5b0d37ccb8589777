"""The compare job: the standard families beside seqsolve's own trade-off front, on one timing.

Every design is scored for the spec's [analysis] on the first participant's timing, relative to
the same references as the search (see seqsolve.objective), so all sit on one plane:
detection (share of the best block design's) against estimation (times random orderings').
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from seqsolve.efficiency.setup import make_setup
from seqsolve.errors import InputError, OutputExistsError, Problem
from seqsolve.families import (
    Family,
    block_designs,
    m_sequence_designs,
    permuted_block_designs,
    random_valid_designs,
)
from seqsolve.objective import References, Scorer, Weights
from seqsolve.plots import FRONT_FAMILY, FrontMark, clouds_of, plane_figure, pyplot
from seqsolve.search import Progress, SearchOptions
from seqsolve.solve import derive_seed
from seqsolve.spec import Study
from seqsolve.timing import draw_gaps
from seqsolve.tradeoff import FrontPoint, trade_off_front

PLOT_SUFFIXES = (".png", ".svg")


@dataclass
class Point:
    family: str
    label: str
    detection: float  # share of the best block design's detection (any block size, rules or not)
    estimation: float  # times the mean random ordering's estimation
    weights: tuple[float, float] | None = None  # (detection, estimation) weights of a front point


@dataclass
class Comparison:
    references: References
    families: list[Family]
    points: list[Point] = field(default_factory=list)
    front: list[FrontPoint] = field(default_factory=list)

    def summary(self) -> list[dict]:
        """One row per family: best detection, best estimation, how many designs, and the note."""
        rows = []
        names = [f.name for f in self.families] + ([FRONT_FAMILY] if self.front else [])
        for name in names:
            pts = [p for p in self.points if p.family == name]
            fam = next((f for f in self.families if f.name == name), None)
            rows.append(
                {
                    "family": name,
                    "designs": len(pts),
                    "best_detection": max((p.detection for p in pts), default=None),
                    "best_estimation": max((p.estimation for p in pts), default=None),
                    "mean_detection": float(np.mean([p.detection for p in pts])) if pts else None,
                    "mean_estimation": float(np.mean([p.estimation for p in pts])) if pts else None,
                    "note": fam.note if fam else f"{len(self.front)} weightings from detection to estimation",
                    "absent": "" if pts else absence(fam),
                }
            )
        return rows

    def clouds(self) -> list:
        """The families' points for the plane (seqsolve's front apart: see front_marks)."""
        return clouds_of(self.summary(), [p.__dict__ for p in self.points])

    def front_marks(self) -> list[FrontMark]:
        return [
            FrontMark(
                p.weights.detection, p.weights.estimation, p.figures.detection_vs_block, p.figures.estimation_vs_random
            )
            for p in self.front
        ]


def absence(fam: Family | None) -> str:
    """Why a family has no point: the rules refused every design, or it cannot exist for these counts."""
    if fam is None or fam.refused_by_rules:
        return "none valid under the rules"
    return "not possible for these counts and run lengths"


def compare(
    study: Study,
    samples: int = 200,
    front_points: int = 5,
    search: SearchOptions | None = None,
    on_step: Callable[[Progress], None] | None = None,
    on_sample: Callable[[int, int], None] | None = None,
) -> Comparison:
    """Build and score every family, and seqsolve's front (front_points = 0: no front).

    on_sample(k, samples) after each random valid design is drawn (for progress lines); on_step as
    the search's (each front point is one search)."""
    setup = make_setup(study)
    seed = derive_seed(study.spec.study.seed, 0)
    randoms = random_valid_designs(study, seed, samples, on_sample)
    gaps = draw_gaps(study, randoms.designs[0], seed)
    refs = References.for_study(study, setup, seed)
    scorer = Scorer(study, Weights.of(1.0, 1.0), refs, seed, gaps, setup)
    out = Comparison(refs, [])

    def add(fam: Family) -> list[Point]:
        out.families.append(fam)
        pts = []
        for d, lab in zip(fam.designs, fam.labels):
            f = scorer.figures(d)
            pts.append(Point(fam.name, lab, f.detection_vs_block, f.estimation_vs_random))
        out.points += pts
        return pts

    blocks = block_designs(study)
    block_points = add(blocks)
    best_block = blocks.designs[int(np.argmax([p.detection for p in block_points]))] if block_points else None
    add(permuted_block_designs(study, best_block, seed))
    add(m_sequence_designs(study, seed))
    add(randoms)
    if front_points:
        out.front = trade_off_front(study, front_points, search, 0, on_step)
        for m in out.front_marks():
            w = (m.weight_detection, m.weight_estimation)
            out.points.append(Point(FRONT_FAMILY, m.label, m.detection, m.estimation, w))
    return out


def check_plot_path(path: str | Path, force: bool) -> Path:
    """Refuse an unknown suffix or an existing file (without force) before any work is done."""
    path = Path(path)
    if path.suffix.lower() not in PLOT_SUFFIXES:
        raise InputError(
            str(path),
            [Problem("--plot", f"the plot file must end in {' or '.join(PLOT_SUFFIXES)}, not '{path.suffix}'")],
        )
    if path.exists() and not force:
        raise OutputExistsError(f"{path}: exists; choose another --plot file, or add --force to replace it")
    return path


def plot(comparison: Comparison, path: str | Path, title: str) -> Path:
    """Draw the detection-vs-estimation plane to a PNG or SVG file (written atomically), in the table's
    units; the front shows its non-dominated points only, each named by its weights."""
    path = Path(path)
    fig = plane_figure(comparison.clouds(), comparison.front_marks(), title)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=120, metadata={"Date": None} if path.suffix.lower() == ".svg" else {})
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    finally:
        pyplot().close(fig)
    return path
