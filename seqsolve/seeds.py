"""Seeds derived from a study's master seed (numpy only, so light modules can use them)."""

from __future__ import annotations

import numpy as np


def derive_seed(master: int, index: int) -> int:
    """A participant's seed from the master seed and its position in the list (fits CP-SAT's int32)."""
    return int(np.random.SeedSequence([master, index]).generate_state(1)[0] % (2**31 - 1))


def reference_seed(master: int) -> int:
    """The seed of a study's references (random orderings, and the timing of jittered references):
    the first participant's, so that generate and score divide by the same figures."""
    return derive_seed(master, 0)


__all__ = ["derive_seed", "reference_seed"]
