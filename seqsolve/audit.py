"""Audit: check orderings someone already has against a spec's rules, never calling the solver."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from seqsolve.io.tables import read_orderings
from seqsolve.rules import Violation
from seqsolve.spec import Study

COUNT_RULE = "each run holds the declared number of trials of each condition"


@dataclass
class AuditReport:
    """Every violation found, with the participants and rules that were checked."""

    participants: list[str]
    rules: list[str]
    violations: list[Violation]

    @property
    def valid(self) -> bool:
        return not self.violations


def count_violations(study: Study, runs: list[np.ndarray]) -> list[Violation]:
    """Runs whose condition counts differ from the spec's."""
    out = []
    for r, seq in enumerate(runs):
        found = np.bincount(seq, minlength=study.facts.n_conditions)
        for c in np.flatnonzero(found != study.facts.counts[r]):
            out.append(
                Violation(
                    COUNT_RULE,
                    r,
                    (),
                    f"{found[c]} trials of '{study.names[c]}'; the spec says {study.facts.counts[r, c]}",
                )
            )
    return out


def audit_orderings(study: Study, designs: dict[str, list[np.ndarray]]) -> AuditReport:
    """Check orderings (per participant, one integer array per run) against every rule."""
    violations: list[Violation] = []
    for label, runs in designs.items():
        found = count_violations(study, runs)
        for rule in study.rules:
            if not rule.across_participants:
                found += rule.check(study.facts, runs)
        violations += [replace(v, participant=label) for v in found]
    for rule in study.rules:
        if rule.across_participants:
            violations += rule.check_study(study.facts, designs)
    return AuditReport(list(designs), [COUNT_RULE] + [r.name(study.facts) for r in study.rules], violations)


def audit(study: Study, paths: list[str | Path]) -> AuditReport:
    """Read ordering files (orderings.csv or BIDS events.tsv) and check them against the spec.

    Raises
    ------
    OrderingFileError
        When a file cannot be read against the spec.
    """
    return audit_orderings(study, read_orderings(study, paths))
