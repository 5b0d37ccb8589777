"""Rule kind even-spread: each condition's share holds in every segment or window of a run."""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from pydantic import Field, model_validator

from seqsolve.rules._text import targets_phrase
from seqsolve.rules.base import Rule, StudyFacts, Violation


class EvenSpread(Rule):
    """In every segment (or sliding window), each target's count stays within tolerance of its share."""

    kind: Literal["even-spread"]
    segments: int | None = Field(default=None, ge=2, description="Split each run into this many equal parts.")
    window: int | None = Field(default=None, ge=2, description="Or: every stretch of this many trials.")
    tolerance: int = Field(default=1, ge=0, description="Allowed distance, in trials, beyond the rounded share.")
    conditions: list[str] | None = Field(
        default=None, description="Conditions or factor levels; default every condition but the baseline."
    )
    example = 'kind = "even-spread", segments = 3, tolerance = 1'

    @model_validator(mode="after")
    def _one_way(self):
        if (self.segments is None) == (self.window is None):
            raise ValueError("give exactly one of 'segments' (e.g. 2 for halves) or 'window' (in trials)")
        return self

    def condition_names(self) -> list[str]:
        return self.conditions or []

    def sentence(self, facts: StudyFacts) -> str:
        where = {2: "each half", 3: "each third", 4: "each quarter"}.get(
            self.segments, f"each of {self.segments} parts"
        )
        if self.window is not None:
            where = f"every {self.window} consecutive trials"
        return f"{targets_phrase(self.conditions)} keeps its share within {self.tolerance} in {where} of a run"

    def spans(self, n: int) -> list[tuple[int, int]]:
        """(start, stop) of every segment or window of a run of n trials."""
        if self.window is not None:
            return [(p, p + self.window) for p in range(n - self.window + 1)]
        edges = np.concatenate([[0], np.cumsum([len(a) for a in np.array_split(np.arange(n), self.segments)])])
        return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:])]

    @staticmethod
    def allowed(n_target: int, n_run: int, span: int, tol: int) -> tuple[int, int]:
        share = n_target * span / n_run
        return max(math.floor(share + 1e-9) - tol, 0), min(math.ceil(share - 1e-9) + tol, span)

    def encode(self, m, guard) -> None:
        facts = m.facts
        for t in facts.targets(self.conditions, include_baseline=False):
            for r in m.runs():
                lits = m.member(r, t)
                n_t = int(facts.counts[r, list(t.codes)].sum())
                for a, b in self.spans(len(lits)):
                    lo, hi = self.allowed(n_t, len(lits), b - a, self.tolerance)
                    # the target's count in this stretch is near its share
                    expr = sum(lits[a:b].tolist())
                    m.cp.add(expr >= lo).only_enforce_if(guard)
                    m.cp.add(expr <= hi).only_enforce_if(guard)

    def add_moves(self, facts: StudyFacts, moves) -> None:
        for t in facts.targets(self.conditions, include_baseline=False):
            for r in range(facts.n_runs):
                n_run = facts.run_length(r)
                n_t = int(facts.counts[r, list(t.codes)].sum())
                spans = [(a, b, *self.allowed(n_t, n_run, b - a, self.tolerance)) for a, b in self.spans(n_run)]
                moves.bound_spans(t.codes, r, spans)

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:
        out = []
        for t in facts.targets(self.conditions, include_baseline=False):
            for r, seq in enumerate(runs):
                inside = np.concatenate([[0], np.cumsum(np.isin(seq, t.codes))])
                n_t = int(inside[-1])
                for a, b in self.spans(len(seq)):
                    lo, hi = self.allowed(n_t, len(seq), b - a, self.tolerance)
                    found = int(inside[b] - inside[a])
                    if not lo <= found <= hi:
                        out.append(
                            Violation(
                                self.name(facts),
                                r,
                                tuple(range(a, b)),
                                f"{found} trials of '{t.label}' in positions {a + 1}-{b}; allowed {lo} to {hi}",
                            )
                        )
        return out
