"""Rule kind max-run: no more than L trials of one condition (or factor level) in a row."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules._text import targets_phrase, trials
from seqsolve.rules.base import Rule, StudyFacts, Violation, runs_of


class MaxRun(Rule):
    """No more than `length` consecutive trials of each target."""

    kind: Literal["max-run"]
    length: int = Field(ge=1, description="Longest allowed stretch, in trials.")
    conditions: list[str] | None = Field(
        default=None,
        description="Conditions or factor levels ('factor=level'), each counted on its own; default every condition.",
    )
    example = 'kind = "max-run", length = 3'

    def condition_names(self) -> list[str]:
        return self.conditions or []

    def sentence(self, facts: StudyFacts) -> str:
        return f"no more than {trials(self.length)} of {targets_phrase(self.conditions)} in a row"

    def encode(self, m, guard) -> None:
        L = self.length
        for t in m.facts.targets(self.conditions, include_baseline=True):
            for r in m.runs():
                lits = m.member(r, t)
                # every window of L+1 trials holds at most L of the target
                for p in range(len(lits) - L):
                    m.cp.add(sum(lits[p : p + L + 1].tolist()) <= L).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        targets = f.facts.targets(self.conditions, include_baseline=True)
        if any(len(t.codes) > 1 for t in targets):
            return False
        for t in targets:
            f.limit_stretch(t.codes[0], 1, self.length, guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        for t in facts.targets(self.conditions, include_baseline=True):
            moves.limit_stretch(t.codes, 1, self.length)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        for t in facts.targets(self.conditions, include_baseline=True):
            member = np.isin(np.arange(facts.n_conditions), t.codes)
            for r, seq in enumerate(runs):
                for start, n in runs_of(seq, member):
                    if n > self.length:
                        out.append(
                            Violation(
                                self.name(facts),
                                r,
                                tuple(range(start, start + n)),
                                f"{n} trials of '{t.label}' in a row",
                            )
                        )
        return out
