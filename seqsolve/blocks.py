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


def condition_blocks(counts: np.ndarray, baseline: int | None, size: int) -> list[np.ndarray]:
    """The modelled conditions' blocks of `size` trials, in turn, in spec order (each an int array)."""
    left = counts.astype(int).copy()
    order = [c for c in range(len(counts)) if c != baseline]
    blocks = []
    while any(left[c] for c in order):
        for c in order:
            take = min(size, int(left[c]))
            if take:
                blocks.append(np.full(take, c, dtype=np.int64))
                left[c] -= take
    return blocks


def even_split(total: int, n_slots: int) -> list[int]:
    """total trials over n_slots slots as evenly as it divides (sizes differ by at most 1)."""
    edges = [(i * total) // n_slots for i in range(n_slots + 1)]
    return [b - a for a, b in zip(edges[:-1], edges[1:])]


def layout_run(counts: np.ndarray, baseline: int | None, layout: BlockLayout) -> np.ndarray:
    """The ordering of one run (counts per condition) under a block layout, shape (n_trials,)."""
    blocks = condition_blocks(counts, baseline, layout.size)
    n0 = int(counts[baseline]) if baseline is not None else 0
    slots = PLACEMENTS[layout.placement]
    if n0 == 0 or not blocks:
        parts = blocks + ([np.full(n0, baseline, dtype=np.int64)] if n0 else [])
        return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)
    if slots is None:
        return block_ordering(counts, baseline, layout.size)
    start, between, end = slots
    n_slots = int(start) + (len(blocks) - 1) * int(between) + int(end)
    if n_slots == 0:  # one block and no gap between blocks: the baseline goes after it
        start, end, n_slots = False, True, 1
    sizes = iter(even_split(n0, n_slots))
    out = [np.full(next(sizes), baseline, dtype=np.int64)] if start else []
    for i, block in enumerate(blocks):
        out.append(block)
        if (between and i < len(blocks) - 1) or (end and i == len(blocks) - 1):
            out.append(np.full(next(sizes), baseline, dtype=np.int64))
    return np.concatenate(out)


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


def block_family(counts: list[np.ndarray], baseline: int | None) -> list[tuple[BlockLayout, list[np.ndarray]]]:
    """Every distinct block layout of these runs' counts (each (n_conditions,)): (layout, runs).

    Sizes 1 .. the largest count of any run; placements as in PLACEMENTS (only "after each" when
    there is no baseline, where they all coincide). Deterministic order: by size, then placement.
    """
    biggest = int(max(int(c.max()) for c in counts))
    placements = list(PLACEMENTS) if baseline is not None else ["after each"]
    seen: set[bytes] = set()
    out = []
    for size in range(1, biggest + 1):
        for placement in placements:
            layout = BlockLayout(size, placement)
            runs = [layout_run(c, baseline, layout) for c in counts]
            key = b"|".join(r.tobytes() for r in runs)
            if key not in seen:
                seen.add(key)
                out.append((layout, runs))
    return out
