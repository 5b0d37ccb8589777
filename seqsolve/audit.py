"""Audit: check orderings someone already has against a spec's rules, never calling the solver."""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from seqsolve.counterbalance import assignment_problems
from seqsolve.io.participants import PARTICIPANTS_FILE, is_participants_table, read_assignment
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
class Rank:
    """Where one participant's design falls among valid designs sampled under the same rules."""

    participant: str
    score: float  # the weighted score of [objective] (as generate steers by)
    percentile: float  # percent of the sampled designs scoring at or below it
    samples: int  # distinct valid designs sampled (duplicates dropped)


@dataclass
class AuditReport:
    """Every violation found, with the participants and rules that were checked."""

    participants: list[str]
    rules: list[str]
    violations: list[Violation]
    absent: dict[str, list[int]] = field(default_factory=dict)  # participant: runs (from 1) not in the files
    notes: list[str] = field(default_factory=list)  # what could not be checked, and why
    ranks: list[Rank] = field(default_factory=list)

    @property
    def valid(self) -> bool:
        return not self.violations


def count_violations(study: Study, runs: list[np.ndarray | None]) -> list[Violation]:
    """Runs whose condition counts differ from the spec's (absent runs, None, are skipped)."""
    out = []
    for r, seq in enumerate(runs):
        if seq is None:
            continue
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


def audit_orderings(study: Study, designs: dict[str, list[np.ndarray | None]]) -> AuditReport:
    """Check orderings (per participant, one integer array per run; None for a run the files do not
    hold) against every rule. Rules are checked on the runs present; see present_run_violations."""
    violations: list[Violation] = []
    notes: set[str] = set()
    for label, runs in designs.items():
        found = count_violations(study, runs)
        if any(seq is None for seq in runs):
            found += present_run_violations(study, runs, notes)
        else:
            for rule in study.rules:
                if not rule.across_participants:
                    found += rule.check(study.facts, runs)
        violations += [replace(v, participant=label) for v in found]
    for rule in study.rules:
        if rule.across_participants:
            violations += _across_participants(study, rule, designs)
    absent = {label: [r + 1 for r, seq in enumerate(runs) if seq is None] for label, runs in designs.items()}
    return AuditReport(
        list(designs),
        [COUNT_RULE] + [r.name(study.facts) for r in study.rules],
        violations,
        {k: v for k, v in absent.items() if v},
        sorted(notes),
    )


def present_run_violations(study: Study, runs: list[np.ndarray | None], notes: set[str]) -> list[Violation]:
    """Every rule within one participant, on the runs present only.

    Each stretch of consecutive present runs is checked as a study of its own (its runs' counts), so
    rules between neighbouring runs (run boundaries) hold where both runs are there; a position rule
    for given runs keeps the ones present; a balance summed over all runs cannot be judged and is
    named in notes. Violations carry the spec's run indices."""
    facts = study.facts
    out = []
    present = [r for r, seq in enumerate(runs) if seq is not None]
    stretches = np.split(present, np.flatnonzero(np.diff(present) > 1) + 1)
    for rule in study.rules:
        if rule.across_participants:
            continue
        if getattr(rule, "across_runs", False):
            notes.add(f"{rule.name(facts)}: not checked, it needs every run of a participant")
            continue
        for stretch in stretches:
            local = _rule_for_runs(rule, [int(r) for r in stretch])
            if local is None:
                continue
            sub = replace(facts, counts=facts.counts[stretch])
            for v in local.check(sub, [runs[int(r)] for r in stretch]):
                run = None if v.run is None else int(stretch[v.run])
                found = _RUN_NUMBER.sub(lambda m, st=stretch: f"run {int(st[int(m.group(1)) - 1]) + 1}", v.found)
                out.append(replace(v, rule=rule.name(facts), run=run, found=found))
    return out


#: "run 2" in a violation's text, numbered within a stretch of present runs (renumbered to the spec's)
_RUN_NUMBER = re.compile(r"\brun (\d+)")


def _rule_for_runs(rule, stretch: list[int]):
    """The rule as it applies to these runs (0-based spec indices) renumbered from 1; None if not at all."""
    if getattr(rule, "runs", None) is None:
        return rule
    kept = [i + 1 for i, r in enumerate(stretch) if r + 1 in rule.runs]
    return rule.model_copy(update={"runs": kept}) if kept else None


def _across_participants(study: Study, rule, designs: dict[str, list[np.ndarray | None]]) -> list[Violation]:
    """A rule tying participants together, on the runs present (each run against every earlier one)."""
    if not any(seq is None for runs in designs.values() for seq in runs):
        return rule.check_study(study.facts, designs)
    labels = list(designs)
    index = {lab: [r for r, seq in enumerate(designs[lab]) if seq is not None] for lab in labels}
    out = []
    for j, lab in enumerate(labels):
        earlier = [[designs[x][r] for r in index[x]] for x in labels[:j]]
        for i, q, r, d in rule.clashes([designs[lab][r] for r in index[lab]], earlier):
            run, other = index[lab][r], index[labels[i]][q]
            found = f"run {run + 1} differs from participant {labels[i]}'s run {other + 1} in only {d} positions"
            out.append(Violation(rule.name(study.facts), run, (), found, participant=lab))
    return out


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


def audit(
    study: Study, paths: list[str | Path], rank_samples: int = 0, on_sample: Callable[[int, int], None] | None = None
) -> AuditReport:
    """Read ordering files (orderings.csv or BIDS events.tsv, or an output folder) and check them against
    the spec: every rule, and the onsets against [timing] where the files give them. A participant may
    have only some of the runs (report.absent names the others). A participants.tsv (given, or in the
    folder, when the spec counterbalances) is checked against [[counterbalance]]: each order taken
    equally often and the design's balance. rank_samples > 0: also rank each complete design among that
    many valid designs sampled under the same rules (rank_designs; this calls the solver).

    Raises
    ------
    OrderingFileError
        When a file cannot be read against the spec.
    """
    orderings, tables = _expand(study, paths)
    report = (
        _audit_orderings_files(study, orderings, rank_samples, on_sample) if orderings else audit_orderings(study, {})
    )
    for table in tables:
        labels, found = assignment_violations(study, table)
        report.participants += [label for label in labels if label not in report.participants]
        report.violations += found
    if tables:
        report.rules += [f"counterbalance[{i}] '{c.name}'" for i, c in enumerate(study.spec.counterbalance, start=1)]
    return report


def _audit_orderings_files(
    study: Study, paths: list[Path], rank_samples: int, on_sample: Callable[[int, int], None] | None
) -> AuditReport:
    """Every rule, the timing and the items, on ordering files (some runs may be absent); ranked when asked."""
    trials = read_trials(study, paths, partial=True)
    designs = {label: [None if r is None else r[:2] for r in runs] for label, runs in trials.items()}
    report = audit_orderings(
        study, {label: [None if r is None else r[0] for r in runs] for label, runs in designs.items()}
    )
    timed = [
        replace(v, participant=label)
        for label, runs in designs.items()
        for r, run in enumerate(runs)
        if run is not None and run[1] is not None
        for v in timing_violations(study, run[0], run[1], r)
    ]
    report.rules.append(TIMING_RULE)
    report.violations.extend(timed)
    if study.items is not None:
        _audit_items(study, trials, report)
    if rank_samples:
        _rank(study, designs, report, rank_samples, on_sample)
    return report


def _audit_items(study: Study, trials: dict[str, list[tuple | None]], report: AuditReport) -> None:
    """The item rules on the runs present, for participants whose files give every trial's item there
    (others are named in the notes as not checked); absent runs (None) are skipped, keeping run numbers."""
    report.rules += rule_names(study.items)
    unchecked = []
    for label, runs in trials.items():
        present = [run for run in runs if run is not None]
        if any(items is None for _, _, items in present):
            unchecked.append(label)
            continue
        index = study.participants.index(label) if label in study.participants else None
        codes = [None if run is None else run[0] for run in runs]
        items = [None if run is None else run[2] for run in runs]
        found = check_items(study.items, index, codes, items)
        report.violations += [replace(v, participant=label) for v in found]
    if unchecked:
        shown = ", ".join(unchecked[:5]) + (" ..." if len(unchecked) > 5 else "")
        report.notes.append(f"items of participant(s) {shown}: not checked (their files have no item column)")


def _rank(study: Study, designs: dict, report: AuditReport, n_samples: int, on_sample) -> None:
    """Rank the designs that can be scored on the spec's timing: every run there, the declared counts,
    onsets that follow [timing] (a rule may be broken: its rank still says how efficient it is)."""
    off = {v.participant for v in report.violations if v.rule in (COUNT_RULE, TIMING_RULE)}
    ranked = {label: runs for label, runs in designs.items() if label not in off and all(r is not None for r in runs)}
    if ranked:
        from seqsolve.ranking import rank_designs  # the solver and the scores: only when asked

        report.ranks = rank_designs(study, ranked, n_samples, on_sample)
    if any(label in report.absent for label in designs):
        report.notes.append("participants with absent runs are not ranked: a score needs every run")
    if off:
        report.notes.append(
            f"participant(s) {', '.join(sorted(off))} not ranked: their trial counts or onsets differ from the spec"
        )
