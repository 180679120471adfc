"""Control charts against the worked examples of the NIST/SEMATECH e-Handbook of Statistical Methods."""

from __future__ import annotations

import math

import numpy as np
import pytest

from runlog.drift.charts import cusum_chart, ewma_chart, individuals_chart, p_chart
from runlog.errors import FitError

# NIST/SEMATECH e-Handbook 6.3.2.4 (REFERENCES.md section 3).
EWMA_DATA = [52.0, 47.0, 53.0, 49.3, 50.1, 47.0, 51.0, 50.1, 51.2, 50.5,
             49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1]  # fmt: skip
EWMA_VALUES = [50.60, 49.52, 50.56, 50.18, 50.16, 49.21, 49.75, 49.85, 50.26, 50.33,
               50.11, 49.36, 49.52, 50.05, 49.38, 49.92, 50.73, 51.23, 51.94, 51.99]  # fmt: skip

# NIST/SEMATECH e-Handbook 6.3.2.3 (REFERENCES.md section 3).
CUSUM_DATA = [324.925, 324.675, 324.725, 324.350, 325.350, 325.225, 324.125, 324.525,
              325.225, 324.600, 324.625, 325.150, 328.325, 327.250, 327.825, 328.500,
              326.675, 327.775, 326.875, 328.350]  # fmt: skip
CUSUM_UPPER = [0, 0, 0, 0, 0.0325, 0, 0, 0, 0, 0, 0, 0, 3.0075, 4.9400, 7.4475, 10.6300,
               11.9875, 14.4450, 16.0025, 19.0350]  # fmt: skip

# NIST/SEMATECH e-Handbook 6.3.2.2 (REFERENCES.md section 3).
INDIVIDUALS_DATA = [49.6, 47.6, 49.9, 51.3, 47.8, 51.2, 52.6, 52.4, 53.6, 52.1]


def test_ewma_handbook_6_3_2_4_values_and_limits():
    chart = ewma_chart(EWMA_DATA, lam=0.3, target=50.0, sigma=2.0539, k=3.0)
    np.testing.assert_allclose(chart.statistic, EWMA_VALUES, atol=0.005)
    # Unrounded limits; the handbook prints 52.5884 / 47.4115 after rounding sqrt(0.3/1.7) to 0.4201.
    np.testing.assert_allclose(chart.upper, 52.58843, atol=5e-6)
    np.testing.assert_allclose(chart.lower, 47.41157, atol=5e-6)
    assert not chart.out_of_control.any()
    assert chart.first_signal is None
    assert chart.center == 50.0


def test_ewma_exact_limits_start_at_k_sigma_lam_and_approach_the_handbook_limits():
    # Algebra of the exact variance (handbook 6.3.2.4 gives its asymptote): at i = 1,
    # lam/(2-lam) (1 - (1-lam)^2) = lam^2, so the half-width is k sigma lam.
    chart = ewma_chart(EWMA_DATA, lam=0.3, target=50.0, sigma=2.0539, asymptotic=False)
    assert chart.upper[0] - 50.0 == pytest.approx(3.0 * 2.0539 * 0.3, rel=1e-12)
    assert np.all(np.diff(chart.upper) > 0)
    assert chart.upper[-1] == pytest.approx(52.58843, abs=1e-3)
    assert not chart.out_of_control.any()


def test_ewma_baseline_estimates_target_and_sigma_and_flags_a_later_shift():
    rng = np.random.default_rng(5)
    values = rng.normal(10.0, 1.0, 40)
    values[25:] += 3.0
    by_slice = ewma_chart(values, baseline=slice(0, 20))
    mask = np.zeros(40, dtype=bool)
    mask[:20] = True
    by_mask = ewma_chart(values, baseline=mask)
    assert by_slice.center == pytest.approx(values[:20].mean())
    assert by_slice.sigma == pytest.approx(values[:20].std(ddof=1))
    np.testing.assert_array_equal(by_slice.out_of_control, by_mask.out_of_control)
    assert by_slice.first_signal is not None and 25 <= by_slice.first_signal <= 28
    assert not by_slice.out_of_control[:25].any()


def test_cusum_handbook_6_3_2_3_upper_sums_and_signals():
    chart = cusum_chart(CUSUM_DATA, target=325.0, k=0.3175, h=4.1959)
    np.testing.assert_allclose(chart.upper_sum, CUSUM_UPPER, atol=0.005)
    # The handbook counts groups from 1: the first signal is group 14, groups 14-20 are flagged.
    assert chart.first_signal == 13
    np.testing.assert_array_equal(np.flatnonzero(chart.out_of_control) + 1, np.arange(14, 21))


def test_cusum_lower_sum_mirrors_the_upper_sum():
    # Reflecting the data about the target swaps the two sums (handbook 6.3.2.3 definitions).
    mirrored = 2 * 325.0 - np.asarray(CUSUM_DATA)
    chart = cusum_chart(mirrored, target=325.0, k=0.3175, h=4.1959)
    np.testing.assert_allclose(chart.lower_sum, CUSUM_UPPER, atol=0.005)
    assert chart.first_signal == 13


def test_individuals_handbook_6_3_2_2():
    chart = individuals_chart(INDIVIDUALS_DATA)
    assert chart.center == pytest.approx(50.81, abs=1e-10)
    assert chart.mean_moving_range == pytest.approx(1.8778, abs=5e-5)
    np.testing.assert_allclose(chart.upper, 55.8041, atol=5e-5)
    np.testing.assert_allclose(chart.lower, 45.8159, atol=5e-5)
    assert math.isnan(chart.moving_range[0])
    assert chart.moving_range[1] == pytest.approx(2.0)
    assert not chart.out_of_control.any()


def test_p_chart_limits_per_point_with_varying_trials():
    # Formula of handbook 6.3.3.2 worked by hand: p-bar = (10 + 30 + 5) / (100 + 200 + 40) = 45/340.
    successes = [10, 30, 5]
    trials = [100, 200, 40]
    chart = p_chart(successes, trials)
    p_bar = 45 / 340
    assert chart.center == pytest.approx(p_bar, rel=1e-12)
    for i, n in enumerate(trials):
        half = 3 * math.sqrt(p_bar * (1 - p_bar) / n)
        assert chart.upper[i] == pytest.approx(p_bar + half, rel=1e-12)
        assert chart.lower[i] == pytest.approx(max(0.0, p_bar - half), abs=1e-15)
    assert chart.lower[2] == 0.0  # p-bar - 3 sigma = -0.027 at n = 40, clipped
    np.testing.assert_allclose(chart.statistic, [0.1, 0.15, 0.125])
    assert not chart.out_of_control.any()


def test_p_chart_baseline_excludes_a_bad_run_from_p_bar():
    # Fill fraction near 0.5 is common practice for random loading, no published source.
    successes = [500, 498, 505, 495, 300]
    trials = [1000] * 5
    chart = p_chart(successes, trials, baseline=slice(0, 4))
    assert chart.center == pytest.approx(1998 / 4000)
    np.testing.assert_array_equal(chart.out_of_control, [False, False, False, False, True])
    assert chart.first_signal == 4


def test_chart_errors():
    with pytest.raises(ValueError, match=r"lam must be in \(0, 1\], got 1.5"):
        ewma_chart(EWMA_DATA, lam=1.5)
    with pytest.raises(FitError) as error:
        ewma_chart([1.0, float("nan"), 2.0])
    assert str(error.value) == "ewma chart fit failed: non-finite value at index 1"
    with pytest.raises(FitError) as error:
        individuals_chart([3.0, 3.0, 3.0])
    assert str(error.value) == "individuals chart fit failed: baseline points are all equal: no moving range"
    with pytest.raises(FitError) as error:
        p_chart([5, 12], [10, 10])
    assert str(error.value) == "p chart fit failed: successes outside [0, trials] (index 1)"
    with pytest.raises(FitError) as error:
        ewma_chart([1.0, 2.0, 3.0], baseline=[True, False])
    assert str(error.value) == "ewma chart fit failed: baseline mask has 2 entries for 3 points"


def test_p_chart_laney_factor_widens_limits_only_for_overdispersed_baselines():
    # Laney (2002), Quality Engineering 14:531: sigma_z from the mean moving range of the
    # baseline z-scores / 1.128 [memory: d2 = 1.128 as in the handbook's individuals chart].
    trials = np.full(10, 10_000.0)
    binomial = np.array([5010, 4990, 5005, 4998, 5012, 4985, 5003, 4996, 5008, 4991], dtype=float)
    plain = p_chart(binomial, trials, overdispersion=True)
    assert plain.overdispersion == 1.0
    scattered = np.array([5200, 4800, 5150, 4850, 5250, 4750, 5100, 4900, 5200, 4800], dtype=float)
    wide = p_chart(scattered, trials, overdispersion=True)
    centre = scattered.sum() / trials.sum()
    z = (scattered / trials - centre) / np.sqrt(centre * (1 - centre) / trials)
    expected = np.mean(np.abs(np.diff(z))) / 1.128
    assert wide.overdispersion == pytest.approx(expected)
    assert wide.upper[0] - wide.center == pytest.approx(3 * expected * np.sqrt(centre * (1 - centre) / 10_000))
    assert not wide.out_of_control.any() and p_chart(scattered, trials).out_of_control.any()
