"""Rule kind min-gap: at least g other trials between two trials of a target (or a target and another)."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules._text import quoted, trials
from seqsolve.rules.base import Rule, StudyFacts, Violation


class MinGap(Rule):
    """Between two trials of each target (or between a target and `other`) lie at least `gap` trials."""

    kind: Literal["min-gap"]
    conditions: list[str] = Field(min_length=1, description="Conditions or factor levels, each on its own.")
    gap: int = Field(ge=1, description="Fewest other trials between the two, within a run.")
    other: str | None = Field(
        default=None, description="If given, the gap is between a target and this condition (either order)."
    )
    example = 'kind = "min-gap", conditions = ["oddball"], gap = 3'

    def condition_names(self) -> list[str]:
        return self.conditions + ([self.other] if self.other else [])

    def sentence(self, facts: StudyFacts) -> str:
        if self.other:
            return f"at least {trials(self.gap)} between {quoted(self.conditions)} and '{self.other}'"
        return f"at least {trials(self.gap)} between two trials of {quoted(self.conditions)}"

    def encode(self, m, guard) -> None:
        g = self.gap
        facts = m.facts
        for t in facts.targets(self.conditions, include_baseline=True):
            for r in m.runs():
                a = m.member(r, t)
                if self.other is None:
                    # any g+1 consecutive trials hold at most one of the target
                    for p in range(max(len(a) - g, 1)):
                        m.cp.add(sum(a[p : p + g + 1].tolist()) <= 1).only_enforce_if(guard)
                    continue
                b = m.member(r, facts.resolve(self.other))
                # no target and other closer than g+1 positions, in either order
                for p in range(len(a)):
                    for q in range(p + 1, min(p + g + 1, len(a))):
                        m.cp.add_bool_or([~a[p], ~b[q]]).only_enforce_if(guard)
                        m.cp.add_bool_or([~b[p], ~a[q]]).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        if self.gap != 1:
            return False
        facts = f.facts
        for t in facts.targets(self.conditions, include_baseline=True):
            others = t.codes if self.other is None else facts.resolve(self.other).codes
            for r in range(facts.n_runs):
                for i in t.codes:
                    for j in others:
                        # a gap of one trial: the two never stand side by side
                        f.cp.add(f.m[r][i, j] == 0).only_enforce_if(guard)
                        f.cp.add(f.m[r][j, i] == 0).only_enforce_if(guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        for t in facts.targets(self.conditions, include_baseline=True):
            other = None if self.other is None else facts.resolve(self.other).codes
            moves.keep_apart(t.codes, other, self.gap)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        for t in facts.targets(self.conditions, include_baseline=True):
            other = None if self.other is None else facts.resolve(self.other)
            for r, seq in enumerate(runs):
                pos_a = np.flatnonzero(np.isin(seq, t.codes))
                if other is None:
                    close = np.flatnonzero(np.diff(pos_a) <= self.gap)
                    pairs = [(pos_a[i], pos_a[i + 1]) for i in close]
                else:
                    is_b = np.isin(seq, other.codes)
                    # every target trial against the other's trials within the gap (a trial that
                    # belongs to both sets is not its own neighbour); each pair once
                    found = set()
                    for p in pos_a:
                        lo, hi = max(0, p - self.gap), min(len(seq), p + self.gap + 1)
                        for q in lo + np.flatnonzero(is_b[lo:hi]):
                            if q != p:
                                found.add((min(p, q), max(p, q)))
                    pairs = sorted(found)
                for p, q in pairs:
                    out.append(
                        Violation(self.name(facts), r, (int(p), int(q)), f"only {int(q - p - 1)} trials between them")
                    )
        return out
