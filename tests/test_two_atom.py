"""Two-atom interference: the coincidence dip, its visibility, and the kind through the store.

Outside references, named beside each check: ``scipy.optimize.curve_fit`` on the same data
(same optimum; HC3 against one residual variance for the errors); ``statsmodels``'
``proportion_confint`` (Wilson) for the single-setting interval; the distinguishable-
particle coincidence probability 1/2 at a balanced beam splitter (Hong, Ou & Mandel 1987);
seeded simulations with a known truth for coverage.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pyarrow as pa
import pytest
from conftest import T0
from scipy.optimize import curve_fit
from statsmodels.stats.proportion import proportion_confint

from runlog.derive import fit_curve
from runlog.errors import FitError
from runlog.figures.interference import coincidences, dip_model, fit_visibility, visibility_at_one_setting


def dip_scan(rng, visibility=0.8):
    x = np.repeat(np.linspace(-30.0, 30.0, 21), 6)  # a delay in us; 8 pairs a shot
    return x, rng.binomial(8, dip_model(x, 0.5, visibility, 2.0, 6.0)) / 8


def test_dip_against_curve_fit_and_coverage():
    rng = np.random.default_rng(1)
    x, y = dip_scan(rng)
    found = {f.name: f for f in fit_visibility(x, y, x_unit="us")}
    reference, covariance = curve_fit(dip_model, x, y, p0=[0.5, 0.7, 0.0, 5.0], ftol=1e-14, xtol=1e-14, gtol=1e-14)
    assert found["visibility"].value == pytest.approx(reference[1], rel=1e-6)
    assert 0.5 <= found["visibility"].stderr / math.sqrt(covariance[1, 1]) <= 2.0
    assert found["overlap_width"].unit == "us" and found["visibility"].method == "least-squares/dip"
    runs = [{f.name: f for f in fit_visibility(*dip_scan(rng))} for _ in range(50)]
    # The centre and width are there to draw the curve; their coverage is lower (the dip's
    # bottom has few coincidences): measured 0.64 within one and 0.94 within three errors.
    for name, truth in (("visibility", 0.8), ("coincidence_baseline", 0.5)):
        z = np.array([abs(r[name].value - truth) / r[name].stderr for r in runs])
        assert 0.52 <= np.mean(z < 1) <= 0.84 and np.mean(z < 3) >= 0.98, name
    peak = {f.name: f for f in fit_visibility(*dip_scan(rng, visibility=-0.6))}
    assert peak["visibility"].value < 0 and peak["visibility"].method == "least-squares/peak"


def test_one_setting_against_the_distinguishable_expectation():
    # V = 1 - P_c / (1/2); the interval is statsmodels' Wilson interval of P_c mapped through it.
    figure = visibility_at_one_setting(30, 200)[0]
    low, high = proportion_confint(30, 200, method="wilson")
    assert figure.value == pytest.approx(0.7)
    assert (figure.ci_low, figure.ci_high) == (pytest.approx(1 - 2 * high, rel=1e-9), pytest.approx(1 - 2 * low, rel=1e-9))
    with pytest.raises(FitError, match="no shot loaded"):
        visibility_at_one_setting(0, 0)


def pair_table(rng, run="hom1", scanned=True) -> pa.Table:
    """8 pairs of sites; both loaded with 0.8 each; a loaded pair ends in both sites with P_c."""
    delay = np.repeat(np.linspace(-30.0, 30.0, 21), 6) if scanned else np.zeros(120)
    n = delay.size
    loaded = rng.random((n, 16)) < 0.8
    p = dip_model(delay, 0.5, 0.8, 2.0, 6.0) if scanned else np.full(n, 0.15)
    both = loaded[:, 0::2] & loaded[:, 1::2]
    coincident = both & (rng.random(both.shape) < p[:, None])
    final = np.zeros_like(loaded)
    final[:, 0::2] = coincident
    final[:, 1::2] = coincident
    columns = {
        "run": [run] * n,
        "apparatus": ["bench-a"] * n,
        "sequence": ["hom"] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([T0 + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
        "occ.loading": pa.array(list(loaded), pa.list_(pa.bool_())),
        "occ.output": pa.array(list(final), pa.list_(pa.bool_())),
    }
    if scanned:
        columns["p.delay[us]"] = delay
    return pa.table(columns), coincident.sum(), both.sum()


def test_two_atom_through_derive_rules_and_the_curve(catalogue, make_file):
    rng = np.random.default_rng(2)
    table, _, _ = pair_table(rng)
    catalogue.ingest(make_file(table=table))
    found = {f.name: f for f in catalogue.derive("hom1", "two_atom").figures}
    # Simulated truth: visibility 0.8, baseline 0.5 (the distinguishable expectation).
    assert abs(found["visibility"].value - 0.8) < 3 * found["visibility"].stderr
    assert abs(found["coincidence_baseline"].value - 0.5) < 3 * found["coincidence_baseline"].stderr
    assert catalogue.run("hom1").figures["visibility"]["value"] == found["visibility"].value
    outcome = catalogue.apply_rules([{"sequence": "hom", "kind": "two_atom"}])[0]
    assert outcome.figures[0].value == found["visibility"].value
    curve = fit_curve(catalogue, "hom1")
    assert curve.kind == "two_atom" and curve.x_name == "delay"
    assert curve.offset == pytest.approx(found["coincidence_baseline"].value, rel=1e-3)

    table, coincident, pairs = pair_table(rng, run="hom2", scanned=False)
    catalogue.ingest(make_file(table=table))
    single = catalogue.derive("hom2", "two_atom").figures[0]
    assert single.value == pytest.approx(1 - 2 * coincident / pairs)
    assert abs(single.value - 0.7) < 3 * single.stderr  # P_c = 0.15: V = 0.7


def test_pairs_need_an_even_number_of_sites():
    with pytest.raises(FitError, match="even number"):
        coincidences(np.ones((2, 3), bool), np.ones((2, 3), bool))
