"""Allan deviations against the test data of NIST SP 1065 (Riley 2008), REFERENCES.md section 4."""

from __future__ import annotations

import numpy as np
import pytest

from runlog.drift.stability import allan_deviation, modified_allan_deviation, octave_taus
from runlog.errors import FitError

NINE_POINTS = [892, 809, 823, 798, 671, 644, 883, 903, 677]  # NIST SP 1065 9-point set, rate 1


def thousand_points() -> list[float]:
    """NIST SP 1065 1000-point set: n0 = 1234567890, n(i+1) = 16807 n(i) mod 2147483647, y(i) = n(i) / 2147483647.

    The set holds y(0) ... y(999); starting at y(1) misses the published values by 4e-4.
    """
    n, out = 1234567890, []
    for _ in range(1000):
        out.append(n / 2147483647)
        n = 16807 * n % 2147483647
    return out


def test_nine_point_set_allan_deviation():
    # NIST SP 1065: ADEV tau=1 91.22945, tau=2 115.8082.
    curve = allan_deviation(NINE_POINTS, [1, 2])
    np.testing.assert_allclose(curve.deviation, [91.22945, 115.8082], rtol=1e-6)
    np.testing.assert_array_equal(curve.terms, [8, 3])


def test_nine_point_set_overlapping_allan_deviation():
    # NIST SP 1065: overlapping ADEV tau=2 85.95287.
    curve = allan_deviation(NINE_POINTS, [2], overlapping=True)
    assert curve.deviation[0] == pytest.approx(85.95287, rel=1e-6)
    assert curve.terms[0] == 6


def test_nine_point_set_modified_allan_deviation():
    # NIST SP 1065: MDEV tau=2 74.78849.
    curve = modified_allan_deviation(NINE_POINTS, [2])
    assert curve.deviation[0] == pytest.approx(74.78849, rel=1e-6)


def test_thousand_point_set():
    y = thousand_points()
    assert 16807 * 1234567890 % 2147483647 == 395529916  # SP 1065 check value n1
    # NIST SP 1065: ADEV tau=1, 10, 100; overlapping ADEV tau=10, 100.
    np.testing.assert_allclose(
        allan_deviation(y, [1, 10, 100]).deviation, [2.922319e-01, 9.965736e-02, 3.897804e-02], rtol=1e-6
    )
    np.testing.assert_allclose(
        allan_deviation(y, [10, 100], overlapping=True).deviation, [9.159953e-02, 3.241343e-02], rtol=1e-6
    )


def test_rate_sets_the_tau_units_only():
    y = thousand_points()
    at_one = allan_deviation(y, [1, 10, 100], overlapping=True)
    at_fifty = allan_deviation(y, [0.02, 0.2, 2.0], rate=50.0, overlapping=True)
    np.testing.assert_allclose(at_fifty.deviation, at_one.deviation, rtol=1e-12)
    np.testing.assert_allclose(at_fifty.taus, [0.02, 0.2, 2.0])


def test_modified_equals_allan_at_one_sample():
    # SP 1065: the modified Allan variance equals the Allan variance at tau = tau0 [memory].
    y = thousand_points()
    mod = modified_allan_deviation(y, [1]).deviation[0]
    assert mod == pytest.approx(allan_deviation(y, [1], overlapping=True).deviation[0], rel=1e-12)


def test_white_noise_falls_as_one_over_root_tau():
    # SP 1065 noise-type table: white frequency noise has sigma(tau) proportional to tau^-1/2 [memory].
    y = np.random.default_rng(4).normal(0.0, 1.0, 8192)
    taus = octave_taus(y.size)[:8]
    curve = allan_deviation(y, taus, overlapping=True)
    slope = np.polyfit(np.log(curve.taus), np.log(curve.deviation), 1)[0]
    assert slope == pytest.approx(-0.5, abs=0.05)
    assert curve.deviation[0] == pytest.approx(1.0, rel=0.05)


def test_octave_taus():
    np.testing.assert_array_equal(octave_taus(9), [1, 2, 4])
    np.testing.assert_array_equal(octave_taus(9, modified=True), [1, 2])
    np.testing.assert_array_equal(octave_taus(100, rate=10.0), [0.1, 0.2, 0.4, 0.8, 1.6, 3.2])


def test_stability_errors():
    with pytest.raises(FitError) as error:
        allan_deviation(NINE_POINTS, [1.5])
    assert str(error.value) == "allan deviation fit failed: tau 1.5 is not a positive whole number of samples at rate 1.0"
    with pytest.raises(FitError) as error:
        allan_deviation(NINE_POINTS, [5], overlapping=True)
    assert str(error.value) == "overlapping allan deviation fit failed: tau 5.0 needs at least 10 samples, got 9"
    with pytest.raises(FitError) as error:
        modified_allan_deviation(NINE_POINTS, [4])
    assert str(error.value) == "modified allan deviation fit failed: tau 4.0 needs at least 11 samples, got 9"


def test_cross_check_with_allantools_when_installed():
    allantools = pytest.importorskip("allantools")
    y = np.asarray(thousand_points())
    taus = [1, 2, 4, 8, 16, 32]
    for ours, theirs in (
        (allan_deviation(y, taus), allantools.adev(y, rate=1.0, data_type="freq", taus=taus)),
        (allan_deviation(y, taus, overlapping=True), allantools.oadev(y, rate=1.0, data_type="freq", taus=taus)),
        (modified_allan_deviation(y, taus), allantools.mdev(y, rate=1.0, data_type="freq", taus=taus)),
    ):
        np.testing.assert_allclose(ours.deviation, theirs[1], rtol=1e-9)


def test_a_series_stability_matches_allantools_and_reads_in_plain_words(catalogue, make_file):
    # Reference: allantools.oadev (overlapping Allan deviation, rate 1, octave taus), a
    # library used only in the tests. White run-to-run noise: the deviation keeps falling.
    import datetime as dt

    import allantools

    from runlog import Figure

    rng = np.random.default_rng(41)
    values = 1000.0 + rng.normal(0.0, 20.0, 32)
    for day in range(8):
        start = dt.datetime(2026, 3, 2 + day, 9, tzinfo=dt.timezone.utc)
        catalogue.ingest(make_file(runs={f"r{day}-{k}": 5 for k in range(4)}, sequence="ramsey", start=start, seed=day))
    for index, value in enumerate(values):
        catalogue.save_figures(f"r{index // 4}-{index % 4}", "coherence", [Figure("coherence_time", float(value), "us", stderr=20.0, method="least-squares")])
    found = catalogue.stability("coherence_time")
    taus, deviation, _, _ = allantools.oadev(values, rate=1.0, data_type="freq", taus=np.array(found["taus"]))
    # allantools leaves out the longest tau (one term); the others agree.
    np.testing.assert_allclose(found["deviation"][: len(deviation)], deviation, rtol=1e-10)
    assert found["terms"][-1] == 1 and len(deviation) == len(found["taus"]) - 1
    assert found["words"].startswith(f"averaging {found['best_runs']} runs (about {5 * found['best_runs']} shots) reaches")
    assert "no drift seen" in found["words"]
