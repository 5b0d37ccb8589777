"""The plane's front: only non-dominated points, checked against brute force (both figures maximised)."""

from __future__ import annotations

import numpy as np
import pytest

from seqsolve.plots import Cloud, FrontMark, non_dominated, plane_figure, png_bytes


def brute_force(points: np.ndarray) -> set[int]:
    """Pareto optimality from its definition: no other point at least as good on both and better on one."""
    keep = set()
    for i, p in enumerate(points):
        if not any(np.all(q >= p) and np.any(q > p) for j, q in enumerate(points) if j != i):
            keep.add(i)
    return keep


def test_a_dominated_point_is_removed():
    # the zig-zag of the issue: the middle point is beaten on both figures by the third
    pts = [(0.9, 1.00), (0.6, 1.05), (0.7, 1.10), (0.3, 1.20)]
    assert non_dominated(pts) == [3, 2, 0]  # by rising detection


@pytest.mark.parametrize("seed", range(20))
def test_non_dominated_equals_brute_force_on_random_points(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 60))
    # coarse values, so ties in one or both coordinates (and exact duplicates) occur
    pts = rng.integers(0, 8, size=(n, 2)).astype(float)
    got = non_dominated(pts)
    assert set(got) == brute_force(pts)
    assert [pts[i, 0] for i in got] == sorted(pts[i, 0] for i in got)


def test_the_plane_draws_missing_families_and_a_front():
    clouds = [Cloud("block", absent="none valid under the rules"), Cloud("random valid", [0.4, 0.5], [1.0, 0.9])]
    front = [FrontMark(1.0, 0.0, 0.9, 1.0), FrontMark(0.5, 0.5, 0.6, 1.05), FrontMark(0.0, 1.0, 0.7, 1.1)]
    fig = plane_figure(clouds, front, "t")
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "block: none valid under the rules" in labels
    assert any("2 of 3 weightings not dominated" in t for t in labels)
    notes = [t.get_text() for t in ax.texts]
    assert notes == ["d 0.00 / e 1.00", "d 1.00 / e 0.00"]  # the dominated middle weighting is not labelled
    assert "%" in ax.get_xlabel()
    assert png_bytes(fig).startswith(b"\x89PNG")
