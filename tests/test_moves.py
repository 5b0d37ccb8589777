"""The compiled swap checks (seqsolve.moves) agree with the rules' own checks on every rule kind."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqsolve.errors import InfeasibleError
from seqsolve.moves import MoveChecker, compile_moves, start_state
from seqsolve.rules import RULE_CLASSES, ParticipantsDiffer
from seqsolve.search import Judge
from seqsolve.solve import SolveOptions, generate_orderings
from tests.conftest import make_study
from tests.test_rule_properties import rules_for

SETTINGS = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _walk_and_compare(study, runs, earlier, rng, steps: int = 25) -> int:
    """Random walk over valid swaps; at each step every judged pair must agree with the full
    checks (Judge.ok: every rule's check, participants-differ, no repeated design), and the
    counters after each move must equal counters computed from scratch. Returns pairs judged."""
    judge = Judge(study, earlier)
    checker = MoveChecker(compile_moves(study.rules, study.facts), earlier, np.concatenate(runs))
    lengths = [len(r) for r in runs]
    splits = np.cumsum(lengths)[:-1]
    n = int(sum(lengths))
    judged = 0
    for _ in range(steps):
        pairs = rng.integers(0, n, size=(40, 2))
        verdicts = checker.valid(pairs)
        for (i, j), fast in zip(pairs, verdicts):
            codes = checker.codes.copy()
            same_run = np.searchsorted(splits, i, side="right") == np.searchsorted(splits, j, side="right")
            if i == j or codes[i] == codes[j] or not same_run:
                assert not fast
                continue
            codes[i], codes[j] = codes[j], codes[i]
            full = judge.ok(np.split(codes, splits))
            assert fast == full, (study.rules, (i, j), checker.codes)
            judged += 1
        good = np.flatnonzero(verdicts)
        if len(good):
            i, j = pairs[good[rng.integers(len(good))]]
            checker.apply(i, j)
            fresh = start_state(checker.tables, checker.codes)
            for a, b in zip(checker.state, fresh):
                assert np.array_equal(a, b)
    return judged


@st.composite
def studies_with_rules(draw):
    k = draw(st.integers(3, 4))
    counts = draw(st.lists(st.integers(1, 4), min_size=k, max_size=k))
    rules = draw(st.lists(rules_for(k), min_size=1, max_size=3))
    return make_study(counts, rules, runs=draw(st.integers(1, 3)), grouped=True, seed=draw(st.integers(0, 999)))


@SETTINGS
@given(studies_with_rules(), st.integers(0, 2**32 - 1))
def test_swap_verdicts_match_the_full_checks(study, seed):
    try:
        start = generate_orderings(study, SolveOptions(time_limit=10))[0].runs
    except InfeasibleError:
        return
    _walk_and_compare(study, start, [], np.random.default_rng(seed))


@settings(max_examples=40, deadline=None)
@given(st.integers(1, 4), st.integers(0, 2**32 - 1))
def test_swap_verdicts_respect_earlier_participants(min_differences, seed):
    rng = np.random.default_rng(seed)
    rule = ParticipantsDiffer(kind="participants-differ", min_differences=min_differences)
    study = make_study([3, 3, 2], [rule], runs=2)
    earlier = [[rng.permutation(np.repeat(np.arange(3), [3, 3, 2])) for _ in range(2)] for _ in range(3)]
    start = [rng.permutation(np.repeat(np.arange(3), [3, 3, 2])) for _ in range(2)]
    if not Judge(study, earlier).ok(start):
        return
    _walk_and_compare(study, start, earlier, rng)


# one feasible study per rule kind with room to move, so that every kind's local check is met often
# (hypothesis' small studies are often infeasible for min-run and spread rules)
KIND_CASES = {
    "max-run": [{"kind": "max-run", "length": 2}],
    "min-run": [{"kind": "min-run", "length": 3, "conditions": ["a", "f=y"]}],
    "balanced-transitions": [{"kind": "balanced-transitions", "tolerance": 1, "cyclic": True}],
    "balanced-transitions across runs": [
        {"kind": "balanced-transitions", "tolerance": 0, "exclude_repeats": True, "across_runs": True}
    ],
    "balanced-triples": [{"kind": "balanced-triples", "tolerance": 1}],
    "balanced-triples cyclic across runs": [
        {"kind": "balanced-triples", "tolerance": 1, "cyclic": True, "exclude_repeats": True, "across_runs": True}
    ],
    "balanced-triples with pairs": [
        {"kind": "balanced-triples", "tolerance": 1, "cyclic": True},
        {"kind": "balanced-transitions", "tolerance": 1},
    ],
    "forbidden-transition": [{"kind": "forbidden-transition", "first": "f=x", "then": "c"}],
    "min-gap": [{"kind": "min-gap", "conditions": ["a"], "gap": 2}],
    "min-gap other": [{"kind": "min-gap", "conditions": ["a"], "gap": 2, "other": "b"}],
    "min-gap overlapping sets": [{"kind": "min-gap", "conditions": ["f=x"], "gap": 1, "other": "b"}],
    "run-boundary": [{"kind": "run-boundary", "window": 2}],
    "position": [
        {"kind": "position", "conditions": ["a"], "placement": "never", "first": 2},
        {"kind": "position", "conditions": ["f=y"], "placement": "always", "at": [5, 7], "runs": [2]},
    ],
    "even-spread segments": [{"kind": "even-spread", "segments": 3, "tolerance": 0}],
    "even-spread window": [{"kind": "even-spread", "window": 4, "tolerance": 1, "conditions": ["a"]}],
}


@pytest.mark.parametrize("case", list(KIND_CASES))
def test_each_rule_kind_on_a_roomy_study(case):
    study = make_study([6, 5, 4, 4], KIND_CASES[case], runs=3, grouped=True, seed=5)
    rng = np.random.default_rng(11)
    for p in generate_orderings(study, SolveOptions(time_limit=10))[:1]:
        # ~800 judged same-run swaps per case (random pairs often fall in two runs)
        assert _walk_and_compare(study, p.runs, [], rng, steps=80) > 500


def test_a_repeated_design_is_never_a_valid_move():
    # with no rule at all, the only thing a swap can break is "a design of your own"
    study = make_study([1, 1], [])
    checker = MoveChecker(compile_moves(study.rules, study.facts), [[np.array([1, 0])]], np.array([0, 1]))
    assert not checker.valid(np.array([[0, 1]]))[0]


@pytest.mark.parametrize("cls", RULE_CLASSES, ids=lambda c: c.__name__)
def test_every_rule_kind_has_a_local_form(cls):
    # the search judges moves through add_moves; a kind without one would fail at run time
    assert cls.add_moves is not RULE_CLASSES[0].__mro__[1].add_moves
