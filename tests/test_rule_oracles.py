"""Oracle tables: (ordering, expected) pairs, judged by each rule's check and by its CP-SAT encoding.

Windowed rules (max-run, min-run, min-gap, even-spread) get boundary cases on purpose: an encoding
of sliding windows is where off-by-one errors hide.
"""

from __future__ import annotations

import numpy as np
import pytest

from seqsolve.rules import (
    BalancedTransitions,
    BalancedTriples,
    EvenSpread,
    ForbiddenTransition,
    MaxRun,
    MinGap,
    MinRun,
    Position,
    RunBoundary,
)
from tests.conftest import fixed_feasible, make_facts


def seq(text: str) -> np.ndarray:
    return np.array(["abcde".index(ch) for ch in text], dtype=np.int64)


ORACLE = [
    # max-run: exactly L in a row is allowed, L + 1 is not, also at either end
    (MaxRun(kind="max-run", length=2), ["aabbab"], True),
    (MaxRun(kind="max-run", length=2), ["aaabbb"[:3] + "bab"], False),
    (MaxRun(kind="max-run", length=2), ["ababbb"], False),
    (MaxRun(kind="max-run", length=1), ["ababab"], True),
    (MaxRun(kind="max-run", length=2, conditions=["a"]), ["aabbba"], True),
    (MaxRun(kind="max-run", length=2, conditions=["f=x"]), ["abacbc"], False),  # a, b share level x
    (MaxRun(kind="max-run", length=2, conditions=["f=x"]), ["abccab"], True),
    # min-run: stretches at both ends count
    (MinRun(kind="min-run", length=2), ["aabbcc"], True),
    (MinRun(kind="min-run", length=2), ["abbcca"], False),
    (MinRun(kind="min-run", length=3, conditions=["a"]), ["aaabcc"], True),
    (MinRun(kind="min-run", length=3, conditions=["a"]), ["bcaaab"], True),
    (MinRun(kind="min-run", length=3, conditions=["a"]), ["bcbaaa"], True),
    (MinRun(kind="min-run", length=3, conditions=["a"]), ["bcabaa"], False),
    # min-gap: gap g means at least g other trials between
    (MinGap(kind="min-gap", conditions=["a"], gap=2), ["abcabc"], True),
    (MinGap(kind="min-gap", conditions=["a"], gap=2), ["abacbc"], False),
    (MinGap(kind="min-gap", conditions=["a"], gap=2, other="b"), ["acbcac"], False),
    (MinGap(kind="min-gap", conditions=["a"], gap=1, other="b"), ["acbcac"], True),
    (MinGap(kind="min-gap", conditions=["a"], gap=1, other="b"), ["aacbbc"], True),
    (MinGap(kind="min-gap", conditions=["a"], gap=1, other="b"), ["acabbc"], False),
    # forbidden transition
    (ForbiddenTransition(kind="forbidden-transition", first="a", then="b"), ["bacbca"], True),
    (ForbiddenTransition(kind="forbidden-transition", first="a", then="b"), ["bcaabc"], False),
    (ForbiddenTransition(kind="forbidden-transition", first="f=x", then="c"), ["cabcab"], False),
    # positions
    (Position(kind="position", conditions=["c"], placement="always", first=1), ["cabcab"], True),
    (Position(kind="position", conditions=["c"], placement="always", first=1), ["acbcab"], False),
    (Position(kind="position", conditions=["c"], placement="never", last=2), ["ccabab"], True),
    (Position(kind="position", conditions=["c"], placement="never", last=2), ["cababc"], False),
    (Position(kind="position", conditions=["a", "b"], placement="always", at=[2, 3]), ["cabcab"], True),
    (Position(kind="position", conditions=["a"], placement="always", at=[6]), ["cabcba"], True),
    # even spread in halves: each of a, b, c has 2 of 6 trials -> 1 per half, within tolerance 0
    (EvenSpread(kind="even-spread", segments=2, tolerance=0), ["abccab"], True),
    (EvenSpread(kind="even-spread", segments=2, tolerance=0), ["aabbcc"], False),
    (EvenSpread(kind="even-spread", window=3, tolerance=0), ["abcabc"], True),
    (EvenSpread(kind="even-spread", window=3, tolerance=0), ["abccab"], False),  # "bcc"
    (EvenSpread(kind="even-spread", window=3, tolerance=0), ["abcacb"], False),  # "cac"
    (EvenSpread(kind="even-spread", window=3, tolerance=0), ["abacbc"], False),
    # balanced transitions: 6 trials, 5 pairs, ideal 5/9 each -> 0 or 1 with tolerance 0
    (BalancedTransitions(kind="balanced-transitions", tolerance=0), ["abacbc"], True),  # 5 different pairs
    (BalancedTransitions(kind="balanced-transitions", tolerance=0), ["ababcc"], False),  # a->b twice
    (BalancedTransitions(kind="balanced-transitions", tolerance=1), ["ababcc"], True),
    (
        BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True),
        ["aabbcc"],
        True,
    ),  # 6 pairs, ideal 2/3
    (BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True), ["ababcc"], False),
    # balanced triples: 6 trials of 2 a, 2 b, 2 c hold 4 triples, ideal 4/27 each -> 0 or 1 with tolerance 0
    (BalancedTriples(kind="balanced-triples", tolerance=0), ["abacbc"], True),
    (BalancedTriples(kind="balanced-triples", tolerance=0), ["abcabc"], False),  # a, b, c twice
    (BalancedTriples(kind="balanced-triples", tolerance=1), ["abcabc"], True),
    (BalancedTriples(kind="balanced-triples", tolerance=0, exclude_repeats=True), ["aabbcc"], True),
    # 3 a, 2 b, 1 c: the wrap adds 'b, a, b' a second time (cyclic ideal 6 x 3 x 2 x 2 / 216 = 1/3)
    (BalancedTriples(kind="balanced-triples", tolerance=0), ["abacab"], True),
    (BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True), ["abacab"], False),
    # 4 a, 1 b, 1 c: linear ideal 4 x 64 / 216 = 1.19 for 'a, a, a' is missed (0), the wrap gives it
    (BalancedTriples(kind="balanced-triples", tolerance=0), ["aabaca"], False),
    (BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True), ["aabaca"], True),
]

BOUNDARY_ORACLE = [
    (RunBoundary(kind="run-boundary"), ["abcabc", "cabcab"], False),
    (RunBoundary(kind="run-boundary"), ["abcabc", "abcabc"], True),
    (RunBoundary(kind="run-boundary", window=2), ["abcabc", "abcabc"], False),  # b ends run 1, starts run 2 at 2
    (RunBoundary(kind="run-boundary", window=2), ["abcacb", "aabbcc"], True),
    (RunBoundary(kind="run-boundary", window=2), ["abccab", "bcabac"], False),
    (
        BalancedTransitions(kind="balanced-transitions", tolerance=0, across_runs=True, exclude_repeats=True),
        ["abcabc", "cbacba"],
        True,
    ),
    (BalancedTransitions(kind="balanced-transitions", tolerance=0, across_runs=True), ["abcabc", "cbacba"], False),
    # triples summed over two runs: 'a, a, b' twice is too often unless repeats are left free
    (BalancedTriples(kind="balanced-triples", tolerance=0, across_runs=True), ["aabbcc", "aabbcc"], False),
    (
        BalancedTriples(kind="balanced-triples", tolerance=0, across_runs=True, exclude_repeats=True),
        ["aabbcc", "aabbcc"],
        True,
    ),
    (BalancedTriples(kind="balanced-triples", tolerance=0, across_runs=True), ["aabbcc", "bbaacc"], True),
]


@pytest.mark.parametrize("rule, runs, expected", ORACLE + BOUNDARY_ORACLE)
def test_check_and_encoding_agree_with_oracle(rule, runs, expected):
    arrays = [seq(r) for r in runs]
    counts = np.bincount(arrays[0], minlength=3)
    assert all((np.bincount(a, minlength=3) == counts).all() for a in arrays), "runs of a row must share counts"
    facts = make_facts(counts, runs=len(runs), grouped=True)
    violations = rule.check(facts, arrays)
    assert (not violations) == expected, violations
    assert fixed_feasible(facts, [rule], arrays) == expected


def counts_model_accepts(facts, rule, arrays) -> bool | None:
    """Is the transition-count model feasible with its counts fixed to these orderings' (pairs, first
    and last trial per run)? None when the rule cannot be said there."""
    from ortools.sat.python import cp_model

    from seqsolve.flow import FlowModel
    from seqsolve.rules.transitions import pair_counts

    f = FlowModel(facts)
    g = f.new_guard("r")
    f.cp.add(g == 1)
    if not rule.encode_flow(f, g):
        return None
    for r, a in enumerate(arrays):
        pairs = pair_counts(a, facts.n_conditions)
        for i in range(facts.n_conditions):
            f.cp.add(f.start[r][i] == int(a[0] == i))
            f.cp.add(f.end[r][i] == int(a[-1] == i))
            for j in range(facts.n_conditions):
                f.cp.add(f.m[r][i, j] == int(pairs[i, j]))
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1
    return solver.solve(f.cp) != cp_model.INFEASIBLE


FLOW_ROWS = [row for row in ORACLE + BOUNDARY_ORACLE if row[2]]


@pytest.mark.parametrize("rule, runs, expected", FLOW_ROWS)
def test_counts_model_never_excludes_a_valid_oracle_ordering(rule, runs, expected):
    # the counts model sees pair counts only, so it is exact one way: an ordering the check accepts
    # must leave its counts feasible (the other way is the trail builder's job, tests/test_flow.py)
    arrays = [seq(r) for r in runs]
    facts = make_facts(np.bincount(arrays[0], minlength=3), runs=len(runs), grouped=True)
    assert counts_model_accepts(facts, rule, arrays) in (True, None)


def flow_kinds_with_oracle_rows() -> set[str]:
    """Rule kinds with at least one valid oracle row that the counts model can state."""
    out = set()
    for row in FLOW_ROWS:
        rule, runs, _ = row
        arrays = [seq(r) for r in runs]
        facts = make_facts(np.bincount(arrays[0], minlength=3), runs=len(runs), grouped=True)
        if counts_model_accepts(facts, rule, arrays) is not None:
            out.add(type(rule).__name__)
    return out


def test_violation_names_positions_and_what_was_found():
    facts = make_facts([3, 3], grouped=False)
    (v,) = MaxRun(kind="max-run", length=2).check(facts, [seq("aaabbb")[[0, 1, 2, 3, 4, 5]]])[:1]
    assert v.positions == (0, 1, 2)
    assert "3 trials of 'a' in a row" in v.describe()
    assert "positions 1, 2, 3" in v.describe()
