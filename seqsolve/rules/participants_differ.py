"""Rule kind participants-differ: no run of one participant repeats a run of another."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from seqsolve.rules.base import Rule, StudyFacts, Violation


class ParticipantsDiffer(Rule):
    """Any two runs of different participants (of equal length) differ in at least d positions."""

    kind: Literal["participants-differ"]
    min_differences: int = Field(default=1, ge=1, description="Fewest positions at which two runs must differ.")
    example = 'kind = "participants-differ", min_differences = 10'
    across_participants = True

    def sentence(self, facts: StudyFacts) -> str:
        if self.min_differences == 1:
            return "no two participants get the same ordering of a run"
        return f"runs of different participants differ in at least {self.min_differences} positions"

    def encode(self, m, guard) -> None:
        """Within one participant there is nothing to say; see encode_against."""

    def encode_flow(self, f, guard) -> bool:
        # the flow path samples, compares with earlier participants and retries; see solve.py
        return True

    def encode_against(self, m, guard, earlier: list[list[np.ndarray]]) -> None:
        for runs in earlier:
            for prev in runs:
                for r in m.runs():
                    if m.length(r) != len(prev):
                        continue
                    same = [m.x[r][p, int(c)] for p, c in enumerate(prev)]
                    # at most n - d positions agree with that earlier run
                    m.cp.add(sum(same) <= len(prev) - self.min_differences).only_enforce_if(guard)

    def add_moves(self, facts: StudyFacts, moves) -> None:
        moves.differ_by(self.min_differences)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        return []

    def clashes(self, runs: list[np.ndarray], earlier: list[list[np.ndarray]]) -> list[tuple[int, int, int, int]]:
        """(earlier participant, its run, this run, positions that differ) for every clash."""
        out = []
        for i, other in enumerate(earlier):
            for q, prev in enumerate(other):
                for r, seq in enumerate(runs):
                    if len(seq) == len(prev):
                        d = int(np.count_nonzero(seq != prev))
                        if d < self.min_differences:
                            out.append((i, q, r, d))
        return out

    def check_study(self, facts: StudyFacts, designs: dict[str, list[np.ndarray]]) -> list[Violation]:
        labels = list(designs)
        out = []
        for j, lab in enumerate(labels):
            earlier = [designs[x] for x in labels[:j]]
            for i, q, r, d in self.clashes(designs[lab], earlier):
                out.append(
                    Violation(
                        self.name(facts),
                        r,
                        (),
                        f"run {r + 1} differs from participant {labels[i]}'s run {q + 1} in only {d} positions",
                        participant=lab,
                    )
                )
        return out
