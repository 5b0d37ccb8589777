"""Conflicts that simple counting proves, found before any solving and told with their arithmetic.

Spacing: n trials of a target with at least g other trials between any two take (n - 1)(g + 1) + 1
positions (the first, then g + 1 for each further one: the pigeonhole principle). Position rules that
keep the target out of the first or last trials of a run shorten the room it has.

Distinct orderings: a run holding n_1, ..., n_k trials of k conditions has n! / (n_1! ... n_k!)
orderings (the multinomial coefficient); participants-differ asks every participant for a run of
their own, so more participants than that cannot all be served.

Stretches: n trials of a target in a run of N, no more than L in a row, fall into at least ceil(n / L)
stretches; two stretches need a trial of another condition between them, and there are N - n such
trials, so ceil(n / L) - 1 <= N - n, i.e. n <= L (N - n + 1), must hold (the pigeonhole principle).

Forbidden pairs: balanced transitions ask each ordered pair (a, b) to occur at least its rounded-down
ideal count less the tolerance; forbidden-transition, max-run 1 and min-gap rules keep some pairs from
ever standing side by side, so such a pair with a positive lower bound cannot be served (only the wrap
from a run's last trial to its first, counted by cyclic balance and by none of those rules, can give it,
at most once a run). Balanced triples the same way: a triple (a, b, c) holding a pair that never stands side
by side cannot stand in a row either, except as one of the two triples of a cyclic run that hold the wrap.

The pigeonhole principle and the multinomial coefficient are common practice (no source needed).
"""

from __future__ import annotations

from itertools import combinations
from math import ceil, factorial

import numpy as np

from seqsolve.rules import (
    BalancedTransitions,
    BalancedTriples,
    ForbiddenTransition,
    MaxRun,
    MinGap,
    ParticipantsDiffer,
    Position,
)
from seqsolve.rules.base import Target
from seqsolve.rules.transitions import ideal_pair_counts
from seqsolve.rules.triples import ideal_triple_counts
from seqsolve.spec import Study


def counting_conflict(study: Study):
    """The first conflict counting proves (an Explanation of seqsolve.solve), or None."""
    return (
        spacing_conflict(study)
        or stretch_conflict(study)
        or pair_conflict(study)
        or triple_conflict(study)
        or distinct_conflict(study)
    )


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


def stretch_conflict(study: Study):
    """A max-run rule whose target has too many trials in a run to be broken into stretches, or None."""
    from seqsolve.solve import Explanation

    facts = study.facts
    for i, rule in enumerate(study.rules):
        if not isinstance(rule, MaxRun):
            continue
        for target in facts.targets(rule.conditions, include_baseline=True):
            for run in range(facts.n_runs):
                n = int(facts.counts[run, list(target.codes)].sum())
                length = facts.run_length(run)
                # ceil(n / L) stretches need ceil(n / L) - 1 separating trials of other conditions
                need = ceil(n / rule.length) - 1 if n else 0
                if need <= length - n:
                    continue
                arithmetic = (
                    f" ('{target.label}' has {n} of {length} trials in run {run + 1}; with at most {rule.length} "
                    f"in a row it needs at least ceil({n} / {rule.length}) - 1 = {need} other trials to break "
                    f"them up, but the run has {length} - {n} = {length - n})"
                )
                rows = [(i, study.rule_sources[i], rule.sentence(facts) + arithmetic)]
                return Explanation(True, True, rows, "found by counting, before any solving")
    return None


def never_adjacent(study: Study) -> list[tuple[int, np.ndarray]]:
    """(rule index, matrix (K, K) of bool) for every rule that keeps b from directly following a
    anywhere within a run (the wrap from last trial to first is not within a run)."""
    facts = study.facts
    out = []
    for j, rule in enumerate(study.rules):
        banned = np.zeros((facts.n_conditions, facts.n_conditions), dtype=bool)
        if isinstance(rule, ForbiddenTransition):
            first, then = facts.resolve(rule.first), facts.resolve(rule.then)
            banned[np.ix_(first.codes, then.codes)] = True
        elif isinstance(rule, MaxRun) and rule.length == 1:
            # two trials of one target side by side make a stretch of 2
            for t in facts.targets(rule.conditions, include_baseline=True):
                banned[np.ix_(t.codes, t.codes)] = True
        elif isinstance(rule, MinGap):  # gap >= 1: never side by side
            for t in facts.targets(rule.conditions, include_baseline=True):
                if rule.other is None:
                    banned[np.ix_(t.codes, t.codes)] = True
                else:
                    other = facts.resolve(rule.other).codes
                    banned[np.ix_(t.codes, other)] = banned[np.ix_(other, t.codes)] = True
        if banned.any():
            out.append((j, banned))
    return out


def pair_conflict(study: Study):
    """Balanced transitions that need a pair another rule never lets stand side by side, or None."""
    forbidders = never_adjacent(study)
    if not forbidders:
        return None
    for i, rule in enumerate(study.rules):
        if not isinstance(rule, BalancedTransitions):
            continue
        for runs, low, _ in rule.bounds(study.facts):
            # cyclic balance counts the wrap pair, which no forbidding rule covers: at most 1 a run
            allowed = len(runs) if rule.cyclic else 0
            for j, banned in forbidders:
                hits = np.argwhere(banned & (low > allowed))
                if len(hits):
                    a, b = (int(x) for x in hits[0])
                    return _pair_explanation(study, i, j, runs, (a, b), int(low[a, b]), allowed)
    return None


def _pair_explanation(study: Study, i: int, j: int, runs: list[int], pair, low: int, allowed: int):
    """Explanation naming the balance rule i (with its arithmetic) and the forbidding rule j."""
    facts, rule = study.facts, study.rules[i]
    a, b = pair
    ideal = float(sum(ideal_pair_counts(facts.counts[r], rule.cyclic, rule.exclude_repeats)[a, b] for r in runs))
    where = _runs_need(runs)
    wrap = f"; the wraps from last trial to first can give it at most {allowed}" if allowed else ""
    first, then = facts.names[a], facts.names[b]
    arithmetic = (
        f" ({where} '{first}' then '{then}' at least floor({ideal:.2f}) - {rule.tolerance} = {low} time(s): "
        f"ideal {ideal:.2f}, tolerance {rule.tolerance}; but {study.rule_sources[j]} never lets '{first}' be "
        f"directly followed by '{then}'{wrap})"
    )
    return _counted(study, i, j, arithmetic)


def triple_conflict(study: Study):
    """Balanced triples that need a triple holding a pair another rule never lets stand side by side, or None."""
    forbidders = never_adjacent(study)
    for i, rule in enumerate(study.rules):
        if not isinstance(rule, BalancedTriples):
            continue
        for runs, low, _ in rule.bounds(study.facts):
            # a cyclic run's two wrapping triples each hold the wrap pair, which no forbidding rule covers
            allowed = 2 * len(runs) if rule.cyclic else 0
            for j, banned in forbidders:
                # (a, b, c) holds the banned pair (a, b) or (b, c)
                holds = banned[:, :, None] | banned[None, :, :]
                hits = np.argwhere(holds & (low > allowed))
                if len(hits):
                    return _triple_explanation(
                        study, i, j, runs, tuple(int(x) for x in hits[0]), int(low[tuple(hits[0])]), allowed
                    )
    return None


def _triple_explanation(study: Study, i: int, j: int, runs: list[int], triple, low: int, allowed: int):
    """Explanation naming the triple balance rule i (with its arithmetic) and the forbidding rule j."""
    facts, rule = study.facts, study.rules[i]
    ideal = float(sum(ideal_triple_counts(facts.counts[r], rule.cyclic, rule.exclude_repeats)[triple] for r in runs))
    where = _runs_need(runs)
    wrap = f"; the triples that wrap from last trials to first can give it at most {allowed}" if allowed else ""
    a, b, c = (facts.names[x] for x in triple)
    arithmetic = (
        f" ({where} '{a}' then '{b}' then '{c}' at least floor({ideal:.2f}) - {rule.tolerance} = {low} time(s): "
        f"ideal {ideal:.2f}, tolerance {rule.tolerance}; but {study.rule_sources[j]} never lets those trials stand "
        f"side by side{wrap})"
    )
    return _counted(study, i, j, arithmetic)


def _runs_need(runs: list[int]) -> str:
    return f"run {runs[0] + 1} needs" if len(runs) == 1 else f"runs {runs[0] + 1} to {runs[-1] + 1} together need"


def _counted(study: Study, i: int, j: int, arithmetic: str):
    """Explanation naming the balance rule i (its sentence with the arithmetic) and the forbidding rule j."""
    from seqsolve.solve import Explanation

    rows = [
        (i, study.rule_sources[i], study.rules[i].sentence(study.facts) + arithmetic),
        (j, study.rule_sources[j], study.rules[j].sentence(study.facts)),
    ]
    # each rule alone was not tried (balance alone can fail by itself), so no claim of a smallest set
    note = "found by counting, before any solving; whether each holds alone was not tried"
    return Explanation(True, False, sorted(rows), note)
