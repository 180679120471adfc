"""Fringe fits on simulated phase scans with a known truth and binomial shot noise.

The truth is ours (simulated), so the checks are: the estimate lies near the truth, the
standard error covers the truth in about 68 % of repeated scans (the meaning of one
standard error), and our standard error agrees with a plain library least-squares fit
(scipy.optimize.curve_fit, absolute_sigma=False) used as the reference.
"""

from __future__ import annotations

import math

import numpy as np
import pint
import pytest
from scipy.optimize import curve_fit

from runlog.errors import FitError
from runlog.figures.fringe import fit_fringe

ATOMS = 100  # atoms per shot, so a shot's signal is k / 100 with k binomial
PHASES = np.linspace(0.0, 2.0 * math.pi, 16, endpoint=False)
SWEEPS = 4


def simulate(rng, contrast=0.8, phi=0.4, offset=0.5, phases=PHASES, sweeps=SWEEPS):
    """One shot per (phase, sweep): bright fraction k/N, k ~ Binomial(N, p(phase))."""
    x = np.tile(phases, sweeps)
    p = offset * (1.0 + contrast * np.cos(x + phi))
    return x, rng.binomial(ATOMS, p) / ATOMS


def by_name(figures):
    return {f.name: f for f in figures}


def test_typical_scan_recovers_the_truth():
    x, y = simulate(np.random.default_rng(1))
    figures = by_name(fit_fringe(x, y))
    assert [f for f in figures] == ["contrast", "fringe_phase", "offset"]
    for name, truth in (("contrast", 0.8), ("fringe_phase", 0.4), ("offset", 0.5)):
        f = figures[name]
        assert abs(f.value - truth) <= max(3 * f.stderr, 0.15 * abs(truth)), name
        assert f.method == "least-squares" and f.method_version == "1"
    assert figures["fringe_phase"].unit == "rad" and figures["contrast"].unit == ""


def test_degrees_in_degrees_out():
    rng = np.random.default_rng(2)
    x, y = simulate(rng, phi=math.radians(-170.0))
    in_rad = by_name(fit_fringe(x, y))
    in_deg = by_name(fit_fringe(np.degrees(x), y, phase_unit="deg", y_unit="count"))
    assert in_deg["fringe_phase"].unit == "deg" and in_deg["offset"].unit == "count"
    assert in_deg["fringe_phase"].value == pytest.approx(math.degrees(in_rad["fringe_phase"].value), rel=1e-9)
    assert in_deg["fringe_phase"].stderr == pytest.approx(math.degrees(in_rad["fringe_phase"].stderr), rel=1e-6)
    assert in_deg["contrast"].value == pytest.approx(in_rad["contrast"].value, rel=1e-9)
    # -170 deg stays -170 deg: wrapped to (-180, 180], not reported as 190.
    assert -180.0 < in_deg["fringe_phase"].value <= 180.0
    assert abs(in_deg["fringe_phase"].value + 170.0) <= 3 * in_deg["fringe_phase"].stderr
    # Units are pint-parsable.
    units = pint.UnitRegistry()
    assert units.Quantity(1.0, in_deg["fringe_phase"].unit).to("rad").magnitude == pytest.approx(math.pi / 180)


def test_phase_near_half_turn_is_wrapped():
    x, y = simulate(np.random.default_rng(3), phi=math.pi - 0.01)
    f = by_name(fit_fringe(x, y))["fringe_phase"]
    assert -math.pi < f.value <= math.pi
    # distance on the circle to the truth
    assert abs(math.remainder(f.value - (math.pi - 0.01), 2 * math.pi)) <= 3 * f.stderr


def test_negative_contrast_is_reported_positive_with_shifted_phase():
    # a (1 - 0.6 cos(x + 0.3)) is a (1 + 0.6 cos(x + 0.3 + pi)).
    x, y = simulate(np.random.default_rng(4), contrast=-0.6, phi=0.3)
    figures = by_name(fit_fringe(x, y))
    assert figures["contrast"].value > 0
    assert abs(figures["contrast"].value - 0.6) <= 3 * figures["contrast"].stderr
    assert abs(math.remainder(figures["fringe_phase"].value - (0.3 + math.pi), 2 * math.pi)) <= 3 * figures["fringe_phase"].stderr


def test_coverage_of_one_standard_error():
    # 200 simulated scans: |estimate - truth| <= 1 stderr should hold in ~68 % of them.
    hits = {"contrast": 0, "fringe_phase": 0}
    seeds = range(200)
    for seed in seeds:
        x, y = simulate(np.random.default_rng(1000 + seed))
        figures = by_name(fit_fringe(x, y))
        hits["contrast"] += abs(figures["contrast"].value - 0.8) <= figures["contrast"].stderr
        hits["fringe_phase"] += abs(figures["fringe_phase"].value - 0.4) <= figures["fringe_phase"].stderr
    fractions = {name: count / len(seeds) for name, count in hits.items()}
    print(f"\nfringe coverage of 1 stderr over {len(seeds)} seeds: {fractions}")
    for name, fraction in fractions.items():
        assert 0.58 <= fraction <= 0.78, (name, fraction)


def test_standard_error_agrees_with_the_plain_reference():
    # Reference: scipy.optimize.curve_fit, absolute_sigma=False, same model and data.
    def model(x, a, c, phi):
        return a * (1.0 + c * np.cos(x + phi))

    for seed in range(5):
        x, y = simulate(np.random.default_rng(50 + seed))
        figures = by_name(fit_fringe(x, y))
        ref, cov = curve_fit(model, x, y, p0=(0.5, 0.8, 0.4), absolute_sigma=False)
        ref_err = np.sqrt(np.diag(cov))
        assert figures["contrast"].value == pytest.approx(ref[1], rel=1e-5)
        # Ours is the sandwich estimator, the reference the residual-variance one: they
        # differ by the heteroscedasticity of binomial noise, not by more than a factor 3.
        for name, index in (("offset", 0), ("contrast", 1), ("fringe_phase", 2)):
            ratio = figures[name].stderr / ref_err[index]
            assert 0.3 <= ratio <= 3.0, (name, ratio)


# --- degenerate scans: FitError with the message asserted ------------------------------


def test_three_distinct_phases():
    x, y = simulate(np.random.default_rng(5), phases=np.array([0.0, 2.0, 4.0]))
    with pytest.raises(FitError) as caught:
        fit_fringe(x, y)
    assert str(caught.value) == (
        "fringe fit failed: 3 distinct phases; at least 4 are needed to separate contrast, phase and offset"
    )


def test_phase_range_too_small():
    phases = np.radians(np.linspace(0.0, 60.0, 7))
    x, y = simulate(np.random.default_rng(6), phases=phases)
    with pytest.raises(FitError) as caught:
        fit_fringe(np.degrees(x), y, phase_unit="deg")
    assert str(caught.value) == (
        "fringe fit failed: phase range too small: the distinct phases cover 60 deg, less than a quarter turn"
    )


def test_phase_range_across_zero_counts_as_small():
    # 350 deg to 10 deg covers 20 deg, not 340 deg.
    phases = np.radians(np.array([350.0, 355.0, 0.0, 5.0, 10.0]))
    x, y = simulate(np.random.default_rng(7), phases=phases)
    with pytest.raises(FitError) as caught:
        fit_fringe(x, y)
    assert str(caught.value) == (
        "fringe fit failed: phase range too small: the distinct phases cover 0.349 rad, less than a quarter turn"
    )


def test_no_fringe_at_all():
    # Zero contrast: the engine finds the fit no better than a constant.
    x, y = simulate(np.random.default_rng(8), contrast=0.0)
    with pytest.raises(FitError) as caught:
        fit_fringe(x, y)
    assert str(caught.value) == (
        "fringe fit failed: the model explains no more than a constant would by chance "
        "(residual sum of squares 0.125621 against 0.1323 for a constant, F-test p = 0.21)"
    )


def test_contrast_not_resolved():
    # A weak fringe whose noise sits where the contrast is measured (top and bottom of the
    # fringe): the fit beats a constant overall, but the contrast is within 2 standard errors.
    x = np.tile(PHASES, 4)
    rng = np.random.default_rng(42)
    noise = np.where(np.abs(np.cos(x)) > 0.9, 0.2, 0.002) * rng.standard_normal(x.size)
    with pytest.raises(FitError) as caught:
        fit_fringe(x, 0.5 * (1.0 + 0.1 * np.cos(x)) + noise)
    assert str(caught.value) == (
        "fringe fit failed: contrast not resolved: 0.0729 ± 0.036 is within 2 standard errors of zero"
    )


def test_no_signal():
    with pytest.raises(FitError) as caught:
        fit_fringe(np.tile(PHASES, 2), np.zeros(2 * PHASES.size))
    assert str(caught.value) == "fringe fit failed: the mean signal is not positive (0); contrast is undefined"


def test_bad_arguments():
    with pytest.raises(ValueError, match="phase_unit must be 'rad' or 'deg'"):
        fit_fringe(PHASES, np.ones(PHASES.size), phase_unit="grad")
    with pytest.raises(ValueError, match="differ in length"):
        fit_fringe(PHASES, np.ones(3))
