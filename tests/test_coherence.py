"""Ramsey and envelope fits on simulated scans with a known truth and binomial shot noise.

The truth is ours (simulated), so the checks are: the estimate lies near the truth, the
standard error covers the truth in about 68 % of repeated scans, and our standard error
agrees with a plain library least-squares fit (scipy.optimize.curve_fit,
absolute_sigma=False) used as the reference.
"""

from __future__ import annotations

import math

import numpy as np
import pint
import pytest
from scipy.optimize import curve_fit

from runlog.errors import FitError
from runlog.figures.coherence import fit_envelope, fit_ramsey, frequency_unit

ATOMS = 100  # atoms per shot: a shot's signal is k / 100, k binomial
WAITS_US = np.linspace(0.0, 3000.0, 31)
TRUTH = {"t2_star": 1000.0, "ramsey_contrast": 0.9, "ramsey_frequency": 0.002, "ramsey_phase": 0.3}  # us, -, MHz, rad


def envelope_of(kind, t, lifetime):
    return np.exp(-((t / lifetime) ** 2)) if kind == "gaussian" else np.exp(-t / lifetime)


def simulate(rng, kind="gaussian", waits=WAITS_US, sweeps=3, lifetime=1000.0, c0=0.9, detuning=0.002, phi=0.3):
    """One shot per (wait, sweep): bright fraction k/N, k ~ Binomial(N, p(wait))."""
    t = np.tile(waits, sweeps)
    p = 0.5 * (1.0 + c0 * envelope_of(kind, t, lifetime) * np.cos(2.0 * math.pi * detuning * t + phi))
    return t, rng.binomial(ATOMS, p) / ATOMS


def by_name(figures):
    return {f.name: f for f in figures}


@pytest.mark.parametrize("kind", ["gaussian", "exponential"])
def test_typical_scan_recovers_the_truth(kind):
    t, y = simulate(np.random.default_rng(11), kind=kind)
    figures = by_name(fit_ramsey(t, y, envelope=kind, wait_unit="us"))
    assert list(figures) == ["t2_star", "ramsey_contrast", "ramsey_frequency", "ramsey_phase"]
    for name, truth in TRUTH.items():
        f = figures[name]
        assert abs(f.value - truth) <= max(3 * f.stderr, 0.15 * abs(truth)), (name, f.value, f.stderr)
        assert f.method == "least-squares" and f.method_version == "1"
    assert figures["t2_star"].unit == "us"
    assert figures["ramsey_frequency"].unit == "MHz"
    assert figures["ramsey_phase"].unit == "rad"


def test_hyperfine_qubit_coherence_time_is_of_order_a_millisecond():
    # Common practice, no published source (REFERENCES.md section 6): hyperfine-qubit
    # coherence times of trapped neutral atoms are of order a millisecond. A simulated scan
    # with T = 1 ms, waits given in microseconds, must come back in the millisecond range.
    t, y = simulate(np.random.default_rng(12), waits=np.linspace(0.0, 2500.0, 26), detuning=0.003)
    f = by_name(fit_ramsey(t, y, wait_unit="us"))["t2_star"]
    value_ms = pint.UnitRegistry().Quantity(f.value, f.unit).to("ms").magnitude
    assert 0.5 <= value_ms <= 2.0


def test_negative_detuning_is_reported_positive():
    # cos(-2 pi d t + phi) = cos(2 pi d t - phi): the scan cannot tell the sign.
    t, y = simulate(np.random.default_rng(13), detuning=-0.002, phi=0.3)
    figures = by_name(fit_ramsey(t, y))
    assert figures["ramsey_frequency"].value > 0
    assert abs(figures["ramsey_frequency"].value - 0.002) <= 3 * figures["ramsey_frequency"].stderr
    assert abs(math.remainder(figures["ramsey_phase"].value + 0.3, 2 * math.pi)) <= 3 * figures["ramsey_phase"].stderr


def test_slow_fringe_less_than_one_cycle():
    # Detuning below one cycle per scan: the near-zero starting detuning handles it.
    t, y = simulate(np.random.default_rng(14), detuning=0.00025, lifetime=1500.0, sweeps=6)
    figures = by_name(fit_ramsey(t, y))
    assert abs(figures["t2_star"].value - 1500.0) <= max(
        3 * figures["t2_star"].stderr, 0.15 * 1500.0
    )


def test_coverage_of_one_standard_error():
    # 200 simulated scans: |estimate - truth| <= 1 stderr should hold in ~68 % of them.
    hits = {"t2_star": 0, "ramsey_contrast": 0}
    seeds = range(200)
    for seed in seeds:
        t, y = simulate(np.random.default_rng(2000 + seed), sweeps=2)
        figures = by_name(fit_ramsey(t, y))
        for name in hits:
            hits[name] += abs(figures[name].value - TRUTH[name]) <= figures[name].stderr
    fractions = {name: count / len(seeds) for name, count in hits.items()}
    print(f"\nRamsey coverage of 1 stderr over {len(seeds)} seeds: {fractions}")
    for name, fraction in fractions.items():
        assert 0.58 <= fraction <= 0.78, (name, fraction)


def test_standard_error_agrees_with_the_plain_reference():
    # Reference: scipy.optimize.curve_fit, absolute_sigma=False, started at the truth.
    def model(t, a, c0, lifetime, detuning, phi):
        return a * (1.0 + c0 * np.exp(-((t / lifetime) ** 2)) * np.cos(2.0 * math.pi * detuning * t + phi))

    for seed in range(4):
        t, y = simulate(np.random.default_rng(60 + seed))
        figures = by_name(fit_ramsey(t, y))
        ref, cov = curve_fit(model, t, y, p0=(0.5, 0.9, 1000.0, 0.002, 0.3), absolute_sigma=False)
        ref_err = np.sqrt(np.diag(cov))
        assert figures["t2_star"].value == pytest.approx(abs(ref[2]), rel=1e-4)
        for name, index in (("ramsey_contrast", 1), ("t2_star", 2), ("ramsey_frequency", 3), ("ramsey_phase", 4)):
            ratio = figures[name].stderr / ref_err[index]
            assert 0.3 <= ratio <= 3.0, (name, ratio)


@pytest.mark.parametrize(("wait_unit", "expected"), [("us", "MHz"), ("ms", "kHz"), ("s", "Hz"), ("ns", "GHz")])
def test_detuning_unit_is_the_reciprocal_of_the_wait_unit(wait_unit, expected):
    assert frequency_unit(wait_unit) == expected
    units = pint.UnitRegistry()
    assert (1 / units.Quantity(1.0, wait_unit)).to(expected).magnitude == pytest.approx(1.0)


def test_detuning_unit_for_an_unnamed_reciprocal():
    assert frequency_unit("min") == "1/min"
    pint.UnitRegistry().Quantity(1.0, frequency_unit("min"))  # parsable


# --- envelope fits ----------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["gaussian", "exponential"])
def test_envelope_recovers_the_truth(kind):
    rng = np.random.default_rng(21)
    waits = np.linspace(0.0, 3000.0, 16)
    contrast = 0.9 * envelope_of(kind, waits, 1000.0) + rng.normal(0.0, 0.02, waits.size)
    figures = by_name(fit_envelope(waits, contrast, envelope=kind, wait_unit="us"))
    assert list(figures) == ["envelope_time", "envelope_contrast"]
    for name, truth in (("envelope_time", 1000.0), ("envelope_contrast", 0.9)):
        f = figures[name]
        assert abs(f.value - truth) <= max(3 * f.stderr, 0.15 * truth), (name, f.value, f.stderr)


def test_envelope_coverage_of_one_standard_error():
    hits, seeds = 0, range(200)
    waits = np.linspace(0.0, 3000.0, 16)
    for seed in seeds:
        rng = np.random.default_rng(3000 + seed)
        contrast = 0.9 * np.exp(-((waits / 1000.0) ** 2)) + rng.normal(0.0, 0.03, waits.size)
        f = by_name(fit_envelope(waits, contrast))["envelope_time"]
        hits += abs(f.value - 1000.0) <= f.stderr
    fraction = hits / len(seeds)
    print(f"\nenvelope coverage of 1 stderr over {len(seeds)} seeds: envelope_time {fraction}")
    assert 0.58 <= fraction <= 0.78


# --- degenerate scans: FitError with the message asserted ------------------------------


def test_too_few_waits_for_ramsey():
    t, y = simulate(np.random.default_rng(31), waits=np.linspace(0.0, 3000.0, 5))
    with pytest.raises(FitError) as caught:
        fit_ramsey(t, y)
    assert str(caught.value) == "ramsey fit failed: 5 distinct waits; at least 6 are needed for 5 parameters"


def test_too_few_waits_for_envelope():
    with pytest.raises(FitError) as caught:
        fit_envelope([0.0, 100.0, 0.0, 100.0], [0.9, 0.8, 0.9, 0.8])
    assert str(caught.value) == "coherence fit failed: 2 distinct waits; at least 3 are needed for 2 parameters"


def test_envelope_that_grows():
    waits = np.linspace(0.0, 1000.0, 8)
    contrast = 0.3 * np.exp(waits / 800.0) + 0.001 * np.cos(waits)
    with pytest.raises(FitError) as caught:
        fit_envelope(waits, contrast, envelope="exponential")
    assert str(caught.value) == (
        "coherence fit failed: the contrast grows with wait instead of decaying; no coherence time to report"
    )


def test_no_decay_within_the_scan():
    # Waits far shorter than T: the contrast is flat, no better explained than by a constant.
    rng = np.random.default_rng(32)
    waits = np.linspace(0.0, 10.0, 12)
    contrast = 0.9 * np.exp(-((waits / 1000.0) ** 2)) + rng.normal(0.0, 0.02, waits.size)
    with pytest.raises(FitError) as caught:
        fit_envelope(waits, contrast)
    assert str(caught.value) == (
        "coherence fit failed: the model explains no more than a constant would by chance "
        "(residual sum of squares 0.00529389 against 0.00574489 for a constant, F-test p = 0.38)"
    )


def test_no_fringe_in_a_ramsey_scan():
    t, y = simulate(np.random.default_rng(33), c0=0.0)
    with pytest.raises(FitError) as caught:
        fit_ramsey(t, y)
    assert str(caught.value) == (
        "ramsey fit failed: the model explains no more than a constant would by chance "
        "(residual sum of squares 0.232901 against 0.257228 for a constant, F-test p = 0.065)"
    )


def test_weak_ramsey_fringe_leaves_the_coherence_time_unresolved():
    t, y = simulate(np.random.default_rng(23), c0=0.15)
    with pytest.raises(FitError) as caught:
        fit_ramsey(t, y)
    assert str(caught.value) == (
        "ramsey fit failed: coherence time not resolved: 3.08e+03 ± 1.6e+03 us is within 2 standard errors of zero"
    )


def test_negative_wait():
    with pytest.raises(FitError) as caught:
        fit_envelope([-1.0, 0.0, 1.0, 2.0], [0.9, 0.9, 0.8, 0.7])
    assert str(caught.value) == "coherence fit failed: negative waits"


def test_bad_envelope_name():
    with pytest.raises(ValueError, match="envelope must be one of gaussian, exponential"):
        fit_ramsey(WAITS_US, np.ones(WAITS_US.size), envelope="lorentzian")
