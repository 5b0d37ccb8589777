"""Rule kind position: conditions kept out of, or put into, given positions of a run."""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from seqsolve.rules._text import quoted
from seqsolve.rules.base import Rule, StudyFacts, Target, Violation


class Position(Rule):
    """The listed conditions are never (or always) at the given positions of each run."""

    kind: Literal["position"]
    conditions: list[str] = Field(min_length=1, description="Conditions or factor levels, taken together.")
    placement: Literal["never", "always"] = Field(
        description="'never': none of them at these positions; 'always': one of them at each."
    )
    first: int | None = Field(default=None, ge=1, description="The first this many trials of a run.")
    last: int | None = Field(default=None, ge=1, description="The last this many trials of a run.")
    at: list[int] | None = Field(default=None, min_length=1, description="Positions counted from 1.")
    runs: list[int] | None = Field(default=None, min_length=1, description="Runs it applies to, from 1; default all.")
    example = 'kind = "position", conditions = ["fixation"], placement = "always", first = 1'

    @model_validator(mode="after")
    def _one_place(self):
        given = [n for n in ("first", "last", "at") if getattr(self, n) is not None]
        if len(given) != 1:
            raise ValueError("give exactly one of 'first', 'last' or 'at' (e.g. first = 1)")
        if self.at is not None and min(self.at) < 1:
            raise ValueError("positions in 'at' count from 1")
        return self

    def condition_names(self) -> list[str]:
        return self.conditions

    def sentence(self, facts: StudyFacts) -> str:
        if self.first is not None:
            where = "the first trial" if self.first == 1 else f"the first {self.first} trials"
        elif self.last is not None:
            where = "the last trial" if self.last == 1 else f"the last {self.last} trials"
        else:
            where = "position " + ", ".join(map(str, self.at))
        scope = "" if self.runs is None else f" of run {', '.join(map(str, self.runs))}"
        what = quoted(self.conditions)
        if self.placement == "never":
            return f"{what} never at {where}{scope}"
        return f"{where}{scope} {'is' if (self.first == 1 or self.last == 1) else 'are'} always {what}"

    def target(self, facts: StudyFacts) -> Target:
        codes = sorted({c for item in self.conditions for c in facts.resolve(item).codes})
        return Target("/".join(self.conditions), tuple(codes))

    def places(self, n: int) -> list[int]:
        """0-based positions in a run of n trials (those beyond the run are dropped)."""
        if self.first is not None:
            return list(range(min(self.first, n)))
        if self.last is not None:
            return list(range(max(n - self.last, 0), n))
        return [p - 1 for p in self.at if p <= n]

    def run_indices(self, facts: StudyFacts) -> list[int]:
        return list(range(facts.n_runs)) if self.runs is None else [r - 1 for r in self.runs if r <= facts.n_runs]

    def encode(self, m, guard) -> None:
        t = self.target(m.facts)
        want = 1 if self.placement == "always" else 0
        for r in self.run_indices(m.facts):
            if not m.active(r):
                continue
            lits = m.member(r, t)
            for p in self.places(len(lits)):
                m.cp.add(lits[p] == want).only_enforce_if(guard)

    def encode_flow(self, f, guard) -> bool:
        if self.at is not None or (self.first or self.last) != 1:
            return False
        t = self.target(f.facts)
        want = 1 if self.placement == "always" else 0
        for r in self.run_indices(f.facts):
            ends = f.start[r] if self.first == 1 else f.end[r]
            f.cp.add(sum(ends[c] for c in t.codes) == want).only_enforce_if(guard)
        return True

    def add_moves(self, facts: StudyFacts, moves) -> None:
        t = self.target(facts)
        for r in self.run_indices(facts):
            moves.restrict(r, self.places(facts.run_length(r)), t.codes, self.placement)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        t = self.target(facts)
        out = []
        for r in self.run_indices(facts):
            seq = runs[r]
            places = np.asarray(self.places(len(seq)), dtype=np.int64)
            inside = np.isin(seq[places], t.codes)
            bad = places[~inside] if self.placement == "always" else places[inside]
            for p in bad:
                out.append(Violation(self.name(facts), r, (int(p),), f"'{facts.names[seq[p]]}' there"))
        return out
