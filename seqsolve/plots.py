"""Pictures shared by compare and the HTML report: the detection/estimation plane and its front.

Units are those of the tables: detection in percent of the best block design's, estimation as a
multiple of the mean random ordering's. matplotlib is imported on first use (Agg, no display), so
importing this module costs nothing.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

#: marker styles of compare's families (anything else gets matplotlib's next colour)
FAMILY_STYLES = {
    "random valid": dict(marker=".", s=14, alpha=0.45, color="0.55", zorder=1),
    "block": dict(marker="s", s=46, color="tab:red", zorder=3),
    "permuted block": dict(marker="^", s=30, color="tab:orange", alpha=0.8, zorder=2),
    "m-sequence": dict(marker="D", s=40, color="tab:green", zorder=3),
    "participants": dict(marker="o", s=34, color="tab:purple", zorder=4),
}
FRONT_FAMILY = "seqsolve front"  # compare's name for its searched points
DETECTION_AXIS = "detection: % of the best block design's"
ESTIMATION_AXIS = "estimation: times the mean random ordering's"


@dataclass
class Cloud:
    """One family's points on the plane (fractions as the figures keep them), or why it has none."""

    name: str
    detection: list[float] = field(default_factory=list)  # share of the best block design's
    estimation: list[float] = field(default_factory=list)  # times the mean random ordering's
    absent: str = ""  # why there is no point, e.g. "none valid under the rules"


@dataclass
class FrontMark:
    """One searched point of the trade-off, named by its weights."""

    weight_detection: float
    weight_estimation: float
    detection: float
    estimation: float

    @property
    def label(self) -> str:
        return f"d {self.weight_detection:.2f} / e {self.weight_estimation:.2f}"


def clouds_of(summary: list[dict], points: list[dict]) -> list[Cloud]:
    """Clouds from compare's JSON (its "families" rows and "points"), the front left out (FrontMark)."""
    out = []
    for row in summary:
        if row["family"] == FRONT_FAMILY:
            continue
        pts = [p for p in points if p["family"] == row["family"]]
        absent = row.get("absent", "") or "none"
        out.append(Cloud(row["family"], [p["detection"] for p in pts], [p["estimation"] for p in pts], absent))
    return out


def non_dominated(points: Sequence[tuple[float, float]]) -> list[int]:
    """Indices of the points no other point dominates, both coordinates maximised, by rising first
    coordinate. A point is dominated when another is at least as good on both and better on one;
    equal points do not dominate each other (both kept).

    points: sequence of (x, y) pairs. O(n log n): a sweep from the largest x keeps the best y seen
    among strictly larger x; within one x only the largest y can survive.
    """
    pts = np.asarray(points, dtype=float).reshape(-1, 2)
    order = np.lexsort((-pts[:, 1], -pts[:, 0]))  # x descending, then y descending
    kept: list[int] = []
    best_y = -np.inf  # best y among strictly larger x
    i = 0
    while i < len(order):
        x = pts[order[i], 0]
        j = i
        while j < len(order) and pts[order[j], 0] == x:
            j += 1
        top = pts[order[i], 1]  # the group's largest y
        if top > best_y:
            kept += [int(k) for k in order[i:j] if pts[k, 1] == top]
        best_y = max(best_y, top)
        i = j
    return sorted(kept, key=lambda k: (pts[k, 0], k))


def pyplot():
    """matplotlib's pyplot on the Agg backend (files only: no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def draw_plane(ax, clouds: list[Cloud], front: list[FrontMark]) -> None:
    """Families as point clouds and the front's non-dominated points joined and labelled by weights.

    A family without points still gets a legend entry saying why (Cloud.absent)."""
    for c in clouds:
        style = FAMILY_STYLES.get(c.name, {})
        if c.detection:
            xs = 100.0 * np.asarray(c.detection)
            ax.scatter(xs, c.estimation, label=f"{c.name} ({len(c.detection)})", **style)
        else:
            # an empty, invisible handle: the legend then says the family is missing and why
            ax.scatter([], [], label=f"{c.name}: {c.absent or 'none'}", marker=style.get("marker", "o"), color="w")
    if front:
        keep = [front[i] for i in non_dominated([(m.detection, m.estimation) for m in front])]
        ax.plot(
            [100.0 * m.detection for m in keep],
            [m.estimation for m in keep],
            "-o",
            color="tab:blue",
            zorder=5,
            label=f"seqsolve front ({len(keep)} of {len(front)} weightings not dominated)",
        )
        for m in keep:
            ax.annotate(
                m.label,
                (100.0 * m.detection, m.estimation),
                fontsize=7,
                xytext=(4, 4),
                textcoords="offset points",
                color="tab:blue",
            )
    ax.set_xlabel(DETECTION_AXIS)
    ax.set_ylabel(ESTIMATION_AXIS)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")


def plane_figure(clouds: list[Cloud], front: list[FrontMark], title: str, size=(7.5, 5.5)):
    """A new figure holding the plane (the caller saves and closes it)."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=size)
    draw_plane(ax, clouds, front)
    ax.set_title(title, fontsize=10)
    fig.tight_layout()
    return fig


def png_bytes(fig, dpi: int = 80) -> bytes:
    """The figure as PNG bytes (no software or date stamps, so a rerun gives the same bytes); closes it."""
    plt = pyplot()
    buf = io.BytesIO()
    try:
        fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None})
    finally:
        plt.close(fig)
    return buf.getvalue()
