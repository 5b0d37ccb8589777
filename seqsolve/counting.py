"""Conflicts that simple counting proves, found before any solving and told with their arithmetic.

Spacing: n trials of a target with at least g other trials between any two take (n - 1)(g + 1) + 1
positions (the first, then g + 1 for each further one: the pigeonhole principle). Position rules that
keep the target out of the first or last trials of a run shorten the room it has.
"""

from __future__ import annotations

from itertools import combinations

from seqsolve.rules import MinGap, Position
from seqsolve.rules.base import Target
from seqsolve.spec import Study


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
