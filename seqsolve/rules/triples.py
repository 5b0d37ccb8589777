"""Rule kind balanced-triples: second-order carry-over balance (what follows each ordered pair)."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules.base import Rule, StudyFacts, Violation
from seqsolve.rules.transitions import FREE, count_bounds


def triple_counts(seq: np.ndarray, n_conditions: int, cyclic: bool = False) -> np.ndarray:
    """Array (K, K, K): how often a, b, c stand at three consecutive positions of seq.

    With cyclic, the two triples that wrap from the run's end to its start count too (runs of
    3 trials or more; a shorter run has no triple either way).
    """
    k = n_conditions
    out = np.zeros((k, k, k), dtype=np.int64)
    seq = np.asarray(seq, dtype=np.int64)
    n = len(seq)
    if n < 3:
        return out
    ext = np.concatenate([seq, seq[:2]]) if cyclic else seq
    np.add.at(out, (ext[:-2], ext[1:-1], ext[2:]), 1)
    return out


def n_triples(n_trials: int, cyclic: bool) -> int:
    """Triples a run of n_trials holds: n - 2, or n with the wrap (none below 3 trials)."""
    if n_trials < 3:
        return 0
    return n_trials if cyclic else n_trials - 2


def repeat_mask(k: int) -> np.ndarray:
    """bool (K, K, K): triples with a condition directly repeated (a == b or b == c)."""
    idx = np.arange(k)
    return (idx[:, None, None] == idx[None, :, None]) | (idx[None, :, None] == idx[None, None, :])


def ideal_triple_counts(counts: np.ndarray, cyclic: bool, exclude_repeats: bool) -> np.ndarray:
    """Expected count of each ordered triple in one run with the given condition counts, (K, K, K).

    With n triples in all, (a, b, c) is expected n * p_a * p_b * p_c times, p being the condition
    shares (the second-order analogue of the pair ideal). With repeats excluded, the n triples are
    shared among those with no direct repeat (a != b, b != c) in proportion to n_a * n_b * n_c,
    and the others get no ideal.
    """
    counts = np.asarray(counts, dtype=float)
    prod = counts[:, None, None] * counts[None, :, None] * counts[None, None, :]
    if exclude_repeats:
        prod[repeat_mask(len(counts))] = 0.0
    denom = prod.sum()
    return n_triples(int(counts.sum()), cyclic) * prod / denom if denom > 0 else prod


class BalancedTriples(Rule):
    """Second-order carry-over balance: each ordered triple occurs about as often as its ideal count."""

    kind: Literal["balanced-triples"]
    tolerance: int = Field(default=1, ge=0, description="Allowed distance, in trials, beyond the rounded ideal count.")
    exclude_repeats: bool = Field(
        default=False, description="Leave triples with a condition directly repeated unbalanced and unideal."
    )
    across_runs: bool = Field(default=False, description="Balance the counts summed over a participant's runs.")
    cyclic: bool = Field(default=False, description="Count the two triples that wrap from a run's end to its start.")
    example = 'kind = "balanced-triples", tolerance = 1'
    wide_model = True  # K^3 triple literals per position

    def sentence(self, facts: StudyFacts) -> str:
        scope = "over all runs of a participant" if self.across_runs else "in every run"
        what = (
            "every ordered triple of conditions with no direct repeat"
            if self.exclude_repeats
            else "every ordered triple of conditions"
        )
        wrap = " (counting the wrap from last trials to first)" if self.cyclic else ""
        return f"{what} stands in a row within {self.tolerance} of its ideal count {scope}{wrap}"

    def bounds(self, facts: StudyFacts) -> list[tuple[list[int], np.ndarray, np.ndarray]]:
        """(runs, low, high) groups: the summed triple counts over `runs` lie in [low, high], (K, K, K)."""
        free = repeat_mask(facts.n_conditions) if self.exclude_repeats else None
        return count_bounds(
            facts,
            self.across_runs,
            self.tolerance,
            lambda counts: ideal_triple_counts(counts, self.cyclic, self.exclude_repeats),
            free,
        )

    def encode(self, m, guard) -> None:
        k = m.facts.n_conditions
        triples = {r: m.triples(r, self.cyclic) for r in range(m.facts.n_runs)}
        for runs, low, high in self.bounds(m.facts):
            if not any(m.active(r) for r in runs):
                continue
            for a in range(k):
                for b in range(k):
                    for c in range(k):
                        expr = sum(sum(triples[r][:, a, b, c].tolist()) for r in runs)
                        # the triple a, b, c stands in a row between its low and high count
                        if low[a, b, c] > 0:
                            m.cp.add(expr >= int(low[a, b, c])).only_enforce_if(guard)
                        if high[a, b, c] < FREE:
                            m.cp.add(expr <= int(high[a, b, c])).only_enforce_if(guard)

    def add_moves(self, facts: StudyFacts, moves) -> None:
        groups = self.bounds(facts)
        moves.bound_triples(
            [g for g, _, _ in groups],
            np.array([lo for _, lo, _ in groups]),
            np.array([hi for _, _, hi in groups]),
            self.cyclic,
        )

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        for group, low, high in self.bounds(facts):
            found = sum(triple_counts(runs[r], facts.n_conditions, self.cyclic) for r in group)
            for a, b, c in np.argwhere((found < low) | (found > high)):
                run = group[0] if len(group) == 1 else None
                where = () if run is None else _where(runs[run], (a, b, c), found[a, b, c] > high[a, b, c])
                out.append(Violation(self.name(facts), run, where, _found(facts, (a, b, c), found, low, high)))
        return out


def _found(facts: StudyFacts, triple, found, low, high) -> str:
    lo, hi = int(low[triple]), int(high[triple])
    allowed = f"{lo}" if lo == hi else f"{lo} to {hi}"
    a, b, c = (facts.names[i] for i in triple)
    return f"'{a}' then '{b}' then '{c}' occurs {found[triple]} times; allowed {allowed}"


def _where(seq: np.ndarray, triple, too_many: bool) -> tuple[int, ...]:
    """Too many: where the triple starts (linear positions); too few: where its first condition stands."""
    a, b, c = triple
    hits = np.zeros(0, dtype=np.int64)
    if too_many and len(seq) >= 3:
        hits = np.flatnonzero((seq[:-2] == a) & (seq[1:-1] == b) & (seq[2:] == c))
    if len(hits) == 0:  # too few, or too many only through the wrap
        hits = np.flatnonzero(seq == a)
    return tuple(int(p) for p in hits)
