"""Audit: check orderings someone already has against a spec's rules, never calling the solver."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from seqsolve.counterbalance import assignment_problems
from seqsolve.io.participants import PARTICIPANTS_FILE, is_participants_table, read_assignment
from seqsolve.io.tables import read_designs
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


def assignment_violations(study: Study, path: str | Path) -> tuple[list[str], list[Violation]]:
    """The participants of a participants table and where its counterbalanced assignment breaks the
    spec's [[counterbalance]] sections (see counterbalance.assignment_problems)."""
    read = read_assignment(study, path)
    out = []
    for i, section in enumerate(study.spec.counterbalance, start=1):
        rule = f"counterbalance[{i}] '{section.name}'"
        for label, found in assignment_problems(section, read[section.name]):
            out.append(Violation(rule, None, (), found, label))
    return list(read[study.spec.counterbalance[0].name]), out


def _expand(study: Study, paths: list[str | Path]) -> tuple[list[Path], list[Path]]:
    """(ordering files, participants tables): an output folder stands for its orderings.csv and, when
    the spec counterbalances, its participants.tsv (a table given by name is always read: without
    [[counterbalance]] the reader says there is nothing to check)."""
    orderings, tables = [], []
    for p in map(Path, paths):
        if p.is_dir():
            orderings.append(p / "orderings.csv")
            if study.spec.counterbalance and (p / PARTICIPANTS_FILE).is_file():
                tables.append(p / PARTICIPANTS_FILE)
        elif is_participants_table(p):
            tables.append(p)
        else:
            orderings.append(p)
    return orderings, tables


def audit(study: Study, paths: list[str | Path]) -> AuditReport:
    """Read ordering files (orderings.csv or BIDS events.tsv, or an output folder) and check them against
    the spec: every rule, and the onsets against [timing] where the files give them. A participants.tsv
    (given, or in the folder, when the spec counterbalances) is checked against [[counterbalance]]:
    each order taken equally often and the design's balance.

    Raises
    ------
    OrderingFileError
        When a file cannot be read against the spec.
    """
    orderings, tables = _expand(study, paths)
    report = _audit_orderings_files(study, orderings) if orderings else audit_orderings(study, {})
    for table in tables:
        labels, found = assignment_violations(study, table)
        report.participants += [label for label in labels if label not in report.participants]
        report.violations += found
    if tables:
        report.rules += [f"counterbalance[{i}] '{c.name}'" for i, c in enumerate(study.spec.counterbalance, start=1)]
    return report


def _audit_orderings_files(study: Study, paths: list[Path]) -> AuditReport:
    """Every rule and the timing, on ordering files."""
    designs = read_designs(study, paths)
    report = audit_orderings(study, {label: [codes for codes, _ in runs] for label, runs in designs.items()})
    timed = [
        replace(v, participant=label)
        for label, runs in designs.items()
        for r, (codes, onsets) in enumerate(runs)
        if onsets is not None
        for v in timing_violations(study, codes, onsets, r)
    ]
    report.rules.append(TIMING_RULE)
    report.violations.extend(timed)
    return report
