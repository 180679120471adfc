"""Temperature by release and recapture: the trajectory model, its fit, and the kind.

Outside references, named beside each check: the free-flight limit of a thermal atom
released from a harmonic trap, sigma_x(t)^2 = (k T / (m w^2)) (1 + w^2 t^2) (it follows from
straight-line flight of normal positions and velocities; REFERENCES.md section 7); an
independent brute-force Monte-Carlo written out in the test with its own random numbers;
seeded simulations with a known truth for coverage; SI 2019 exact k_B.
"""

from __future__ import annotations

import datetime as dt
import math
from functools import lru_cache

import numpy as np
import pyarrow as pa
import pytest
from conftest import T0

from runlog.derive import fit_curve
from runlog.errors import FitError, NotFoundError
from runlog.figures.recapture import Trap, atom_mass, critical_temperatures, fit_release_recapture, recapture_probability, thermal_sample

BOLTZMANN = 1.380649e-23  # J/K, exact (SI 2019)
TRAP = Trap(depth=1e-3 * BOLTZMANN, waist=1.0e-6, mass=atom_mass("87Rb"), wavelength=850e-9)
RELEASE = np.linspace(0.0, 60e-6, 13)  # s


def brute_force(trap: Trap, temperature: float, times: np.ndarray, count: int = 40_000, seed: int = 5) -> np.ndarray:
    """Recapture probability by direct simulation: harmonic thermal start, free fall, E < 0."""
    rng = np.random.default_rng(seed)
    radial, axial = trap.frequencies()
    speed = math.sqrt(BOLTZMANN * temperature / trap.mass)
    start = np.array([rng.normal(0, speed / radial, count), rng.normal(0, speed / radial, count), rng.normal(0, speed / axial, count)])
    velocity = rng.normal(0, speed, (3, count))
    out = []
    for t in times:
        x, y, z = start + velocity * t
        x = x + 0.5 * trap.gravity * t**2
        vx = velocity[0] + trap.gravity * t
        energy = 0.5 * trap.mass * (vx**2 + velocity[1] ** 2 + velocity[2] ** 2) + trap.potential(x, y, z)
        out.append(np.mean(energy < 0))
    return np.array(out)


def test_free_flight_spread_matches_the_harmonic_limit():
    temperature = 30e-6
    positions, velocities = thermal_sample(TRAP, temperature, count=200_000)
    radial, _ = TRAP.frequencies()
    for t in (0.0, 10e-6, 40e-6):
        spread = np.var(positions[0] + velocities[0] * t)
        expected = BOLTZMANN * temperature / (TRAP.mass * radial**2) * (1 + radial**2 * t**2)
        assert spread == pytest.approx(expected, rel=0.01)  # 200 000 draws: sampling error ~0.3 %


def test_model_matches_a_brute_force_simulation_and_its_limits():
    critical = critical_temperatures(TRAP, RELEASE)
    for temperature in (10e-6, 30e-6, 100e-6):
        model = recapture_probability(critical, temperature)
        direct = brute_force(TRAP, temperature, RELEASE)
        # Monte-Carlo errors of 10 000 and 40 000 trajectories, plus the kernel: below 0.015.
        assert np.max(np.abs(model - direct)) < 0.015, temperature
    # At zero release a cold atom in a deep trap stays; hotter atoms leave faster.
    assert recapture_probability(critical, 10e-6)[0] == pytest.approx(1.0, abs=1e-3)
    assert np.all(recapture_probability(critical, 100e-6)[1:] < recapture_probability(critical, 10e-6)[1:])


@lru_cache(maxsize=4)
def truth_curve(temperature: float) -> np.ndarray:
    return brute_force(TRAP, temperature, RELEASE)


def recapture_scan(rng, temperature=30e-6, shots=40):
    t = np.repeat(RELEASE, shots)
    p = 0.95 * np.interp(t, RELEASE, truth_curve(temperature))
    return t * 1e6, rng.binomial(1, p).astype(float)


def test_temperature_fit_covers_its_truth():
    rng = np.random.default_rng(11)
    z = []
    for _ in range(25):
        found = fit_release_recapture(*recapture_scan(rng), TRAP, release_unit="us")[0]
        assert found.unit == "uK" and found.ci_low < found.value < found.ci_high
        z.append(abs(found.value - 30.0) / found.stderr)
    z = np.array(z)
    assert 0.5 <= np.mean(z < 1) <= 0.87 and np.mean(z < 3) >= 0.96
    with pytest.raises(FitError, match="3 are needed"):
        fit_release_recapture([0, 0, 10], [1, 1, 0.5], TRAP)


def recapture_table(rng, run="rr1", parameters=None, start=T0) -> pa.Table:
    """Single atoms in 16 tweezers: loaded with 0.6, recaptured as the brute force says at 30 uK."""
    release_us, _ = recapture_scan(rng, shots=12)
    n = release_us.size
    p = 0.95 * np.interp(release_us * 1e-6, RELEASE, truth_curve(30e-6))
    loaded = rng.random((n, 16)) < 0.6
    kept = loaded & (rng.random((n, 16)) < p[:, None])
    columns = {
        "run": [run] * n,
        "apparatus": ["bench-a"] * n,
        "sequence": ["release"] * n,
        "shot": pa.array(np.arange(n), pa.int64()),
        "time": pa.array([start + dt.timedelta(seconds=2 * i) for i in range(n)], pa.timestamp("us", tz="UTC")),
        "p.release[us]": release_us,
        "occ.first": pa.array(list(loaded), pa.list_(pa.bool_())),
        "occ.second": pa.array(list(kept), pa.list_(pa.bool_())),
    }
    defaults = {"p.trap_depth[mK]": 1.0, "p.waist[um]": 1.0, "p.wavelength[nm]": 850.0, "p.atom": "87Rb"}
    for name, value in (defaults if parameters is None else parameters).items():
        columns[name] = [value] * n
    return pa.table(columns)


def test_release_recapture_through_derive_rules_and_the_curve(catalogue, make_file):
    rng = np.random.default_rng(12)
    catalogue.ingest(make_file(table=recapture_table(rng)))
    found = catalogue.derive("rr1", "release_recapture").figures[0]
    assert found.name == "temperature" and abs(found.value - 30.0) < 3 * found.stderr  # simulated truth 30 uK
    assert catalogue.run("rr1").figures["temperature"]["value"] == found.value
    # The depth as a frequency (h x 20.8 MHz = k_B x 1 mK) and the atom as a mass give the same.
    same = catalogue.derive("rr1", "release_recapture", settings={"depth": "20.8366 MHz", "mass": "86.909180527 u"}, store=False).figures[0]
    assert same.value == pytest.approx(found.value, rel=1e-3)
    outcomes = catalogue.apply_rules([{"sequence": "release", "kind": "release_recapture", "depth": "trap_depth"}])
    assert outcomes[0].figures[0].value == found.value
    curve = fit_curve(catalogue, "rr1")
    assert curve.kind == "release_recapture" and curve.x_unit == "us"
    at_shots = np.interp(curve.x, curve.curve_x, curve.curve_y)
    assert np.sqrt(np.mean((curve.y - at_shots) ** 2)) < 0.2


def test_release_recapture_names_what_it_lacks(catalogue, make_file):
    rng = np.random.default_rng(13)
    catalogue.ingest(make_file(table=recapture_table(rng, run="bare", parameters={"p.trap_depth[mK]": 1.0, "p.waist[um]": 1.0})))
    with pytest.raises(NotFoundError, match="give mass="):
        catalogue.derive("bare", "release_recapture")
    with pytest.raises(FitError, match="trap's depth must be positive"):
        catalogue.derive("bare", "release_recapture", settings={"mass": "87Rb", "depth": "0 mK"})
    assert "temperature" not in catalogue.run("bare").figures
