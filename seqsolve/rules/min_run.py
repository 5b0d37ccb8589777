"""Rule kind min-run: every stretch of a condition is at least M trials long (mini-blocks)."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules._text import targets_phrase
from seqsolve.rules.base import Rule, StudyFacts, Violation, runs_of


class MinRun(Rule):
    """Trials of each target come in stretches of at least `length`."""

    kind: Literal["min-run"]
    length: int = Field(ge=2, description="Shortest allowed stretch, in trials.")
    conditions: list[str] | None = Field(
        default=None, description="Conditions or factor levels; default every condition but the baseline."
    )
    example = 'kind = "min-run", length = 4, conditions = ["gain", "loss"]'

    def condition_names(self) -> list[str]:
        return self.conditions or []

    def sentence(self, facts: StudyFacts) -> str:
        what = "every condition but the baseline" if self.conditions is None else targets_phrase(self.conditions)
        return f"trials of {what} come in stretches of at least {self.length}"

    def encode(self, m, guard) -> None:
        M = self.length
        for t in m.facts.targets(self.conditions, include_baseline=False):
            for r in m.runs():
                lits = m.member(r, t)
                n = len(lits)
                # a stretch that starts at p goes on for at least M trials
                for p in range(n):
                    starts = [~lits[p]] + ([lits[p - 1]] if p > 0 else [])
                    if p + M > n:
                        m.cp.add_bool_or(starts).only_enforce_if(guard)
                        continue
                    for j in range(1, M):
                        m.cp.add_bool_or(starts + [lits[p + j]]).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        targets = f.facts.targets(self.conditions, include_baseline=False)
        if any(len(t.codes) > 1 for t in targets):
            return False
        for t in targets:
            f.limit_stretch(t.codes[0], self.length, 10**9, guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        for t in facts.targets(self.conditions, include_baseline=False):
            moves.limit_stretch(t.codes, self.length, 1 << 40)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        for t in facts.targets(self.conditions, include_baseline=False):
            member = np.isin(np.arange(facts.n_conditions), t.codes)
            for r, seq in enumerate(runs):
                for start, n in runs_of(seq, member):
                    if n < self.length:
                        out.append(
                            Violation(
                                self.name(facts), r, tuple(range(start, start + n)), f"a stretch of {n} '{t.label}'"
                            )
                        )
        return out
