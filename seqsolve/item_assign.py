"""Items for one participant's trials, after the ordering is made, and the independent check of them.

Without [[items.rules]] each condition's trials are dealt its list's items at random (a fresh
shuffle of the list for each pass through it, so with repeats every item is shown floor or ceil of
trials / items times). With rules on attributes the items are first grouped by their values of the
ruled attributes ("signatures"); a CP-SAT model (one worker, seeded, a deterministic work limit)
gives each trial a signature, within how many items of that signature its condition's list holds,
and no more than `length` in a row sharing a value; then the items of each signature are dealt as
above. The check (`check_items`) never looks at how the items were chosen.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from ortools.sat.python import cp_model

from seqsolve.errors import InfeasibleError, SolverTimeoutError
from seqsolve.items import ItemCatalogue
from seqsolve.rules.base import Violation, runs_of

#: CP-SAT work for one participant's item model (deterministic time units, about seconds)
WORK_LIMIT = 20.0
#: wall-clock safety net only; the work limit decides
WALL_LIMIT = 120.0

LIST_RULE = "items: each trial of a condition with items shows an item of that condition's list"
NO_ITEM_RULE = "items: trials of conditions without items show none"
REPEAT_RULE = "items: no item is shown twice to a participant"


def rule_sentence(rule) -> str:
    """Plain English for an [[items.rules]] entry."""
    if rule.label:
        return rule.label
    shown = "two trials in a row never show" if rule.length == 1 else f"no more than {rule.length} trials in a row show"
    return f"items: {shown} items of the same '{rule.attribute}'"


def rule_names(cat: ItemCatalogue | None) -> list[str]:
    """What check_items checks, in order (for reports)."""
    if cat is None:
        return []
    fixed = [LIST_RULE, NO_ITEM_RULE] + ([] if cat.repeat else [REPEAT_RULE])
    return fixed + [rule_sentence(r) for r in cat.rules]


@dataclass
class ItemConflict:
    """Item rules that the participant's ordering leaves no room for (what InfeasibleError shows)."""

    participant: str
    rules: list[str]

    def describe(self) -> str:
        lines = [
            f"participant {self.participant}: no way to give the trials items under these item rules:",
            *[f"  - {r}" for r in self.rules],
            "items are given after the ordering is made, so an ordering can leave them no room: give the "
            "conditions rules that do (e.g. a max-run or min-gap on conditions whose items share a value), "
            "add items of other values, or raise the length",
        ]
        return "\n".join(lines)


def assign_items(cat: ItemCatalogue, participant: int, label: str, runs: list[np.ndarray], seed: int):
    """Item index of every trial, one int64 array per run (-1: the condition has no items).

    participant: the participant's index in the spec (0-based, picks the rotation); seed: theirs.

    Raises
    ------
    InfeasibleError
        When the item rules cannot hold for this ordering.
    SolverTimeoutError
        When CP-SAT decides nothing within its work limit.
    """
    rng = np.random.default_rng([seed, 0, 2])
    lists = cat.lists(participant)
    flat = np.concatenate(runs).astype(np.int64)
    out = np.full(len(flat), -1, dtype=np.int64)
    signature = _signature_of_items(cat)
    trial_sig = _solve_signatures(cat, lists, runs, signature, rng, seed, label) if cat.rules else None
    for c in cat.with_items():
        trials = np.flatnonzero(flat == c)
        items = np.asarray(lists[c], dtype=np.int64)
        if trial_sig is None:
            out[trials] = _deal(items, len(trials), rng)
            continue
        for s in np.unique(signature[items]):
            these = trials[trial_sig[trials] == s]
            out[these] = _deal(items[signature[items] == s], len(these), rng)
    return np.split(out, np.cumsum([len(r) for r in runs])[:-1])


def _deal(items: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """n items from the list: shuffled passes through it, so each is used floor or ceil of n / len times."""
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    passes = -(-n // len(items))
    return np.concatenate([rng.permutation(items) for _ in range(passes)])[:n]


def _ruled_attributes(cat: ItemCatalogue) -> list[str]:
    return list(dict.fromkeys(r.attribute for r in cat.rules))


def _signature_of_items(cat: ItemCatalogue) -> np.ndarray:
    """int64 (n_items,): items with equal values of every ruled attribute share a signature."""
    attrs = _ruled_attributes(cat)
    keys = list(zip(*(cat.attributes[a] for a in attrs))) if attrs else [()] * len(cat.names)
    ids: dict[tuple, int] = {}
    return np.array([ids.setdefault(k, len(ids)) for k in keys], dtype=np.int64)


def _solve_signatures(cat, lists, runs, signature, rng, seed, label) -> np.ndarray:
    """Signature of each trial (runs concatenated; -1 for trials without items) meeting the item rules."""
    flat = np.concatenate(runs)
    cp = cp_model.CpModel()
    z: dict[int, dict[int, object]] = {}  # trial -> signature -> literal
    hint = np.full(len(flat), -1, dtype=np.int64)
    for c in cat.with_items():
        trials = np.flatnonzero(flat == c)
        items = np.asarray(lists[c], dtype=np.int64)
        hint[trials] = signature[_deal(items, len(trials), rng)]
        sigs, held = np.unique(signature[items], return_counts=True)
        for t in trials:
            z[int(t)] = {int(s): cp.new_bool_var(f"trial{t + 1}_sig{s}") for s in sigs}
            # one signature per trial
            cp.add_exactly_one(z[int(t)].values())
        whole, part = divmod(len(trials), len(items))
        for s, n_s in zip(sigs, held):
            used = sum(z[int(t)][int(s)] for t in trials)
            # as many trials of this signature as its items can serve (each item floor or ceil times)
            cp.add(used >= int(whole * n_s))
            cp.add(used <= int(whole * n_s + (n_s if part else 0)))
    _add_run_limits(cp, cat, runs, signature, z)
    for t, by_sig in z.items():
        for s, lit in by_sig.items():
            cp.add_hint(lit, int(hint[t] == s))
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1
    solver.parameters.random_seed = int(seed % (2**31 - 1))
    solver.parameters.max_deterministic_time = WORK_LIMIT
    solver.parameters.max_time_in_seconds = WALL_LIMIT
    status = solver.solve(cp)
    if status == cp_model.INFEASIBLE:
        raise InfeasibleError(ItemConflict(label, [rule_sentence(r) for r in cat.rules]))
    if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
        raise SolverTimeoutError(f"participant {label}: no item assignment found within the work limit")
    out = np.full(len(flat), -1, dtype=np.int64)
    for t, by_sig in z.items():
        out[t] = next(s for s, lit in by_sig.items() if solver.boolean_value(lit))
    return out


def _add_run_limits(cp, cat: ItemCatalogue, runs, signature, z) -> None:
    """No window of length + 1 trials of a run in which every trial shows one value of the attribute."""
    n_sigs = int(signature.max()) + 1 if len(signature) else 0
    sig_value = {}
    for i, s in enumerate(signature):
        sig_value[int(s)] = {a: cat.attributes[a][i] for a in _ruled_attributes(cat)}
    start = 0
    for run in runs:
        trials = range(start, start + len(run))
        start += len(run)
        for rule in cat.rules:
            values = {sig_value[s][rule.attribute] for s in range(n_sigs)} - {""}
            for v in values:
                lits = [
                    sum(lit for s, lit in z[t].items() if sig_value[s][rule.attribute] == v) if t in z else 0
                    for t in trials
                ]
                for a in range(len(lits) - rule.length):
                    window = lits[a : a + rule.length + 1]
                    if all(isinstance(w, int) for w in window):
                        continue
                    # at most `length` of these consecutive trials show an item with this value
                    cp.add(sum(window) <= rule.length)


def check_items(
    cat: ItemCatalogue,
    participant: int | None,
    runs: list[np.ndarray | None],
    items: list[np.ndarray | None],
) -> list[Violation]:
    """Violations of the item rules in one participant's runs (condition codes and item indices per
    run; item -1: none). participant None (a label not in the spec): an item may come from any of the
    lists its condition can have. A run None (absent from the files audited) is skipped; the others
    keep their run numbers, and an item repeated only with an absent run goes unseen."""
    out = []
    allowed = _allowed(cat, participant)
    seen: dict[int, list[tuple[int, int]]] = {}
    for r, (codes, shown) in enumerate(zip(runs, items)):
        if codes is None or shown is None:
            continue
        for p, (c, i) in enumerate(zip(codes.tolist(), shown.tolist())):
            if allowed[c] and i not in allowed[c]:
                found = "no item" if i < 0 else f"item '{cat.names[i]}', not in its list for this participant"
                out.append(Violation(LIST_RULE, r, (p,), found))
            elif not allowed[c] and i >= 0:
                out.append(
                    Violation(NO_ITEM_RULE, r, (p,), f"item '{cat.names[i]}' in a trial of a condition without items")
                )
            if i >= 0:
                seen.setdefault(i, []).append((r, p))
    if not cat.repeat:
        for i, places in seen.items():
            if len(places) > 1:
                runs_shown = sorted({r + 1 for r, _ in places})
                where = places[0][0] if len(runs_shown) == 1 else None
                where_shown = ", ".join(map(str, runs_shown))
                found = f"item '{cat.names[i]}' is shown {len(places)} times (in run(s) {where_shown})"
                out.append(Violation(REPEAT_RULE, where, tuple(p for _, p in places), found))
    for rule in cat.rules:
        out += _run_violations(cat, rule, items)
    return out


def _allowed(cat: ItemCatalogue, participant: int | None) -> list[set[int]]:
    if participant is not None:
        return [set(lst) for lst in cat.lists(participant)]
    out = [set(o) for o in cat.own]
    for c in cat.rotate:
        out[c] = {i for g in cat.pool for i in g}
    return out


def _run_violations(cat: ItemCatalogue, rule, items: list[np.ndarray]) -> list[Violation]:
    """Stretches of trials longer than rule.length showing items of one value of rule.attribute."""
    values = np.array(cat.attributes[rule.attribute] + ("",), dtype=object)
    out = []
    for r, shown in enumerate(items):
        if shown is None:  # an absent run
            continue
        vals = values[shown]  # -1 picks the trailing '' (no item: no value)
        for v in sorted(set(vals) - {""}):
            for start, length in runs_of(np.arange(len(vals)), vals == v):
                if length > rule.length:
                    found = f"{length} trials in a row show items with {rule.attribute} = '{v}'"
                    out.append(Violation(rule_sentence(rule), r, tuple(range(start, start + length)), found))
    return out
