"""Definitions behind the reported figures, each held to a calculation written here from first
principles (numpy/scipy linear algebra, brute force over tiny designs, closed forms), not to
seqsolve's own evaluators."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import linalg, signal

from seqsolve.errors import SpecError
from seqsolve.score import score_design
from seqsolve.timing import make_schedules
from tests.conftest import make_study


def fir_information(seq: np.ndarray, modelled: list[int], lags: int, rho: float = 0.0) -> np.ndarray:
    """Covariance (noise variance 1) of the FIR estimates of one run with one trial per volume
    (SOA = TR, bins of one TR) and an intercept, after AR(1) prewhitening.

    Written from the textbook model, independent of seqsolve: column (condition i, lag j) is 1 at
    volume t when the trial at volume t - j is of condition i; the prewhitening is the Prais-Winsten
    transform (first row times sqrt(1 - rho^2), then y_t - rho y_(t-1)), whose W'W is the inverse
    AR(1) correlation matrix scaled to unit innovation variance (standard time-series result).
    Returns cov, shape (len(modelled) * lags, same), ordered condition-major, or None when the
    model is rank-deficient (the parameters are not estimable: efficiency 0).
    """
    n = len(seq)
    x = np.zeros((n, len(modelled) * lags))
    for t in range(n):
        for j in range(lags):
            if t - j >= 0 and seq[t - j] in modelled:
                x[t, modelled.index(seq[t - j]) * lags + j] = 1.0
    full = np.hstack([x, np.ones((n, 1))])
    w = np.eye(n) - rho * np.eye(n, k=-1)
    w[0, 0] = np.sqrt(1.0 - rho**2)
    wx = w @ full
    if np.linalg.matrix_rank(wx) < wx.shape[1]:
        return None
    return linalg.inv(wx.T @ wx)[: x.shape[1], : x.shape[1]]


def _score(study, seq):
    (sched,) = make_schedules(study, [seq], 0)
    (row,) = score_design(study, "01", [seq], [sched], with_references=False)
    return row


# --- 1. the D criterion needs independent contrasts ---


@pytest.mark.parametrize(
    "contrasts",
    ["all-pairs", ["a - c", "b - c", "(a + b)/2 - c"], ["a - b", "b - a"]],
)
def test_d_criterion_rejects_redundant_contrasts_naming_the_field(contrasts):
    with pytest.raises(SpecError) as err:
        make_study([4, 4, 4, 4], baseline=3, analysis={"criterion": "D", "contrasts": contrasts})
    text = str(err.value)
    assert "analysis.contrasts" in text and 'criterion = "D"' in text and 'criterion = "A"' in text


def test_a_criterion_keeps_redundant_contrasts():
    # 1/trace is defined for any contrast set: all-pairs of 3 conditions is accepted under A
    study = make_study([4, 4, 4, 4], baseline=3, analysis={"contrasts": "all-pairs", "high_pass_cutoff": 0})
    assert study.spec.analysis.contrasts == "all-pairs"


def test_redundant_set_has_zero_determinant_so_rejecting_is_right():
    # linear algebra (any textbook): the k(k-1)/2 pairwise differences of k conditions span only
    # k - 1 dimensions, so det(C V C') = 0 for every covariance V; scipy's det confirms it here
    rng = np.random.default_rng(0)
    seq = rng.permutation(np.repeat([0, 1, 2, 3], 6))
    cov = fir_information(seq, [0, 1, 2], lags=1)
    pairs = np.array([[1, -1, 0], [1, 0, -1], [0, 1, -1]], dtype=float)
    v = pairs @ cov @ pairs.T
    assert abs(linalg.det(v)) < 1e-12 * np.prod(np.diag(v))


def test_d_with_independent_contrasts_matches_first_principles():
    analysis = {"criterion": "D", "contrasts": ["a - c", "b - c"], "high_pass_cutoff": 0, "fir_window": 6.0}
    study = make_study([6, 6, 6, 6], baseline=3, analysis=analysis)
    rng = np.random.default_rng(1)
    seq = rng.permutation(np.repeat([0, 1, 2, 3], 6))
    cov = fir_information(seq, [0, 1, 2], lags=3)
    c = np.kron(np.array([[1.0, 0, -1], [0, 1, -1]]), np.eye(3))  # each contrast at each lag
    v = c @ cov @ c.T
    theirs = linalg.det(v) ** (-1.0 / v.shape[0])  # D-efficiency: det^(-1/q)
    assert _score(study, seq).estimation == pytest.approx(theirs, rel=1e-6)


# --- 2. the estimation bound is reported only where it holds ---


def _all_orderings(counts):
    base = np.repeat(np.arange(len(counts)), counts)
    return sorted(set(itertools.permutations(base.tolist())))


def _bound_and_brute_force(counts, lags, rho):
    """What score reports as the bound (None when it reports none) and the estimation efficiency
    of every distinct ordering computed from first principles (identity contrasts, baseline 0)."""
    analysis = {"high_pass_cutoff": 0, "fir_window": 2.0 * lags, "ar1": rho}
    study = make_study(counts, baseline=0, analysis=analysis)
    modelled = list(range(1, len(counts)))
    covs = [fir_information(np.array(s), modelled, lags, rho) for s in _all_orderings(counts)]
    effs = np.array([0.0 if c is None else 1.0 / np.trace(c) for c in covs])
    best = int(np.argmax(effs))
    row = _score(study, np.array(_all_orderings(counts)[best]))
    # the reported estimation is the first-principles one (within 1e-6), so the share is too
    assert row.estimation == pytest.approx(effs[best], rel=1e-6)
    bound = None if row.estimation_vs_bound is None else row.estimation / row.estimation_vs_bound
    return bound, effs


@pytest.mark.parametrize("counts, lags", [([3, 2, 2], 2), ([2, 2, 2, 2], 2), ([4, 2, 1], 3), ([1, 3, 3], 2)])
def test_no_reported_bound_is_exceeded_by_any_ordering(counts, lags):
    # brute force: every distinct ordering of these tiny designs, one trial per TR, intercept only
    bound, effs = _bound_and_brute_force(counts, lags, 0.0)
    assert bound is not None
    assert effs.max() <= bound * (1 + 1e-9)


@pytest.mark.parametrize("rho", [0.3, 0.6, 0.9])
def test_no_bound_is_reported_with_ar1_where_the_white_noise_one_fails(rho):
    counts, lags = [3, 2, 2], 1  # one lag: 1.37x, 1.81x and 2.40x of the white-noise bound
    bound, effs = _bound_and_brute_force(counts, lags, rho)
    assert bound is None
    white, _ = _bound_and_brute_force(counts, lags, 0.0)
    # why it is omitted: brute force passes the white-noise bound once prewhitened
    assert effs.max() > white
    # the bound the docstring of score._estimation_bound states instead, (1 + rho)^2 / (lags sum 1/n_i):
    # W'W is tridiagonal (diagonal 1, 1 + rho^2, ..., 1; off-diagonal -rho), so by Gershgorin its
    # eigenvalues are at most (1 + rho)^2; it holds, but is loose, hence not reported
    n = np.array(counts[1:], dtype=float)
    assert effs.max() <= (1 + rho) ** 2 / (lags * (1 / n).sum())


# --- 3. the HRF kernel: unit area of what is kept ---


@pytest.mark.parametrize("resolution", [0.1, 0.05, 0.25])
def test_kernel_is_the_scipy_double_gamma_cut_at_32_s_with_unit_kept_area(resolution):
    from scipy import stats

    from seqsolve.efficiency.hrf import sampled_hrf

    # the canonical double gamma (common practice: peak shape 6, undershoot shape 16, ratio 1/6)
    # from scipy.stats.gamma, sampled below 32 s and divided by the rectangle-rule area kept
    t = np.arange(0.0, 32.0, resolution)
    ref = stats.gamma.pdf(t, 6) - stats.gamma.pdf(t, 16) / 6
    ref /= ref.sum() * resolution
    h = sampled_hrf(resolution)[0]
    assert np.allclose(h, ref, rtol=1e-12, atol=1e-15)
    assert h.sum() * resolution == pytest.approx(1.0, abs=1e-12)
    # a block longer than the kernel reaches a plateau of exactly 1 (sum of samples times step)
    plateau = np.convolve(np.ones(int(round(80 / resolution))), h)[int(round(40 / resolution))] * resolution
    assert plateau == pytest.approx(1.0, abs=1e-12)
    # what the cut drops, from scipy's gamma CDF: undershoot tail, -1.3e-4 of the whole area (5/6),
    # as hrf.sampled_hrf documents (so the uncut area 5/6 was the wrong divisor by that much)
    dropped = 1 - (stats.gamma.cdf(32, 6) - stats.gamma.cdf(32, 16) / 6) / (5 / 6)
    assert -1.4e-4 < dropped < -1.2e-4


def test_nilearn_scales_its_kernel_to_unit_sum_too():
    # nilearn's spm_hrf divides the sampled kernel by its sum: the convention sampled_hrf follows
    from nilearn.glm.first_level import spm_hrf

    assert spm_hrf(2.0, oversampling=50).sum() == pytest.approx(1.0, abs=1e-12)


# --- 4. conventions: noise units, the A criterion's sum, references in score --json ---


def hrf_regressors(seq, modelled, tr, resolution=0.1):
    """Detection regressors of one run with one trial per TR lasting one TR: boxcars on a fine grid
    convolved with the canonical double gamma of scipy.stats.gamma (shapes 6 and 16, ratio 1/6,
    common practice), cut at 32 s and scaled to unit kept area, sampled at the start of each volume."""
    from scipy import stats

    t = np.arange(0.0, 32.0, resolution)
    h = stats.gamma.pdf(t, 6) - stats.gamma.pdf(t, 16) / 6
    h /= h.sum() * resolution
    step = int(round(tr / resolution))
    n = len(seq)
    x = np.zeros((n, len(modelled)))
    for i, c in enumerate(modelled):
        box = np.repeat((np.asarray(seq) == c).astype(float), step)
        x[:, i] = (np.convolve(box, h) * resolution)[: n * step : step]
    return x


@pytest.mark.parametrize("rho", [0.0, 0.4, 0.8])
def test_noise_is_in_units_of_the_innovation_variance(rho):
    # GLS with scipy's Toeplitz AR(1) correlation R_ij = rho^|i-j| is in units of the marginal noise
    # variance; the innovation variance is (1 - rho^2) of it (AR(1) textbook result), so seqsolve's
    # figures, per unit innovation variance, are (1 - rho^2) times the GLS efficiency
    analysis = {"high_pass_cutoff": 0, "ar1": rho, "contrasts": ["a - b", "a + b - 2 * c"]}
    study = make_study([6, 6, 6, 6], baseline=3, durations=[2.0] * 4, analysis=analysis)
    seq = np.random.default_rng(2).permutation(np.repeat([0, 1, 2, 3], 6))
    x = np.hstack([hrf_regressors(seq, [0, 1, 2], 2.0), np.ones((len(seq), 1))])
    r = linalg.toeplitz(rho ** np.arange(len(seq)))
    cov = linalg.inv(x.T @ linalg.solve(r, x))[:3, :3]
    c = np.array([[1.0, -1, 0], [1, 1, -2]])
    marginal = 1 / np.trace(c @ cov @ c.T)  # A: the variances summed over contrasts, not averaged
    assert _score(study, seq).detection == pytest.approx((1 - rho**2) * marginal, rel=1e-6)


def test_references_are_printed_by_score_json_and_hold_to_first_principles(tmp_path):
    import json

    from typer.testing import CliRunner

    from seqsolve.blocks import BlockLayout, layout_run
    from seqsolve.cli import app

    spec = tmp_path / "s.toml"
    spec.write_text(
        '[study]\nname = "t"\ntask = "t"\nparticipants = 1\nruns = 1\nseed = 0\n'
        '[[conditions]]\nname = "a"\ntrials = 6\n[[conditions]]\nname = "b"\ntrials = 6\n'
        '[[conditions]]\nname = "rest"\ntrials = 6\nbaseline = true\n'
        "[timing]\ntr = 2.0\nsoa = 2.0\n[analysis]\nhigh_pass_cutoff = 0\nfir_window = 4.0\n"
    )
    orderings = tmp_path / "orderings.csv"
    seq = [0, 1, 2, 2, 0, 1, 1, 2, 0, 0, 2, 1, 2, 1, 0, 1, 0, 2]  # six of each, not periodic
    names = ["a", "b", "rest"]
    orderings.write_text(
        "participant,run,position,condition\n" + "".join(f"01,1,{i + 1},{names[c]}\n" for i, c in enumerate(seq))
    )
    result = CliRunner().invoke(app, ["score", str(spec), str(orderings), "--json"])
    assert result.exit_code == 0, result.output
    (row,) = json.loads(result.output)
    ref = row["references"]
    assert set(ref) >= {
        "block_detection",
        "block_size",
        "block_placement",
        "random_estimation",
        "random_orderings",
        "estimation_bound",
    }

    def detection(s):
        x = np.hstack([hrf_regressors(s, [0, 1], 2.0), np.ones((len(s), 1))])
        return 1 / np.trace(linalg.inv(x.T @ x)[:2, :2])  # each-vs-baseline: C = I

    counts = np.array([6, 6, 6])
    best = layout_run(counts, 2, BlockLayout(ref["block_size"], ref["block_placement"]))
    assert ref["block_detection"] == pytest.approx(detection(best), rel=1e-6)
    assert row["detection"] == pytest.approx(detection(np.array(seq)), rel=1e-6)
    assert row["detection_vs_block"] == pytest.approx(detection(np.array(seq)) / detection(best), rel=1e-6)
    assert row["estimation"] == pytest.approx(1 / np.trace(fir_information(np.array(seq), [0, 1], 2)), rel=1e-6)
    # the random reference, as documented: 100 shuffles from default_rng(reference_seed), FIR efficiency
    # averaged (the reference seed is the first participant's: generate and score use the same)
    from seqsolve.seeds import reference_seed

    rng = np.random.default_rng(reference_seed(0))
    shuffled = [rng.permutation(np.repeat([0, 1, 2], 6)) for _ in range(ref["random_orderings"])]
    mean = np.mean([1 / np.trace(fir_information(s, [0, 1], 2)) for s in shuffled])
    assert ref["random_estimation"] == pytest.approx(mean, rel=1e-6)
    # the bound holds here (each-vs-baseline, SOA = TR, no ar1): limits.py's closed form, written out
    n0 = 6
    bound = 1 / (2 * (1 / 6 + 1 / 6) + 2 / n0 + 2 / (n0 + 1))
    assert ref["estimation_bound"] == pytest.approx(bound, rel=1e-12)


# --- 6. durations that are not whole samples of the fine grid ---


def boxcar_regressors(seq, modelled, durations, soa, tr, resolution):
    """Detection regressors of one run, one trial every `soa` seconds (onsets on the grid), trial of
    condition c lasting durations[c] seconds: a boxcar on a grid of `resolution` s whose last sample
    carries the fraction of a sample that the duration covers (so its integral is the duration),
    convolved with scipy.stats.gamma's double gamma (6, 16, 1/6; cut at 32 s, unit kept area)."""
    from scipy import stats

    t = np.arange(0.0, 32.0, resolution)
    h = stats.gamma.pdf(t, 6) - stats.gamma.pdf(t, 16) / 6
    h /= h.sum() * resolution
    per_soa, per_tr = int(round(soa / resolution)), int(round(tr / resolution))
    n_fine = len(seq) * per_soa
    x = np.zeros((n_fine // per_tr, len(modelled)))
    for i, c in enumerate(modelled):
        box = np.zeros(n_fine + 100)
        cover = durations[c] / resolution
        whole, frac = int(np.floor(cover + 1e-9)), cover - np.floor(cover + 1e-9)
        for k in np.flatnonzero(np.asarray(seq) == c):
            box[k * per_soa : k * per_soa + whole] = 1.0
            if frac > 1e-9:
                box[k * per_soa + whole] += frac
        x[:, i] = (signal.fftconvolve(box, h) * resolution)[:n_fine:per_tr]
    return x


def _detection_first_principles(seq, durations, resolution):
    x = np.hstack([boxcar_regressors(seq, [0, 1, 2], durations, 2.0, 2.0, resolution), np.ones((len(seq), 1))])
    return 1 / np.trace(linalg.inv(x.T @ x)[:3, :3])


@pytest.mark.parametrize("durations", [[0.03, 0.25, 1.0, 2.0], [0.25, 0.25, 0.25, 2.0], [0.03, 0.07, 0.15, 2.0]])
def test_partial_samples_count_by_their_fraction(durations):
    study = make_study([8, 8, 8, 8], baseline=3, durations=durations, analysis={"high_pass_cutoff": 0})
    seq = np.random.default_rng(4).permutation(np.repeat([0, 1, 2, 3], 8))
    ours = _score(study, seq).detection
    # exactly the rectangle-rule model with the last sample weighted by its fraction (1e-6)
    assert ours == pytest.approx(_detection_first_principles(seq, durations, 0.1), rel=1e-6)
    # and close to the same model on a grid 100 times finer, where every duration is whole samples
    # (0.03 s used to count as a whole 0.1 s sample: 11x this figure; 0.25 s as 0.2 s)
    fine = _detection_first_principles(seq, durations, 0.001)
    assert ours == pytest.approx(fine, rel=0.01)  # measured: within 0.4 %
