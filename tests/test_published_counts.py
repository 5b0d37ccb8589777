"""The rule encodings hold against counts published or derivable outside this project."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from ortools.sat.python import cp_model
from scipy.signal import max_len_seq

from seqsolve.model import OrderingModel
from seqsolve.rules import BalancedTransitions, BalancedTriples, MaxRun
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


def eulerian_circuits(edges: list[tuple[int, ...]]) -> int:
    """Eulerian circuits of the order-2 graph whose edges are the given triples (a, b, c): an edge
    runs from node (a, b) to node (b, c). BEST theorem (van Aardenne-Ehrenfest & de Bruijn 1951;
    Smith & Tutte 1941): ec(G) = t_w(G) * prod_v (outdeg(v) - 1)!, t_w the arborescences towards
    any node w, counted by Kirchhoff's matrix-tree theorem as a minor of the Laplacian D_out - A.
    Each triple used once, so each circuit is one cyclic sequence holding every triple once."""
    nodes = sorted({e[:2] for e in edges} | {e[1:] for e in edges})
    at = {v: i for i, v in enumerate(nodes)}
    adj = np.zeros((len(nodes), len(nodes)))
    for a, b, c in edges:
        adj[at[(a, b)], at[(b, c)]] += 1
    out_deg = adj.sum(axis=1)
    arborescences = round(np.linalg.det((np.diag(out_deg) - adj)[1:, 1:]))
    return arborescences * math.prod(math.factorial(int(d) - 1) for d in out_deg)


@pytest.mark.parametrize("k", [2, 3, 4])
def test_best_theorem_helper_matches_the_closed_form_of_order_3(k):
    # B(k, 3) = (k!)^(k^2) / k^3 de Bruijn sequences of order 3 (the BEST theorem's closed form)
    edges = list(itertools.product(range(k), repeat=3))
    assert eulerian_circuits(edges) == math.factorial(k) ** (k * k) // k**3


def test_order_3_de_bruijn_count_matches_best_theorem():
    """k = 2: every ordered triple exactly once, cyclically: (2!)^(2^2) / 2^3 = 2 cyclic sequences
    (00010111 and 00011101), each standing for 8 linear orderings (its rotations). k = 3 has
    (3!)^9 / 27 = 373,248, too many to enumerate here (about 3 minutes of CP-SAT); the next test
    takes the same theorem to three conditions."""
    facts = make_facts([4, 4])
    rule = BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True)
    found = enumerate_orderings(facts, [rule], keep=True).found
    assert len(found) == 2 * 8
    canonical = {min(s[i:] + s[:i] for i in range(len(s))) for s in found}
    assert canonical == {(0, 0, 0, 1, 0, 1, 1, 1), (0, 0, 0, 1, 1, 1, 0, 1)}


def test_no_repeat_triples_count_matches_best_theorem():
    """Every triple with no direct repeat (a != b != c) exactly once, cyclically: with exclude_repeats
    and tolerance 0 the k(k-1)^2 such triples each get ideal 1 and fill the run, so repeats get none.
    Their number is the Eulerian circuits of the graph on pairs of different conditions (BEST theorem,
    computed above): 12 for k = 3, each standing for 12 rotations (k = 4 has 143,327,232: too many)."""
    k = 3
    edges = [e for e in itertools.product(range(k), repeat=3) if e[0] != e[1] and e[1] != e[2]]
    expected = eulerian_circuits(edges)
    assert expected == 12
    facts = make_facts([(k - 1) ** 2] * k)
    rule = BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True, exclude_repeats=True)
    found = enumerate_orderings(facts, [rule], keep=True).found
    n = len(edges)
    assert len(found) == expected * n
    canonical = {min(s[i:] + s[:i] for i in range(len(s))) for s in found}
    assert len(canonical) == expected


@pytest.mark.parametrize("k", [2, 3, 4])
def test_hand_built_order_3_de_bruijn_sequence_passes_zero_tolerance_triples(k):
    s = np.array(de_bruijn(k, 3))
    facts = make_facts(np.bincount(s, minlength=k).tolist())
    rule = BalancedTriples(kind="balanced-triples", tolerance=0, cyclic=True)
    assert rule.check(facts, [s]) == []
    # an order-2 de Bruijn sequence repeated k times has every pair k times but not every triple once
    broken = np.tile(np.array(de_bruijn(k, 2)), k)
    assert rule.check(facts, [broken]) != []


@pytest.mark.parametrize(
    "counts, tolerance",
    [([3, 3], 0), ([4, 2], 0), ([4, 4], 0), ([4, 4], 1), ([5, 3], 1), ([3, 2, 2], 0), ([2, 2, 2, 1], 0)],
)
def test_linear_triple_balance_count_matches_brute_force(counts, tolerance):
    """Linear runs (N - 2 triples): CP-SAT's count of orderings meeting the balance equals a plain
    enumeration of every arrangement judged by counting triples with itertools."""
    facts = make_facts(counts)
    rule = BalancedTriples(kind="balanced-triples", tolerance=tolerance)
    ((_, low, high),) = rule.bounds(facts)
    trials = [c for c, n in enumerate(counts) for _ in range(n)]
    brute = 0
    for w in set(itertools.permutations(trials)):
        found = np.zeros_like(low)
        for t in zip(w, w[1:], w[2:]):
            found[t] += 1
        brute += bool(((found >= low) & (found <= high)).all())
    assert enumerate_orderings(facts, [rule]).n == brute
    assert 0 < brute < len(set(itertools.permutations(trials)))
