"""Rule kinds about what follows what: balanced-transitions and forbidden-transition."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules._text import quoted
from seqsolve.rules.base import Rule, StudyFacts, Target, Violation


def pair_counts(seq: np.ndarray, n_conditions: int, cyclic: bool = False) -> np.ndarray:
    """Matrix (K, K) of how often b directly follows a in seq (with the wrap-around pair if cyclic)."""
    out = np.zeros((n_conditions, n_conditions), dtype=np.int64)
    if len(seq) > 1:
        np.add.at(out, (seq[:-1], seq[1:]), 1)
    if cyclic and len(seq) > 1:
        out[seq[-1], seq[0]] += 1
    return out


def ideal_pair_counts(counts: np.ndarray, cyclic: bool, exclude_repeats: bool) -> np.ndarray:
    """Expected count of each ordered pair in one run with the given condition counts, shape (K, K).

    With n transitions in all (N-1, or N when cyclic), pair (a, b) is expected n * p_a * p_b times,
    p being the condition shares. With repeats excluded, the n transitions are shared among the
    pairs of different conditions only, in proportion to n_a * n_b, and repeats get no ideal.
    """
    counts = np.asarray(counts, dtype=float)
    total = counts.sum()
    n_trans = total if cyclic else total - 1
    prod = np.outer(counts, counts)
    if exclude_repeats:
        np.fill_diagonal(prod, 0.0)
    denom = prod.sum()
    return n_trans * prod / denom if denom > 0 else prod


#: the high bound of a count left free
FREE = 10**9


def count_bounds(
    facts: StudyFacts, across_runs: bool, tolerance: int, ideal_of, free: np.ndarray | None
) -> list[tuple[list[int], np.ndarray, np.ndarray]]:
    """(runs, low, high) groups for a balance of pair or triple counts: each count summed over `runs`
    (every run alone, or all runs together) lies within `tolerance` of its ideal, rounded outward.

    ideal_of(counts): the ideal count array of one run with these condition counts; free: a mask of
    counts left unbounded (low 0, high FREE), or None."""
    groups = [list(range(facts.n_runs))] if across_runs else [[r] for r in range(facts.n_runs)]
    out = []
    for runs in groups:
        ideal = sum(ideal_of(facts.counts[r]) for r in runs)
        low = np.maximum(np.floor(ideal + 1e-9) - tolerance, 0).astype(np.int64)
        high = (np.ceil(ideal - 1e-9) + tolerance).astype(np.int64)
        if free is not None:
            low[free] = 0
            high[free] = FREE
        out.append((runs, low, high))
    return out


class BalancedTransitions(Rule):
    """First-order carry-over balance: each ordered pair occurs about as often as its ideal count."""

    kind: Literal["balanced-transitions"]
    tolerance: int = Field(default=1, ge=0, description="Allowed distance, in trials, beyond the rounded ideal count.")
    exclude_repeats: bool = Field(
        default=False, description="Leave pairs of a condition with itself unbalanced and unideal."
    )
    across_runs: bool = Field(default=False, description="Balance the counts summed over a participant's runs.")
    cyclic: bool = Field(default=False, description="Count the pair from a run's last trial back to its first.")
    example = 'kind = "balanced-transitions", tolerance = 1'

    def sentence(self, facts: StudyFacts) -> str:
        scope = "over all runs of a participant" if self.across_runs else "in every run"
        pairs = (
            "every ordered pair of different conditions" if self.exclude_repeats else "every ordered pair of conditions"
        )
        wrap = " (counting the wrap from last trial to first)" if self.cyclic else ""
        return f"{pairs} follows within {self.tolerance} of its ideal count {scope}{wrap}"

    def bounds(self, facts: StudyFacts) -> list[tuple[list[int], np.ndarray, np.ndarray]]:
        """(runs, low, high) groups: the summed pair counts over `runs` must lie in [low, high]."""
        free = np.eye(facts.n_conditions, dtype=bool) if self.exclude_repeats else None
        return count_bounds(
            facts,
            self.across_runs,
            self.tolerance,
            lambda counts: ideal_pair_counts(counts, self.cyclic, self.exclude_repeats),
            free,
        )

    def _add_bounds(self, cp, count_of, facts, guard, active=None) -> None:
        k = facts.n_conditions
        for runs, low, high in self.bounds(facts):
            if active is not None and not any(active(r) for r in runs):
                continue
            for a in range(k):
                for b in range(k):
                    expr = sum(count_of(r, a, b) for r in runs)
                    # the pair a->b occurs between its low and high count
                    if low[a, b] > 0:
                        cp.add(expr >= int(low[a, b])).only_enforce_if(guard)
                    if high[a, b] < FREE:
                        cp.add(expr <= int(high[a, b])).only_enforce_if(guard)

    def encode(self, m, guard) -> None:
        wraps = {}
        if self.cyclic:
            for r in range(m.facts.n_runs):
                wraps[r] = _and_matrix(m.cp, m.x[r][-1], m.x[r][0], f"run{r + 1}_wrap")

        def count_of(r, a, b):
            expr = sum(m.pairs(r)[:, a, b].tolist())
            return expr + wraps[r][a, b] if self.cyclic else expr

        self._add_bounds(m.cp, count_of, m.facts, guard, active=m.active)

    def encode_flow(self, f, guard) -> bool:
        wraps = {}
        if self.cyclic:
            for r in range(f.facts.n_runs):
                wraps[r] = _and_matrix(f.cp, f.end[r], f.start[r], f"run{r + 1}_wrap")

        def count_of(r, a, b):
            return f.m[r][a, b] + wraps[r][a, b] if self.cyclic else f.m[r][a, b]

        self._add_bounds(f.cp, count_of, f.facts, guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        groups = self.bounds(facts)
        moves.bound_pairs(
            [g for g, _, _ in groups],
            np.array([lo for _, lo, _ in groups]),
            np.array([hi for _, _, hi in groups]),
            self.cyclic,
        )

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        names = facts.names
        for group, low, high in self.bounds(facts):
            found = sum(pair_counts(runs[r], facts.n_conditions, self.cyclic) for r in group)
            bad = np.argwhere((found < low) | (found > high))
            for a, b in bad:
                lo, hi = int(low[a, b]), int(high[a, b])
                allowed = f"{lo}" if lo == hi else f"{lo} to {hi}"
                run = group[0] if len(group) == 1 else None
                where = ()
                if run is not None:
                    # too many: where the pair stands; too few: where its first condition stands
                    seq = runs[run]
                    hits = (
                        np.flatnonzero((seq[:-1] == a) & (seq[1:] == b))
                        if found[a, b] > hi
                        else np.flatnonzero(seq == a)
                    )
                    where = tuple(int(p) for p in hits)
                out.append(
                    Violation(
                        self.name(facts),
                        run,
                        where,
                        f"'{names[a]}' then '{names[b]}' occurs {found[a, b]} times; allowed {allowed}",
                    )
                )
        return out


def _and_matrix(cp, left, right, name: str) -> np.ndarray:
    """Literals w[a, b] = left[a] AND right[b]."""
    k = len(left)
    w = np.empty((k, k), dtype=object)
    for a in range(k):
        for b in range(k):
            w[a, b] = cp.new_bool_var(f"{name}_{a}_{b}")
            cp.add_bool_or([~left[a], ~right[b], w[a, b]])
            cp.add_implication(w[a, b], left[a])
            cp.add_implication(w[a, b], right[b])
    return w


class ForbiddenTransition(Rule):
    """A trial of `first` is never directly followed by a trial of `then`."""

    kind: Literal["forbidden-transition"]
    first: str = Field(description="Condition or factor level ('factor=level') that comes first.")
    then: str = Field(description="Condition or factor level that must not come directly after it.")
    example = 'kind = "forbidden-transition", first = "loss", then = "gain"'

    def condition_names(self) -> list[str]:
        return [self.first, self.then]

    def sentence(self, facts: StudyFacts) -> str:
        return f"{quoted([self.first])} is never directly followed by {quoted([self.then])}"

    def _pair(self, facts: StudyFacts) -> tuple[Target, Target]:
        return facts.resolve(self.first), facts.resolve(self.then)

    def encode(self, m, guard) -> None:
        a, b = self._pair(m.facts)
        for r in m.runs():
            la, lb = m.member(r, a), m.member(r, b)
            # no a directly followed by b
            for p in range(len(la) - 1):
                m.cp.add_bool_or([~la[p], ~lb[p + 1]]).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        a, b = self._pair(f.facts)
        for r in range(f.facts.n_runs):
            for i in a.codes:
                for j in b.codes:
                    f.cp.add(f.m[r][i, j] == 0).only_enforce_if(guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        a, b = self._pair(facts)
        moves.forbid_pair(a.codes, b.codes)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        a, b = self._pair(facts)
        out = []
        for r, seq in enumerate(runs):
            hits = np.flatnonzero(np.isin(seq[:-1], a.codes) & np.isin(seq[1:], b.codes))
            for p in hits:
                out.append(
                    Violation(
                        self.name(facts),
                        r,
                        (int(p), int(p) + 1),
                        f"'{facts.names[seq[p]]}' then '{facts.names[seq[p + 1]]}'",
                    )
                )
        return out
