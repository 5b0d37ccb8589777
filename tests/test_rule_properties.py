"""Property tests: the checks and the encodings agree both ways, on random small studies."""

from __future__ import annotations

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqsolve.errors import InfeasibleError
from seqsolve.rules import (
    RULE_CLASSES,
    BalancedTransitions,
    BalancedTriples,
    EvenSpread,
    ForbiddenTransition,
    MaxRun,
    MinGap,
    MinRun,
    ParticipantsDiffer,
    Position,
    RunBoundary,
)
from seqsolve.solve import SolveOptions, choose_method, generate_orderings
from tests.conftest import NAMES, fixed_feasible, make_study, random_ordering

SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def rules_for(draw, k: int):
    names = list(NAMES[:k])
    targets = names + ["f=x", "f=y"]
    pick = st.sampled_from(names)
    kind = draw(st.sampled_from([c.__name__ for c in RULE_CLASSES if c is not ParticipantsDiffer]))
    some = st.one_of(st.none(), st.lists(st.sampled_from(targets), min_size=1, max_size=2, unique=True))
    if kind == "MaxRun":
        return MaxRun(kind="max-run", length=draw(st.integers(1, 3)), conditions=draw(some))
    if kind == "MinRun":
        return MinRun(kind="min-run", length=draw(st.integers(2, 3)), conditions=draw(some))
    if kind == "BalancedTransitions":
        return BalancedTransitions(
            kind="balanced-transitions",
            tolerance=draw(st.integers(0, 2)),
            exclude_repeats=draw(st.booleans()),
            across_runs=draw(st.booleans()),
            cyclic=draw(st.booleans()),
        )
    if kind == "BalancedTriples":
        return BalancedTriples(
            kind="balanced-triples",
            tolerance=draw(st.integers(0, 2)),
            exclude_repeats=draw(st.booleans()),
            across_runs=draw(st.booleans()),
            cyclic=draw(st.booleans()),
        )
    if kind == "ForbiddenTransition":
        return ForbiddenTransition(kind="forbidden-transition", first=draw(st.sampled_from(targets)), then=draw(pick))
    if kind == "MinGap":
        a = draw(pick)
        other = draw(st.one_of(st.none(), st.sampled_from([n for n in names if n != a])))
        return MinGap(kind="min-gap", conditions=[a], gap=draw(st.integers(1, 3)), other=other)
    if kind == "RunBoundary":
        return RunBoundary(kind="run-boundary", window=draw(st.integers(1, 2)), conditions=draw(some))
    if kind == "Position":
        where = draw(st.sampled_from(["first", "last", "at"]))
        value = [draw(st.integers(1, 4))] if where == "at" else draw(st.integers(1, 2))
        return Position(
            kind="position",
            conditions=[draw(pick)],
            placement=draw(st.sampled_from(["never", "always"])),
            **{where: value},
        )
    if kind == "EvenSpread":
        if draw(st.booleans()):
            return EvenSpread(kind="even-spread", segments=draw(st.integers(2, 3)), tolerance=draw(st.integers(0, 1)))
        return EvenSpread(kind="even-spread", window=draw(st.integers(2, 4)), tolerance=draw(st.integers(0, 1)))
    # a new rule kind must get its own branch above (and its name in STRATEGY_KINDS): no silent fall-through
    raise NotImplementedError(f"no strategy for rule kind {kind}; add one to rules_for")


#: the rule kinds rules_for draws; tests/test_registry.py holds this to the registry
STRATEGY_KINDS = frozenset(
    {
        "MaxRun",
        "MinRun",
        "BalancedTransitions",
        "BalancedTriples",
        "ForbiddenTransition",
        "MinGap",
        "RunBoundary",
        "Position",
        "EvenSpread",
    }
)


@st.composite
def small_studies(draw, max_rules: int = 3):
    k = draw(st.integers(3, 4))
    counts = draw(st.lists(st.integers(1, 3), min_size=k, max_size=k))
    runs = draw(st.integers(1, 2))
    rules = draw(st.lists(rules_for(k), min_size=1, max_size=max_rules))
    return make_study(counts, rules, runs=runs, grouped=True, seed=draw(st.integers(0, 1000)))


@SETTINGS
@given(small_studies(max_rules=2), st.integers(0, 2**32 - 1))
def test_check_passes_exactly_when_fixed_ordering_is_feasible(study, seed):
    """Both ways: a failing ordering is infeasible when fixed in, a passing one is feasible."""
    rng = np.random.default_rng(seed)
    for _ in range(3):
        runs = random_ordering(study.facts, rng)
        passes = not [v for r in study.rules for v in r.check(study.facts, runs)]
        assert fixed_feasible(study.facts, study.rules, runs) == passes


@SETTINGS
@given(small_studies())
def test_every_generated_ordering_passes_every_check(study):
    """Solver output passes the checks; where the counts model applies it agrees on feasibility."""
    verdicts = {}
    for method in ("positions", "counts"):
        if method == "counts" and choose_method(study, SolveOptions()) != "counts":
            continue
        try:
            out = generate_orderings(study, SolveOptions(method=method, time_limit=20))
        except InfeasibleError:
            verdicts[method] = False
            continue
        verdicts[method] = True
        for p in out:
            assert not [v for r in study.rules for v in r.check(study.facts, p.runs)]
            for r, seq in enumerate(p.runs):
                assert np.bincount(seq, minlength=study.facts.n_conditions).tolist() == study.facts.counts[r].tolist()
    assert len(set(verdicts.values())) == 1, verdicts


@settings(max_examples=15, deadline=None)
@given(st.integers(0, 10_000))
def test_participants_get_different_orderings(seed):
    study = make_study(
        [2, 2, 1], [ParticipantsDiffer(kind="participants-differ", min_differences=2)], participants=6, seed=seed
    )
    out = generate_orderings(study)
    flat = [tuple(p.runs[0]) for p in out]
    for i in range(len(flat)):
        for j in range(i):
            assert sum(a != b for a, b in zip(flat[i], flat[j])) >= 2


def test_participants_differ_reports_impossible_when_orderings_run_out():
    # 3 trials a, a, b have only 3 orderings: a fourth participant cannot differ from all
    study = make_study([2, 1], [ParticipantsDiffer(kind="participants-differ")], participants=4)
    try:
        generate_orderings(study)
    except InfeasibleError as exc:
        assert "no two participants" in str(exc)
    else:
        raise AssertionError("expected the fourth participant to be impossible")
