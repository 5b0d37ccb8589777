"""Rule kind run-boundary: no condition carries over a break between consecutive runs."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules._text import quoted
from seqsolve.rules.base import Rule, StudyFacts, Violation


class RunBoundary(Rule):
    """No target occurs both in the last `window` trials of a run and the first `window` of the next."""

    kind: Literal["run-boundary"]
    window: int = Field(default=1, ge=1, description="Trials on each side of the break.")
    conditions: list[str] | None = Field(
        default=None, description="Conditions or factor levels; default every condition but the baseline."
    )
    example = 'kind = "run-boundary"'

    def condition_names(self) -> list[str]:
        return self.conditions or []

    def sentence(self, facts: StudyFacts) -> str:
        what = (
            "no condition (the baseline excepted)" if self.conditions is None else f"none of {quoted(self.conditions)}"
        )
        if self.window == 1:
            return f"{what} both ends a run and starts the next"
        return f"{what} occurs both in the last {self.window} trials of a run and the first {self.window} of the next"

    def encode(self, m, guard) -> None:
        w = self.window
        facts = m.facts
        for t in facts.targets(self.conditions, include_baseline=False):
            for r in range(facts.n_runs - 1):
                if not (m.active(r) or m.active(r + 1)):
                    continue
                before, after = m.member(r, t)[-w:], m.member(r + 1, t)[:w]
                # the target may sit on one side of the break, not both
                for i in before:
                    for j in after:
                        m.cp.add_bool_or([~i, ~j]).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        if self.window != 1:
            return False
        for t in f.facts.targets(self.conditions, include_baseline=False):
            for r in range(f.facts.n_runs - 1):
                ends = [f.end[r][c] for c in t.codes]
                starts = [f.start[r + 1][c] for c in t.codes]
                f.cp.add(sum(ends) + sum(starts) <= 1).only_enforce_if(guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        for t in facts.targets(self.conditions, include_baseline=False):
            moves.separate_runs(t.codes, self.window)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        w = self.window
        for t in facts.targets(self.conditions, include_baseline=False):
            for r in range(len(runs) - 1):
                tail, head = runs[r][-w:], runs[r + 1][:w]
                if np.isin(tail, t.codes).any() and np.isin(head, t.codes).any():
                    end_at = tuple(int(len(runs[r]) - w + i) for i in np.flatnonzero(np.isin(tail, t.codes)))
                    out.append(
                        Violation(
                            self.name(facts),
                            r,
                            end_at,
                            f"'{t.label}' ends run {r + 1} and starts run {r + 2} (within {w} trials of the break)",
                        )
                    )
        return out
