"""The contract every rule kind follows, the resolved study facts rules see, and violations."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, ClassVar

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

if TYPE_CHECKING:  # pragma: no cover
    from seqsolve.flow import FlowModel
    from seqsolve.model import OrderingModel


@dataclass(frozen=True)
class Target:
    """A set of conditions a rule treats as one (a single condition, or a factor level)."""

    label: str
    codes: tuple[int, ...]


@dataclass(frozen=True)
class StudyFacts:
    """What rules need to know of a validated study, with names resolved to integer codes.

    counts has shape (n_runs, n_conditions): trials of each condition in each run.
    """

    names: tuple[str, ...]
    counts: np.ndarray
    baseline: int | None = None
    levels: dict[str, dict[str, tuple[int, ...]]] = field(default_factory=dict)

    @property
    def n_conditions(self) -> int:
        return len(self.names)

    @property
    def n_runs(self) -> int:
        return self.counts.shape[0]

    def run_length(self, run: int) -> int:
        return int(self.counts[run].sum())

    def code(self, name: str) -> int:
        return self.names.index(name)

    def resolve(self, item: str) -> Target:
        """Turn 'gain' or 'valence=positive' into a Target (validated earlier, so it exists)."""
        if "=" in item:
            factor, level = (s.strip() for s in item.split("=", 1))
            return Target(f"{factor}={level}", self.levels[factor][level])
        return Target(item, (self.code(item),))

    def targets(self, items: list[str] | None, include_baseline: bool) -> list[Target]:
        """Resolve a rule's list of targets; None means every condition, one target each."""
        if items is not None:
            return [self.resolve(i) for i in items]
        return [Target(n, (c,)) for c, n in enumerate(self.names) if include_baseline or c != self.baseline]


@dataclass(frozen=True)
class Violation:
    """Where and why an ordering breaks a rule. run and positions are 0-based here."""

    rule: str
    run: int | None
    positions: tuple[int, ...]
    found: str
    participant: str | None = None

    def describe(self) -> str:
        where = []
        if self.participant is not None:
            where.append(f"participant {self.participant}")
        if self.run is not None:
            where.append(f"run {self.run + 1}")
        if self.positions:
            shown = ", ".join(str(p + 1) for p in self.positions[:8])
            more = "" if len(self.positions) <= 8 else f", ... ({len(self.positions)} in all)"
            where.append(f"position {shown}{more}" if len(self.positions) == 1 else f"positions {shown}{more}")
        # no participant, run or position: a finding about the whole study (a counterbalanced assignment)
        return f"{'; '.join(where) or 'the study'}: {self.found} (rule: {self.rule})"


def runs_of(seq: np.ndarray, member: np.ndarray) -> list[tuple[int, int]]:
    """Maximal stretches where member[seq] holds, as (start, length) pairs."""
    inside = member[seq].astype(np.int8)
    edges = np.diff(np.concatenate([[0], inside, [0]]))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)
    return [(int(a), int(b - a)) for a, b in zip(starts, stops)]


class Rule(BaseModel):
    """Base of every rule kind: spec fields, CP-SAT encoding, independent check and sentence.

    Subclasses set `kind` as a Literal and implement the methods below. `check` must never
    call `encode`: the two are written independently and tested against each other.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    #: a one-line spec example shown in the rule catalogue and in error messages
    example: ClassVar[str] = ""
    #: True for rules about several participants (checked on the whole study)
    across_participants: ClassVar[bool] = False
    #: True for rules whose encoding adds many literals per position (the driver then skips CP-SAT's
    #: probing and symmetry detection, which cost seconds there and found nothing, seqsolve/solve.py)
    wide_model: ClassVar[bool] = False

    label: str | None = Field(default=None, description="Optional name shown in reports.")

    def condition_names(self) -> list[str]:
        """Every condition or factor level the rule names (validated against the study)."""
        return []

    def sentence(self, facts: StudyFacts) -> str:  # pragma: no cover - abstract
        raise NotImplementedError

    def encode(self, m: OrderingModel, guard) -> None:  # pragma: no cover - abstract
        """Add the rule's constraints to the per-position model, enforced only if guard holds."""
        raise NotImplementedError

    def encode_flow(self, f: FlowModel, guard) -> bool:
        """Add the rule to the transition-count model; return False if it cannot be said there."""
        return False

    def add_moves(self, facts: StudyFacts, moves) -> None:  # pragma: no cover - abstract
        """State the rule as local primitives of seqsolve.moves.MoveRules (for fast swap checks)."""
        raise NotImplementedError(f"rule kind {getattr(self, 'kind', '?')} has no local form for the search")

    def check(self, facts: StudyFacts, runs: list[np.ndarray]) -> list[Violation]:  # pragma: no cover
        """Violations in one participant's runs (integer codes per run). Plain numpy."""
        raise NotImplementedError

    def name(self, facts: StudyFacts) -> str:
        return self.label or self.sentence(facts)
