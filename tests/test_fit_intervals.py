"""Fits: Student-t intervals with the fit's degrees of freedom, the thermal Ramsey envelope,
and curves drawn again with the envelope the stored fit was made with.

Sources: Student's t quantiles t(0.975, dof) from scipy.stats.t (used only here) and the
printed table of the NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.2 [memory]
(dof 2: 4.303, dof 5: 2.571, dof 30: 2.042). The thermal envelope is that of S. Kuhr et al.,
Phys. Rev. A 72, 023406 (2005), C(t) = C0 [1 + 0.95 (t/T2*)^2]^(-3/2) [memory].
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from runlog.derive import derive, fit_curve
from runlog.errors import FitError
from runlog.figures.coherence import ENVELOPES, fit_envelope, fit_ramsey
from runlog.figures.fitting import t_interval

from test_derive import ramsey_scan


@pytest.mark.parametrize(("dof", "factor"), [(2, 4.303), (5, 2.571), (30, 2.042)])
def test_t_interval_uses_the_t_quantile(dof, factor):
    low, high = t_interval(10.0, 1.0, dof)
    assert (high - 10.0) == pytest.approx(factor, abs=5e-4)  # NIST e-Handbook table [memory]
    assert (high - 10.0) == pytest.approx(stats.t.ppf(0.975, dof), rel=1e-12)
    assert low == pytest.approx(20.0 - high)


@pytest.mark.parametrize("envelope", ["gaussian", "thermal"])
def test_interval_of_an_envelope_fit_from_four_waits_covers_at_its_rate(envelope):
    # Seeded simulation with known truth: 4 waits, 2 parameters, dof 2. The t interval
    # covers ~95 %; value ± 1.96 stderr (the normal quantile) only ~80 %.
    waits = np.array([0.0, 500.0, 1000.0, 1500.0])
    shape = ENVELOPES[envelope]
    hits, normal, fits = np.zeros(2), np.zeros(2), 0
    for seed in range(300):
        rng = np.random.default_rng(seed)
        contrast = 0.9 * shape(waits, 1000.0) + rng.normal(0.0, 0.03, waits.size)
        try:
            figures = {f.name: f for f in fit_envelope(waits, contrast, envelope=envelope)}
        except FitError:
            continue
        fits += 1
        for i, (name, truth) in enumerate((("envelope_time", 1000.0), ("envelope_contrast", 0.9))):
            hits[i] += figures[name].ci_low <= truth <= figures[name].ci_high
            normal[i] += abs(figures[name].value - truth) <= 1.96 * figures[name].stderr
    coverage, normal_coverage = hits / fits, normal / fits
    print(f"\n{envelope} envelope, 4 waits, {fits} fits: t-interval coverage {coverage}, normal {normal_coverage}")
    assert fits >= 290
    assert np.all((coverage >= 0.92) & (coverage <= 0.98))
    assert np.all(normal_coverage < 0.88)


def test_thermal_ramsey_envelope_recovers_its_dephasing_time():
    rng = np.random.default_rng(5)
    t = np.tile(np.linspace(0.0, 3000.0, 31), 3)
    p = 0.5 * (1.0 + 0.9 * ENVELOPES["thermal"](t, 800.0) * np.cos(2 * math.pi * 0.002 * t + 0.3))
    y = rng.binomial(400, p) / 400
    figures = {f.name: f for f in fit_ramsey(t, y, envelope="thermal")}
    time = figures["t2_star"]
    assert time.ci_low <= 800.0 <= time.ci_high
    assert abs(time.value - 800.0) <= 3 * time.stderr


def test_a_curve_is_drawn_with_the_envelope_its_fit_was_made_with(catalogue, make_file):
    catalogue.ingest(make_file(table=ramsey_scan(np.random.default_rng(21))))
    derive(catalogue, "ramsey1", "coherence", envelope="thermal")
    curve = fit_curve(catalogue, "ramsey1")
    assert "(1 + 0.95 (t/T)²)^(-3/2)" in curve.formula
    derive(catalogue, "ramsey1", "coherence", envelope="exponential")
    assert "exp(-t/T)" in fit_curve(catalogue, "ramsey1").formula
    assert "exp(-(t/T)²)" in fit_curve(catalogue, "ramsey1", envelope="gaussian").formula
    stored = catalogue.run("ramsey1").figures["t2_star"]
    assert stored["ci_low"] < stored["value"] < stored["ci_high"]
