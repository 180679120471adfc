"""Binomial proportion intervals checked against Newcombe (1998) and against statsmodels."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from runlog.figures.intervals import (
    INTERVAL_METHODS,
    clopper_pearson,
    newcombe_difference,
    wilson,
    wilson_continuity,
)

# Newcombe R.G. (1998), "Two-sided confidence intervals for the single proportion: comparison
# of seven methods", Statistics in Medicine 17:857-872, Table I (95 %), as copied into
# /work/shared/REFERENCES.md section 1. The continuity-corrected column there was recomputed,
# not read from the printed table. Printed to 4 decimals, so a correct value is within 5e-5.
TABLE_I = [
    # x, n, Wilson score, Wilson continuity-corrected, Clopper-Pearson
    (81, 263, (0.2553, 0.3662), (0.2535, 0.3682), (0.2527, 0.3676)),
    (15, 148, (0.0624, 0.1605), (0.0598, 0.1645), (0.0578, 0.1617)),
    (0, 20, (0.0000, 0.1611), (0.0000, 0.2005), (0.0000, 0.1684)),
    (1, 29, (0.0061, 0.1718), (0.0018, 0.1963), (0.0009, 0.1776)),
]
TABLE_I_TOLERANCE = 5e-5

# Newcombe R.G. (1998), "Interval estimation for the difference between independent
# proportions", Statistics in Medicine 17:873-890, Table II, method 10 (hybrid score), as
# copied into /work/shared/REFERENCES.md section 1.
TABLE_II_METHOD_10 = [
    (56, 70, 48, 80, (0.0524, 0.3339)),
    (9, 10, 3, 10, (0.1705, 0.8090)),
    (6, 7, 2, 7, (0.0582, 0.8062)),
    (5, 56, 0, 29, (-0.0381, 0.1926)),
    (0, 10, 0, 20, (-0.1611, 0.2775)),
    (10, 10, 0, 20, (0.6791, 1.0000)),
]


def _wald(x: int, n: int) -> tuple[float, float]:
    """The Wald interval, only to show that ours is not it."""
    p = x / n
    half = stats.norm.ppf(0.975) * math.sqrt(p * (1 - p) / n)
    return p - half, p + half


def _table_id(row: tuple) -> str:
    return f"Newcombe1998-TableI-{row[0]}of{row[1]}"


@pytest.mark.parametrize("row", TABLE_I, ids=_table_id)
def test_wilson_matches_newcombe_table_i(row):
    x, n, expected, _, _ = row
    assert wilson(x, n) == pytest.approx(expected, abs=TABLE_I_TOLERANCE)


# The continuity-corrected upper end for 15/148 sits on a rounding boundary: with the exact
# 97.5 % normal quantile (z = 1.959964) it is 0.1644498, which rounds to 0.1644, while the
# REFERENCES.md value 0.1645 comes from z = 1.96 exactly (0.1644511). So the column is checked
# at z = 1.96, i.e. confidence 2*Phi(1.96) - 1, where every entry meets 5e-5, and at 0.95 with
# the tolerance widened by that quantile's effect (measured 5.02e-5 worst case).
CONFIDENCE_AT_Z_1_96 = 2 * stats.norm.cdf(1.96) - 1


@pytest.mark.parametrize("row", TABLE_I, ids=_table_id)
def test_wilson_continuity_matches_newcombe_table_i(row):
    x, n, _, expected, _ = row
    got = wilson_continuity(x, n, CONFIDENCE_AT_Z_1_96)
    assert got == pytest.approx(expected, abs=TABLE_I_TOLERANCE)
    assert wilson_continuity(x, n) == pytest.approx(expected, abs=TABLE_I_TOLERANCE + 1e-6)


@pytest.mark.parametrize("row", TABLE_I, ids=_table_id)
def test_clopper_pearson_matches_newcombe_table_i(row):
    x, n, _, _, expected = row
    assert clopper_pearson(x, n) == pytest.approx(expected, abs=TABLE_I_TOLERANCE)


@pytest.mark.parametrize(
    "row", TABLE_II_METHOD_10, ids=lambda r: f"Newcombe1998-TableII-m10-{r[0]}of{r[1]}-{r[2]}of{r[3]}"
)
def test_newcombe_difference_matches_table_ii_method_10(row):
    x1, n1, x2, n2, expected = row
    assert newcombe_difference(x1, n1, x2, n2) == pytest.approx(expected, abs=TABLE_I_TOLERANCE)


# Must-not-do cases from /work/shared/REFERENCES.md section 1: the Wald interval for 1/29 is
# -0.0319..0.1009 and for 0/20 is [0, 0].
def test_wald_reference_values_as_documented():
    assert _wald(1, 29) == pytest.approx((-0.0319, 0.1009), abs=5e-5)
    assert _wald(0, 20) == (0.0, 0.0)


@pytest.mark.parametrize("method", sorted(INTERVAL_METHODS))
@pytest.mark.parametrize("x, n", [(1, 29), (0, 20), (15, 148), (81, 263)])
def test_no_method_is_the_wald_interval(method, x, n):
    low, high = INTERVAL_METHODS[method](x, n, 0.95)
    wald_low, wald_high = _wald(x, n)
    assert abs(low - wald_low) > 1e-3 or abs(high - wald_high) > 1e-3
    assert 0.0 <= low < high <= 1.0


@pytest.mark.parametrize("method", sorted(INTERVAL_METHODS))
def test_zero_successes_keeps_a_positive_upper_end(method):
    low, high = INTERVAL_METHODS[method](0, 20, 0.95)
    assert low == 0.0
    assert high > 0.0


@pytest.mark.parametrize("method", sorted(INTERVAL_METHODS))
@pytest.mark.parametrize("n", [1, 2, 5, 20, 137, 10_000, 3_000_000])
def test_edges_are_exactly_zero_and_one(method, n):
    interval = INTERVAL_METHODS[method]
    assert interval(0, n, 0.95)[0] == 0.0
    assert interval(n, n, 0.95)[1] == 1.0
    # mirror symmetry x <-> n - x holds for all three methods
    low, high = interval(n // 3, n, 0.95)
    mirror_low, mirror_high = interval(n - n // 3, n, 0.95)
    assert low == pytest.approx(1.0 - mirror_high, abs=1e-12)
    assert high == pytest.approx(1.0 - mirror_low, abs=1e-12)


# Reference library: statsmodels.stats.proportion.proportion_confint ("wilson" and "beta",
# the latter being Clopper-Pearson).
@pytest.mark.parametrize("confidence", [0.68, 0.9, 0.95, 0.99])
@pytest.mark.parametrize(
    "ours, statsmodels_method", [(wilson, "wilson"), (clopper_pearson, "beta")], ids=["wilson", "beta"]
)
def test_agrees_with_statsmodels_on_random_grid(ours, statsmodels_method, confidence):
    rng = np.random.default_rng(20240611)
    trials = rng.integers(1, 5000, size=200)
    successes = rng.integers(0, trials + 1)
    worst = 0.0
    for x, n in zip(successes.tolist(), trials.tolist()):
        expected = proportion_confint(x, n, alpha=1 - confidence, method=statsmodels_method)
        got = ours(x, n, confidence)
        worst = max(worst, abs(got[0] - expected[0]), abs(got[1] - expected[1]))
    assert worst < 1e-10


# Reference library: statsmodels.stats.proportion.confint_proportions_2indep, method "newcomb".
def test_newcombe_difference_agrees_with_statsmodels_on_random_grid():
    rng = np.random.default_rng(7)
    worst = 0.0
    for _ in range(200):
        n1, n2 = rng.integers(1, 2000, size=2).tolist()
        x1, x2 = int(rng.integers(0, n1 + 1)), int(rng.integers(0, n2 + 1))
        expected = confint_proportions_2indep(x1, n1, x2, n2, method="newcomb", compare="diff")
        got = newcombe_difference(x1, n1, x2, n2)
        worst = max(worst, abs(got[0] - expected[0]), abs(got[1] - expected[1]))
    assert worst < 1e-10


def test_newcombe_difference_is_antisymmetric():
    low, high = newcombe_difference(56, 70, 48, 80)
    swapped_low, swapped_high = newcombe_difference(48, 80, 56, 70)
    assert (low, high) == pytest.approx((-swapped_high, -swapped_low), abs=1e-15)


def test_confidence_widens_the_interval():
    narrow = wilson(30, 100, 0.68)
    wide = wilson(30, 100, 0.99)
    assert wide[0] < narrow[0] and narrow[1] < wide[1]


def _coverage(interval, n: int, probabilities: np.ndarray) -> np.ndarray:
    """Exact coverage probability: binomial weight of the x whose interval holds p."""
    bounds = np.array([interval(x, n, 0.95) for x in range(n + 1)])
    xs = np.arange(n + 1)
    out = []
    for p in probabilities:
        holds = (bounds[:, 0] <= p) & (p <= bounds[:, 1])
        out.append(stats.binom.pmf(xs[holds], n, p).sum())
    return np.array(out)


def test_clopper_pearson_never_covers_less_than_nominal():
    # Clopper & Pearson (1934): the exact interval guarantees coverage >= the nominal level.
    probabilities = np.linspace(0.001, 0.999, 999)
    for n in (10, 29, 100):
        assert _coverage(clopper_pearson, n, probabilities).min() >= 0.95 - 1e-12


def test_wilson_mean_coverage_is_near_nominal():
    # Newcombe (1998, Stat. Med. 17:857) reports mean coverage of the Wilson score interval
    # close to the nominal 0.95 [memory]; we only require it within 0.01.
    probabilities = np.linspace(0.001, 0.999, 999)
    for n in (10, 29, 100):
        assert abs(_coverage(wilson, n, probabilities).mean() - 0.95) < 0.01


@pytest.mark.parametrize(
    "args, message",
    [
        ((5, 4), "successes must lie between 0 and trials (4), got 5"),
        ((-1, 4), "successes must lie between 0 and trials (4), got -1"),
        ((0, 0), "trials must be positive, got 0"),
        ((1, 4.0), "trials must be an integer, got 4.0"),
        ((True, 4), "successes must be an integer, got True"),
        ((1, 4, 1.0), "confidence must lie strictly between 0 and 1, got 1.0"),
        ((1, 4, "95%"), "confidence must be a number between 0 and 1, got '95%'"),
    ],
)
@pytest.mark.parametrize("method", sorted(INTERVAL_METHODS))
def test_invalid_input_is_rejected_with_a_clear_message(method, args, message):
    with pytest.raises(ValueError) as caught:
        INTERVAL_METHODS[method](*args)
    assert str(caught.value) == message


def test_numpy_integers_are_accepted():
    assert wilson(np.int64(81), np.int32(263)) == wilson(81, 263)


def test_newcombe_difference_rejects_invalid_counts():
    with pytest.raises(ValueError, match=r"successes must lie between 0 and trials \(10\), got 11"):
        newcombe_difference(11, 10, 0, 10)


def test_interval_method_names():
    assert INTERVAL_METHODS == {
        "wilson": wilson,
        "clopper-pearson": clopper_pearson,
        "wilson-cc": wilson_continuity,
    }
