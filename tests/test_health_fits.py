"""The health-figure fits on arrays: Rabi, lineshapes and field, echo, T1, lifetime.

Outside references, named beside each check:

* NIST StRD nonlinear regression, certified values (Misra1a, BoxBOD: y = b1 (1 - exp(-b2 x)),
  the T1 relaxation model from P0 = 0);
* ``scipy.optimize.curve_fit`` on the same data as a plain reference fit (the same least
  squares optimum; its standard errors assume one noise level for all shots, ours are HC3,
  so they agree within a factor, not to digits);
* the textbook two-level atom (Rabi formula; pi time = pi / Omega);
* 1 G = 1e-4 T exactly (NIST SP 811);
* seeded simulations with a known truth for coverage (truth within one standard error in
  about 68 % of scans, within three in at least 99 %).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq, curve_fit

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.lifetime import fit_lifetime, lifetime_model
from runlog.figures.rabi import fit_rabi, rabi_model
from runlog.figures.relaxation import echo_model, fit_echo, fit_relaxation, fit_t1
from runlog.figures.spectroscopy import field_from_resonance, fit_lineshape, lorentzian, rabi_lineshape, rabi_linewidth

ATOMS = 100


def figures(found: list[Figure]) -> dict[str, Figure]:
    return {f.name: f for f in found}


def coverage(runs: list[dict[str, Figure]], name: str, truth: float) -> tuple[float, float]:
    z = np.array([abs(r[name].value - truth) / r[name].stderr for r in runs])
    return float(np.mean(z < 1)), float(np.mean(z < 3))


def assert_covers(runs: list[dict[str, Figure]], truths: dict[str, float]) -> None:
    for name, truth in truths.items():
        one, three = coverage(runs, name, truth)
        # 60 scans: the fraction within one standard error is 0.68 ± 0.06; allow ±2.5 of those.
        assert 0.53 <= one <= 0.83, (name, one)
        assert three >= 0.98, (name, three)


def rabi_scan(rng, frequency=0.25, contrast=0.9, offset=0.03, damping=20.0):
    t = np.repeat(np.linspace(0.0, 10.0, 21), 5)  # us
    p = rabi_model(t, offset, contrast, frequency, 1.0 / damping)
    return t, rng.binomial(ATOMS, p) / ATOMS


# --- Rabi oscillation -------------------------------------------------------------------


def test_rabi_matches_curve_fit_and_the_textbook_pi_time():
    t, y = rabi_scan(np.random.default_rng(1))
    found = figures(fit_rabi(t, y, duration_unit="us"))
    reference, covariance = curve_fit(rabi_model, t, y, p0=[0.0, 1.0, 0.25, 0.05])
    assert found["rabi_frequency"].value == pytest.approx(reference[2], rel=1e-6)
    assert found["contrast"].value == pytest.approx(reference[1], rel=1e-6)
    assert found["damping_time"].value == pytest.approx(1.0 / reference[3], rel=1e-5)
    # Textbook two-level atom: pi time = pi / Omega = 1 / (2 f).
    assert found["pi_time"].value == pytest.approx(0.5 / found["rabi_frequency"].value, rel=1e-12)
    assert found["rabi_frequency"].unit == "MHz" and found["pi_time"].unit == "us"
    ratio = found["rabi_frequency"].stderr / math.sqrt(covariance[2, 2])
    assert 0.5 <= ratio <= 2.0


def test_rabi_coverage_on_simulated_scans():
    rng = np.random.default_rng(2)
    runs = [figures(fit_rabi(*rabi_scan(rng))) for _ in range(60)]
    assert_covers(runs, {"rabi_frequency": 0.25, "pi_time": 2.0, "contrast": 0.9, "damping_time": 20.0})


def test_rabi_without_damping_omits_the_damping_time_and_refuses_flat_data():
    rng = np.random.default_rng(3)
    t = np.repeat(np.linspace(0.0, 10.0, 21), 5)
    y = rng.binomial(ATOMS, rabi_model(t, 0.0, 0.95, 0.25, 0.0)) / ATOMS
    assert "damping_time" not in figures(fit_rabi(t, y))
    with pytest.raises(FitError, match="constant"):
        fit_rabi(t, rng.binomial(ATOMS, 0.5, t.size) / ATOMS)
    with pytest.raises(FitError, match="6 are needed"):
        fit_rabi([0, 1, 2], [0.0, 0.5, 1.0])


# --- lineshapes and the field ------------------------------------------------------------


def test_rabi_linewidth_of_a_pi_pulse_against_a_brute_force_root():
    # Textbook Rabi formula at Omega T = pi: the half-maximum detuning found here by a
    # plain root search of the formula written out again.
    pulse = 1.0
    omega = math.pi / pulse

    def shape(delta_cyclic):
        d = 2 * math.pi * delta_cyclic
        w = math.sqrt(omega**2 + d**2)
        return omega**2 / w**2 * math.sin(w * pulse / 2) ** 2

    half = brentq(lambda d: shape(d) - 0.5, 0.0, 0.6)
    assert rabi_linewidth(0.5, pulse) == pytest.approx(2 * half, rel=1e-10)
    assert rabi_linewidth(0.5, pulse) == pytest.approx(0.7987, abs=1e-3)  # 0.80/T for a pi pulse [memory]


def lorentz_scan(rng):
    x = np.repeat(np.linspace(-30.0, 30.0, 25), 4)  # kHz
    return x, rng.binomial(ATOMS, lorentzian(x, 0.05, 0.8, 3.0, 10.0)) / ATOMS


def test_lorentzian_matches_curve_fit_and_covers_its_truth():
    rng = np.random.default_rng(4)
    x, y = lorentz_scan(rng)
    found = figures(fit_lineshape(x, y, frequency_unit="kHz"))
    reference, covariance = curve_fit(lorentzian, x, y, p0=[0.0, 1.0, 0.0, 8.0])
    assert found["resonance"].value == pytest.approx(reference[2], rel=1e-6)
    assert found["linewidth"].value == pytest.approx(abs(reference[3]), rel=1e-6)
    assert 0.5 <= found["resonance"].stderr / math.sqrt(covariance[2, 2]) <= 2.0
    runs = [figures(fit_lineshape(*lorentz_scan(rng))) for _ in range(60)]
    assert_covers(runs, {"resonance": 3.0, "linewidth": 10.0, "amplitude": 0.8})


def rabi_line_scan(rng):
    x = np.repeat(np.linspace(-3.0, 3.0, 31), 4)  # kHz, pulse 1 ms
    return x, rng.binomial(ATOMS, rabi_lineshape(x, 0.02, 0.9, 0.3, 0.45, 1.0)) / ATOMS


def test_rabi_lineshape_covers_its_truth_and_dips_are_negative():
    rng = np.random.default_rng(5)
    runs = [figures(fit_lineshape(*rabi_line_scan(rng), lineshape="rabi", pulse=1.0)) for _ in range(40)]
    one = [coverage(runs, name, truth) for name, truth in (("resonance", 0.3), ("rabi_frequency", 0.45), ("amplitude", 0.9))]
    assert all(0.48 <= c[0] <= 0.88 and c[1] >= 0.97 for c in one), one
    x, y = lorentz_scan(rng)
    dip = figures(fit_lineshape(x, 1.0 - y))
    assert dip["amplitude"].value < 0 and dip["resonance"].value == pytest.approx(3.0, abs=1.5)
    with pytest.raises(FitError, match="pulse duration"):
        fit_lineshape(x, y, lineshape="rabi")


def test_field_from_a_resonance_in_the_sensitivity_unit():
    resonance = Figure("resonance", 101.0, "kHz", stderr=0.4, method="least-squares")
    field = field_from_resonance(resonance, "2.0 kHz/mG")
    assert (field.value, field.unit, field.stderr) == (pytest.approx(50.5), "mG", pytest.approx(0.2))
    absolute = Figure("resonance", 6834.782610904, "MHz", stderr=0.0001, method="least-squares")
    field = field_from_resonance(absolute, "1.4 MHz/G", "6834.682610904 MHz")
    assert field.value == pytest.approx(0.1 / 1.4, rel=1e-9) and field.unit == "G"
    # 1 G = 1e-4 T exactly (NIST SP 811): the same line with the sensitivity per tesla.
    tesla = field_from_resonance(absolute, "14 GHz/T", "6834.682610904 MHz")
    assert tesla.value == pytest.approx(0.1 / 1.4 * 1e-4, rel=1e-9)
    with pytest.raises(ValueError, match="not a frequency per magnetic field"):
        field_from_resonance(resonance, "2.0 kHz/s")


# --- echo, T1, lifetime ------------------------------------------------------------------


@pytest.mark.parametrize(
    ("x", "y", "start", "b1", "b2", "s1", "s2", "rss"),
    [
        # NIST StRD Misra1a, certified values.
        ([77.6, 114.9, 141.1, 190.8, 239.9, 289.0, 332.8, 378.4, 434.8, 477.3, 536.8, 593.1, 689.1, 760.0],
         [10.07, 14.73, 17.94, 23.93, 29.61, 35.18, 40.02, 44.82, 50.76, 55.05, 61.01, 66.40, 75.47, 81.78],
         None, 2.3894212918e02, 5.5015643181e-04, 2.7070075241e00, 7.2668688436e-06, 1.2455138894e-01),
        # NIST StRD BoxBOD, certified values.
        ([1, 2, 3, 5, 7, 10], [109, 149, 149, 191, 213, 224], None,
         2.1380940889e02, 5.4723748542e-01, 1.2354515176e01, 1.0455993237e-01, 1.1680088766e03),
    ],
    ids=["Misra1a", "BoxBOD"],
)
def test_relaxation_from_zero_against_nist_certified_values(x, y, start, b1, b2, s1, s2, rss):
    fit = fit_relaxation(x, y, initial=0.0, covariance="residual")
    assert fit.value("steady") == pytest.approx(b1, rel=1e-6)
    assert fit.value("rate") == pytest.approx(b2, rel=1e-6)
    assert fit.error("steady") == pytest.approx(s1, rel=1e-4)
    assert fit.error("rate") == pytest.approx(s2, rel=1e-4)
    assert fit.residual_sum_of_squares == pytest.approx(rss, rel=1e-8)


def test_echo_stretched_exponential_against_curve_fit_and_coverage():
    rng = np.random.default_rng(6)
    t = np.linspace(0.0, 30.0, 13)

    def series():
        return 0.9 * np.exp(-((t / 12.0) ** 1.8)) + rng.normal(0.0, 0.02, t.size)

    c = series()
    found = figures(fit_echo(t, c, wait_unit="ms"))
    reference, covariance = curve_fit(lambda v, c0, t2, n: echo_model(v, 0.0, c0, t2, n), t, c, p0=[1.0, 10.0, 2.0])
    assert found["t2"].value == pytest.approx(reference[1], rel=1e-6)
    assert found["stretch"].value == pytest.approx(reference[2], rel=1e-5)
    # Same data, same residual covariance: the standard errors agree to rounding.
    assert found["t2"].stderr == pytest.approx(math.sqrt(covariance[1, 1]), rel=1e-4)
    assert found["t2"].unit == "ms"
    runs = [figures(fit_echo(t, series())) for _ in range(60)]
    one, three = coverage(runs, "t2", 12.0)
    # Residual covariance with 10 degrees of freedom: normal quantiles undercover a little.
    assert 0.5 <= one <= 0.83 and three >= 0.98
    fixed = figures(fit_echo(t, c, stretch=2.0))
    assert "stretch" not in fixed and fixed["t2"].value == pytest.approx(12.0, rel=0.1)


def t1_scan(rng, loss=True):
    t = np.repeat(np.linspace(0.0, 400.0, 11), 10)  # ms
    reference = np.tile([True, False, False, False, False], t.size // 5)
    kept = 0.97 * np.exp(-t / 800.0) if loss else np.ones_like(t)
    population = 0.5 + (0.98 - 0.5) * np.exp(-t / 120.0)
    p = np.where(reference, kept, kept * population)
    return t, rng.binomial(ATOMS, p) / ATOMS, reference


def test_t1_corrected_for_atom_loss_covers_its_truth():
    rng = np.random.default_rng(7)
    runs, apparent = [], []
    for _ in range(60):
        t, y, reference = t1_scan(rng)
        runs.append(figures(fit_t1(t, y, reference=reference)))
        apparent.append(figures(fit_t1(t[~reference], y[~reference]))["t1"].value)
    assert_covers(runs, {"t1": 120.0})
    # Without the correction the atom loss biases T1 by many of its standard errors of the
    # mean over the 60 scans: the bias the reference shots remove.
    corrected = np.array([r["t1"].value for r in runs])
    assert abs(np.mean(corrected) - 120.0) < 3 * np.std(corrected) / math.sqrt(60)
    assert abs(np.mean(apparent) - 120.0) > 5 * np.std(apparent) / math.sqrt(60)


def lifetime_scan(rng, two_body=0.0):
    t = np.repeat(np.linspace(0.0, 20.0, 9), 10)  # s
    return t, rng.binomial(50, lifetime_model(t, 0.95, 1.0 / 12.0, two_body)) / 50


def test_lifetime_against_curve_fit_coverage_and_interval():
    rng = np.random.default_rng(9)
    t, y = lifetime_scan(rng)
    found = figures(fit_lifetime(t, y, hold_unit="s"))
    reference, covariance = curve_fit(lambda v, s0, tau: s0 * np.exp(-v / tau), t, y, p0=[1.0, 10.0])
    assert found["lifetime"].value == pytest.approx(reference[1], rel=1e-6)
    assert 0.5 <= found["lifetime"].stderr / math.sqrt(covariance[1, 1]) <= 2.0
    assert found["lifetime"].ci_low < found["lifetime"].value < found["lifetime"].ci_high
    runs = [figures(fit_lifetime(*lifetime_scan(rng))) for _ in range(60)]
    assert_covers(runs, {"lifetime": 12.0, "survival_at_zero": 0.95})
    inside = np.mean([r["lifetime"].ci_low <= 12.0 <= r["lifetime"].ci_high for r in runs])
    assert inside >= 0.88  # a 95 % interval over 60 scans


def test_lifetime_with_a_two_body_term_matches_curve_fit():
    rng = np.random.default_rng(10)
    t, y = lifetime_scan(rng, two_body=0.5)
    found = figures(fit_lifetime(t, y, two_body=True))
    reference, _ = curve_fit(lambda v, s0, k, b: lifetime_model(v, s0, k, b), t, y, p0=[1.0, 0.1, 0.3])
    assert found["lifetime"].value == pytest.approx(1.0 / reference[1], rel=1e-5)
    assert found["two_body_fraction"].value == pytest.approx(reference[2], rel=1e-4)
    # Flat survival: refused (the F-test against a constant, which passes 5 % of flat scans).
    with pytest.raises(FitError, match="constant"):
        fit_lifetime(t, np.full(t.size, 0.9) + np.random.default_rng(11).normal(0, 0.01, t.size))
