"""balanced-triples beyond the oracle rows: counts against plain Python, ideals, and searched designs."""

from __future__ import annotations

from collections import Counter

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqsolve.errors import InfeasibleError, SolverTimeoutError
from seqsolve.rules import BalancedTriples
from seqsolve.rules.triples import ideal_triple_counts, n_triples, triple_counts
from seqsolve.search import Search, SearchOptions
from seqsolve.solve import check_runs
from tests.conftest import make_facts, make_study
from tests.test_search import scorer_for


@given(st.lists(st.integers(0, 3), max_size=30), st.booleans())
def test_triple_counts_match_a_plain_counter(seq, cyclic):
    # collections.Counter over zip of the sequence with its shifts (and the wrap when cyclic)
    s = list(seq)
    ext = s + s[:2] if cyclic and len(s) >= 3 else s
    expected = Counter(zip(ext, ext[1:], ext[2:]))
    found = triple_counts(np.array(s, dtype=np.int64), 4, cyclic)
    assert {t: int(found[t]) for t in zip(*np.nonzero(found))} == dict(expected)
    assert found.sum() == n_triples(len(s), cyclic)


@given(st.lists(st.integers(0, 6), min_size=2, max_size=5), st.booleans(), st.booleans())
def test_ideal_counts_share_out_exactly_the_triples_a_run_holds(counts, cyclic, exclude):
    ideal = ideal_triple_counts(np.array(counts), cyclic, exclude)
    total = n_triples(sum(counts), cyclic)
    # nothing to share when no triple of the allowed kind can be formed
    assert np.isclose(ideal.sum(), total) or ideal.sum() == 0
    if not exclude and sum(counts):
        p = np.array(counts) / sum(counts)
        assert np.allclose(ideal, total * np.einsum("a,b,c->abc", p, p, p))


def test_the_sentence_names_the_tolerance_scope_and_wrap():
    facts = make_facts([2, 2, 2])
    rule = BalancedTriples(kind="balanced-triples", tolerance=2, across_runs=True, cyclic=True, exclude_repeats=True)
    text = rule.sentence(facts)
    assert "within 2" in text and "over all runs" in text and "wrap" in text and "no direct repeat" in text


EXTRA = [
    None,
    {"kind": "max-run", "length": 2},
    {"kind": "balanced-transitions", "tolerance": 1},
    {"kind": "run-boundary"},
]


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    counts=st.lists(st.integers(4, 8), min_size=3, max_size=3),
    tolerance=st.integers(1, 2),
    cyclic=st.booleans(),
    across=st.booleans(),
    extra=st.sampled_from(range(len(EXTRA))),
    runs=st.integers(1, 2),
    seed=st.integers(0, 1000),
)
def test_every_searched_design_keeps_the_triple_balance(counts, tolerance, cyclic, across, extra, runs, seed):
    rule = {"kind": "balanced-triples", "tolerance": tolerance, "cyclic": cyclic, "across_runs": across}
    rules = [rule] + ([EXTRA[extra]] if EXTRA[extra] else [])
    study = make_study(counts, rules, runs=runs, seed=seed, baseline=2)
    try:
        scorer, s = scorer_for(study)
    except (InfeasibleError, SolverTimeoutError):
        return
    res = Search(study, scorer, "01", s, [], SearchOptions(iterations=6, stall=10**6)).run()
    assert check_runs(study, study.rules, res.runs) == []
    assert res.judged > 0  # the move checker judged swaps under the triple counts
