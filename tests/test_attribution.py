"""Ranking what else changed across a change date: Hedges' g and two-sample tests."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from runlog.drift.attribution import CandidateShift, hedges_g, rank_candidates
from runlog.errors import FitError


def test_hedges_g_is_the_pooled_t_statistic_rescaled_and_corrected():
    # Reference: the pooled two-sample t statistic (scipy.stats.ttest_ind, equal variances) is
    # d / sqrt(1/n1 + 1/n2); Hedges (1981), J. Educational Statistics 6:107, gives
    # J ~ 1 - 3 / (4 df - 1), good to a few 1e-4 at df = 20.
    rng = np.random.default_rng(8)
    before, after = rng.normal(1.0, 0.2, 9), rng.normal(1.3, 0.3, 13)
    t = stats.ttest_ind(after, before, equal_var=True).statistic
    d = t * math.sqrt(1 / 9 + 1 / 13)
    df = 9 + 13 - 2
    assert hedges_g(before, after) == pytest.approx(d * (1 - 3 / (4 * df - 1)), rel=3e-4)
    assert hedges_g(after, before) == pytest.approx(-hedges_g(before, after), rel=1e-12)


@pytest.mark.parametrize(("df", "j"), [(10, 0.9227), (20, 0.9619)])
def test_hedges_correction_table(df, j):
    # Hedges & Olkin (1985), Statistical Methods for Meta-Analysis, table of J(df) [memory].
    n = df // 2 + 1
    before = np.array([0.0, 1.0] * (n // 2) + [0.5] * (n % 2))
    after = before + 1.0  # same spread, means 1 apart: the uncorrected d is 1 / pooled sd
    pooled_sd = before.std(ddof=1)
    assert hedges_g(before, after) * pooled_sd == pytest.approx(j, abs=5e-5)


def test_constant_settings_rank_first_when_changed_and_last_when_not():
    rng = np.random.default_rng(1)
    ranking = rank_candidates(
        {
            "lattice depth": ([3.0, 3.0, 3.0], [3.0, 3.0]),
            "probe power": (rng.normal(1.0, 0.1, 20), rng.normal(1.3, 0.1, 20)),
            "cooling detuning": ([-5.0] * 4, [-6.0] * 3),
            "room temperature": (rng.normal(21.0, 0.3, 20), rng.normal(21.0, 0.3, 20)),
        }
    )
    assert [s.name for s in ranking] == ["cooling detuning", "probe power", "room temperature", "lattice depth"]
    top, bottom = ranking[0], ranking[-1]
    assert top.effect_size == -math.inf and top.p_value == 0.0
    assert (top.before_mean, top.after_mean, top.n_before, top.n_after) == (-5.0, -6.0, 4, 3)
    assert bottom == CandidateShift("lattice depth", 0.0, 1.0, 3.0, 3.0, 3, 2)
    assert ranking[1].effect_size > 2.0 and ranking[1].p_value < 1e-6
    assert ranking[2].p_value > 0.01


def test_welch_p_value_matches_the_welch_satterthwaite_formula():
    # Welch (1947) t with Satterthwaite degrees of freedom, worked here by hand.
    before = np.array([10.1, 9.8, 10.3, 10.0, 9.9])
    after = np.array([10.6, 10.9, 10.2, 11.0, 10.7, 10.4, 10.8])
    va, vb = before.var(ddof=1) / before.size, after.var(ddof=1) / after.size
    t = (after.mean() - before.mean()) / math.sqrt(va + vb)
    df = (va + vb) ** 2 / (va**2 / (before.size - 1) + vb**2 / (after.size - 1))
    (shift,) = rank_candidates({"oven current": (before, after)})
    assert shift.p_value == pytest.approx(2 * stats.t.sf(abs(t), df), rel=1e-9)


def test_mann_whitney_p_value_by_counting_arrangements():
    # Exact two-sided Mann-Whitney p for 3 vs 3 fully separated readings: 2 of the C(6,3) = 20
    # equally likely arrangements are as extreme, p = 0.1.
    (shift,) = rank_candidates({"bias field": ([1.0, 2.0, 3.0], [4.0, 5.0, 6.0])}, test="mann-whitney")
    assert shift.p_value == pytest.approx(0.1, rel=1e-12)


def test_too_few_readings_rank_last_as_nan():
    ranking = rank_candidates({"single": ([1.0], [2.0]), "same": ([2.0, 2.0], [2.0, 2.0])})
    assert [s.name for s in ranking] == ["same", "single"]
    assert math.isnan(ranking[1].effect_size) and math.isnan(ranking[1].p_value)


def test_attribution_errors():
    with pytest.raises(FitError) as error:
        rank_candidates({"probe power": ([], [1.0, 2.0])})
    assert str(error.value) == "change attribution fit failed: candidate 'probe power' has no readings before the change"
    with pytest.raises(FitError) as error:
        rank_candidates({"probe power": ([1.0, 2.0], [1.0, math.nan])})
    assert str(error.value) == "change attribution fit failed: candidate 'probe power' has a non-finite reading after the change"
    with pytest.raises(ValueError, match="test must be 'welch' or 'mann-whitney', got 'z'"):
        rank_candidates({}, test="z")  # type: ignore[arg-type]
