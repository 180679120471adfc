"""Drift arithmetic of fitted figures: circular means of phases, logarithmic pooling of
times, and a Birge ratio that counts only runs with a stderr."""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pytest
from scipy import stats

from runlog.drift.pooling import arithmetic_of, pool
from runlog.figures.base import Figure


def test_arithmetic_follows_the_unit():
    assert [arithmetic_of(u) for u in ("deg", "rad", "ms", "us", "s", "MHz", "", "uK")] == ["circular", "circular", "logarithmic", "logarithmic", "logarithmic", "linear", "linear", "linear"]


def test_circular_mean_of_phases_against_scipy():
    # Reference: scipy.stats.circmean / circstd (Mardia & Jupp 2000).
    phases = np.array([355.0, 359.0, 2.0, 6.0, 350.0])
    value, low, high, stderr, spread = pool(phases, [None] * 5, "deg")
    expected = stats.circmean(phases, high=360, low=0)
    assert value == pytest.approx(expected - 360 if expected > 180 else expected, abs=1e-9)
    assert spread == pytest.approx(stats.circstd(phases, high=360, low=0), rel=1e-9)
    assert low < value < high
    # A linear mean would be 254.4 deg: far from every phase.
    assert abs(value) < 5


def test_weighted_circular_mean_and_its_error_in_radians():
    phases = np.array([math.pi - 0.05, -math.pi + 0.03, math.pi - 0.01])
    value, _, _, stderr, _ = pool(phases, [0.02, 0.02, 0.02], "rad")
    wrapped = np.angle(np.exp(1j * (phases - math.pi)))  # around pi the phases are -0.05, 0.03, -0.01
    assert value == pytest.approx(math.pi + wrapped.mean(), abs=1e-4) or value == pytest.approx(-math.pi + wrapped.mean(), abs=1e-4)
    chi2 = np.sum((wrapped - wrapped.mean()) ** 2 / 0.02**2)
    assert stderr == pytest.approx(0.02 / math.sqrt(3) * max(1, math.sqrt(chi2 / 2)), rel=1e-3)


def test_times_pooled_in_log_are_not_biased_low():
    # Fitted lifetimes scatter log-normally about the truth with a 20 % relative error, and
    # each fit's stderr is 20 % of its own value, growing with it. Inverse-variance
    # weighting of the times favours the short ones; pooling ln T does not.
    rng = np.random.default_rng(2026)
    truth, days, runs, relative = 10.0, 3000, 5, 0.2
    logged, linear, covered = [], [], 0
    for _ in range(days):
        times = truth * np.exp(rng.normal(0.0, relative, runs))
        errors = relative * times
        value, low, high, _, _ = pool(times, errors, "ms")
        logged.append(value)
        covered += low <= truth <= high
        weights = 1 / errors**2
        linear.append(np.sum(weights * times) / np.sum(weights))
    assert np.median(logged) == pytest.approx(truth, rel=0.01)
    assert np.mean(logged) == pytest.approx(truth, rel=0.01)
    assert np.mean(linear) < 0.97 * truth  # 4 % low: the bias the log pooling removes
    assert 0.93 <= covered / days <= 0.97


def test_birge_ratio_counts_only_runs_with_a_stderr():
    value, _, _, stderr, spread = pool([1.0, 1.2, 5.0], [0.1, 0.1, None], "")
    assert value == pytest.approx(1.1)
    # chi2 = 2 over k - 1 = 1 weighted run: Birge ratio sqrt(2), not sqrt(2/2).
    assert stderr == pytest.approx(math.sqrt(2) / math.sqrt(200))
    assert spread == pytest.approx(np.std([1.0, 1.2, 5.0], ddof=1))


def test_drift_of_a_phase_through_180_degrees_is_charted_without_jumps(catalogue, make_file):
    start = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)
    phases = [[176.0, 178.0], [179.0, -179.0], [-177.0, -175.0], [-174.0, -172.0]]
    for day, pair in enumerate(phases):
        for k, phase in enumerate(pair):
            key = f"f{day}{k}"
            catalogue.ingest(make_file(runs={key: 4}, seed=10 * day + k, start=start + dt.timedelta(days=day, hours=k)))
            catalogue.save_figures(key, "fringe", [Figure("fringe_phase", phase, "deg", stderr=1.0, method="least-squares")])
    drift = catalogue.drift("fringe_phase", apparatus="bench-a")
    values = [p.value for p in drift.points]
    assert values == pytest.approx([177.0, 180.0, 184.0, 187.0], abs=1e-6)


def test_rollup_rows_and_figures_give_the_same_daily_points(catalogue, make_file):
    """The two paths that make a daily point - the rollup table and the figures of chosen
    runs - agree in every arithmetic, over two sequences a day, with runs lacking a stderr."""
    from sqlalchemy import select

    from runlog.drift.series import daily_points, filtered_points
    from runlog.store import schema as s

    rng = np.random.default_rng(7)
    start = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)
    truth: dict[tuple[int, str], list[tuple[float, float | None]]] = {}
    for day in range(3):
        for k in range(4):
            key, sequence = f"r{day}{k}", ("ramsey", "echo")[k % 2]
            catalogue.ingest(make_file(runs={key: 4}, sequence=sequence, seed=10 * day + k, start=start + dt.timedelta(days=day, hours=k)))
            phase = float(np.remainder(178.0 + rng.normal(0, 3) + 180.0, 360.0) - 180.0)  # about +-180 deg
            time, contrast = float(5.0 * np.exp(rng.normal(0, 0.2))), float(rng.uniform(0.6, 0.8))
            errors = (None, None, None) if k == 3 else (1.0 + k, 0.2 * time, 0.02)
            catalogue.save_figures(key, "fringe", [
                Figure("fringe_phase", phase, "deg", stderr=errors[0], method="least-squares"),
                Figure("t2", time, "ms", stderr=errors[1], method="least-squares"),
                Figure("contrast", contrast, "", stderr=errors[2], method="least-squares"),
            ])
            for name, value, error in zip(("fringe_phase", "t2", "contrast"), (phase, time, contrast), errors):
                truth.setdefault((day, name), []).append((value, error))
    with catalogue.engine.connect() as connection:
        apparatus_id = connection.execute(select(s.Apparatus.id)).scalar_one()
        for name, unit in (("fringe_phase", "deg"), ("t2", "ms"), ("contrast", "")):
            rolled, rolled_unit, _ = daily_points(connection, name, apparatus_id)
            direct, direct_unit, _ = filtered_points(connection, name, apparatus_id)
            assert rolled_unit == direct_unit == unit and len(rolled) == len(direct) == 3
            for day, (a, b) in enumerate(zip(rolled, direct)):
                assert (a.date, a.runs, a.shots) == (b.date, b.runs, b.shots) == (start.date() + dt.timedelta(days=day), 4, 16)
                values, errors = zip(*truth[(day, name)])
                expected = pool(values, errors, unit)
                for made in (a, b):
                    assert (made.value, made.ci_low, made.ci_high, made.stderr, made.spread) == pytest.approx(expected, rel=1e-9, abs=1e-9)
                if name == "fringe_phase":
                    # The weighted mean direction, computed here (Mardia & Jupp 2000, 2.2.1).
                    w = np.array([1 / e**2 for e in errors if e is not None])
                    angles = np.deg2rad([v for v, e in zip(values, errors) if e is not None])
                    mean = math.degrees(math.atan2(np.sum(w * np.sin(angles)), np.sum(w * np.cos(angles))))
                    assert abs(math.remainder(a.value - mean, 360.0)) < 1e-9 and abs(abs(a.value) - 178.0) < 10
                if name == "t2":
                    w = np.array([(v / e) ** 2 for v, e in zip(values, errors) if e is not None])
                    logs = np.log([v for v, e in zip(values, errors) if e is not None])
                    assert a.value == pytest.approx(math.exp(np.sum(w * logs) / np.sum(w)), rel=1e-12)
