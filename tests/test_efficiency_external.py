"""The efficiency engine against the outside world: analytic HRF facts, nilearn, m-sequences, published trade-offs."""

from __future__ import annotations

import warnings

import galois
import numpy as np
import pandas as pd
import pytest
from scipy import optimize
from scipy.signal import max_len_seq

from seqsolve.blocks import block_ordering
from seqsolve.efficiency.fast import Evaluator
from seqsolve.efficiency.grid import make_layout
from seqsolve.efficiency.hrf import double_gamma, sampled_hrf
from seqsolve.efficiency.limits import (
    detection_bound_one_type,
    estimation_bound_any_allocation,
    estimation_bound_identity,
    estimation_bound_pairwise,
)
from seqsolve.efficiency.nuisance import cosine_drift
from seqsolve.efficiency.reference import detection_matrix, fir_matrix, reference_scores
from seqsolve.efficiency.setup import make_setup
from seqsolve.io.tables import events_tsv
from seqsolve.timing import make_schedules, trial_durations
from tests.conftest import make_study

# --- the canonical HRF: values derived from scipy.stats.gamma (checked by solving, not copied) ---


def test_double_gamma_landmarks():
    peak = optimize.minimize_scalar(
        lambda t: -double_gamma(t), bounds=(2, 8), method="bounded", options={"xatol": 1e-8}
    )
    assert peak.x == pytest.approx(4.9985, abs=5e-4)
    assert double_gamma(peak.x) == pytest.approx(0.175441, abs=1e-6)
    zero = optimize.brentq(double_gamma, 8, 14)
    assert zero == pytest.approx(12.0655, abs=5e-4)
    low = optimize.minimize_scalar(double_gamma, bounds=(12, 20), method="bounded", options={"xatol": 1e-8})
    assert low.x == pytest.approx(15.749, abs=1e-3)
    # area: 1 - 1/6 (each gamma density integrates to 1)
    t = np.arange(0, 60, 0.001)
    assert double_gamma(t).sum() * 0.001 == pytest.approx(5 / 6, abs=1e-4)
    # our kernel (cut at 32 s) is scaled so what is kept has unit area: a long block's plateau is 1
    h = sampled_hrf(0.1)[0]
    assert h.sum() * 0.1 == pytest.approx(1.0, abs=1e-12)


def test_gamma_density_equals_scipy_stats():
    # hrf.gamma_pdf writes out the density so that scipy.stats need not be imported; scipy's own
    # scipy.stats.gamma.pdf is the judge (shape 6 and 16, unit scale: the canonical HRF's two parts)
    from scipy import stats

    from seqsolve.efficiency.hrf import gamma_pdf

    t = np.concatenate([[-1.0, 0.0, 1e-12], np.arange(0.05, 60.0, 0.05)])
    for shape in (1.0, 6.0, 16.0):
        assert np.allclose(gamma_pdf(t, shape), stats.gamma.pdf(t, shape), rtol=1e-12, atol=1e-300)


def test_matches_nilearn_spm_hrf_up_to_its_rounded_ratio():
    from nilearn.glm.first_level import spm_hrf

    tr, over = 2.0, 50
    dt = tr / over
    theirs = spm_hrf(tr, oversampling=over)
    times = np.linspace(0, 32.0, np.rint(32.0 / dt).astype(int)) - dt  # nilearn shifts by loc = dt
    ours = double_gamma(times)
    # nilearn uses an undershoot ratio of 0.167 instead of 1/6: after peak-normalising, the shapes
    # differ by (0.167 - 1/6) * undershoot / peak, about 2e-4 at most
    diff = np.abs(ours / ours.max() - theirs / theirs.max()).max()
    assert 1e-4 < diff < 3e-4


def test_cosine_drift_equals_nilearn():
    from nilearn.glm.first_level import make_first_level_design_matrix

    frames = np.arange(240) * 2.0
    dm = make_first_level_design_matrix(frames, events=None, drift_model="cosine", high_pass=1 / 128)
    theirs = dm.to_numpy()
    ours = cosine_drift(240, 2.0, 128.0)
    assert ours.shape[1] == 7 and theirs.shape[1] == 8  # 7 cosines + constant
    assert np.abs(ours - theirs[:, :7]).max() < 1e-12


def test_detection_agrees_with_nilearn_design_matrix_on_our_events_file(tmp_path):
    from nilearn.glm.first_level import make_first_level_design_matrix

    study = make_study(
        [20, 20, 20],
        baseline=2,
        timing={"tr": 2.0, "soa": 4.0, "lead_out": 16.0},
        durations=[2.0, 2.0, 2.0],
        analysis={"contrasts": ["a - b", "a + b"]},
    )
    rng = np.random.default_rng(3)
    runs = [rng.permutation(np.repeat([0, 1, 2], 20))]
    (sched,) = make_schedules(study, runs, 0)
    path = tmp_path / "sub-01_task-t_run-1_events.tsv"
    path.write_text(events_tsv(study, sched))
    events = pd.read_csv(path, sep="\t")  # the file we write is a BIDS events table pandas reads
    frames = np.arange(sched.n_volumes) * 2.0
    dm = make_first_level_design_matrix(frames, events, hrf_model="spm", drift_model="cosine", high_pass=1 / 128)
    x = dm[["a", "b"] + [c for c in dm.columns if c not in ("a", "b")]].to_numpy()
    cov = np.linalg.inv(x.T @ x)[:2, :2]
    c = np.array([[1.0, -1.0], [1.0, 1.0]])
    theirs = 1 / np.trace(c @ cov @ c.T)
    setup = make_setup(study)
    layout = make_layout(setup, [sched.onsets], [sched.n_volumes], trial_durations(study))
    ours = Evaluator(setup, layout, 3).score(np.concatenate(runs))[0]
    # both scale the response so a sustained block reaches 1 (nilearn: kernel sums to 1 on its grid)
    assert ours == pytest.approx(theirs, rel=5e-3)


def test_runs_agree_with_nilearn_design_matrices_stacked_run_by_run():
    # several runs: nilearn builds one design matrix per run (its own intercept and cosine drifts);
    # the study's model is those matrices stacked block-diagonally in the nuisance columns, which
    # our evaluator reproduces from its per-run nuisance bases
    from nilearn.glm.first_level import make_first_level_design_matrix
    from scipy.linalg import block_diag

    study = make_study(
        [12, 12, 12],
        baseline=2,
        runs=3,
        timing={"tr": 2.0, "soa": 4.0, "lead_out": 16.0},
        durations=[2.0, 2.0, 2.0],
        analysis={"contrasts": ["a - b", "a + b"], "high_pass_cutoff": 64.0},
    )
    rng = np.random.default_rng(5)
    runs = [rng.permutation(np.repeat([0, 1, 2], 12)) for _ in range(3)]
    scheds = make_schedules(study, runs, 0)
    tasks, drifts = [], []
    for sched in scheds:
        onsets = np.asarray(sched.onsets)
        keep = np.asarray(sched.codes) != 2
        events = pd.DataFrame(
            {"onset": onsets[keep], "duration": 2.0, "trial_type": np.array(["a", "b"])[np.asarray(sched.codes)[keep]]}
        )
        frames = np.arange(sched.n_volumes) * 2.0
        dm = make_first_level_design_matrix(frames, events, hrf_model="spm", drift_model="cosine", high_pass=1 / 64)
        tasks.append(dm[["a", "b"]].to_numpy())
        drifts.append(dm.drop(columns=["a", "b"]).to_numpy())
    x = np.hstack([np.vstack(tasks), block_diag(*drifts)])
    cov = np.linalg.inv(x.T @ x)[:2, :2]
    c = np.array([[1.0, -1.0], [1.0, 1.0]])
    theirs = 1 / np.trace(c @ cov @ c.T)
    setup = make_setup(study)
    layout = make_layout(setup, [s.onsets for s in scheds], [s.n_volumes for s in scheds], trial_durations(study))
    codes = np.concatenate(runs)
    ours = Evaluator(setup, layout, 3).score(codes)[0]
    # nilearn's HRF differs from ours by its rounded undershoot ratio (see above): 5e-3 as there
    assert ours == pytest.approx(theirs, rel=5e-3)
    assert ours == pytest.approx(reference_scores(setup, layout, codes)[0], rel=1e-9)


# --- m-sequences ---


def gf_m_sequence(q: int, n: int) -> np.ndarray:
    """A q-ary m-sequence of length q^n - 1 from galois' Fibonacci LFSR of a primitive polynomial."""
    poly = galois.primitive_poly(q, n)
    return np.asarray(galois.FLFSR(poly.reverse()).step(q**n - 1)).astype(np.int64)


def fir_setup(counts, lags, baseline=0, high_pass=0):
    study = make_study(
        counts,
        baseline=baseline,
        timing={"tr": 2.0, "soa": 2.0},
        analysis={"fir_window": 2.0 * lags, "high_pass_cutoff": high_pass},
    )
    return study, make_setup(study)


def evaluator_for(study, setup, seq, circular):
    (sched,) = make_schedules(study, [seq], 0)
    layout = make_layout(setup, [sched.onsets], [sched.n_volumes], trial_durations(study))
    return Evaluator(setup, layout, study.facts.n_conditions, circular=circular), layout


@pytest.mark.parametrize("q, n", [(3, 4), (4, 3), (5, 2)])
def test_galois_m_sequences_have_shift_and_add_and_uniform_pairs(q, n):
    gf = galois.GF(q)
    s = gf_m_sequence(q, n)
    big_n = q**n - 1
    # shift-and-add (Golomb): s + shift(s, k) is another shift of s, in GF(q) arithmetic
    rotations = {tuple(np.roll(s, m)) for m in range(big_n)}
    for k in (1, 2, 5):
        added = np.asarray(gf(s) + gf(np.roll(s, k))).astype(np.int64)
        assert tuple(added) in rotations
    # every ordered pair of symbols (not both 0) at lag 1 occurs q^(n-2) times cyclically
    pairs = np.zeros((q, q), dtype=int)
    np.add.at(pairs, (s, np.roll(s, -1)), 1)
    expected = np.full((q, q), q ** (n - 2))
    expected[0, 0] -= 1
    assert (pairs == expected).all()


def test_m_sequence_fir_information_has_the_closed_form_and_efficiency_27_over_41():
    """GF(3), n = 4: N = 80, Q = 2 event types of 27 trials, k = 10 lags, periodic, intercept.

    Pairs at any nonzero lag are uniform (9 each), so X'X = 27 I + 9 (J_k - I) kron J_Q (lag-major
    blocks). Removing the intercept subtracts 27^2/80 J; the eigenvalues are then 27 (x10), 9 (x9)
    and 6.75 (x1), so trace(M^-1) = 10/27 + 1 + 4/27 = 41/27 and the efficiency is 27/41 (derived).
    """
    s = gf_m_sequence(3, 4)
    study, setup = fir_setup(np.bincount(s).tolist(), lags=10)
    ev, layout = evaluator_for(study, setup, s, circular=True)
    x = fir_matrix(setup, layout, s, circular=True)  # condition-major columns
    lag_major = x.reshape(80, 2, 10).transpose(0, 2, 1).reshape(80, 20)
    expected = 27 * np.eye(20) + 9 * np.kron(np.ones((10, 10)) - np.eye(10), np.ones((2, 2)))
    assert np.array_equal(lag_major.T @ lag_major, expected)
    assert ev.score(s)[1] == pytest.approx(27 / 41, rel=1e-12)
    assert reference_scores(setup, layout, s, circular=True)[1] == pytest.approx(27 / 41, rel=1e-12)


def test_m_sequence_reaches_the_pairwise_bound_exactly():
    s = gf_m_sequence(3, 4)
    study = make_study(
        np.bincount(s).tolist(),
        baseline=0,
        timing={"tr": 2.0, "soa": 2.0},
        analysis={"fir_window": 20.0, "high_pass_cutoff": 0, "contrasts": ["b - c"]},
    )
    setup = make_setup(study)
    ev, _ = evaluator_for(study, setup, s, circular=True)
    assert ev.score(s)[1] == pytest.approx(estimation_bound_pairwise([27, 27], 10), rel=1e-12)


def test_binary_m_sequence_detection_closed_form():
    """0/1 m-sequence, 8 bits: |S(f)|^2 = (N+1)/4 off zero, so detection = (N+1)/(4N) (N|h|^2 - (sum h)^2)."""
    s = max_len_seq(8)[0].astype(np.int64)
    big_n = len(s)
    study = make_study(
        np.bincount(s).tolist(), baseline=0, timing={"tr": 2.0, "soa": 2.0}, analysis={"high_pass_cutoff": 0}
    )
    setup = make_setup(study)
    ev, layout = evaluator_for(study, setup, s, circular=True)
    one = np.zeros(big_n, dtype=np.int64)
    one[0] = 1
    h = detection_matrix(setup, layout, one, circular=True)[:, 0]  # response to one trial, folded
    closed = (big_n + 1) / (4 * big_n) * (big_n * (h**2).sum() - h.sum() ** 2)
    assert ev.score(s)[0] == pytest.approx(closed, rel=1e-10)
    assert ev.score(s)[0] <= detection_bound_one_type(int(s.sum()), big_n, h) + 1e-9


def test_m_sequence_beats_random_orderings_for_estimation_when_periodic():
    """Buracas & Boynton (2002, NeuroImage 16:801-813): m-sequences are efficient for estimation.

    The claim rests on periodic presentation with an intercept. Presented once through, the
    m-sequence still does well but is no longer guaranteed the best; we record both.
    """
    s = gf_m_sequence(3, 4)
    study, setup = fir_setup(np.bincount(s).tolist(), lags=10)
    rng = np.random.default_rng(0)
    randoms = np.array([rng.permutation(s) for _ in range(10_000)])
    ev, _ = evaluator_for(study, setup, s, circular=True)
    _, est_random = ev.score_many(randoms)
    assert ev.score(s)[1] > est_random.max()
    once, _ = evaluator_for(study, setup, s, circular=False)
    _, est_once = once.score_many(randoms)
    m_once = once.score(s)[1]
    assert m_once > np.quantile(est_once, 0.99)  # still near the top
    assert est_once.max() > 0.9 * m_once  # ... but not in a class of its own any more


# --- bounds ---


@pytest.mark.parametrize("circular", [True, False])
def test_no_ordering_exceeds_the_estimation_bounds(circular):
    counts = [30, 20, 20, 10]  # baseline first
    study, setup = fir_setup(counts, lags=8)
    rng = np.random.default_rng(5)
    base = np.repeat(np.arange(4), counts)
    designs = [rng.permutation(base) for _ in range(300)] + [
        block_ordering(np.array(counts), 0, b) for b in (1, 2, 5, 10)
    ]
    ev, _ = evaluator_for(study, setup, designs[0], circular=circular)
    _, est = ev.score_many(np.array(designs))
    bound = estimation_bound_identity([20, 20, 10], 80, 8)
    assert est.max() <= bound + 1e-12
    assert bound <= estimation_bound_any_allocation(80, 3, 8) + 1e-12
    pair = make_study(
        counts,
        baseline=0,
        timing={"tr": 2.0, "soa": 2.0},
        analysis={"fir_window": 16.0, "high_pass_cutoff": 0, "contrasts": ["b - c"]},
    )
    ev2, _ = evaluator_for(pair, make_setup(pair), designs[0], circular=circular)
    assert ev2.score_many(np.array(designs))[1].max() <= estimation_bound_pairwise([20, 20], 8) + 1e-12


# --- the detection / estimation trade-off ---


def test_blocks_win_detection_and_lose_estimation_as_published():
    """Liu, Frank, Wong & Buxton (2001, NeuroImage 13:759-773); Liu & Frank (2004, NeuroImage 21:387-400):
    for the same trial counts, blocked designs detect better and estimate worse than random ones;
    an m-sequence sits with the random designs on detection and above them on estimation."""
    s = gf_m_sequence(3, 4)
    counts = np.bincount(s)
    study = make_study(
        counts.tolist(),
        baseline=0,
        timing={"tr": 2.0, "soa": 2.0},
        analysis={"fir_window": 20.0, "high_pass_cutoff": 0},
    )
    setup = make_setup(study)
    ev, _ = evaluator_for(study, setup, s, circular=True)
    rng = np.random.default_rng(1)
    det_r, est_r = ev.score_many(np.array([rng.permutation(s) for _ in range(500)]))
    det_b, est_b = ev.score_many(np.array([block_ordering(counts, 0, 9)]))
    det_m, est_m = ev.score(s)
    assert det_b[0] > det_r.max() and est_b[0] < np.median(est_r)
    assert np.quantile(det_r, 0.05) < det_m < np.quantile(det_r, 0.95)
    assert est_m > est_r.max()


# --- invariances (common practice) ---


def test_relabelling_conditions_keeps_symmetric_figures():
    study, setup = fir_setup([20, 20, 20, 20], lags=6, high_pass=128.0)
    rng = np.random.default_rng(2)
    seq = rng.permutation(np.repeat(np.arange(4), 20))
    ev, _ = evaluator_for(study, setup, seq, circular=False)
    relabelled = np.array([0, 2, 3, 1])[seq]  # permute the three modelled conditions
    assert np.allclose(ev.score(seq), ev.score(relabelled), rtol=1e-10)


def test_high_pass_shorter_than_the_block_period_destroys_block_detection():
    counts = np.array([60, 60])
    study_slow = make_study(
        counts.tolist(), baseline=0, timing={"tr": 2.0, "soa": 2.0}, analysis={"high_pass_cutoff": 128.0}
    )
    study_fast = make_study(
        counts.tolist(), baseline=0, timing={"tr": 2.0, "soa": 2.0}, analysis={"high_pass_cutoff": 40.0}
    )
    blocks = block_ordering(counts, 0, 20)  # 40 s on, 40 s off: an 80 s period
    det = []
    for st in (study_slow, study_fast):
        ev, _ = evaluator_for(st, make_setup(st), blocks, circular=False)
        det.append(ev.score(blocks)[0])
    assert det[1] < 0.2 * det[0]


def test_contrast_weights_that_do_not_cancel_warn():
    study = make_study([10, 10, 10, 10], baseline=3, analysis={"contrasts": ["a - (b + c)"]})
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        make_setup(study)
    assert any("cancel" in str(w.message) for w in caught)
