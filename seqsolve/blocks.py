"""The block-design family: every layout of blocks the detection reference is the best of.

A block layout of a study's counts is fixed by two choices, applied to every run alike:

- the block size b (trials), every b from 1 to the largest count of a run: the modelled
  conditions, in spec order, are taken in turn in blocks of b trials (a condition whose trials run
  out drops out; its last block may be shorter);
- where the baseline's trials go (studies with a baseline), one of PLACEMENTS:
  ``after each``   a baseline block of b trials after each condition's turn while any are left, the
                   rest at the end (`block_ordering`; the only layout the reference once searched);
  ``spread ...``   the baseline spread as evenly as it divides over chosen slots: the gaps between
                   condition blocks, with or without a slot at the start and/or the end;
  ``at start``, ``at end``, ``at both ends``   no baseline between blocks.

Even division gives slot i of S the trials floor((i+1) n0 / S) - floor(i n0 / S) (n0 baseline
trials), so longer and shorter slots alternate deterministically. Layouts that give the same
orderings are kept once (the first in the order above). No solver imports.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: baseline placements: name -> (slot at start, slots between blocks, slot at end), or None for
#: "after each" (baseline blocks of the condition block's size)
PLACEMENTS: dict[str, tuple[bool, bool, bool] | None] = {
    "after each": None,
    "spread between": (False, True, False),
    "spread between and at end": (False, True, True),
    "spread at start and between": (True, True, False),
    "spread at start, between and at end": (True, True, True),
    "at start": (True, False, False),
    "at end": (False, False, True),
    "at both ends": (True, False, True),
}


@dataclass(frozen=True)
class BlockLayout:
    """One member of the family: block size in trials and where the baseline goes."""

    size: int
    placement: str

    @property
    def label(self) -> str:
        return f"blocks of {self.size}, baseline {self.placement}"


def condition_blocks(counts: np.ndarray, baseline: int | None, size: int) -> tuple[np.ndarray, np.ndarray]:
    """The modelled conditions' blocks of `size` trials, in turn, in spec order: (labels, lengths),
    each of shape (n_blocks,). Turn k holds every condition's k-th block, so a condition that
    runs out drops out of later turns."""
    order = [c for c in range(len(counts)) if c != baseline]
    turn, rank, label, length = [], [], [], []
    for i, c in enumerate(order):
        n = int(counts[c])
        k = -(-n // size)  # blocks of c, the last one shorter when size does not divide n
        lengths = np.full(k, size, dtype=np.int64)
        if k and n % size:
            lengths[-1] = n % size
        turn.append(np.arange(k))
        rank.append(np.full(k, i))
        label.append(np.full(k, c, dtype=np.int64))
        length.append(lengths)
    at = np.lexsort((np.concatenate(rank), np.concatenate(turn)))
    return np.concatenate(label)[at], np.concatenate(length)[at]


def even_split(total: int, n_slots: int) -> np.ndarray:
    """total trials over n_slots slots as evenly as it divides (sizes differ by at most 1)."""
    edges = (np.arange(n_slots + 1) * total) // n_slots
    return np.diff(edges)


def layout_run(counts: np.ndarray, baseline: int | None, layout: BlockLayout) -> np.ndarray:
    """The ordering of one run (counts per condition) under a block layout, shape (n_trials,)."""
    slots = PLACEMENTS[layout.placement]
    n0 = int(counts[baseline]) if baseline is not None else 0
    if slots is None and n0:
        return block_ordering(counts, baseline, layout.size)
    labels, lengths = condition_blocks(counts, baseline, layout.size)
    n = len(labels)
    gaps = np.zeros(n + 1, dtype=np.int64)  # baseline trials before block 0, after blocks 0 .. n-1
    if n0 and n == 0:
        gaps[0] = n0
    elif n0:
        start, between, end = slots
        chosen = np.array([start] + [between] * (n - 1) + [end], dtype=bool)
        if not chosen.any():  # one block and no gap between blocks: the baseline goes after it
            chosen[-1] = True
        gaps[chosen] = even_split(n0, int(chosen.sum()))
    seq_labels = np.empty(2 * n + 1, dtype=np.int64)
    seq_labels[0::2] = baseline if baseline is not None else -1
    seq_labels[1::2] = labels
    seq_lengths = np.empty(2 * n + 1, dtype=np.int64)
    seq_lengths[0::2] = gaps
    seq_lengths[1::2] = lengths
    return np.repeat(seq_labels, seq_lengths)


def block_ordering(counts: np.ndarray, baseline: int | None, block: int) -> np.ndarray:
    """Conditions in blocks of `block` trials taken in turn (the baseline's blocks between them)."""
    left = counts.astype(int).copy()
    order = [c for c in range(len(counts)) if c != baseline]
    out: list[int] = []
    while left.sum():
        for c in order:
            take = min(block, left[c])
            out += [c] * take
            left[c] -= take
            if baseline is not None and left[baseline]:
                rest = min(block, left[baseline])
                out += [baseline] * rest
                left[baseline] -= rest
        if baseline is not None and all(left[c] == 0 for c in order):
            out += [baseline] * left[baseline]
            left[baseline] = 0
    return np.asarray(out, dtype=np.int64)


def block_family(
    counts: list[np.ndarray], baseline: int | None, sizes: list[int] | None = None
) -> list[tuple[BlockLayout, list[np.ndarray]]]:
    """Every distinct block layout of these runs' counts (each (n_conditions,)): (layout, runs).

    sizes: the block sizes (default: every size from 1 to the largest count of any run);
    placements as in PLACEMENTS (only "after each" when there is no baseline, where they all
    coincide). Deterministic order: by size, then placement.
    """
    if sizes is None:
        sizes = list(range(1, int(max(int(c.max()) for c in counts)) + 1))
    placements = list(PLACEMENTS) if baseline is not None else ["after each"]
    seen: set[bytes] = set()
    out = []
    for size in sizes:
        for placement in placements:
            layout = BlockLayout(size, placement)
            runs = [layout_run(c, baseline, layout) for c in counts]
            key = b"|".join(r.tobytes() for r in runs)
            if key not in seen:
                seen.add(key)
                out.append((layout, runs))
    return out
