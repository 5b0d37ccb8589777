"""The detection reference is the best of the block family (seqsolve.blocks), as its name says."""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pytest
from conftest import make_study

from seqsolve.blocks import PLACEMENTS, block_family, block_ordering
from seqsolve.efficiency.setup import make_setup
from seqsolve.score import evaluator_for, references
from seqsolve.spec import load_study
from seqsolve.timing import make_schedules

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
#: the block sizes the reference searched before it searched the whole family (baseline after each block)
OLD_SIZES = (1, 2, 3, 4, 5, 6, 8, 10, 12, 15, 16, 20, 24, 30, 40)


def detections(study, designs: np.ndarray) -> np.ndarray:
    """Detection of one-run designs (rows of codes) on the study's fixed timing."""
    setup = make_setup(study)
    ev = evaluator_for(study, setup, make_schedules(study, [designs[0]], 0))
    return ev.score_many(designs, True, False)[0]


def compositions(n: int, k: int):
    """Every way to put n identical trials into k ordered slots (stars and bars)."""
    for bars in itertools.combinations(range(n + k - 1), k - 1):
        edges = (-1, *bars, n + k - 1)
        yield [b - a - 1 for a, b in zip(edges[:-1], edges[1:])]


def blocks_in_turn(counts, size):
    """The two modelled conditions (0, 1) in turn in blocks of `size`, written out from the definition."""
    left, out = list(counts[:2]), []
    while sum(left):
        for c in (0, 1):
            if left[c]:
                take = min(size, left[c])
                out.append([c] * take)
                left[c] -= take
    return out


def is_defined_layout(gaps: list[int], size: int, n0: int) -> bool:
    """Is this baseline arrangement (trials before block 1, after block 1, ..., after the last) one
    of the placements the README defines? Written from the words, not from seqsolve.blocks."""
    n = len(gaps) - 1
    greedy, left = [0], n0  # "after each": b after each block while any are left, the rest at the end
    for _ in range(n):
        greedy.append(min(size, left))
        left -= greedy[-1]
    greedy[-1] += left
    if gaps == greedy:
        return True
    for start, between, end in (s for s in PLACEMENTS.values() if s is not None):
        chosen = [start] + [between] * (n - 1) + [end]
        if not any(chosen):
            chosen[-1] = True  # one block, nothing between: after it
        k = sum(chosen)
        even = [(i + 1) * n0 // k - i * n0 // k for i in range(k)]  # even split, floor pattern
        if gaps == [even.pop(0) if c else 0 for c in chosen]:
            return True
    return False


def test_no_defined_block_layout_beats_the_reference_brute_force():
    # every arrangement of the baseline around blocks-in-turn of every size (20,146 designs), the
    # layouts the README defines picked out of them by is_defined_layout
    counts = [6, 6, 6]
    study = make_study(counts, baseline=2, durations=[2.0] * 3, analysis={"high_pass_cutoff": 0})
    designs, defined = [], []
    for size in range(1, 7):
        blocks = blocks_in_turn(counts, size)
        for gaps in compositions(counts[2], len(blocks) + 1):
            seq = [2] * gaps[0]
            for block, gap in zip(blocks, gaps[1:]):
                seq += block + [2] * gap
            designs.append(seq)
            defined.append(is_defined_layout(gaps, size, counts[2]))
    designs, defined = np.array(designs), np.array(defined)
    det = detections(study, designs)
    ref = references(study, make_setup(study), [0], 0)
    family = {runs[0].tobytes() for _, runs in block_family([np.array(counts)], 2)}
    assert family == {d.astype(np.int64).tobytes() for d in designs[defined]}  # the family is the definition
    assert det[defined].max() <= ref["block_detection"] * (1 + 1e-9)
    assert det[defined].max() == pytest.approx(ref["block_detection"], rel=1e-9)
    # arrangements outside the definition (an uneven split between the run's ends) do better on a
    # run this short, where the ends weigh most: measured 5.1 % here; the family does not claim them
    assert ref["block_detection"] >= 0.94 * det.max()


@pytest.mark.parametrize(
    "case",
    [
        "reward_cue.toml",
        "word_reading.toml",
        dict(counts=[10, 14, 30], baseline=2, durations=[2.0] * 3),
        dict(counts=[20, 20, 12], baseline=2, durations=[1.0] * 3, timing={"tr": 1.0, "soa": 1.5}),
        dict(counts=[12, 12, 12], baseline=None, durations=[2.0] * 3),
    ],
)
def test_family_is_at_least_as_good_as_the_old_single_layout(case):
    study = load_study(EXAMPLES / case) if isinstance(case, str) else make_study(**case)
    setup = make_setup(study)
    runs = list(range(study.facts.n_runs))
    counts = [study.facts.counts[r] for r in runs]
    biggest = int(max(c.max() for c in counts))
    sizes = sorted({b for b in OLD_SIZES if b <= biggest} | {biggest})
    from seqsolve.score import _score_orderings

    old = [[block_ordering(c, study.facts.baseline, b) for c in counts] for b in sizes]
    old_best = _score_orderings(study, setup, old, 0, estimation=False)[0].max()
    new = references(study, setup, runs, 0)["block_detection"]
    assert new >= old_best * (1 - 1e-12)
    if case == "reward_cue.toml":
        assert new > 1.05 * old_best  # measured 1.079: the baseline spread at start, between and at end


def test_best_block_period_is_the_common_one_for_the_canonical_hrf_with_a_128_s_high_pass():
    # Common practice (from memory, not a computed source): with the canonical HRF and a 128 s
    # high-pass, blocks of about 15-20 s on and off (a 30-40 s period) are near-optimal for one
    # condition against baseline; efficiency rises as the period grows toward that, and collapses
    # once the period nears the cut-off, where the high-pass removes the block's own frequency
    study = make_study([160, 160], baseline=1, durations=[2.0, 2.0], analysis={"high_pass_cutoff": 128})
    sizes = np.arange(1, 81)  # trials of 2 s per block: 2 s .. 160 s on
    det = detections(study, np.array([block_ordering(np.array([160, 160]), 1, int(b)) for b in sizes]))
    on_seconds = 2 * sizes[np.argmax(det)]
    assert 14 <= on_seconds <= 24  # measured 20 s
    rising = det[: np.argmax(det) - 1]
    assert np.all(np.diff(rising) > 0)
    assert det[sizes == 32][0] < 0.5 * det.max()  # 64 s on, a 128 s period: at the cut-off
    ref = references(study, make_setup(study), [0], 0)
    assert 14 <= 2 * ref["block_size"] <= 24 and ref["block_detection"] >= det.max()
    # the best of every size of every placement (all 1,050 layouts scored here)
    every = block_family([np.array([160, 160])], 1)
    assert ref["block_detection"] == pytest.approx(
        detections(study, np.array([r[0] for _, r in every])).max(), rel=1e-12
    )
