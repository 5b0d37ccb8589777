"""The steered search: valid by construction, monotone, deterministic, and optimal where that can be checked."""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from seqsolve.baselines import _crossover, genetic, shuffle_and_reject
from seqsolve.cli import app
from seqsolve.efficiency.setup import make_setup
from seqsolve.generate import design_study
from seqsolve.objective import References, Scorer, Weights
from seqsolve.search import Judge, Search, SearchOptions
from seqsolve.solve import check_runs, derive_seed, sample_orderings
from seqsolve.timing import draw_gaps, make_schedules
from tests.conftest import end_session, make_study

RULE_CHOICES = [
    {"kind": "max-run", "length": 2},
    {"kind": "balanced-transitions", "tolerance": 1},
    {"kind": "min-gap", "conditions": ["a"], "gap": 2},
    {"kind": "position", "conditions": ["c"], "placement": "always", "first": 1},
    {"kind": "forbidden-transition", "first": "a", "then": "b"},
    {"kind": "run-boundary"},
]


def scorer_for(study, weights=(1.0, 1.0, 0.0), seed=None):
    seed = derive_seed(study.spec.study.seed, 0) if seed is None else seed
    setup = make_setup(study)
    first = sample_orderings(study, seed, 1)[0]
    refs = References.for_study(study, setup, seed)
    return Scorer(study, Weights.of(*weights), refs, seed, draw_gaps(study, first, seed), setup), seed


def search(study, iterations, weights=(1.0, 1.0, 0.0), **kw):
    scorer, seed = scorer_for(study, weights)
    return Search(study, scorer, "01", seed, [], SearchOptions(iterations=iterations, stall=10**6, **kw)).run()


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    counts=st.lists(st.integers(3, 7), min_size=3, max_size=4),
    rules=st.lists(st.sampled_from(range(len(RULE_CHOICES))), max_size=3, unique=True),
    runs=st.integers(1, 2),
    seed=st.integers(0, 1000),
)
def test_every_searched_design_passes_every_rule_check(counts, rules, runs, seed):
    study = make_study(counts, [RULE_CHOICES[i] for i in rules], runs=runs, seed=seed, baseline=len(counts) - 1)
    try:
        scorer, s = scorer_for(study)
    except Exception as exc:  # an impossible random rule set: not this test's subject
        from seqsolve.errors import InfeasibleError, SolverTimeoutError

        if isinstance(exc, InfeasibleError | SolverTimeoutError):
            return
        raise
    seen = []
    res = Search(study, scorer, "01", s, [], SearchOptions(iterations=12, stall=10**6), seen.append).run()
    assert check_runs(study, study.rules, res.runs) == []
    for runs_, n in zip(res.runs, study.facts.counts):
        assert np.array_equal(np.bincount(runs_, minlength=len(n)), n)


def test_reported_best_only_rises_and_matches_an_exact_rescore():
    study = make_study([8, 8, 8, 8], [{"kind": "max-run", "length": 2}], baseline=3)
    scorer, seed = scorer_for(study)
    res = Search(study, scorer, "01", seed, [], SearchOptions(iterations=40, stall=10**6)).run()
    scores = [s for _, _, s in res.history]
    assert all(b > a for a, b in zip(scores, scores[1:]))
    assert res.figures.score == pytest.approx(scores[-1], rel=1e-9)
    # and the straightforward computation (reference.py, no fast path) gives the same figures
    from seqsolve.efficiency.reference import reference_scores

    layout = scorer.evaluator(res.runs).layout
    det, est = reference_scores(scorer.setup, layout, np.concatenate(res.runs))
    assert res.figures.detection == pytest.approx(det, rel=1e-9)
    assert res.figures.estimation == pytest.approx(est, rel=1e-9)


def test_same_seed_and_iteration_budget_give_the_same_design():
    study = make_study([6, 6, 6, 5], [{"kind": "max-run", "length": 2}, {"kind": "run-boundary"}], runs=2, baseline=3)
    a, b = search(study, 30), search(study, 30)
    assert all(np.array_equal(x, y) for x, y in zip(a.runs, b.runs))
    # the same steps improved by the same amounts (the seconds differ, of course)
    assert [(i, s) for i, _, s in a.history] == [(i, s) for i, _, s in b.history]


def all_orderings(counts):
    """Every distinct ordering of a multiset (itertools, deduplicated)."""
    pool = np.repeat(np.arange(len(counts)), counts)
    return sorted(set(itertools.permutations(pool.tolist())))


@pytest.mark.parametrize("weights", [(1.0, 0.0, 0.0), (0.0, 1.0, 0.0), (1.0, 1.0, 0.0)])
def test_finds_the_true_optimum_of_a_tiny_spec(weights):
    # 4 + 4 + 3 trials (11!/(4!4!3!) = 11,550 orderings, 7,342 with at most 2 in a row), short FIR
    # window; the starting pool alone stays well below the optimum (measured: 0.63 to 0.79 of it)
    study = make_study(
        [4, 4, 3],
        [{"kind": "max-run", "length": 2}],
        baseline=2,
        analysis={"fir_window": 6.0, "high_pass_cutoff": 0.0},
    )
    scorer, seed = scorer_for(study, weights)
    valid = [[np.array(o)] for o in all_orderings([4, 4, 3])]
    valid = [d for d in valid if not check_runs(study, study.rules, d)]
    best = scorer.score_many(valid).max()
    assert len(valid) == 7342
    res = Search(study, scorer, "01", seed, [], SearchOptions(iterations=150, stall=10**6)).run()
    assert res.figures.score == pytest.approx(best, rel=1e-9)


def test_ctrl_c_keeps_the_best_design_so_far():
    study = make_study([8, 8, 8, 8], [{"kind": "max-run", "length": 2}], baseline=3, participants=2)

    def interrupt(p):
        if p.iteration == 6:
            raise KeyboardInterrupt

    scorer, seed = scorer_for(study)
    res = Search(study, scorer, "01", seed, [], SearchOptions(iterations=100, stall=10**6), interrupt).run()
    assert res.stopped == "interrupted" and res.iterations == 6
    assert check_runs(study, study.rules, res.runs) == []
    designs = design_study(study, search=SearchOptions(iterations=100), on_step=interrupt)
    assert designs.interrupted and len(designs) == 2
    assert designs[0].search["stopped"] == "interrupted"
    assert designs[1].search["stopped"] == "not reached"  # not searched after the stop, but valid and scored
    assert designs[1].figures is not None
    assert any("interrupted" in n for n in designs.notes)


def test_participants_get_distinct_designs_within_the_spread():
    study = make_study(
        [6, 6, 6, 6],
        [{"kind": "max-run", "length": 2}, {"kind": "participants-differ"}],
        baseline=3,
        participants=3,
        objective={"iterations": 25, "spread": 0.03},
    )
    designs = design_study(study)
    keys = {tuple(np.concatenate(d.runs).tolist()) for d in designs}
    assert len(keys) == 3
    scores = [d.figures.score for d in designs]
    # a note about the spread exactly when it was not reached
    assert (min(scores) < 0.97 * max(scores)) == any("spread" in n for n in designs.notes)
    assert designs.spread() == pytest.approx(1 - min(scores) / max(scores))


def test_repeated_designs_are_searched_again_knowing_the_earlier_ones():
    # the tiny spec's optimum is reached from any seed, so participants searched on their own
    # collide; the pass in participant order searches each repeat again, excluding earlier designs
    from seqsolve.workers import Job, search_participant

    study = make_study(
        [4, 4, 3],
        [{"kind": "max-run", "length": 2}],
        baseline=2,
        participants=3,
        analysis={"fir_window": 6.0, "high_pass_cutoff": 0.0},
        objective={"iterations": 150, "stall": 60},
    )
    options = SearchOptions()
    refs = References.for_study(study, make_setup(study), derive_seed(study.spec.study.seed, 0))
    alone = [
        tuple(search_participant(study, refs, options, Job(i, label, derive_seed(0, i))).runs[0].tolist())
        for i, label in enumerate(study.participants)
    ]
    assert len(set(alone)) < 3  # the premise: on their own, some participants get the same design
    designs = design_study(study, search=options)
    keys = [tuple(d.runs[0].tolist()) for d in designs]
    assert len(set(keys)) == 3
    assert all(check_runs(study, study.rules, d.runs) == [] for d in designs)
    assert keys[0] == alone[0]  # the first participant has nobody to differ from


def test_worker_processes_give_the_same_designs():
    study = make_study(
        [8, 8, 8],
        [{"kind": "max-run", "length": 2}],
        baseline=2,
        participants=3,
        runs=2,
        objective={"iterations": 15},
    )
    one = design_study(study, search=SearchOptions(workers=1))
    two = design_study(study, search=SearchOptions(workers=2))
    assert [np.concatenate(d.runs).tolist() for d in one] == [np.concatenate(d.runs).tolist() for d in two]
    assert [d.figures.score for d in one] == [d.figures.score for d in two]


def test_jittered_gaps_are_only_rearranged():
    study = make_study(
        [5, 5, 5, 5],
        [{"kind": "max-run", "length": 2}],
        baseline=3,
        timing={
            "tr": 2.0,
            "trial_duration": 1.0,
            "iti": {"distribution": "uniform", "min": 1.0, "max": 5.0},
            "grid": 0.5,
            "volumes": 40,
        },
    )
    scorer, seed = scorer_for(study)
    res = Search(study, scorer, "01", seed, [], SearchOptions(iterations=40, stall=10**6)).run()
    drawn = draw_gaps(study, res.runs, seed)
    assert np.allclose(np.sort(res.gaps[0]), np.sort(drawn[0]))
    sched = make_schedules(study, res.runs, seed, res.gaps)[0]
    assert sched.length == pytest.approx(40 * 2.0)
    assert sched.onsets[-1] + sched.durations[-1] <= sched.length


def test_baselines_are_deterministic_and_valid():
    study = make_study([6, 6, 6, 6], [{"kind": "max-run", "length": 2}], baseline=3)
    scorer, seed = scorer_for(study)
    judge = Judge(study, [])
    a = shuffle_and_reject(study, scorer, judge, seed, evaluations=300)
    b = shuffle_and_reject(study, scorer, judge, seed, evaluations=300)
    assert a.score == b.score and check_runs(study, study.rules, a.runs) == []
    g = genetic(study, scorer, judge, seed, evaluations=400)
    assert check_runs(study, study.rules, g.runs) == [] and g.score >= g.curve[0][1]


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10**6))
def test_crossover_keeps_each_runs_counts(seed):
    rng = np.random.default_rng(seed)
    counts = rng.integers(1, 6, size=4)
    pool = np.repeat(np.arange(4), counts)
    a, b = [rng.permutation(pool)], [rng.permutation(pool)]
    child = _crossover(a, b, rng)
    assert np.array_equal(np.bincount(child[0], minlength=4), counts)


def test_detection_and_estimation_trade_off_along_the_front():
    # Liu, Frank, Wong & Buxton 2001 (NeuroImage 13:759-773): favouring detection costs estimation
    from seqsolve.tradeoff import trade_off_front

    study = make_study([20, 20, 20], [{"kind": "max-run", "length": 8}], baseline=2)
    points = trade_off_front(study, 3, SearchOptions(iterations=40, stall=10**6))
    first, last = points[0].figures, points[-1].figures
    assert first.detection > last.detection and last.estimation > first.estimation


def test_generate_writes_the_front_and_search_figures(tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text(
        """
[study]
name = "tiny"
task = "tiny"
participants = 2
[[conditions]]
name = "go"
trials = 8
[[conditions]]
name = "stop"
trials = 8
[[conditions]]
name = "rest"
trials = 8
baseline = true
[timing]
tr = 2.0
soa = 2.0
[[rules]]
kind = "max-run"
length = 2
[objective]
iterations = 10
"""
    )
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["generate", str(spec), "-o", str(out), "--front", "3"])
    assert result.exit_code == 0, result.output
    assert "detection vs block" in result.output
    front = (out / "front.tsv").read_text().splitlines()
    assert len(front) == 4 and front[0].startswith("point\tweight_detection")
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["objective"]["weights"]["detection"] == 0.5
    assert manifest["participants"][0]["search"]["iterations"] == 10


@pytest.mark.parametrize("workers, group", [(1, False), (2, False), (2, True)])
def test_ctrl_c_on_the_command_line_writes_the_best_designs_so_far(tmp_path, workers, group):
    # group: the signal goes to every process of the command, as a terminal's Ctrl-C does
    import os
    import signal
    import subprocess
    import sys

    spec = tmp_path / "s.toml"
    spec.write_text(
        '[study]\nname = "t"\ntask = "t"\nparticipants = 3\nruns = 2\n'
        '[[conditions]]\nname = "a"\ntrials = 20\n[[conditions]]\nname = "b"\ntrials = 20\n'
        '[[conditions]]\nname = "rest"\ntrials = 20\nbaseline = true\n'
        '[timing]\ntr = 2.0\nsoa = 2.0\n[[rules]]\nkind = "max-run"\nlength = 2\n'
        "[objective]\niterations = 100000\nstall = 100000\n"
    )
    out = tmp_path / "out"
    cmd = [sys.executable, "-c", "from seqsolve.cli import main; main()", "generate", str(spec), "-o", str(out)]
    cmd += ["--workers", str(workers)]
    # a session of its own, so that whatever happens no process of it outlives the test
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        for line in proc.stderr:  # wait until the search reports its first step, then press Ctrl-C
            if "best" in line:
                break
        if group:
            os.killpg(proc.pid, signal.SIGINT)
        else:
            proc.send_signal(signal.SIGINT)
        stdout, _ = proc.communicate(timeout=300)
    finally:
        end_session(proc)
    assert proc.returncode == 130, stdout  # the shell convention for a run cut short by SIGINT
    assert "interrupted" in stdout
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["objective"]["interrupted"] is True
    audit = CliRunner().invoke(app, ["audit", str(spec), str(out / "orderings.csv")])
    assert audit.exit_code == 0, audit.output


def test_searched_designs_stay_below_the_once_through_estimation_bound():
    # limits.py: presented once through, lag j has up to j extra baseline volumes per run, so the
    # periodic form of the bound is loosened; the optimiser is the hardest test of the bound
    from seqsolve.efficiency.limits import estimation_bound_identity

    study = make_study([16, 16, 16, 15], [], baseline=3, analysis={"fir_window": 10.0, "high_pass_cutoff": 0.0})
    res = search(study, 120, weights=(0.0, 1.0, 0.0))
    periodic = estimation_bound_identity([16, 16, 16], 63, 5)
    once = estimation_bound_identity([16, 16, 16], 63, 5, once_through_runs=1)
    assert res.figures.estimation <= once + 1e-12
    # measured when written: this search reached 0.5240, above the periodic form (0.5161), which
    # is why score.py uses the once-through bound for designs presented once
    assert once > periodic


def test_a_budget_alone_searches_until_it_runs_out_and_says_so():
    # the spec asks for one round; a budget given without a round count overrides it (issue 9)
    study = make_study([8, 8, 8, 8], [{"kind": "max-run", "length": 2}], baseline=3, objective={"iterations": 1})
    scorer, seed = scorer_for(study)
    res = Search(study, scorer, "01", seed, [], SearchOptions(budget=1.5, stall=10**6)).run()
    assert res.stopped == "budget"
    assert res.iterations > 1 and res.moves > 0 and res.judged > 0
    # with a round count as well, whichever ends first: here the rounds
    res = Search(study, scorer, "01", seed, [], SearchOptions(iterations=2, budget=600.0)).run()
    assert (res.stopped, res.iterations) == ("iterations", 2)


def test_budget_alone_searches_even_where_the_spec_asks_for_none(tmp_path):
    study = make_study([6, 6, 6], [{"kind": "max-run", "length": 2}], objective={"iterations": 0})
    designs = design_study(study, search=SearchOptions(budget=0.5, stall=10**6))
    info = designs[0].search
    assert info["stopped"] == "budget" and "wall-clock" in info["stopped_by"]
    assert info["swaps_judged"] > 0


def test_compiled_and_numpy_moves_reach_valid_designs_of_the_same_quality():
    # counterbalance weight sends every move through numpy and the Evaluator; without it the same
    # study runs on the compiled loop. Both must end valid and well above their start.
    study = make_study([10, 10, 10, 10], [{"kind": "max-run", "length": 2}], baseline=3)
    for weights in ((1.0, 1.0, 0.0), (1.0, 1.0, 0.2)):
        scorer, seed = scorer_for(study, weights)
        s = Search(study, scorer, "01", seed, [], SearchOptions(iterations=3, stall=10**6))
        res = s.run()
        assert Judge(study, []).ok(res.runs)
        assert res.figures.score == pytest.approx(scorer.score(res.runs), rel=1e-9)
        assert res.history[-1][2] > res.history[0][2]
        assert s.compiled == (weights[2] == 0.0)


def test_generate_and_score_divide_by_the_same_references(tmp_path):
    # one reference per study (issue 11): the manifest's shares and score's shares of the same
    # designs agree, jittered timing included (examples/word_reading.toml jitters its gaps)
    from pathlib import Path

    from seqsolve.generate import generate
    from seqsolve.score import score_files
    from seqsolve.spec import load_study

    study = load_study(Path(__file__).resolve().parents[1] / "examples" / "word_reading.toml")
    out = tmp_path / "designs"
    generate(study, out, search=SearchOptions(iterations=1))
    manifest = json.loads((out / "manifest.json").read_text())
    rows = {r.participant: r for r in score_files(study, [out / "orderings.csv"]) if r.run == "all"}
    for p in manifest["participants"]:
        row = rows[p["label"]]
        assert row.detection_vs_block == pytest.approx(p["score"]["detection_vs_block"], rel=1e-6)
        assert row.estimation_vs_random == pytest.approx(p["score"]["estimation_vs_random"], rel=1e-6)
