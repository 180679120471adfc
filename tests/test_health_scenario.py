"""One lab day of our own with known truth, through the store on both backends: every
health kind and a contrast-vs-steps series land within 3 standard errors of the truth, each
standard error is within 0.5-2x of a reference, and the field comes out right in mG.

References, named beside each check: scipy's ``curve_fit`` on the same per-shot data
(default ``absolute_sigma=False``: one residual variance) where a kind's model is a plain
function; for the kinds whose estimate is not a plain curve fit (detection's histogram
threshold, T1 corrected for loss, release-recapture's Monte-Carlo trap model) the
empirical standard deviation of the same estimator over 30 seeded repeats of the scenario.
The detection truth is the exact error probability of the two simulated Poisson
distributions at the chosen threshold (``scipy.stats.poisson``).
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pyarrow as pa
import pytest
from conftest import T0
from scipy import stats
from scipy.optimize import curve_fit

from runlog.figures.across_runs import series_model
from runlog.figures.detection import detection_figures, fit_counts
from runlog.figures.interference import dip_model
from runlog.figures.lifetime import lifetime_model
from runlog.figures.rabi import rabi_model
from runlog.figures.recapture import Trap, atom_mass, fit_release_recapture
from runlog.figures.relaxation import fit_t1
from runlog.figures.spectroscopy import lorentzian
from runlog.units import conversion

APPARATUS = "tweezer-south"
ATOMS = 80
SENSITIVITY = "2.1 kHz/mG"
BOLTZMANN = 1.380649e-23  # J/K, exact (SI 2019)
TRAP = Trap(depth=0.8e-3 * BOLTZMANN, waist=0.9e-6, mass=atom_mass("87Rb"), wavelength=808e-9)

# The truths of the scenario.
RABI = {"offset": 0.04, "contrast": 0.86, "rabi_frequency": 0.18, "damping_time": 35.0}  # MHz, us
SPECTRUM = {"offset": 0.06, "amplitude": 0.75, "resonance": 64.0, "linewidth": 8.0}  # kHz
RAMSEY = {"ramsey_frequency": 0.03, "t2_star": 70.0, "contrast": 0.88}  # MHz, us
ECHO = {"contrast": 0.82, "t2": 8.0, "stretch": 1.5}  # ms
T1 = {"t1": 150.0, "loss": 900.0}  # ms
LIFETIME = {"survival_at_zero": 0.94, "lifetime": 9.0}  # s
TEMPERATURE = 45.0  # uK
DARK, BRIGHT = 0.7, 10.0  # mean photon counts
VISIBILITY = 0.72
STEPS, PER_STEP, CONTRAST0 = [0, 2, 4, 6, 8, 10, 12], 0.91, 0.9


def _table(run: str, sequence: str, parameters: dict, measurements: dict | None = None, occupancy: dict | None = None, counts: dict | None = None, *, hour: float = 0) -> pa.Table:
    n = len(next(iter(parameters.values()))) if parameters else len(next(iter((occupancy or counts).values())))
    start = T0 + dt.timedelta(hours=hour)
    columns: dict[str, object] = {
        "run": [run] * n,
        "apparatus": [APPARATUS] * n,
        "sequence": [sequence] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
    }
    columns.update({f"p.{k}": v for k, v in parameters.items()})
    columns.update({f"m.{k}": np.asarray(v, float) for k, v in (measurements or {}).items()})
    for name, array in (occupancy or {}).items():
        columns[f"occ.{name}"] = pa.array(list(np.asarray(array, bool)), pa.list_(pa.bool_()))
    for name, array in (counts or {}).items():
        columns[f"counts.{name}"] = pa.array(list(np.asarray(array, np.int64)), pa.list_(pa.int64()))
    return pa.table(columns)


def t1_data(rng):
    wait = np.repeat(np.linspace(0.0, 500.0, 11), 10)
    reference = np.tile([True, False, False, False, False], wait.size // 5)
    kept = 0.96 * np.exp(-wait / T1["loss"])
    p = np.where(reference, kept, kept * (0.5 + 0.46 * np.exp(-wait / T1["t1"])))
    return wait, reference, rng.binomial(ATOMS, p) / ATOMS


def counts_data(rng, shots=150, sites=25):
    loaded = rng.random((shots, sites)) < 0.6
    return np.where(loaded, rng.poisson(BRIGHT, loaded.shape), rng.poisson(DARK, loaded.shape))


def recapture_data(rng, truth_curve):
    release = np.repeat(np.linspace(0.0, 50.0, 11), 12)  # us
    p = 0.95 * np.interp(release, np.linspace(0.0, 50.0, 11), truth_curve)
    loaded = rng.random((release.size, 16)) < 0.6
    kept = loaded & (rng.random(loaded.shape) < p[:, None])
    return release, loaded, kept


def _recapture_truth():
    # A direct simulation of the trap, independent of runlog's model (test_recapture.py).
    from test_recapture import brute_force

    return brute_force(TRAP, TEMPERATURE * 1e-6, np.linspace(0.0, 50e-6, 11))


def scenario(rng) -> dict[str, tuple[pa.Table, dict]]:
    """Every run of the day, with the per-shot data the references are fitted to."""
    out = {}
    t = np.repeat(np.linspace(0.0, 12.0, 25), 4)
    y = rng.binomial(ATOMS, rabi_model(t, RABI["offset"], RABI["contrast"], RABI["rabi_frequency"], 1 / RABI["damping_time"])) / ATOMS
    out["rabi"] = (_table("rabi", "rabi", {"pulse[us]": t}, {"population": y}, hour=1), {"x": t, "y": y})
    x = np.repeat(np.linspace(40.0, 88.0, 25), 4)
    y = rng.binomial(ATOMS, lorentzian(x, *SPECTRUM.values())) / ATOMS
    out["spectrum"] = (_table("spectrum", "spectrum", {"detuning[kHz]": x}, {"population": y}, hour=2), {"x": x, "y": y})
    t = np.repeat(np.linspace(0.0, 120.0, 41), 3)
    p = 0.5 * (1 + RAMSEY["contrast"] * np.exp(-((t / RAMSEY["t2_star"]) ** 2)) * np.cos(2 * np.pi * RAMSEY["ramsey_frequency"] * t + 0.4))
    y = rng.binomial(ATOMS, p) / ATOMS
    out["ramsey"] = (_table("ramsey", "ramsey", {"wait[us]": t}, {"bright_fraction": y}, hour=3), {"x": t, "y": y})
    t = np.repeat(np.linspace(0.0, 24.0, 13), 2)
    y = ECHO["contrast"] * np.exp(-((t / ECHO["t2"]) ** ECHO["stretch"])) + rng.normal(0, 0.02, t.size)
    out["echo"] = (_table("echo", "echo", {"wait[ms]": t}, {"contrast": y}, hour=4), {"x": t, "y": y})
    wait, reference, y = t1_data(rng)
    out["t1"] = (_table("t1", "t1", {"wait[ms]": wait, "no_pushout": reference}, {"bright": y}, hour=5), {})
    hold = np.repeat(np.linspace(0.0, 18.0, 10), 12)
    loaded = rng.random((hold.size, 25)) < 0.6
    kept = loaded & (rng.random(loaded.shape) < lifetime_model(hold, LIFETIME["survival_at_zero"], 1 / LIFETIME["lifetime"])[:, None])
    out["lifetime"] = (_table("lifetime", "lifetime", {"hold[s]": hold}, occupancy={"first": loaded, "second": kept}, hour=6), {"x": hold, "y": kept.sum(1) / np.maximum(loaded.sum(1), 1), "mask": loaded.sum(1) > 0})
    release, loaded, kept = recapture_data(rng, _recapture_truth())
    parameters = {"release[us]": release, "trap_depth[mK]": np.full(release.size, 0.8), "waist[um]": np.full(release.size, 0.9), "wavelength[nm]": np.full(release.size, 808.0), "atom": ["87Rb"] * release.size}
    out["release"] = (_table("release", "release", parameters, occupancy={"first": loaded, "second": kept}, hour=7), {})
    out["detection"] = (_table("detection", "detection", {}, counts={"first": counts_data(rng)}, hour=8), {})
    delay = np.repeat(np.linspace(-30.0, 30.0, 21), 6)
    loaded = rng.random((delay.size, 16)) < 0.8
    both = loaded[:, 0::2] & loaded[:, 1::2]
    coincident = both & (rng.random(both.shape) < dip_model(delay, 0.5, VISIBILITY, 1.0, 7.0)[:, None])
    final = np.zeros_like(loaded)
    final[:, 0::2] = coincident
    final[:, 1::2] = coincident
    mask = both.sum(1) > 0
    out["two_atom"] = (_table("two-atom", "hom", {"delay[us]": delay}, occupancy={"loading": loaded, "output": final}, hour=9), {"x": delay[mask], "y": coincident.sum(1)[mask] / both.sum(1)[mask]})
    for i, steps in enumerate(STEPS):
        phase = np.repeat(np.linspace(0.0, 360.0, 13), 4)
        contrast = CONTRAST0 * PER_STEP**steps
        y = rng.binomial(ATOMS, 0.5 * (1 + contrast * np.cos(np.radians(phase) + 0.2))) / ATOMS
        out[f"walk-{steps:02d}"] = (_table(f"walk-{steps:02d}", "walk", {"phase[deg]": phase, "walk_steps": np.full(phase.size, float(steps))}, {"bright_fraction": y}, hour=10 + 0.5 * i), {})
    return out


def _stderr(figure) -> float:
    return figure.stderr if figure.stderr is not None else (figure.ci_high - figure.ci_low) / (2 * 1.959964)


def _ratio(found: float, reference: float) -> float:
    return found / reference


@pytest.fixture
def day(catalogue, make_file):
    data = scenario(np.random.default_rng(2026))
    for name, (table, _) in data.items():
        [result] = catalogue.ingest(make_file(f"{name}.parquet", table))
        assert result.status == "ingested", result.reason
    return catalogue, data


def test_every_kind_lands_on_its_truth_with_standard_errors_like_a_reference_fit(day):
    catalogue, data = day
    constants = {"field_sensitivity": SENSITIVITY}
    checked: dict[str, tuple[float, float]] = {}

    def check(figure, truth: float, reference_stderr: float | None = None, unit: str | None = None, label: str | None = None) -> None:
        # The catalogue keeps one unit per parameter name ('wait' came first in us), so a
        # figure may come in another unit than the truth's: compare in the truth's ``unit``.
        scale = 1.0 if unit is None else conversion(figure.unit, unit)[0]
        value, error = figure.value * scale, _stderr(figure) * scale
        assert abs(value - truth) < 3 * error, f"{figure.name} = {value} ± {error} {unit or figure.unit}, truth {truth}"
        if reference_stderr is not None:
            assert 0.5 <= error / reference_stderr <= 2.0, f"{figure.name}: stderr {error} against the reference's {reference_stderr}"
            checked[label or figure.name] = (value, error / reference_stderr)

    rabi = {f.name: f for f in catalogue.derive("rabi", "rabi").figures}
    params, cov = curve_fit(rabi_model, data["rabi"][1]["x"], data["rabi"][1]["y"], p0=[0.05, 0.8, 0.17, 0.03])
    check(rabi["rabi_frequency"], RABI["rabi_frequency"], math.sqrt(cov[2, 2]))
    check(rabi["contrast"], RABI["contrast"], math.sqrt(cov[1, 1]))
    check(rabi["pi_time"], 1 / (2 * RABI["rabi_frequency"]), math.sqrt(cov[2, 2]) / (2 * params[2] ** 2))
    check(rabi["damping_time"], RABI["damping_time"], math.sqrt(cov[3, 3]) / params[3] ** 2)

    spectrum = {f.name: f for f in catalogue.derive("spectrum", "spectroscopy", constants=constants).figures}
    params, cov = curve_fit(lorentzian, data["spectrum"][1]["x"], data["spectrum"][1]["y"], p0=[0.05, 0.7, 63.0, 9.0])
    check(spectrum["resonance"], SPECTRUM["resonance"], math.sqrt(cov[2, 2]))
    check(spectrum["linewidth"], SPECTRUM["linewidth"], math.sqrt(abs(cov[3, 3])))
    # The field in mG: 64 kHz / (2.1 kHz/mG) = 30.48 mG at the truth.
    assert spectrum["field"].unit == "mG"
    check(spectrum["field"], SPECTRUM["resonance"] / 2.1, math.sqrt(cov[2, 2]) / 2.1, label="field from the resonance")

    ramsey = {f.name: f for f in catalogue.derive("ramsey", "coherence", constants=constants).figures}
    frequency = next(ramsey[n] for n in ("ramsey_frequency", "detuning") if n in ramsey)
    lifetime = next(ramsey[n] for n in ("t2_star", "coherence_time") if n in ramsey)

    def ramsey_model(t, a, c0, t2, delta, phi):
        return a * (1 + c0 * np.exp(-((t / t2) ** 2)) * np.cos(2 * np.pi * delta * t + phi))

    params, cov = curve_fit(ramsey_model, data["ramsey"][1]["x"], data["ramsey"][1]["y"], p0=[0.5, 0.85, 65.0, 0.031, 0.4])
    check(frequency, RAMSEY["ramsey_frequency"], math.sqrt(cov[3, 3]))
    check(lifetime, RAMSEY["t2_star"], math.sqrt(cov[2, 2]))
    # The field from the fringe: 30 kHz / (2.1 kHz/mG) = 14.29 mG.
    assert ramsey["field"].unit == "mG"
    check(ramsey["field"], RAMSEY["ramsey_frequency"] * 1000 / 2.1, math.sqrt(cov[3, 3]) * 1000 / 2.1, label="field from the Ramsey fringe")

    echo = {f.name: f for f in catalogue.derive("echo", "echo").figures}
    params, cov = curve_fit(lambda t, c, t2, n: c * np.exp(-((t / t2) ** n)), data["echo"][1]["x"], data["echo"][1]["y"], p0=[0.8, 8.0, 1.5])
    check(echo["t2"], ECHO["t2"], math.sqrt(cov[1, 1]), "ms")
    check(echo["stretch"], ECHO["stretch"], math.sqrt(cov[2, 2]))

    life = {f.name: f for f in catalogue.derive("lifetime", "lifetime").figures}
    x, y, mask = data["lifetime"][1]["x"], data["lifetime"][1]["y"], data["lifetime"][1]["mask"]
    params, cov = curve_fit(lambda t, s0, k: lifetime_model(t, s0, k), x[mask], y[mask], p0=[0.9, 0.1])
    check(life["lifetime"], LIFETIME["lifetime"], math.sqrt(cov[1, 1]) / params[1] ** 2)

    pair = {f.name: f for f in catalogue.derive("two-atom", "two_atom").figures}
    params, cov = curve_fit(dip_model, data["two_atom"][1]["x"], data["two_atom"][1]["y"], p0=[0.5, 0.7, 0.0, 6.0])
    check(pair["visibility"], VISIBILITY, math.sqrt(cov[1, 1]))

    # Kinds whose reference is the spread of the estimator over seeded repeats (below).
    spread = _repeat_spreads()
    t1 = {f.name: f for f in catalogue.derive("t1", "t1", settings={"reference": "no_pushout"}).figures}
    check(t1["t1"], T1["t1"], spread["t1"], "ms")
    temperature = catalogue.derive("release", "release_recapture", settings={"depth": "trap_depth"}).figures[0]
    check(temperature, TEMPERATURE, spread["temperature"])
    detection = {f.name: f for f in catalogue.derive("detection", "detection").figures}
    threshold = detection["threshold"].value
    # Exact (scipy.stats.poisson): occupied when counts >= t.
    exact = 1 - (stats.poisson.sf(threshold - 1, DARK) + stats.poisson.cdf(threshold - 1, BRIGHT)) / 2
    check(detection["fidelity"], exact, spread["fidelity"])

    # The series: contrast per run (fringe fits), then contrast vs walk steps.
    for steps in STEPS:
        catalogue.derive(f"walk-{steps:02d}", "fringe")
    made = catalogue.derive_series("contrast-vs-steps", "contrast", "walk_steps", where="sequence = 'walk'")
    assert [m["x"] for m in made["members"]] == STEPS
    xs = np.array([m["x"] for m in made["members"]])
    ys = np.array([m["y"] for m in made["members"]])
    sigma = np.array([m["stderr"] for m in made["members"]])
    params, cov = curve_fit(series_model("exponential"), xs, ys, p0=[0.9, 0.1], sigma=sigma, absolute_sigma=True)
    chi = float(np.sum(((series_model("exponential")(xs, *params) - ys) / sigma) ** 2))
    scale = math.sqrt(max(1.0, chi / (len(xs) - 2)))
    per_step = made["values"]["per_step"]
    assert abs(per_step["value"] - PER_STEP) < 3 * per_step["stderr"]
    assert 0.5 <= per_step["stderr"] / (math.exp(-params[1]) * math.sqrt(cov[1, 1]) * scale) <= 2.0
    checked["per_step"] = (per_step["value"], per_step["stderr"] / (math.exp(-params[1]) * math.sqrt(cov[1, 1]) * scale))
    print("\nvalue and stderr / reference stderr:", {k: (round(float(v), 5), round(float(r), 3)) for k, (v, r) in checked.items()})
    assert set(checked) >= {"rabi_frequency", "resonance", "field from the resonance", "field from the Ramsey fringe", "t2", "lifetime", "visibility", "t1", "temperature", "fidelity"}


_SPREADS: dict[str, float] = {}


def _repeat_spreads(repeats: int = 30) -> dict[str, float]:
    """The standard deviation of the T1, temperature and fidelity estimators over seeded
    repeats of the scenario's runs (the same functions derive calls, on arrays)."""
    if _SPREADS:
        return _SPREADS
    rng = np.random.default_rng(99)
    truth = _recapture_truth()
    values: dict[str, list[float]] = {"t1": [], "temperature": [], "fidelity": []}
    for _ in range(repeats):
        wait, reference, y = t1_data(rng)
        values["t1"].append(next(f.value for f in fit_t1(wait, y, reference=reference, wait_unit="ms") if f.name == "t1"))
        release, loaded, kept = recapture_data(rng, truth)
        values["temperature"].append(fit_release_recapture(release, kept.sum(1) / np.maximum(loaded.sum(1), 1), TRAP, release_unit="us")[0].value)
        fit = fit_counts(counts_data(rng))
        values["fidelity"].append(next(f.value for f in detection_figures(fit) if f.name == "fidelity"))
    _SPREADS.update({k: float(np.std(v, ddof=1)) for k, v in values.items()})
    return _SPREADS
