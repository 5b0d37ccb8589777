"""Every fast path of the evaluator against the straightforward reference, to 1e-9 relative error."""

from __future__ import annotations

import numpy as np
import pytest

from seqsolve.efficiency import fast
from seqsolve.efficiency.fast import Evaluator
from seqsolve.efficiency.grid import make_layout
from seqsolve.efficiency.reference import reference_scores
from seqsolve.efficiency.setup import make_setup
from seqsolve.timing import make_schedules, trial_durations
from tests.conftest import make_study

CASES = {
    "plain": dict(counts=[8, 8, 8, 8], baseline=3, timing={"tr": 2.0, "soa": 2.0, "lead_in": 4.0, "lead_out": 12.0}),
    "two runs, drift, ar1": dict(
        counts=[6, 6, 6],
        baseline=2,
        runs=2,
        timing={"tr": 2.0, "soa": 3.0, "lead_out": 10.0},
        analysis={"ar1": 0.35, "drift_degree": 2, "high_pass_cutoff": 60.0},
    ),
    "derivative, own durations, D": dict(
        counts=[7, 7, 7],
        baseline=None,
        durations=[1.0, 2.5, 0.5],
        timing={"tr": 1.5, "soa": 3.0, "lead_out": 12.0},
        analysis={"hrf": "double-gamma-derivative", "criterion": "D", "contrasts": ["a - b", "(a + b)/2 - c"]},
    ),
    "jittered, wide FIR bins, offset": dict(
        counts=[8, 8, 8],
        baseline=2,
        timing={
            "tr": 2.0,
            "trial_duration": 1.0,
            "lead_out": 14.0,
            "iti": {"distribution": "uniform", "min": 0.5, "max": 3.5},
        },
        analysis={"fir_step": 4.0, "fir_window": 16.0, "sample_offset": 1.0},
    ),
    "custom hrf, pairs": dict(
        counts=[6, 6, 6, 6],
        baseline=None,
        timing={"tr": 2.0, "soa": 2.5, "lead_out": 12.0},
        analysis={"hrf": {"samples": [0, 0.3, 1, 0.7, 0.2, -0.1, 0], "step": 2.0}, "contrasts": "all-pairs"},
    ),
    # SOA half a TR: two trials share each volume at the same lag (no bitsets for FIR columns)
    "two trials per volume": dict(counts=[8, 8, 8], baseline=2, timing={"tr": 2.0, "soa": 1.0, "lead_out": 12.0}),
    # durations that are not whole samples of the grid: a last sample of fractional weight
    "partial samples": dict(
        counts=[7, 7, 7],
        baseline=None,
        durations=[0.03, 0.25, 1.37],
        timing={"tr": 2.0, "soa": 2.0, "lead_out": 12.0},
        analysis={"contrasts": ["a - b", "b - c"], "ar1": 0.2},
    ),
    # contrast rows whose first weights come in no order (the kernels reorder them)
    "contrasts out of order": dict(
        counts=[7, 7, 7, 7],
        baseline=3,
        timing={"tr": 2.0, "soa": 2.0, "lead_out": 12.0},
        analysis={"contrasts": ["c", "b - c", "a - b"]},
    ),
}


def build(case, seed=0):
    kw = dict(CASES[case])
    study = make_study(kw.pop("counts"), **kw)
    setup = make_setup(study)
    rng = np.random.default_rng(seed)
    runs = [rng.permutation(np.repeat(np.arange(study.facts.n_conditions), n)) for n in study.facts.counts]
    sched = make_schedules(study, runs, seed)
    layout = make_layout(setup, [s.onsets for s in sched], [s.n_volumes for s in sched], trial_durations(study))
    return study, setup, layout, np.concatenate(runs), rng


def close(a, b):
    return np.allclose(a, b, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("compiled", [True, False], ids=["numba", "numpy"])
@pytest.mark.parametrize("case", list(CASES))
def test_full_and_batched_scores_match_reference(case, compiled):
    study, setup, layout, codes, rng = build(case)
    ev = Evaluator(setup, layout, study.facts.n_conditions, compiled=compiled)
    designs = [codes] + [rng.permutation(codes) for _ in range(4)]
    det, est = ev.score_many(np.array(designs))
    for d, a, b in zip(designs, det, est):
        ref = reference_scores(setup, layout, d)
        assert close(a, ref[0]) and close(b, ref[1]), (a, b, ref)


@pytest.mark.parametrize("compiled", [True, False], ids=["numba", "numpy"])
@pytest.mark.parametrize("case", list(CASES))
def test_every_single_change_and_swap_matches_reference(case, compiled):
    study, setup, layout, codes, rng = build(case, seed=1)
    ev = Evaluator(setup, layout, study.facts.n_conditions, compiled=compiled)
    nb = ev.neighbours(codes)
    for i in rng.choice(len(codes), size=6, replace=False):
        for c in range(study.facts.n_conditions):
            changed = codes.copy()
            changed[i] = c
            ref = reference_scores(setup, layout, changed)
            assert close(nb.change_detection[i, c], ref[0]) and close(nb.change_estimation[i, c], ref[1])
    for s in rng.choice(len(nb.swap_pairs), size=8, replace=False):
        i, j = nb.swap_pairs[s]
        swapped = codes.copy()
        swapped[[i, j]] = swapped[[j, i]]
        ref = reference_scores(setup, layout, swapped)
        assert close(nb.swap_detection[s], ref[0]) and close(nb.swap_estimation[s], ref[1])


@pytest.mark.parametrize("case", list(CASES))
def test_direct_scores_of_single_designs_match_reference(case):
    # the search's path when onsets move with the labels: no Evaluator, the same numbers
    study, setup, layout, codes, rng = build(case)
    direct = fast.DirectScorer(setup)
    for d in [codes] + [rng.permutation(codes) for _ in range(3)]:
        a, b = direct.score(layout, d)
        ref = reference_scores(setup, layout, d)
        assert close(a, ref[0]) and close(b, ref[1]), (a, b, ref)


def test_cases_cover_every_compiled_estimation_kernel():
    kinds = {}
    for case in CASES:
        study, setup, layout, _, _ = build(case)
        ev = Evaluator(setup, layout, study.facts.n_conditions)
        kind = {"FirBitsEstimation": "bits", "FirHitsEstimation": "hits", "MatrixScores": "numpy"}[
            type(ev.full_estimation).__name__
        ]
        kinds.setdefault(kind, []).append(case)
    assert set(kinds) == {"bits", "hits", "numpy"}, kinds
    assert "two runs, drift, ar1" in kinds["bits"]  # AR(1) weights through the masks


@pytest.mark.parametrize("shared", [True, False], ids=["shared factor", "whole factor"])
@pytest.mark.parametrize("case", list(CASES))
def test_compiled_neighbours_equal_numpy_ones_everywhere(case, shared, monkeypatch):
    # every candidate, both ways the compiled kernels factorise (the numpy path is held to the
    # reference above): through the untouched blocks' shared factor, or one whole factor each
    monkeypatch.setattr(fast, "SCHUR_MIN", 1 if shared else 10**9)
    monkeypatch.setattr(fast, "SCHUR_MIN_COLUMNS", 1 if shared else 10**9)
    study, setup, layout, codes, rng = build(case, seed=2)
    a = Evaluator(setup, layout, study.facts.n_conditions, compiled=True).neighbours(codes)
    b = Evaluator(setup, layout, study.facts.n_conditions, compiled=False).neighbours(codes)
    for name in ("change_detection", "change_estimation", "swap_detection", "swap_estimation"):
        assert close(getattr(a, name), getattr(b, name)), name


@pytest.mark.parametrize("case", ["plain", "partial samples"])
@pytest.mark.parametrize("compiled", [True, False], ids=["numba", "numpy"])
def test_circular_presentation_matches_reference(compiled, case):
    study, setup, layout, codes, rng = build(case)
    ev = Evaluator(setup, layout, study.facts.n_conditions, circular=True, compiled=compiled)
    if compiled:  # responses wrap round the run: some overlapping trials lie far apart in the list
        assert len(ev.full_detection.far_i) > 0
    designs = np.array([codes] + [rng.permutation(codes) for _ in range(3)])
    det, est = ev.score_many(designs)
    for d, a, b in zip(designs, det, est):
        ref = reference_scores(setup, layout, d, circular=True)
        assert close(a, ref[0]) and close(b, ref[1]), (a, b, ref)


def test_singular_design_scores_zero_not_garbage():
    # a, b alternating every volume with a 20 s FIR window: the lag columns repeat, X'X is singular
    study = make_study([20, 20], timing={"tr": 2.0, "soa": 2.0}, analysis={"high_pass_cutoff": 0})
    setup = make_setup(study)
    codes = np.tile([0, 1], 20)
    sched = make_schedules(study, [codes], 0)
    layout = make_layout(setup, [sched[0].onsets], [sched[0].n_volumes], trial_durations(study))
    for compiled in (True, False):
        det, est = Evaluator(setup, layout, 2, compiled=compiled).score(codes)
        assert est == 0.0
        assert np.isfinite(det)
        nb = Evaluator(setup, layout, 2, compiled=compiled).neighbours(codes)
        assert np.isfinite(nb.swap_estimation).all() and (nb.swap_estimation >= 0).all()


def dense_filtered(setup, layout, x, circular=False):
    """The dense construction the evaluator used to make (and the reference still does): the
    whole-model nuisance basis by one SVD, prewhitening of dense columns, projection."""
    from seqsolve.efficiency.nuisance import block_nuisance, residual_basis, whiten

    q = residual_basis(
        whiten(
            block_nuisance(layout.run_lengths, setup.tr, setup.high_pass_cutoff, setup.drift_degree),
            setup.ar1,
            layout.run_lengths,
        )
    )
    xw = whiten(x, setup.ar1, layout.run_lengths)
    return xw - q @ (q.T @ xw), q


@pytest.mark.parametrize("circular", [False, True], ids=["once", "circular"])
@pytest.mark.parametrize("case", list(CASES))
def test_sparse_per_run_construction_equals_the_dense_one(case, circular):
    # the evaluator keeps W R sparse and the nuisance basis per run; the dense whole-model
    # construction (reference.py's design matrices, filtered) must give the same matrices
    from seqsolve.efficiency.nuisance import whiten
    from seqsolve.efficiency.reference import detection_matrix, fir_matrix

    study, setup, layout, codes, rng = build(case, seed=3)
    ev = Evaluator(setup, layout, study.facts.n_conditions, circular=circular, compiled=False)
    xd, q = dense_filtered(setup, layout, detection_matrix(setup, layout, codes, circular))
    xe, _ = dense_filtered(setup, layout, fir_matrix(setup, layout, codes, circular))
    assert np.allclose(ev.q @ ev.q.T, q @ q.T, rtol=0, atol=1e-12)  # the same nuisance space
    assert np.allclose(ev.det.design(codes[None])[0], xd, rtol=1e-9, atol=1e-12)
    assert np.allclose(ev.est.design(codes[None])[0], xe, rtol=1e-9, atol=1e-12)
    md, me = ev.information(codes)
    assert close(md, xd.T @ xd) and close(me, xe.T @ xe)
    # all trials' products, summed by label, give the information again: Z' G Z = X'X
    for part, x in ((ev.det, xd), (ev.est, xe)):
        n, nb = part.n_trials, part.nb
        z = sum(part._labels(codes, g) for g in range(len(part.whitened)))
        if len(part.whitened) == 1:
            gram = part.gram()[0, 0].reshape(n * nb, n * nb)
            assert close(z.T @ gram @ z, x.T @ x)
            own = part.own()[0, 0]
            assert close(own, np.einsum("ibic->ibc", part.gram()[0, 0]))
    # Omega = W'(I - QQ')W, once built from dense matrices over all volumes
    eye = whiten(np.eye(layout.n_scans), setup.ar1, layout.run_lengths)
    rw = eye - q @ (q.T @ eye)
    assert np.allclose(ev.omega, rw.T @ rw, rtol=0, atol=1e-12)


def test_memory_of_an_evaluator_grows_linearly_with_the_trials():
    # no volumes x trials dense object is kept: bytes held per trial stay put as runs grow 4-fold
    # (counted from the evaluator's arrays, not timed; the products only neighbour scores read are
    # built on demand). Without a high-pass filter: its cosines add columns to Q as runs grow, so
    # Q (volumes x cosines) itself grows faster than the trials. The dense construction held
    # 35 kB per trial at 60 trials a condition and 139 kB at 240 (measured when it was replaced).
    def held(n):
        study = make_study(
            [n, n, n], baseline=2, runs=2, timing={"tr": 2.0, "soa": 2.0}, analysis={"high_pass_cutoff": 0}
        )
        setup = make_setup(study)
        runs = [np.tile([0, 1, 2], n) for _ in range(2)]
        sched = make_schedules(study, runs, 0)
        layout = make_layout(setup, [s.onsets for s in sched], [s.n_volumes for s in sched], trial_durations(study))
        ev = Evaluator(setup, layout, 3)
        return sum(v.nbytes for v in _arrays(ev)) / layout.n_trials

    small, large = held(60), held(240)
    assert large < 1.1 * small, (small, large)


def _arrays(obj, seen=None):
    """Every numpy array and sparse matrix reachable from obj's attributes (tuples, lists, parts)."""
    from scipy import sparse

    seen = set() if seen is None else seen
    if id(obj) in seen:
        return
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        yield obj
    elif sparse.issparse(obj):
        yield from (obj.data, obj.indices, obj.indptr)
    elif isinstance(obj, (tuple, list)):
        for v in obj:
            yield from _arrays(v, seen)
    elif hasattr(obj, "__dict__") and type(obj).__module__.startswith("seqsolve"):
        for v in vars(obj).values():
            yield from _arrays(v, seen)
