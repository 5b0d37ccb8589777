"""Schedules: fixed SOA onsets, jittered gaps matching their distribution, exact run lengths."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from seqsolve.errors import SpecError
from seqsolve.timing import make_schedules
from tests.conftest import make_study


def test_fixed_soa_onsets_and_volumes():
    study = make_study([2, 2], timing={"tr": 2.0, "soa": 3.0, "lead_in": 4.0, "lead_out": 10.0})
    (s,) = make_schedules(study, [np.array([0, 1, 0, 1])], seed=1)
    assert s.onsets.tolist() == [4.0, 7.0, 10.0, 13.0]
    assert s.durations.tolist() == [3.0, 3.0, 3.0, 3.0]  # duration defaults to the soa
    assert s.length == pytest.approx(26.0) and s.n_volumes == 13


@pytest.mark.parametrize(
    "iti, dist",
    [
        ({"distribution": "uniform", "min": 1.0, "max": 5.0}, stats.uniform(1.0, 4.0)),
        # min + exponential(mean 2) truncated at max: scipy's truncexpon with b = (max - min) / mean
        (
            {"distribution": "exponential", "mean": 2.0, "min": 1.0, "max": 8.0},
            stats.truncexpon(3.5, loc=1.0, scale=2.0),
        ),
    ],
)
def test_jittered_gaps_follow_the_declared_distribution(iti, dist):
    n = 400
    study = make_study([n // 2, n // 2], timing={"tr": 2.0, "trial_duration": 1.0, "iti": iti, "grid": 0.01})
    (s,) = make_schedules(study, [np.tile([0, 1], n // 2)], seed=3)
    gaps = np.diff(s.onsets) - s.durations[:-1]
    # Kolmogorov-Smirnov distance to scipy's distribution: quantile placement keeps it tiny
    assert stats.kstest(gaps, dist.cdf).statistic < 0.02
    assert np.allclose(np.round(gaps / 0.01) * 0.01, gaps, atol=1e-6)  # on the grid


def test_choice_gaps_keep_their_proportions_and_seed_decides_order():
    iti = {"distribution": "choice", "values": [2.0, 4.0, 6.0], "weights": [3, 2, 1]}
    study = make_study([31, 30], timing={"tr": 2.0, "trial_duration": 1.0, "iti": iti})
    seq = [np.tile([0, 1], 31)[:61]]
    a, b = make_schedules(study, seq, seed=1)[0], make_schedules(study, seq, seed=2)[0]
    gaps = np.diff(a.onsets) - 1.0
    assert np.unique(np.round(gaps, 6), return_counts=True)[1].tolist() == [30, 20, 10]
    assert not np.array_equal(a.onsets, b.onsets)
    assert np.array_equal(a.onsets, make_schedules(study, seq, seed=1)[0].onsets)


def test_fixed_volumes_are_filled_exactly():
    timing = {
        "tr": 2.0,
        "trial_duration": 1.0,
        "iti": {"distribution": "uniform", "min": 1.0, "max": 4.0},
        "lead_in": 2.0,
        "lead_out": 8.0,
        "volumes": 60,
    }
    study = make_study([20, 20], timing=timing)
    (s,) = make_schedules(study, [np.tile([0, 1], 20)], seed=5)
    end = s.onsets[-1] + s.durations[-1] + 8.0
    assert end == pytest.approx(120.0) and s.n_volumes == 60
    gaps = np.diff(s.onsets) - 1.0
    assert gaps.min() >= 1.0 - 1e-9 and gaps.max() <= 4.0 + 1e-9


def test_run_too_short_names_the_field():
    timing = {"tr": 2.0, "soa": 3.0, "volumes": 10}
    study = make_study([10, 10], timing=timing)
    with pytest.raises(SpecError, match="timing.volumes"):
        make_schedules(study, [np.tile([0, 1], 10)], seed=0)
