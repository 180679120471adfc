"""Suspects of a change: standardised changes, Benjamini-Hochberg, setting changes."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from runlog.drift.candidates import KINDS, Candidate, benjamini_hochberg, rank, register_source, sources, standardised_change


def test_benjamini_hochberg_matches_statsmodels():
    # Reference: statsmodels.stats.multitest.multipletests(method="fdr_bh"), an
    # implementation of Benjamini & Hochberg (1995), J. R. Stat. Soc. B 57:289.
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(3)
    p = np.concatenate([rng.uniform(size=20), rng.uniform(0, 0.01, 5)])
    np.testing.assert_allclose(benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12)
    with_nan = benjamini_hochberg([0.01, math.nan, 0.04])
    np.testing.assert_allclose(with_nan[[0, 2]], multipletests([0.01, 0.04], method="fdr_bh")[1])
    assert math.isnan(with_nan[1])


def test_readings_without_errors_get_welchs_test():
    # Reference: scipy.stats.ttest_ind(equal_var=False) is Welch's t-test.
    rng = np.random.default_rng(4)
    before, after = rng.normal(1.0, 0.2, 9), rng.normal(1.3, 0.3, 13)
    *_, z, p = standardised_change(Candidate("x", "measurement", tuple(before), tuple(after)))
    welch = stats.ttest_ind(after, before, equal_var=False)
    assert z == pytest.approx(welch.statistic, rel=1e-12)
    assert p == pytest.approx(welch.pvalue, rel=1e-9)


def test_readings_with_errors_use_their_weighted_means():
    before, after = (10.0, 10.2), (11.0, 11.0)
    errors = (0.1, 0.1)
    mb, ma, sb, sa, z, p = standardised_change(Candidate("t", "figure", before, after, errors, errors))
    assert mb == pytest.approx(10.1) and ma == pytest.approx(11.0)
    # before: chi2 = 2 over 1 degree of freedom, Birge ratio sqrt(2) widens 0.1/sqrt(2) to 0.1
    assert sb == pytest.approx(0.1) and sa == pytest.approx(0.1 / math.sqrt(2))
    assert z == pytest.approx(0.9 / math.hypot(0.1, 0.1 / math.sqrt(2)))
    assert p == pytest.approx(2 * stats.norm.sf(z))


def test_a_figure_within_its_error_bars_does_not_outrank_one_far_outside():
    noisy = Candidate("contrast", "figure", (0.80, 0.60), (0.95, 0.99), (0.2, 0.2), (0.2, 0.2))
    precise = Candidate("survival", "figure", (0.900, 0.901), (0.910, 0.911), (0.001, 0.001), (0.001, 0.001))
    ranked = rank([noisy, precise])
    assert [s.name for s in ranked] == ["survival", "contrast"]
    assert ranked[0].significant and not ranked[1].significant
    assert "within its errors" in ranked[1].words


def test_setting_changes_are_listed_as_such_and_unchanged_settings_dropped():
    moved = Candidate("lattice_depth", "parameter", (65.0, 65.0), (55.0, 55.0), unit="uK")
    same = Candidate("wait", "parameter", (1.0,), (1.0, 1.0))
    ranked = rank([Candidate("atom_number", "measurement", (1.0, 1.1, 0.9), (1.0, 1.05)), moved, same])
    assert ranked[0].setting_changed and ranked[0].name == "lattice_depth"
    assert ranked[0].words == "setting lattice_depth changed from 65 to 55 µK"
    assert [s.name for s in ranked] == ["lattice_depth", "atom_number"]


def test_candidate_kinds_and_registry():
    with pytest.raises(ValueError, match="kind"):
        Candidate("x", "rumour", (1.0,), (2.0,))
    with pytest.raises(ValueError, match="2 readings before but 1 errors"):
        Candidate("x", "figure", (1.0, 2.0), (2.0,), (0.1,), (0.1,))
    assert "monitor" in KINDS
    import runlog.drift.causes  # noqa: F401  registers the stored-readings sources

    assert {"parameters", "measurements", "figures"} <= set(sources())
    register_source("test-source", lambda connection, apparatus_id, window, quantity: [])
    assert "test-source" in sources()
    from runlog.drift import candidates

    del candidates._SOURCES["test-source"]
