"""Conflicts that simple counting proves, found before any solving and told with their arithmetic.

Spacing: n trials of a target with at least g other trials between any two take (n - 1)(g + 1) + 1
positions (the first, then g + 1 for each further one: the pigeonhole principle). Position rules that
keep the target out of the first or last trials of a run shorten the room it has.

Distinct orderings: a run holding n_1, ..., n_k trials of k conditions has n! / (n_1! ... n_k!)
orderings (the multinomial coefficient); participants-differ asks every participant for a run of
their own, so more participants than that cannot all be served.
"""

from __future__ import annotations

from itertools import combinations
from math import factorial

from seqsolve.rules import MinGap, ParticipantsDiffer, Position
from seqsolve.rules.base import Target
from seqsolve.spec import Study


def counting_conflict(study: Study):
    """The first conflict counting proves (an Explanation of seqsolve.solve), or None."""
    return spacing_conflict(study) or distinct_conflict(study)


def distinct_conflict(study: Study):
    """participants-differ with more participants than a run has distinct orderings, or None."""
    from seqsolve.solve import Explanation

    n_people = len(study.participants)
    for i, rule in enumerate(study.rules):
        if not isinstance(rule, ParticipantsDiffer) or n_people < 2:
            continue
        for run, counts in enumerate(study.facts.counts):
            held = [(int(c), name) for c, name in zip(counts, study.facts.names) if c > 0]
            orderings = factorial(sum(c for c, _ in held))
            for c, _ in held:
                orderings //= factorial(c)
            if orderings >= n_people:
                continue
            parts = ", ".join(f"{c} x '{name}'" for c, name in held)
            formula = f"{sum(c for c, _ in held)}! / ({' '.join(f'{c}!' for c, _ in held)})"
            arithmetic = (
                f" (run {run + 1} holds {parts}: {formula} = {orderings} distinct ordering(s) "
                f"for {n_people} participants)"
            )
            rows = [(i, study.rule_sources[i], rule.sentence(study.facts) + arithmetic)]
            return Explanation(True, True, rows, "found by counting, before any solving")
    return None


def spacing_conflict(study: Study):
    """An Explanation (seqsolve.solve) naming a min-gap rule and the position rules that leave too little
    room, with the count in its sentence; None when counting finds no conflict."""
    facts = study.facts
    for i, rule in enumerate(study.rules):
        if not isinstance(rule, MinGap) or rule.other is not None:
            continue
        for target in facts.targets(rule.conditions, include_baseline=True):
            for run in range(facts.n_runs):
                found = _tightest(study, i, rule, target, run)
                if found is not None:
                    return found
    return None


def _trims(study: Study, target: Target, run: int) -> list[tuple[int, str, int]]:
    """(rule index, 'first' or 'last', trials) of never-position rules that bar the whole target."""
    out = []
    for j, rule in enumerate(study.rules):
        if not (isinstance(rule, Position) and rule.placement == "never"):
            continue
        if run not in rule.run_indices(study.facts) or not set(target.codes) <= set(rule.target(study.facts).codes):
            continue
        for end in ("first", "last"):
            if getattr(rule, end) is not None:
                out.append((j, end, getattr(rule, end)))
    return out


def _tightest(study: Study, i: int, rule: MinGap, target: Target, run: int):
    """The smallest set of rules (the min-gap one first) whose room is too small, if any."""
    from seqsolve.solve import Explanation

    n = int(study.facts.counts[run, list(target.codes)].sum())
    length = study.facts.run_length(run)
    need = (n - 1) * (rule.gap + 1) + 1 if n else 0
    trims = _trims(study, target, run)
    for size in range(0, 3):
        for chosen in combinations(trims, size):
            head = max([k for _, end, k in chosen if end == "first"], default=0)
            tail = max([k for _, end, k in chosen if end == "last"], default=0)
            room = max(length - head - tail, 0)
            if need <= room:
                continue
            cut = f", of which {room} are open to it" if chosen else ""
            arithmetic = (
                f" ({n} trials of '{target.label}' with at least {rule.gap} others between any two need "
                f"({n} - 1) x ({rule.gap} + 1) + 1 = {need} positions; run {run + 1} has {length}{cut})"
            )
            rows = [(i, study.rule_sources[i], rule.sentence(study.facts) + arithmetic)]
            rows += [(j, study.rule_sources[j], study.rules[j].sentence(study.facts)) for j, _, _ in chosen]
            return Explanation(True, True, sorted(set(rows)), "found by counting, before any solving")
    return None
