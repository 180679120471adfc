"""Series across runs: the fit against scipy's curve_fit, coverage on seeded simulations,
and through the store on both backends (derive --series, members, records, CLI)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import T0, run_main, shot_table
from scipy.optimize import curve_fit

import datetime as dt
import pyarrow as pa

from runlog.errors import FitError, NotFoundError
from runlog.figures.across_runs import fit_series, series_model


def _reference(model: str, x, y, sigma, p0):
    """scipy's curve_fit with absolute sigma, its covariance scaled by max(1, chi2/dof)
    (the Birge ratio, as the module docstring states)."""
    function = series_model(model)
    params, covariance = curve_fit(function, x, y, p0=p0, sigma=sigma, absolute_sigma=True, maxfev=20000)
    chi = float(np.sum(((function(x, *params) - y) / sigma) ** 2))
    return params, np.sqrt(np.diag(covariance) * max(1.0, chi / (len(x) - len(params)))), chi


# Three scenarios of our own: fringe contrast vs walk steps (exponential decay per step),
# sorting success vs target array size (power law), T2* vs lattice depth (linear).
CASES = [
    ("exponential", np.arange(0, 12, 1.0), lambda x: 0.92 * np.exp(-0.08 * x), 0.02, (0.92, 0.08)),
    ("power_law", np.array([4, 9, 16, 25, 36, 49, 64, 81, 100.0]), lambda x: 1.1 * x**-0.12, 0.01, (1.1, -0.12)),
    ("linear", np.linspace(20, 120, 9), lambda x: 800.0 - 3.5 * x, 15.0, (800.0, -3.5)),
]


@pytest.mark.parametrize("model, x, truth, noise, p0", CASES, ids=[c[0] for c in CASES])
def test_the_fit_agrees_with_scipy_curve_fit(model, x, truth, noise, p0):
    rng = np.random.default_rng(161)
    sigma = noise * (1 + 0.3 * rng.random(x.size))
    y = truth(x) + rng.normal(0, sigma)
    fit = fit_series(x, y, sigma, model=model)
    params, errors, chi = _reference(model, x, y, sigma, p0)
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)
    assert fit.chi_square == pytest.approx(chi, rel=1e-6)
    figures = {f.name: f for f in fit.figures}
    first, second = {"exponential": ("amplitude", "per_step"), "power_law": ("amplitude", "exponent"), "linear": ("intercept", "slope")}[model]
    assert figures[first].stderr == pytest.approx(errors[0], rel=1e-4)
    if model == "exponential":
        # per_step = exp(-k), its error by the delta method: exp(-k) se(k).
        assert figures["per_step"].value == pytest.approx(math.exp(-params[1]), rel=1e-6)
        assert figures["per_step"].stderr == pytest.approx(math.exp(-params[1]) * errors[1], rel=1e-4)
        assert figures["decay_constant"].value == pytest.approx(1 / params[1], rel=1e-6)
    else:
        assert figures[second].stderr == pytest.approx(errors[1], rel=1e-4)


def test_without_errors_on_every_point_the_fit_is_unweighted_like_curve_fit():
    x = np.arange(8.0)
    y = 3.0 + 0.5 * x + np.random.default_rng(2).normal(0, 0.2, 8)
    fit = fit_series(x, y, [0.1] * 7 + [None], model="linear")
    params, covariance = curve_fit(series_model("linear"), x, y, p0=(3, 0.5))  # absolute_sigma=False
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)
    assert {f.name: f.stderr for f in fit.figures}["slope"] == pytest.approx(math.sqrt(covariance[1, 1]), rel=1e-4)
    assert fit.chi_square is None and not fit.weighted


def test_coverage_of_the_decay_per_step_on_simulated_series():
    """Truth within ±1 stderr ~68 % and ±3 stderr ≥ 99 % over 400 seeded series."""
    rng = np.random.default_rng(1616)
    x = np.arange(0, 10, 1.0)
    truth_q, truth_a = math.exp(-0.1), 0.9
    inside1 = inside3 = 0
    repeats = 400
    for _ in range(repeats):
        sigma = 0.015 * (1 + rng.random(x.size))
        y = truth_a * truth_q**x + rng.normal(0, sigma)
        per_step = {f.name: f for f in fit_series(x, y, sigma).figures}["per_step"]
        z = abs(per_step.value - truth_q) / per_step.stderr
        inside1 += z <= 1
        inside3 += z <= 3
    assert 0.62 <= inside1 / repeats <= 0.76
    assert inside3 / repeats >= 0.99


def test_series_refusals():
    with pytest.raises(FitError, match="2 distinct parameter values"):
        fit_series([1, 1, 2], [1, 2, 3], model="linear")
    with pytest.raises(FitError, match="power law needs parameter values above zero"):
        fit_series([0, 1, 2, 3], [1, 2, 3, 4], model="power_law")
    with pytest.raises(FitError, match="needs figure values above zero"):
        fit_series([0, 1, 2, 3], [1, 0.5, -0.1, 0.2], model="exponential")


# --- through the store ---------------------------------------------------------------------

STEPS = [0, 2, 4, 6, 8, 10]


def _walk_runs(rng) -> pa.Table:
    """Runs at walk steps 0..10; each site stays filled with probability 0.9 * 0.93^steps,
    so the fill fraction at ingest is a counted figure with a binomial error."""
    tables = []
    for i, steps in enumerate(STEPS):
        table = shot_table({f"walk-{steps:02d}": 60}, sites=49, seed=i, start=T0 + dt.timedelta(hours=i), occupancy=False)
        fill = 0.9 * 0.93**steps
        load = rng.random((60, 49)) < fill
        table = table.append_column("p.walk_steps", pa.array(np.full(60, float(steps))))
        table = table.append_column("occ.load", pa.array(list(load), pa.list_(pa.bool_())))
        tables.append(table)
    return pa.concat_tables(tables)


def test_a_series_through_the_store_lists_its_member_runs(catalogue, make_file, capsys):
    rng = np.random.default_rng(16)
    catalogue.ingest(make_file("walk.parquet", _walk_runs(rng)))
    # A run without the parameter is left out, with why.
    catalogue.ingest(make_file("other.parquet", shot_table({"plain": 20}, sites=49, seed=9, start=T0 + dt.timedelta(hours=9))))
    made = catalogue.derive_series("fill-vs-steps", "fill_fraction", "walk_steps", model="exponential")
    assert [m["run"] for m in made["members"]] == [f"walk-{s:02d}" for s in STEPS]
    assert [m["x"] for m in made["members"]] == STEPS
    assert made["left_out"] == [{"run": "plain", "apparatus": "bench-a", "why": "no number for parameter 'walk_steps'"}]
    figures = {run: catalogue.run(run).figures["fill_fraction"] for run in (m["run"] for m in made["members"])}
    assert [m["y"] for m in made["members"]] == [figures[m["run"]]["value"] for m in made["members"]]
    # The same fit on the stored values, by scipy.
    x = np.array(STEPS, float)
    y = np.array([m["y"] for m in made["members"]])
    sigma = np.array([m["stderr"] for m in made["members"]])
    params, errors, _ = _reference("exponential", x, y, sigma, (0.9, 0.07))
    per_step = made["values"]["per_step"]
    assert per_step["value"] == pytest.approx(math.exp(-params[1]), rel=1e-6)
    assert per_step["stderr"] == pytest.approx(math.exp(-params[1]) * errors[1], rel=1e-4)
    # Simulated truth: 0.93 kept per step.
    assert abs(per_step["value"] - 0.93) < 3 * per_step["stderr"]
    # Deriving again adds a record; the newest is in force, the history keeps both.
    again = catalogue.derive_series("fill-vs-steps", "fill_fraction", "walk_steps", model="linear", where="shot >= 0 and walk_steps <= 6")
    assert [m["x"] for m in again["members"]] == [0, 2, 4, 6]
    assert [s["model"] for s in catalogue.series_fits("fill-vs-steps", history=True)] == ["linear", "exponential"]
    assert [s["id"] for s in catalogue.series_fits()] == [again["id"]]
    with pytest.raises(NotFoundError, match="nope"):
        catalogue.series_fits("nope")
    with pytest.raises(FitError, match="at least 3"):
        catalogue.derive_series("few", "fill_fraction", "walk_steps", where="walk_steps < 3")

    url = catalogue.url
    code, out, err = run_main(capsys, "--db", url, "derive", "--series", "cli-fit", "--y", "fill_fraction", "--x", "walk_steps", "--model", "exponential", "--json")
    assert code == 0, err
    assert json.loads(out)["values"]["per_step"]["value"] == pytest.approx(per_step["value"], rel=1e-12)
    code, out, err = run_main(capsys, "--db", url, "series-fits", "cli-fit")
    assert code == 0 and "per_step" in out and "walk-10" in out
    code, out, err = run_main(capsys, "--db", url, "derive", "--series", "bad", "--y", "fill_fraction", "--x", "walk_steps", "--model", "cubic")
    assert code != 0 and "cubic" in err and "Traceback" not in err
