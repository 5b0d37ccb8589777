"""Scores kept through swaps (seqsolve.tracking, compiled in move_kernels) match the Evaluator and
the straightforward reference computation."""

from __future__ import annotations

import numpy as np
import pytest

from seqsolve import move_kernels
from seqsolve.efficiency.reference import reference_scores
from seqsolve.objective import References, Scorer, Weights
from seqsolve.solve import sample_orderings
from seqsolve.tracking import detection_track, fir_track, refresh, refresh_fir
from tests.conftest import make_study

CASES = {
    "fixed SOA, AR(1), drifts": dict(
        timing={"tr": 2.0, "soa": 3.0}, analysis={"ar1": 0.3, "fir_window": 12.0, "high_pass_cutoff": 64.0}
    ),
    "jittered, two runs, baseline": dict(
        timing={"tr": 1.5, "trial_duration": 1.0, "iti": {"distribution": "uniform", "min": 1.0, "max": 4.0}},
        analysis={"fir_window": 9.0, "contrasts": "all-pairs"},
        baseline=3,
        runs=2,
    ),
}


def _setting(name):
    kw = dict(CASES[name])
    study = make_study([9, 8, 7, 6], durations=[1.0, 1.0, 1.0, 0.5] if "baseline" in kw else None, **kw)
    runs = sample_orderings(study, 5, 1)[0]
    refs = References(1.0, 1, 1.0)
    scorer = Scorer(study, Weights.of(1.0, 1.0), refs, 5)
    return study, scorer, runs


@pytest.mark.parametrize("name", list(CASES))
def test_tracked_swap_scores_match_the_evaluator_and_the_reference(name):
    study, scorer, runs = _setting(name)
    codes = np.concatenate(runs).astype(np.int64)
    ev = scorer.evaluator(runs)
    det, fir = detection_track(ev, scorer.setup, codes), fir_track(ev, scorer.setup, codes)
    assert det is not None and fir is not None
    rng = np.random.default_rng(0)
    lengths = [len(r) for r in runs]
    starts = np.concatenate([[0], np.cumsum(lengths)])
    for _ in range(30):
        r = rng.integers(len(runs))
        pairs = starts[r] + rng.integers(0, lengths[r], size=(16, 2))
        pairs = pairs[codes[pairs[:, 0]] != codes[pairs[:, 1]]]
        want_d, want_e = ev.swap_scores(codes, pairs)
        np.testing.assert_allclose(move_kernels.detection_swap_scores(det, codes, pairs), want_d, rtol=1e-9)
        np.testing.assert_allclose(move_kernels.estimation_swap_scores(fir, codes, pairs), want_e, rtol=1e-9)
        i, j = pairs[0]
        move_kernels.detection_apply(det, codes, i, j)
        move_kernels.estimation_apply(fir, codes, i, j)
        codes[i], codes[j] = codes[j], codes[i]
    # after 30 updates the kept matrices equal those of the design computed afresh
    m_det, m_est = det.m.copy(), fir.m.copy()
    refresh(det, codes)
    refresh_fir(fir, codes)
    np.testing.assert_allclose(m_det, det.m, rtol=1e-9, atol=1e-9 * np.abs(det.m).max())
    np.testing.assert_allclose(m_est, fir.m, rtol=1e-9, atol=1e-9 * np.abs(fir.m).max())
    # and its efficiencies are the reference's, built the straightforward way (reference.py)
    chol = np.zeros_like(det.m)
    ref = reference_scores(scorer.setup, ev.layout, codes)
    assert move_kernels.a_efficiency(det.m, det.contrast, chol) == pytest.approx(ref[0], rel=1e-9)
    chol = np.zeros_like(fir.m)
    assert move_kernels.a_efficiency(fir.m, fir.contrast, chol) == pytest.approx(ref[1], rel=1e-9)
