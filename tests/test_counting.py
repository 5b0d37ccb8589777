"""Conflicts proven by counting: named at once, with the arithmetic, and only the rules that conflict."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from ortools.sat.python import cp_model
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.counting import counting_conflict
from seqsolve.errors import InfeasibleError
from seqsolve.model import OrderingModel
from seqsolve.rules import BalancedTransitions, BalancedTriples, ForbiddenTransition, MaxRun, MinGap
from seqsolve.solve import SolveOptions, generate_orderings
from seqsolve.spec import load_study
from tests.conftest import counts_model_feasible, make_study

runner = CliRunner()

SPEC = """
[study]
name = "oddball"
task = "odd"
participants = 2
[[conditions]]
name = "rare"
trials = 6
[[conditions]]
name = "common"
trials = 60
[timing]
tr = 2.0
soa = 1.0
[[rules]]
kind = "min-gap"
conditions = ["rare"]
gap = 12
[[rules]]
kind = "max-run"
length = 20
conditions = ["common"]
"""
NEVER_FIRST = '[[rules]]\nkind = "position"\nconditions = ["rare"]\nplacement = "never"\nfirst = 3\n'


def check(tmp_path, text):
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    return runner.invoke(app, ["check", str(spec), "--time-limit", "20"])


def test_rare_trials_spaced_beyond_the_open_positions_are_named_by_counting(tmp_path):
    # pigeonhole: 6 trials with 12 others between any two take 5 x 13 + 1 = 66 positions; the run has
    # 66, of which the position rule leaves 63 open
    result = check(tmp_path, SPEC + NEVER_FIRST)
    assert result.exit_code == 1, result.output
    assert "= 66 positions; run 1 has 66, of which 63 are open" in result.output
    assert "rules[1]" in result.output and "rules[3]" in result.output
    assert "rules[2]" not in result.output, "the max-run rule has nothing to do with it"
    assert "dropping any one of them makes the rest possible" in result.output


@pytest.mark.parametrize("text", [SPEC, SPEC.replace("gap = 12", "gap = 11") + NEVER_FIRST], ids=["no-trim", "gap-11"])
def test_the_counted_bound_is_tight(tmp_path, text):
    # with 66 open positions (or a gap of 11: 5 x 12 + 1 = 61 <= 63) the solver finds an ordering,
    # so the count above is no stricter than the truth
    result = check(tmp_path, text)
    assert result.exit_code == 0, result.output


def test_more_participants_than_distinct_orderings_is_named_by_counting(tmp_path):
    # the multinomial coefficient: 4 trials a, a, b, b have 4! / (2! 2!) = 6 orderings, too few for 7
    text = (
        '[study]\nname = "t"\ntask = "t"\nparticipants = 7\n'
        '[[conditions]]\nname = "a"\ntrials = 2\n[[conditions]]\nname = "b"\ntrials = 2\n'
        '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "participants-differ"\n[objective]\niterations = 0\n'
    )
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    result = runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out")])
    assert result.exit_code == 1, result.output
    assert "4! / (2! 2!) = 6 distinct ordering(s) for 7 participants" in result.output
    assert "cannot all hold" in result.output and not (tmp_path / "out").exists()
    spec.write_text(text.replace("participants = 7", "participants = 6"))  # exactly enough: all six found
    assert runner.invoke(app, ["generate", str(spec), "-o", str(tmp_path / "out6")]).exit_code == 0


# max-run against a target's share of the run

OUTCOMES = """
[study]
name = "outcomes"
task = "out"
participants = 1
[[conditions]]
name = "gain"
trials = {gain}
levels = {{ valence = "positive" }}
[[conditions]]
name = "bonus"
trials = {bonus}
levels = {{ valence = "positive" }}
[[conditions]]
name = "loss"
trials = {loss}
levels = {{ valence = "negative" }}
[timing]
tr = 2.0
soa = 1.0
[[rules]]
kind = "max-run"
length = 2
conditions = ["valence=positive"]
[[rules]]
kind = "max-run"
length = 3
conditions = ["loss"]
[objective]
iterations = 0
"""


def test_a_factor_level_too_common_to_break_up_is_named_by_counting(tmp_path):
    # pigeonhole: 35 positive trials (20 gain + 15 bonus), at most 2 in a row, fall in at least 18
    # stretches, which need 17 separating trials; the run has 50 - 35 = 15. Each condition alone
    # (20 or 15 of 50) would fit, so only counting the level's codes together finds this
    result = check(tmp_path, OUTCOMES.format(gain=20, bonus=15, loss=15))
    assert result.exit_code == 1, result.output
    assert "'valence=positive' has 35 of 50 trials in run 1" in result.output
    assert "ceil(35 / 2) - 1 = 17 other trials to break them up, but the run has 50 - 35 = 15" in result.output
    assert "rules[1]" in result.output and "rules[2]" not in result.output
    assert "dropping any one of them makes the rest possible" in result.output


def test_a_factor_level_exactly_at_the_bound_is_not_claimed_impossible(tmp_path):
    # n = L (N - n + 1): 12 = 2 x (17 - 12 + 1); 6 stretches of 2 with the 5 losses between them (the
    # only shape there is, so the solver meets the bound head-on)
    text = OUTCOMES.format(gain=7, bonus=5, loss=5)
    result = check(tmp_path, text)
    assert result.exit_code == 0, result.output
    spec = tmp_path / "edge.toml"
    spec.write_text(text)
    study = load_study(spec)
    assert counting_conflict(study) is None
    (run,) = generate_orderings(study)[0].runs
    positive = np.isin(run, [study.facts.code("gain"), study.facts.code("bonus")])
    longest = max(len(s) for s in "".join("p" if x else "." for x in positive).split("."))
    assert longest == 2 and positive.sum() == 12


def test_max_run_counting_agrees_with_the_solver_on_small_runs():
    # a single condition under max-run L: counting claims a conflict exactly when CP-SAT proves one
    for n, rest, length in [(6, 4, 1), (5, 4, 1), (7, 2, 2), (6, 2, 2), (9, 2, 3)]:
        study = make_study([n, rest], [MaxRun(kind="max-run", length=length, conditions=["a"])])
        claimed = counting_conflict(study) is not None
        assert claimed == (n > length * (rest + 1)), (n, rest, length)
        if claimed:  # the transition-count model without connectivity is a relaxation: its "no" is a proof
            assert counts_model_feasible(study.facts, study.rules) is False
        else:
            generate_orderings(study)


# balanced transitions against pairs that may never stand side by side

VALENCE = """
[study]
name = "valence"
task = "val"
participants = 1
[[conditions]]
name = "gain"
trials = {n}
[[conditions]]
name = "loss"
trials = {n}
[[conditions]]
name = "neutral"
trials = {n}
[timing]
tr = 2.0
soa = 2.0
[[rules]]
kind = "max-run"
length = 4
[[rules]]
kind = "balanced-transitions"
tolerance = 1
[[rules]]
kind = "forbidden-transition"
first = "loss"
then = "gain"
[objective]
iterations = 0
"""


def test_balance_needing_a_forbidden_pair_is_named_by_counting(tmp_path):
    # 7 of each among 21 trials: 20 transitions, 'loss' then 'gain' ideally 20 x 7 x 7 / 21^2 = 2.22
    # times, so at least 2 - 1 = 1 with tolerance 1; the forbidden transition allows 0
    result = check(tmp_path, VALENCE.format(n=7))
    assert result.exit_code == 1, result.output
    assert "run 1 needs 'loss' then 'gain' at least floor(2.22) - 1 = 1 time(s)" in result.output
    assert "but rules[3] never lets 'loss' be directly followed by 'gain'" in result.output
    assert "rules[2]" in result.output and "rules[3]" in result.output
    assert "rules[1]" not in result.output, "the max-run rule has nothing to do with it"
    assert "found by counting" in result.output


def test_balance_whose_lower_bound_reaches_zero_is_left_to_the_solver(tmp_path):
    # 6 of each: ideal 17 x 36 / 324 = 1.89, at least 1 - 1 = 0: a design without 'loss' then 'gain' exists
    result = check(tmp_path, VALENCE.format(n=6))
    assert result.exit_code == 0, result.output
    spec = tmp_path / "edge.toml"
    spec.write_text(VALENCE.format(n=6))
    study = load_study(spec)
    assert counting_conflict(study) is None
    (run,) = generate_orderings(study)[0].runs
    loss, gain = study.facts.code("loss"), study.facts.code("gain")
    assert not ((run[:-1] == loss) & (run[1:] == gain)).any()


FORBID_AB = ForbiddenTransition(kind="forbidden-transition", first="a", then="b")
BALANCED = BalancedTransitions(kind="balanced-transitions", tolerance=1)


@pytest.mark.parametrize(
    "counts, runs, rules, claimed",
    [
        # repeats: a then a ideally 20 x 49 / 441 = 2.22 times, at least 1; max-run 1 and min-gap forbid it
        ([7, 7, 7], 1, [BALANCED, MaxRun(kind="max-run", length=1)], True),
        ([7, 7, 7], 1, [BALANCED, MinGap(kind="min-gap", conditions=["b"], gap=2)], True),
        # with repeats left out of the balance, the diagonal is free
        (
            [7, 7, 7],
            1,
            [BALANCED.model_copy(update={"exclude_repeats": True}), MaxRun(kind="max-run", length=1)],
            False,
        ),
        # a factor level: 'f=x' (a and b) never followed by c forbids a->c and b->c, both needed once
        ([7, 7, 7], 1, [BALANCED, ForbiddenTransition(kind="forbidden-transition", first="f=x", then="c")], True),
        # across runs: 2 x 11 x 16 / 144 = 2.44 summed, at least 1; in each run alone 1.22, at least 0
        ([4, 4, 4], 2, [BALANCED.model_copy(update={"across_runs": True}), FORBID_AB], True),
        ([4, 4, 4], 2, [BALANCED, FORBID_AB], False),
        # cyclic: 21 x 49 / 441 = 2.33, at least 1, which the wrap from last trial to first can give
        ([7, 7, 7], 1, [BALANCED.model_copy(update={"cyclic": True}), FORBID_AB], False),
    ],
    ids=["max-run-1", "min-gap", "exclude-repeats", "factor-level", "across-runs", "per-run", "cyclic"],
)
def test_pair_counting_cases(counts, runs, rules, claimed):
    study = make_study(counts, rules, runs=runs, grouped=True)
    found = counting_conflict(study)
    assert (found is not None) == claimed
    if claimed:
        # an independent proof where the rules can be said on pair counts (a relaxation: "no" is a proof)
        assert counts_model_feasible(study.facts, study.rules) in (False, None)
        assert found.proven and not found.minimal, "each rule alone was not tried: no smallest-set claim"
        assert [i for i, _, _ in found.rules] == [0, 1]
    else:
        generate_orderings(study, SolveOptions(time_limit=20))  # and the solver agrees it can hold


def test_across_runs_the_sentence_sums_the_runs():
    # 2 runs of 11 transitions: 'a' then 'b' ideally 2 x 11 x 16 / 144 = 2.44 times, at least 2 - 1 = 1
    study = make_study([4, 4, 4], [BALANCED.model_copy(update={"across_runs": True}), FORBID_AB], runs=2)
    sentence = counting_conflict(study).rules[0][2]
    assert "runs 1 to 2 together need 'a' then 'b' at least floor(2.44) - 1 = 1 time(s)" in sentence


RULE_CHOICES = [
    MaxRun(kind="max-run", length=1, conditions=["a"]),
    MaxRun(kind="max-run", length=2),
    MaxRun(kind="max-run", length=2, conditions=["f=x"]),
    BALANCED,
    BalancedTransitions(kind="balanced-transitions", tolerance=0, across_runs=True),
    BalancedTransitions(kind="balanced-transitions", tolerance=0, cyclic=True),
    FORBID_AB,
    ForbiddenTransition(kind="forbidden-transition", first="f=x", then="c"),
    MinGap(kind="min-gap", conditions=["b"], gap=1),
]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    st.lists(st.integers(1, 6), min_size=3, max_size=3),
    st.integers(1, 2),
    st.lists(st.sampled_from(RULE_CHOICES), min_size=1, max_size=3, unique_by=id),
)
def test_counting_claims_only_what_the_solver_proves(counts, runs, rules):
    # soundness: whenever counting names a conflict, the full per-position model (which counting
    # never sees) is infeasible too
    study = make_study(counts, rules, runs=runs, grouped=True)
    claimed = counting_conflict(study) is not None
    event(f"counting claims a conflict: {claimed}")
    if not claimed:
        return
    m = OrderingModel(study.facts)
    for rule in study.rules:
        g = m.new_guard("r")
        m.cp.add(g == 1)
        rule.encode(m, g)
    solver = cp_model.CpSolver()
    solver.parameters.num_workers = 1
    solver.parameters.max_time_in_seconds = 20
    assert solver.solve(m.cp) == cp_model.INFEASIBLE


# balanced triples against pairs that may never stand side by side


def test_triple_balance_needing_a_repeat_that_max_run_forbids_is_named_by_counting(tmp_path):
    # 12 of each among 36 trials: 34 triples, 'gain' 'gain' 'loss' ideally 34 / 27 = 1.26 times, so at
    # least 1 with tolerance 0; max-run 1 never lets two trials of 'gain' stand side by side
    text = (
        VALENCE.format(n=12)
        .replace('kind = "balanced-transitions"\ntolerance = 1', 'kind = "balanced-triples"\ntolerance = 0')
        .replace("length = 4", "length = 1")
    )
    result = check(tmp_path, text)
    assert result.exit_code == 1, result.output
    assert "run 1 needs 'gain' then 'gain' then 'gain' at least floor(1.26) - 0 = 1 time(s)" in result.output
    assert "but rules[1] never lets those trials stand side by side" in result.output
    assert "rules[3]" not in result.output, "the forbidden transition has nothing to do with it"


# 12 of each: 34 triples, ideal 34 / 27 = 1.26 -> at least 1 of 'b' 'a' 'x' with tolerance 0; 9 of each: 25
# triples, ideal 0.93 -> at least 0; cyclic: the two wrapping triples could give up to 2, so nothing is claimed
TRIPLE_CASES = [
    (12, 0, False, False, True),
    (12, 0, False, True, True),  # 'b' 'a' 'c' has no direct repeat: still bounded below
    (12, 1, False, False, False),
    (9, 0, False, False, False),
    (12, 0, True, False, False),
]


@pytest.mark.parametrize("n, tolerance, cyclic, exclude, expected", TRIPLE_CASES)
def test_triple_counting_claims_only_what_the_solver_proves(n, tolerance, cyclic, exclude, expected):
    rules = [
        ForbiddenTransition(kind="forbidden-transition", first="b", then="a"),
        BalancedTriples(kind="balanced-triples", tolerance=tolerance, cyclic=cyclic, exclude_repeats=exclude),
    ]
    study = make_study([n, n, n], rules)
    claimed = counting_conflict(study) is not None
    assert claimed == expected
    try:
        generate_orderings(study, SolveOptions(method="positions", time_limit=60))
        feasible = True
    except InfeasibleError:
        feasible = False
    assert not (claimed and feasible), "counting claimed a conflict the solver met"
