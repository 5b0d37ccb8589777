"""Impossible rule sets: the explanation names a smallest conflicting set, and only with proof."""

from __future__ import annotations

import pytest

from seqsolve.errors import InfeasibleError
from seqsolve.rules import BalancedTransitions, BalancedTriples, MaxRun, MinGap, Position, RunBoundary
from seqsolve.solve import SolveOptions, choose_method, explain, generate_orderings
from tests.conftest import make_study

MAX1 = MaxRun(kind="max-run", length=1)
FIRST_A = Position(kind="position", conditions=["a"], placement="always", first=1)
NOT_FIRST_A = Position(kind="position", conditions=["a"], placement="never", first=1)
BOUNDARY = RunBoundary(kind="run-boundary")
BALANCED0 = BalancedTransitions(kind="balanced-transitions", tolerance=0)


@pytest.mark.parametrize(
    "counts, rules, conflicting",
    [
        # 6 a's among 10 trials cannot all be apart
        ([6, 4], [BOUNDARY, MAX1], [1]),
        ([3, 3, 3], [FIRST_A, BOUNDARY, NOT_FIRST_A], [0, 2]),
        # every pair, repeats included, near 1/3 of 8 -> each condition must repeat, max-run 1 forbids it
        ([3, 3, 3], [BALANCED0, BOUNDARY, MAX1], [0, 2]),
        # 4 targets with 3 trials between them need 13 positions; the run has 10
        ([4, 6], [MinGap(kind="min-gap", conditions=["a"], gap=3), BOUNDARY], [0]),
        # every triple once a cyclic run (an order-3 de Bruijn sequence) holds a, a, a and b, b, b; with
        # at most 2 in a row only the wrap can hold one of them
        (
            [4, 4],
            [
                BOUNDARY,
                BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True),
                MaxRun(kind="max-run", length=2),
            ],
            [1, 2],
        ),
    ],
)
@pytest.mark.parametrize("method", ["counts", "positions"])
def test_explanation_names_exactly_the_conflicting_rules(counts, rules, conflicting, method):
    study = make_study(counts, rules, runs=2)
    if method == "counts" and choose_method(study, SolveOptions()) != "counts":
        pytest.skip("rule set needs the positions model")
    options = SolveOptions(method=method)
    with pytest.raises(InfeasibleError) as info:
        generate_orderings(study, options)
    exp = info.value.explanation
    assert exp.proven and exp.minimal
    assert [i for i, _, _ in exp.rules] == conflicting
    for i in conflicting:
        assert study.rules[i].sentence(study.facts) in str(info.value)


def test_no_time_means_no_claim():
    # a conflict counting does not see (balance's upper bounds against max-run 1) needs the solver
    study = make_study([3, 3, 3], [BALANCED0, MAX1])
    exp = explain(study, SolveOptions(explain_time_limit=0))
    assert not exp.proven
    assert "could not decide" in exp.describe()
    # 6 a's among 10 trials, never two in a row: counting proves it without any solver time
    exp = explain(make_study([6, 4], [MAX1]), SolveOptions(explain_time_limit=0))
    assert exp.proven and exp.minimal and "ceil(6 / 1) - 1 = 5 other trials" in exp.describe()
