"""Audit: check orderings someone already has against a spec's rules, never calling the solver."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from seqsolve.io.tables import read_trials
from seqsolve.item_assign import check_items, rule_names
from seqsolve.rules import Violation
from seqsolve.spec import Study
from seqsolve.timing import trial_durations

COUNT_RULE = "each run holds the declared number of trials of each condition"
TIMING_RULE = "the onsets follow the spec's [timing]"
#: onsets within a millisecond of the spec's timing count as on time (files keep microseconds)
TIMING_TOLERANCE = 1e-3


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


def timing_violations(study: Study, codes: np.ndarray, onsets: np.ndarray, run: int) -> list[Violation]:
    """Where a run's onsets (seconds, shape (n_trials,)) break the spec's [timing]: a trial that starts
    before the previous one ends, an onset off the fixed soa's grid (lead_in + (position - 1) x soa),
    and a run that does not end when the declared volumes do (last trial's end + lead_out)."""
    t = study.spec.timing
    if not len(codes):
        return []
    ends = onsets + trial_durations(study)[codes]
    out = []
    early = np.flatnonzero(onsets[1:] < ends[:-1] - TIMING_TOLERANCE)
    if len(early):
        p = int(early[0]) + 1
        found = f"starts at {onsets[p]:g} s, before the previous trial ends at {ends[p - 1]:g} s"
        out.append(Violation(TIMING_RULE, run, (p,), found))
    if t.soa is not None:
        expected = t.lead_in + t.soa * np.arange(len(codes))
        off = np.flatnonzero(np.abs(onsets - expected) > TIMING_TOLERANCE)
        if len(off):
            p = int(off[0])
            found = (
                f"onset {onsets[p]:g} s; the spec's timing puts this position at {expected[p]:g} s "
                f"(lead_in {t.lead_in:g} s + (position - 1) x soa {t.soa:g} s)"
                + (f", and {len(off) - 1} later position(s) are off too" if len(off) > 1 else "")
            )
            out.append(Violation(TIMING_RULE, run, (p,), found))
    if t.volumes is not None:
        end, declared = float(ends[-1]) + t.lead_out, t.volumes * t.tr
        if abs(end - declared) > TIMING_TOLERANCE:
            found = (
                f"the run ends at {end:g} s (last trial's end + lead_out {t.lead_out:g} s); the spec declares "
                f"{t.volumes} volumes of TR {t.tr:g} s = {declared:g} s"
            )
            out.append(Violation(TIMING_RULE, run, (len(codes) - 1,), found))
    return out


def audit(study: Study, paths: list[str | Path]) -> AuditReport:
    """Read ordering files (orderings.csv or BIDS events.tsv) and check them against the spec: every
    rule, and the onsets against [timing] where the files give them.

    Raises
    ------
    OrderingFileError
        When a file cannot be read against the spec.
    """
    designs = read_trials(study, paths)
    report = audit_orderings(study, {label: [codes for codes, _, _ in runs] for label, runs in designs.items()})
    timed = [
        replace(v, participant=label)
        for label, runs in designs.items()
        for r, (codes, onsets, _) in enumerate(runs)
        if onsets is not None
        for v in timing_violations(study, codes, onsets, r)
    ]
    report.rules.append(TIMING_RULE)
    report.violations.extend(timed)
    if study.items is not None:
        _audit_items(study, designs, report)
    return report


def _audit_items(study: Study, designs: dict[str, list[tuple]], report: AuditReport) -> None:
    """The item rules, for participants whose files give every trial's item (others are named as not checked)."""
    report.rules += rule_names(study.items)
    unchecked = []
    for label, runs in designs.items():
        items = [i for _, _, i in runs]
        if any(i is None for i in items):
            unchecked.append(label)
            continue
        index = study.participants.index(label) if label in study.participants else None
        found = check_items(study.items, index, [codes for codes, _, _ in runs], items)
        report.violations += [replace(v, participant=label) for v in found]
    if unchecked:
        shown = ", ".join(unchecked[:5]) + (" ..." if len(unchecked) > 5 else "")
        report.rules.append(f"items of participant(s) {shown}: not checked (their files have no item column)")
