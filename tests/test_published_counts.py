"""The rule encodings hold against counts published or derivable outside this project."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from ortools.sat.python import cp_model
from scipy.signal import max_len_seq

from seqsolve.model import OrderingModel
from seqsolve.rules import BalancedTransitions, MaxRun
from tests.conftest import make_facts


class _Counter(cp_model.CpSolverSolutionCallback):
    def __init__(self, m: OrderingModel, keep: bool = False):
        super().__init__()
        self.m, self.keep, self.n, self.found = m, keep, 0, []

    def on_solution_callback(self):
        self.n += 1
        if self.keep:
            xs = self.m.x[0]
            self.found.append(tuple(int(np.argmax([self.value(v) for v in row])) for row in xs))


def enumerate_orderings(facts, rules, keep=False):
    m = OrderingModel(facts)
    for rule in rules:
        g = m.new_guard("r")
        m.cp.add(g == 1)
        rule.encode(m, g)
    solver = cp_model.CpSolver()
    solver.parameters.enumerate_all_solutions = True
    solver.parameters.num_workers = 1
    counter = _Counter(m, keep)
    assert solver.solve(m.cp, counter) in (cp_model.OPTIMAL, cp_model.FEASIBLE, cp_model.INFEASIBLE)
    return counter


def compositions(n: int, k: int):
    for cut in itertools.combinations(range(n + k - 1), k - 1):
        parts = np.diff((-1,) + cut + (n + k - 1,)) - 1
        yield parts


def no_long_runs_recurrence(n: int, k: int, L: int) -> int:
    """Words of length n over k letters with no run longer than L.

    Recurrence a(n) = (k-1) * (a(n-1) + ... + a(n-L)), a(0) = 1 after the first letter's k choices:
    the last run has length 1..L and the letter before it differs. For k = 2, L = 2 this is
    2 * Fibonacci(n + 1) (2, 4, 6, 10, 16, 26, ...), a sequence OEIS lists (A-number not quoted,
    recalled from memory; the recurrence itself is derived here).
    """
    # c[i] = words of length i ending in a run, counted with the first letter's k choices
    c = [0] * (n + 1)
    for i in range(1, n + 1):
        c[i] = k if i <= L else 0
        c[i] += (k - 1) * sum(c[i - j] for j in range(1, L + 1) if i - j >= 1)
    return c[n]


@pytest.mark.parametrize("n, k, L", [(6, 2, 2), (8, 2, 2), (7, 2, 3), (6, 3, 1), (6, 3, 2), (5, 4, 2)])
def test_max_run_solution_count_matches_recurrence(n, k, L):
    total = 0
    for counts in compositions(n, k):
        if (counts == 0).any():  # each composition with zero counts is a study of fewer conditions
            nz = counts[counts > 0]
            sub = make_facts(nz.tolist())
            total += enumerate_orderings(sub, [MaxRun(kind="max-run", length=L)]).n
        else:
            total += enumerate_orderings(make_facts(counts.tolist()), [MaxRun(kind="max-run", length=L)]).n
    assert total == no_long_runs_recurrence(n, k, L)
    # and the plain brute force agrees, as a second independent count
    brute = sum(
        1 for w in itertools.product(range(k), repeat=n) if max(len(list(g)) for _, g in itertools.groupby(w)) <= L
    )
    assert total == brute


@pytest.mark.parametrize("k, expected_cyclic", [(2, 1), (3, 24)])
def test_de_bruijn_count_matches_best_theorem(k, expected_cyclic):
    """Cyclic sequences in which every ordered pair of k symbols occurs exactly once.

    The BEST theorem counts de Bruijn sequences of order 2 as (k!)^k / k^2 (de Bruijn 1946;
    van Aardenne-Ehrenfest & de Bruijn 1951): 1 for k = 2, 24 for k = 3. Each is aperiodic,
    so it stands for k^2 distinct linear orderings (its rotations).
    """
    assert math.factorial(k) ** k // k**2 == expected_cyclic
    facts = make_facts([k] * k)
    rule = BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True)
    found = enumerate_orderings(facts, [rule], keep=True).found
    assert len(found) == expected_cyclic * k**2
    canonical = {min(s[i:] + s[:i] for i in range(len(s))) for s in found}
    assert len(canonical) == expected_cyclic


def de_bruijn(k: int, n: int) -> list[int]:
    """The Fredricksen-Kessler-Maiorana construction (concatenated Lyndon words), order n."""
    a = [0] * k * n
    seq: list[int] = []

    def db(t: int, p: int) -> None:
        if t > n:
            if n % p == 0:
                seq.extend(a[1 : p + 1])
        else:
            a[t] = a[t - p]
            db(t + 1, p)
            for j in range(a[t - p] + 1, k):
                a[t] = j
                db(t + 1, t)

    db(1, 1)
    return seq


@pytest.mark.parametrize("k", [2, 3, 4, 5])
def test_hand_built_de_bruijn_sequence_passes_zero_tolerance_balance(k):
    s = np.array(de_bruijn(k, 2))
    facts = make_facts(np.bincount(s, minlength=k).tolist())
    rule = BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True)
    assert rule.check(facts, [s]) == []
    # the same trials cycled 0, 1, ..., k-1, 0, 1, ... only ever show pairs (i, i + 1): not balanced
    broken = np.tile(np.arange(k), k)
    assert rule.check(facts, [broken]) != []


@pytest.mark.parametrize("nbits", [4, 6, 8])
def test_scipy_m_sequence_is_balanced_as_published(nbits):
    """scipy's binary m-sequence: every pair occurs 2^(n-2) times cyclically, except 00 once less
    (the window property of maximal-length sequences; Golomb, Shift Register Sequences, 1967)."""
    s = max_len_seq(nbits)[0].astype(np.int64)
    facts = make_facts(np.bincount(s, minlength=2).tolist())
    assert BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True).check(facts, [s]) == []
