"""The comparison methods: the batch checks agree with the rules' checks, the genetic algorithm keeps
counts, reports only valid designs, is deterministic under an evaluation count, and beats random
valid sampling where the optimum is known by enumeration."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqsolve.baselines import BatchJudge, GeneticSettings, _cross_run, _Genetic, genetic, shuffle_and_reject
from seqsolve.search import Judge
from seqsolve.solve import check_runs, sample_orderings
from tests.conftest import make_study
from tests.test_search import scorer_for

#: every rule kind BatchJudge computes itself, in its variants (conditions a..d; factor f: x = {a, b})
FAST_RULES = [
    {"kind": "max-run", "length": 1},
    {"kind": "max-run", "length": 2},
    {"kind": "max-run", "length": 2, "conditions": ["f=x"]},
    {"kind": "max-run", "length": 1, "conditions": ["a"]},
    {"kind": "min-gap", "conditions": ["a"], "gap": 2},
    {"kind": "min-gap", "conditions": ["a"], "gap": 1, "other": "b"},
    {"kind": "min-gap", "conditions": ["f=x"], "gap": 2, "other": "a"},
    {"kind": "balanced-transitions", "tolerance": 1},
    {"kind": "balanced-transitions", "tolerance": 0, "exclude_repeats": True},
    {"kind": "balanced-transitions", "tolerance": 1, "cyclic": True},
    {"kind": "balanced-transitions", "tolerance": 1, "across_runs": True},
    {"kind": "forbidden-transition", "first": "a", "then": "b"},
    {"kind": "forbidden-transition", "first": "f=y", "then": "f=y"},
    {"kind": "run-boundary"},
    {"kind": "run-boundary", "window": 2, "conditions": ["a", "c"]},
    {"kind": "position", "conditions": ["c"], "placement": "always", "first": 1},
    {"kind": "position", "conditions": ["a"], "placement": "never", "last": 2},
    {"kind": "position", "conditions": ["b"], "placement": "never", "at": [3, 5], "runs": [2]},
]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    counts=st.lists(st.integers(1, 6), min_size=4, max_size=4),
    rules=st.lists(st.sampled_from(range(len(FAST_RULES))), min_size=1, max_size=3, unique=True),
    runs=st.integers(1, 3),
    seed=st.integers(0, 10**6),
)
def test_batch_checks_agree_with_every_rules_check(counts, rules, runs, seed):
    study = make_study(counts, [FAST_RULES[i] for i in rules], runs=runs, grouped=True)
    bj = BatchJudge(study, Judge(study, []))
    assert not bj.slow  # all computed in numpy here, none handed to Judge.ok
    rng = np.random.default_rng(seed)
    base = np.concatenate([np.repeat(np.arange(4), counts)] * runs)
    rows = []
    for _ in range(40):  # shuffles, and shuffles with a few trials swapped (near misses of each other)
        row = np.concatenate([rng.permutation(r) for r in bj.split(base)])
        rows += [row, _swapped(row, bj, rng), _swapped(_swapped(row, bj, rng), bj, rng)]
    codes = np.array(rows)
    broken, marked = bj.check(codes)
    for row, b, m in zip(codes, broken, marked):
        violations = check_runs(study, study.rules, bj.split(row))
        assert b == bool(violations)
        if not b:
            assert not m.any()


def _swapped(row, bj, rng):
    out = row.copy()
    p = int(rng.integers(len(row)))
    r = bj.run_of[p]
    q = int(rng.integers(bj.offsets[r], bj.offsets[r + 1]))
    out[p], out[q] = out[q], out[p]
    return out


def test_rules_without_a_batch_version_and_earlier_participants_go_to_the_judge():
    study = make_study([4, 4, 4], [{"kind": "min-run", "length": 2}, {"kind": "max-run", "length": 3}])
    earlier = sample_orderings(study, 5, 1)
    bj = BatchJudge(study, Judge(study, earlier))
    assert bj.row_by_row and len(bj.slow) == 1
    rng = np.random.default_rng(1)
    rows = np.array([np.concatenate(earlier[0])] + [rng.permutation(np.repeat(np.arange(3), 4)) for _ in range(200)])
    expected = [Judge(study, earlier).ok(bj.split(r)) for r in rows]
    assert bj.valid(rows).tolist() == expected
    assert not expected[0]  # an earlier participant's own design is taken


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 10**6), st.integers(1, 3))
def test_crossover_keeps_every_runs_counts(seed, runs):
    study = make_study([3, 5, 2, 4], runs=runs)
    rng = np.random.default_rng(seed)
    ga = _Genetic(study, None, BatchJudge(study, Judge(study, [])), GeneticSettings(), rng)
    base = np.concatenate([np.repeat(np.arange(4), [3, 5, 2, 4])] * runs)
    a = np.concatenate([rng.permutation(r) for r in ga.judge.split(base)])
    b = np.concatenate([rng.permutation(r) for r in ga.judge.split(base)])
    child = ga.cross(a, b)
    for run in ga.judge.split(child):
        assert np.bincount(run, minlength=4).tolist() == [3, 5, 2, 4]
    one = _cross_run(a[:14], b[:14], rng, 4)
    assert np.bincount(one, minlength=4).tolist() == [3, 5, 2, 4]


RULE_SETS = [
    [{"kind": "max-run", "length": 1}, {"kind": "balanced-transitions", "tolerance": 1, "exclude_repeats": True}],
    [{"kind": "max-run", "length": 2}, {"kind": "balanced-transitions", "tolerance": 1}, {"kind": "run-boundary"}],
    [{"kind": "min-gap", "conditions": ["a"], "gap": 3}, {"kind": "max-run", "length": 2}],
    [{"kind": "min-run", "length": 2}, {"kind": "max-run", "length": 3}],  # min-run: through Judge.ok
]


@pytest.mark.parametrize("rules", RULE_SETS)
@pytest.mark.parametrize("seed", [0, 1])
def test_every_design_the_genetic_algorithm_reports_passes_every_rule_check(rules, seed):
    study = make_study([8, 8, 8, 6], rules, runs=2, baseline=3, seed=seed)
    scorer, s = scorer_for(study)
    reported = []
    evaluations = 300 if rules is RULE_SETS[3] else 1500  # min-run is judged row by row: slower
    trace = genetic(study, scorer, Judge(study, []), s, evaluations=evaluations)
    reported.append(trace.runs)
    assert trace.evaluations >= evaluations and len(trace.curve) >= 1
    for runs in reported:
        assert check_runs(study, study.rules, runs) == []
        for run, n in zip(runs, study.facts.counts):
            assert np.bincount(run, minlength=4).tolist() == n.tolist()
    # the reported score is the design's own exact score
    assert scorer.score(trace.runs) == pytest.approx(trace.score, rel=1e-12)
    assert [b for _, b in trace.curve] == sorted(b for _, b in trace.curve)


def test_an_evaluation_count_makes_the_genetic_algorithm_deterministic():
    study = make_study([8, 8, 8, 6], RULE_SETS[1], runs=2, baseline=3)
    scorer, s = scorer_for(study)
    a = genetic(study, scorer, Judge(study, []), s, evaluations=2000)
    b = genetic(study, scorer, Judge(study, []), s, evaluations=2000)
    assert a.evaluations == b.evaluations and a.score == b.score
    assert all(np.array_equal(x, y) for x, y in zip(a.runs, b.runs))
    assert [v for _, v in a.curve] == [v for _, v in b.curve]
    c = genetic(study, scorer, Judge(study, []), s + 1, evaluations=2000)
    assert c.score != a.score or any(not np.array_equal(x, y) for x, y in zip(a.runs, c.runs))


def test_shuffle_and_reject_is_deterministic_and_counts_its_shuffles():
    study = make_study([6, 6, 6, 6], [{"kind": "max-run", "length": 2}], baseline=3)
    scorer, seed = scorer_for(study)
    a = shuffle_and_reject(study, scorer, Judge(study, []), seed, evaluations=1000)
    b = shuffle_and_reject(study, scorer, Judge(study, []), seed, evaluations=1000)
    assert a.tried == 1000 and 0 < a.evaluations < 1000 and a.score == b.score
    assert check_runs(study, study.rules, a.runs) == []


# (2, 1): the block reference of this spec rose 1.87 times when it came to search the whole block family
# (0.445 -> 0.830), which halved detection's pull at weights (1, 1); (2, 1) keeps the balance of
# detection and estimation this test was written for (at (1, 1) two of four GA runs now stop at 0.985)
@pytest.mark.parametrize("weights", [(1.0, 0.0, 0.0), (2.0, 1.0, 0.0)])
def test_the_genetic_algorithm_finds_the_optimum_of_a_tiny_spec_and_beats_random_valid_sampling(weights):
    # 4 + 4 + 3 trials: 11!/(4!4!3!) = 11,550 orderings (the multinomial coefficient), 7,342 with at
    # most 2 in a row; every valid one scored, as in tests/test_search.py
    study = make_study(
        [4, 4, 3], [{"kind": "max-run", "length": 2}], baseline=2, analysis={"fir_window": 6.0, "high_pass_cutoff": 0.0}
    )
    scorer, seed = scorer_for(study, weights)
    pool = np.repeat(np.arange(3), [4, 4, 3]).tolist()
    orderings = sorted(set(itertools.permutations(pool)))
    assert len(orderings) == math.factorial(11) // (24 * 24 * 6)
    valid = [d for d in ([np.array(o)] for o in orderings) if not check_runs(study, study.rules, d)]
    assert len(valid) == 7342
    scores = scorer.score_many(valid)
    best = scores.max()
    optima = int(np.sum(scores >= best * (1 - 1e-9)))
    assert optima == 2  # an ordering and its mirror image (reversed in time), as measured
    traces = [genetic(study, scorer, Judge(study, []), seed + k, evaluations=1500) for k in range(4)]
    found = [t.score >= best * (1 - 1e-9) for t in traces]
    assert all(t.score >= 0.99 * best for t in traces)
    # random valid sampling scoring as many designs (uniform draws with replacement) meets one of the
    # optima with probability 1 - (1 - optima / 7342)^draws (elementary probability), about 1 in 3
    draws = max(t.evaluations for t in traces)
    chance = 1 - (1 - optima / len(valid)) ** draws
    assert chance < 0.4 and sum(found) >= 3
    # and in 200 repetitions of it, it misses the optimum in most
    rng = np.random.default_rng(0)
    sampled = np.array([scores[rng.integers(len(scores), size=draws)].max() for _ in range(200)])
    assert np.mean(sampled < best * (1 - 1e-9)) > 0.55
