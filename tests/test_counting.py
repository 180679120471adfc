"""Counted figures from occupancy: hand-counted arrays, statsmodels intervals, error messages."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from runlog.errors import FitError, NotFoundError, RunlogError
from runlog.figures.base import Figure
from runlog.figures.counting import (
    compare_proportions,
    counts_fill,
    counts_survival,
    fill_fraction,
    per_site_fill,
    per_site_fill_counts,
    per_site_survival,
    per_site_survival_counts,
    proportion_figure,
    survival,
)

# 3 shots x 4 sites, counted by hand:
#   loading  occupied: shot 0 sites 0,1; shot 1 sites 0,2,3; shot 2 site 0  -> 6 of 12
#   survival occupied: shot 0 site 0 (and site 3, never loaded there); shot 1 sites 0,3;
#                      shot 2 none                                          -> 3 of 6 loaded
LOADING = np.array(
    [
        [1, 1, 0, 0],
        [1, 0, 1, 1],
        [1, 0, 0, 0],
    ],
    dtype=bool,
)
SURVIVAL = np.array(
    [
        [1, 0, 0, 1],
        [1, 0, 0, 1],
        [0, 0, 0, 0],
    ],
    dtype=bool,
)


def test_counts_by_hand():
    assert counts_fill(LOADING) == (6, 12)
    assert counts_survival(LOADING, SURVIVAL) == (3, 6)
    assert all(isinstance(v, int) for v in counts_fill(LOADING) + counts_survival(LOADING, SURVIVAL))


def test_per_site_vectors_by_hand():
    np.testing.assert_array_equal(per_site_fill(LOADING), [1.0, 1 / 3, 1 / 3, 1 / 3])
    successes, trials = per_site_fill_counts(LOADING)
    np.testing.assert_array_equal(successes, [3, 1, 1, 1])
    np.testing.assert_array_equal(trials, [3, 3, 3, 3])

    successes, trials = per_site_survival_counts(LOADING, SURVIVAL)
    np.testing.assert_array_equal(successes, [2, 0, 0, 1])
    np.testing.assert_array_equal(trials, [3, 1, 1, 1])
    np.testing.assert_array_equal(per_site_survival(LOADING, SURVIVAL), [2 / 3, 0.0, 0.0, 1.0])


def test_per_site_survival_is_nan_for_a_never_loaded_site():
    loading = np.array([[1, 0], [1, 0]], dtype=bool)
    kept = np.array([[1, 1], [0, 0]], dtype=bool)
    out = per_site_survival(loading, kept)
    assert out[0] == 0.5
    assert math.isnan(out[1])


def test_fill_fraction_pooled_interval_matches_statsmodels_wilson():
    figure = fill_fraction(LOADING)
    low, high = proportion_confint(6, 12, alpha=0.05, method="wilson")  # reference: statsmodels
    assert figure.name == "fill_fraction"
    assert figure.value == 0.5
    assert (figure.binomial_ci_low, figure.binomial_ci_high) == pytest.approx((low, high), abs=1e-12)
    assert figure.binomial_method == "wilson"
    assert figure.method == "shot-ratio"
    assert figure.unit == ""


def test_fill_fraction_shot_level_interval_by_hand():
    # Per shot 2, 3, 1 of 4 sites: with equal shot sizes the ratio estimate is the mean of
    # the shot fractions and its variance their sample variance / n (Cochran 1977, 6.3).
    fractions = np.array([2, 3, 1]) / 4
    variance = fractions.var(ddof=1) / 3
    assert variance == pytest.approx(0.25 / 12)  # design effect 1: no excess spread here
    figure = fill_fraction(LOADING)
    assert figure.stderr == pytest.approx(math.sqrt(variance), rel=1e-12)
    # Wilson at the effective size 12 * (z / t_2)^2 (Korn & Graubard 1998), statsmodels as
    # the reference for Wilson and scipy for the t quantile.
    from scipy import stats

    effective = 12 * (stats.norm.ppf(0.975) / stats.t.ppf(0.975, 2)) ** 2
    low, high = proportion_confint(0.5 * effective, effective, alpha=0.05, method="wilson")
    assert (figure.ci_low, figure.ci_high) == pytest.approx((low, high), abs=1e-12)


def test_fill_fraction_clopper_pearson_matches_statsmodels_beta():
    figure = fill_fraction(LOADING, method="clopper-pearson")
    low, high = proportion_confint(6, 12, alpha=0.05, method="beta")  # reference: statsmodels
    assert (figure.binomial_ci_low, figure.binomial_ci_high) == pytest.approx((low, high), abs=1e-12)
    assert figure.binomial_method == "clopper-pearson"


def test_survival_and_loss_figures():
    kept, lost = survival(LOADING, SURVIVAL)
    low, high = proportion_confint(3, 6, alpha=0.05, method="wilson")  # reference: statsmodels
    assert (kept.name, lost.name) == ("survival", "loss")
    assert kept.value == 0.5 and lost.value == 0.5
    assert (kept.binomial_ci_low, kept.binomial_ci_high) == pytest.approx((low, high), abs=1e-12)
    assert (lost.binomial_ci_low, lost.binomial_ci_high) == pytest.approx((1 - high, 1 - low), abs=1e-12)
    assert (lost.ci_low, lost.ci_high) == pytest.approx((1 - kept.ci_high, 1 - kept.ci_low), abs=1e-12)
    assert lost.stderr == pytest.approx(kept.stderr)


def test_loss_interval_is_the_mirror_for_an_uneven_case():
    rng = np.random.default_rng(3)
    loading = rng.random((500, 20)) < 0.5
    kept_mask = loading & (rng.random((500, 20)) < 0.97)
    kept, lost = survival(loading, kept_mask, method="clopper-pearson")
    x, n = counts_survival(loading, kept_mask)
    low, high = proportion_confint(x, n, alpha=0.05, method="beta")  # reference: statsmodels
    assert (kept.binomial_ci_low, kept.binomial_ci_high) == pytest.approx((low, high), abs=1e-12)
    assert lost.value == pytest.approx(1 - x / n)
    assert (lost.binomial_ci_low, lost.binomial_ci_high) == pytest.approx((1 - high, 1 - low), abs=1e-12)
    assert (lost.ci_low, lost.ci_high) == pytest.approx((1 - kept.ci_high, 1 - kept.ci_low), abs=1e-12)


def test_full_survival_gives_exact_upper_end():
    kept, lost = survival(LOADING, LOADING)
    assert kept.value == 1.0 and kept.ci_high == 1.0 and kept.ci_low < 1.0
    assert lost.value == 0.0 and lost.ci_low == 0.0 and lost.ci_high > 0.0


def test_no_loaded_site_raises_fit_error():
    empty = np.zeros((5, 3), dtype=bool)
    with pytest.raises(FitError) as caught:
        survival(empty, empty)
    assert str(caught.value) == "counting fit failed: no loaded sites in any shot: survival is undefined"
    assert caught.value.kind == "counting"


def test_unknown_interval_method():
    with pytest.raises(NotFoundError) as caught:
        fill_fraction(LOADING, method="wald")
    assert str(caught.value) == (
        "no interval method 'wald' (choose from clopper-pearson, wilson, wilson-cc)"
    )


@pytest.mark.parametrize(
    "array, message",
    [
        (LOADING.astype(int), "loading occupancy must be a boolean array, got dtype int64"),
        (LOADING[0], "loading occupancy must have shape (shots, sites), got 1 dimension(s)"),
        (np.zeros((0, 4), dtype=bool), "loading occupancy has no observations (shape (0, 4))"),
    ],
)
def test_bad_occupancy_is_rejected(array, message):
    with pytest.raises(ValueError) as caught:
        fill_fraction(array)
    assert str(caught.value) == message


def test_shape_mismatch_is_rejected():
    with pytest.raises(ValueError) as caught:
        survival(LOADING, SURVIVAL[:2])
    assert str(caught.value) == "loading and survival occupancy differ in shape: (3, 4) vs (2, 4)"


def test_proportion_figure_without_trials():
    with pytest.raises(FitError, match="no trials for defect_free_probability"):
        proportion_figure("defect_free_probability", 0, 0)


def test_compare_proportions_uses_newcombe_method_10():
    # Newcombe (1998), Stat. Med. 17:873, Table II, method 10: 56/70 - 48/80 -> 0.0524 to 0.3339.
    figure = compare_proportions(56, 70, 48, 80)
    assert isinstance(figure, Figure)
    assert figure.name == "difference"
    assert figure.method == "newcombe-hybrid-score"
    assert figure.value == pytest.approx(56 / 70 - 48 / 80)
    assert (figure.ci_low, figure.ci_high) == pytest.approx((0.0524, 0.3339), abs=5e-5)
    assert figure.stderr == pytest.approx(math.sqrt(0.8 * 0.2 / 70 + 0.6 * 0.4 / 80))


def test_errors_are_catchable_as_runlog_errors():
    empty = np.zeros((2, 2), dtype=bool)
    with pytest.raises(RunlogError):
        survival(empty, empty)


def test_large_run_is_fast():
    # Requirement from the brief: (300_000 shots, 100 sites) well under a second per figure.
    rng = np.random.default_rng(0)
    loading = rng.random((300_000, 100), dtype=np.float32) < 0.5
    kept = loading & (rng.random((300_000, 100), dtype=np.float32) < 0.95)
    start = time.perf_counter()
    fill = fill_fraction(loading)
    kept_figure, _ = survival(loading, kept)
    per_site_fill(loading)
    per_site_survival(loading, kept)
    elapsed = time.perf_counter() - start
    assert elapsed < 1.0, f"counting figures took {elapsed:.3f} s"
    # random loading draws 0.5 per site: 30 million observations pin it to a few 1e-4
    assert abs(fill.value - 0.5) < 5 * fill.stderr
    assert abs(kept_figure.value - 0.95) < 5 * kept_figure.stderr
