"""False-alarm and detection rates of the drift alarms through the catalogue, on SQLite and
PostgreSQL: seeded simulations of our own, CI-sized (benchmarks/alarms.py holds the large
one). Stable series have a known truth (nothing changes), stepped ones a planted step of
3 daily standard errors; the truth is the only reference.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from runlog import Figure
from runlog.drift.detect import judge

START = dt.date(2026, 1, 5)
DAYS = 42
STEP_DAY = 34
SERIES = 4  # per kind: stable, stepped


def _scenario(catalogue, tmp_path, rng):
    """Apparatus 'stable-i' and 'stepped-i', 1-3 Ramsey runs a day, one coherence time each."""
    keys, apparatus, times = [], [], []
    plan = []
    for kind in ("stable", "stepped"):
        for i in range(SERIES):
            name = f"{kind}-{i}"
            sign = rng.choice([-1.0, 1.0])
            for day in range(DAYS):
                runs = int(rng.integers(1, 4))
                day_error = 20.0 / np.sqrt(runs)
                step = 3.0 * day_error * sign if kind == "stepped" and day >= STEP_DAY else 0.0
                for k in range(runs):
                    key = f"{name}-{day:02d}-{k}"
                    keys.append(key)
                    apparatus.append(name)
                    times.append(dt.datetime.combine(START + dt.timedelta(days=day), dt.time(9 + k), dt.timezone.utc))
                    plan.append((key, 1000.0 + step + rng.normal(0.0, 20.0)))
    n = len(keys)
    table = pa.table({
        "run": keys, "apparatus": apparatus, "sequence": ["ramsey"] * n, "shot": pa.array(np.zeros(n, dtype=np.int64)),
        "time": pa.array(times, pa.timestamp("us", tz="UTC")), "p.lattice_depth[uK]": np.full(n, 40.0),
    })
    pq.write_table(table, tmp_path / "runs.parquet")
    assert {r.status for r in catalogue.ingest(tmp_path / "runs.parquet")} == {"ingested"}
    for key, value in plan:
        catalogue.save_figures(key, "coherence", [Figure("coherence_time", value, "us", stderr=20.0, method="least-squares")])


def test_false_alarm_and_detection_rates_through_the_catalogue(catalogue, tmp_path):
    _scenario(catalogue, tmp_path, np.random.default_rng(1515))
    catalogue.check_drift()
    alarms = catalogue.alarms()
    false = [a for a in alarms if a["apparatus"].startswith("stable")]
    judged_days = SERIES * (DAYS - 7)
    # Budget: ~1 per apparatus-month over 4 quantities is 1/120 per quantity-day; over
    # these 140 judged days that is 1.2 expected at most; 4 or more has P < 4 % for Poisson(1.2).
    assert len(false) <= 3, false
    assert judged_days == 140
    flagged = 0
    for i in range(SERIES):
        mine = [dt.date.fromisoformat(a["date"]) for a in alarms if a["apparatus"] == f"stepped-{i}"]
        step = START + dt.timedelta(days=STEP_DAY)
        flagged += any(step <= day <= step + dt.timedelta(days=2) for day in mine)
    assert flagged >= SERIES - 1
    # The catalogue judges exactly what the detector judges on the stored daily points.
    drift = catalogue.drift("coherence_time", apparatus="stepped-0", record_alarms=False)
    judgement = judge([p.date for p in drift.points], [p.value for p in drift.points], [p.stderr for p in drift.points])
    assert drift.out_of_limits == [int(i) for i in np.flatnonzero(judgement.out)]
    assert [a["date"] for a in alarms if a["apparatus"] == "stepped-0"] == [drift.points[i].date.isoformat() for i in judgement.excursions()]


def test_a_cusum_resets_after_its_signal():
    # One excursion of three days must not flag the twenty days after it.
    days = [START + dt.timedelta(days=i) for i in range(60)]
    rng = np.random.default_rng(3)
    errors = np.full(60, 1.0)
    values = rng.normal(0.0, 1.0, 60)
    values[30:33] += 6.0
    judgement = judge(days, values, errors)
    assert judgement.out[30] and judgement.excursions().count(30) == 1
    assert not judgement.out[36:].any()
    signalled = [i for i in range(60) if "cusum" in judgement.signals[i]]
    assert signalled and all(judgement.cusum_upper[i + 1] < 6.0 for i in signalled)


def test_a_day_of_one_run_counts_for_less_than_a_day_of_five():
    days = [START + dt.timedelta(days=i) for i in range(40)]
    rng = np.random.default_rng(4)
    errors = np.where(np.arange(40) % 2 == 0, 1.0, 1.0 / np.sqrt(5))
    values = rng.normal(0.0, errors)
    one, five = values.copy(), values.copy()
    one[36], five[35] = 2.0, 2.0  # the same excursion on a one-run (even) and a five-run (odd) day
    z_one = judge(days, one, errors).z[36]
    z_five = judge(days, five, errors).z[35]
    assert z_five > 1.5 * z_one > 0  # sqrt(5) apart, less the baseline's own noise


def test_variance_of_the_scatter_estimate_against_simulation():
    # Truth: the sampling variance of the (untruncated) DerSimonian-Laird tau^2 over 20 000
    # seeded sets of 30 days with known errors and scatter; scatter_variance is the formula.
    from runlog.drift.detect import scatter_variance

    rng = np.random.default_rng(15)
    errors = 0.01 / np.sqrt(rng.integers(1, 6, 30))
    w = 1.0 / errors**2
    denominator = w.sum() - (w**2).sum() / w.sum()
    for tau in (0.0, 0.004, 0.01):
        x = rng.normal(0.0, np.sqrt(errors**2 + tau**2), (20_000, 30))
        mean = (x * w).sum(axis=1, keepdims=True) / w.sum()
        estimates = (((x - mean) ** 2 * w).sum(axis=1) - 29) / denominator
        assert np.var(estimates) == pytest.approx(scatter_variance(errors, tau), rel=0.05), tau


def test_phases_are_judged_on_the_circle():
    # Truth: a phase sitting at pi (its wrapped readings jump between +pi and -pi) is stable;
    # then a real step of 0.25 rad (five daily standard errors) on day 40.
    rng = np.random.default_rng(16)
    days = [START + dt.timedelta(days=i) for i in range(60)]
    errors = 0.05 / np.sqrt(rng.integers(1, 4, 60))
    phases = math.pi + rng.normal(0.0, errors)
    phases[40:] += 0.25
    wrapped = np.angle(np.exp(1j * phases))
    assert (wrapped[:40] > 0).any() and (wrapped[:40] < 0).any()
    circle = judge(days, wrapped, errors, period=2 * math.pi)
    assert circle.excursions() and circle.excursions()[0] in (40, 41)
    assert not circle.out[:40].any()
    # On the circle the judgement does not depend on where zero is: the same readings
    # turned by half a turn are judged as a linear series near 0, day for day (up to the
    # difference between a mean direction and an arithmetic mean, second order in the
    # spread: ~1e-4 standard errors here).
    turned = judge(days, np.angle(np.exp(1j * (phases - math.pi))), errors)
    np.testing.assert_allclose(circle.z, turned.z, atol=2e-3)
    assert judge(days, np.angle(np.exp(1j * (phases - math.pi))), errors, period=2 * math.pi).z == pytest.approx(circle.z, abs=1e-9, nan_ok=True)
    assert circle.signals == turned.signals
    # The centre is drawn beside each day's reading, whichever side of the wrap it is on.
    judged = np.isfinite(circle.centre)
    assert np.all(np.abs(circle.centre[judged] - wrapped[judged]) < 1.0)
    # Judged on the line, the wrap looks like day-to-day scatter of about a radian, and
    # the real step drowns in it.
    line = judge(days, wrapped, errors)
    assert np.nanmax(line.scatter) > 1.0 and not line.out[40:42].any()


def test_phase_drift_through_the_catalogue_on_the_circle(catalogue, tmp_path):
    # Truth: a Ramsey phase at -pi + 0.02 rad, fitted and stored wrapped to (-pi, pi], two
    # runs a day; a step of +0.3 rad (6 daily standard errors) from day 30.
    rng = np.random.default_rng(17)
    keys, times, plan = [], [], []
    for day in range(36):
        for k in range(2):
            key = f"ph-{day:02d}-{k}"
            keys.append(key)
            times.append(dt.datetime.combine(START + dt.timedelta(days=day), dt.time(9 + k), dt.timezone.utc))
            truth = -math.pi + 0.02 + (0.3 if day >= 30 else 0.0)
            plan.append((key, float(np.angle(np.exp(1j * rng.normal(truth, 0.07))))))
    n = len(keys)
    table = pa.table({
        "run": keys, "apparatus": ["bench-phase"] * n, "sequence": ["ramsey"] * n, "shot": pa.array(np.zeros(n, dtype=np.int64)),
        "time": pa.array(times, pa.timestamp("us", tz="UTC")), "p.lattice_depth[uK]": np.full(n, 40.0),
    })
    pq.write_table(table, tmp_path / "phases.parquet")
    assert {r.status for r in catalogue.ingest(tmp_path / "phases.parquet")} == {"ingested"}
    for key, value in plan:
        catalogue.save_figures(key, "coherence", [Figure("ramsey_phase", value, "rad", stderr=0.07, method="least-squares")])
    catalogue.check_drift()
    drift = catalogue.drift("ramsey_phase", apparatus="bench-phase", record_alarms=False)
    assert len(drift.points) == 36
    alarms = [a["date"] for a in catalogue.alarms() if a["quantity"] == "ramsey_phase"]
    step = START + dt.timedelta(days=30)
    assert alarms and all(dt.date.fromisoformat(d) >= step for d in alarms), alarms
    assert dt.date.fromisoformat(alarms[0]) <= step + dt.timedelta(days=1)
    # The size of the step is measured on the circle: about +0.3 rad, not a turn.
    first = drift.excursions[0]
    assert first["size"] == pytest.approx(0.3, abs=0.15)
    assert [c.date for c in drift.changes] and all(abs((c.date - step).days) <= 1 for c in drift.changes)


def test_student_t_to_normal_against_scipy():
    # Reference: scipy.special (stdtr, ndtri) for the exact normal deviate of the same tail.
    from scipy import special

    from runlog.drift.detect import _normal_scale

    for freedom, tolerance in ((3, 0.05), (10, 0.016), (30, 0.005), (100, 0.001)):
        for t in np.linspace(-8.0, 8.0, 81):
            exact = -float(special.ndtri(special.stdtr(freedom, -abs(t)))) * np.sign(t)
            assert _normal_scale(float(t), float(freedom)) == pytest.approx(exact, abs=tolerance), (freedom, t)
    assert _normal_scale(2.5, math.inf) == 2.5
