"""False-alarm and detection rates of the drift alarms through the catalogue, on SQLite and
PostgreSQL: seeded simulations of our own, CI-sized (benchmarks/alarms.py holds the large
one). Stable series have a known truth (nothing changes), stepped ones a planted step of
3 daily standard errors; the truth is the only reference.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

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
