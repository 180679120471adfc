"""One false-alarm budget per apparatus, shared by its quantities (runlog.drift.budget).

Truths: seeded stable series of our own (nothing changes, so every alarm is false), and
the normal tail from scipy (used only here) for the Bonferroni split.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.stats import norm

from runlog import Figure
from runlog.drift.budget import CALIBRATED_QUANTITIES, thresholds_for
from runlog.drift.detect import THRESHOLDS, judge

START = dt.date(2026, 1, 5)


def test_the_calibrated_limit_is_kept_for_up_to_four_quantities_and_split_beyond():
    for count in range(0, CALIBRATED_QUANTITIES + 1):
        assert thresholds_for(count) == THRESHOLDS
    calibrated_tail = norm.sf(THRESHOLDS.pair_limit)
    limits = []
    for count in (5, 8, 9, 20, 60):
        shared = thresholds_for(count)
        # Bonferroni: the tail of the two-day statistic is the calibrated one split count/4 ways.
        assert norm.sf(shared.pair_limit) == pytest.approx(calibrated_tail * CALIBRATED_QUANTITIES / count, rel=2e-3)
        assert shared.day_limit == THRESHOLDS.day_limit and shared.window == THRESHOLDS.window
        limits.append(shared.pair_limit)
    assert limits == sorted(limits) and limits[0] > THRESHOLDS.pair_limit


def test_an_apparatus_of_twelve_quantities_stays_within_one_budget():
    # 300 stable series of 120 lab days (1-5 runs a day, a third each with 0, 0.5 and 1
    # daily standard error of scatter beyond the errors), as twelve quantities of one
    # apparatus each would be. At the calibrated limit alone twelve quantities raise about
    # three times the budget (0.97 per apparatus-month for four, benchmarks/alarms.py).
    rng = np.random.default_rng(2612)
    days = [START + dt.timedelta(days=i) for i in range(120)]
    shared, alone = thresholds_for(12), THRESHOLDS
    counts = {"shared": 0, "alone": 0}
    judged = 0
    for _ in range(300):
        runs = rng.integers(1, 6, len(days))
        errors = 0.01 / np.sqrt(runs)
        tau = rng.choice([0.0, 0.5, 1.0]) * 0.01 / np.sqrt(3)
        values = 0.5 + rng.normal(0.0, errors) + rng.normal(0.0, tau, len(days))
        for name, thresholds in (("shared", shared), ("alone", alone)):
            judgement = judge(days, values, errors, thresholds=thresholds)
            counts[name] += len(judgement.excursions())
        judged += int((~judgement.learning).sum())
    per_apparatus_month = {name: count / judged * 30 * 12 for name, count in counts.items()}
    assert per_apparatus_month["shared"] <= 1.2, per_apparatus_month
    assert per_apparatus_month["alone"] > 2.0, per_apparatus_month


def _many_quantities(catalogue, tmp_path, names: list[str], days: int, short: str, short_days: int):
    """One apparatus, one run a day with one figure of each name; ``short`` on a few days."""
    keys = [f"a-{d:02d}" for d in range(days)]
    times = [dt.datetime.combine(START + dt.timedelta(days=d), dt.time(9), dt.timezone.utc) for d in range(days)]
    table = pa.table({
        "run": keys, "apparatus": ["a"] * days, "sequence": ["ramsey"] * days, "shot": pa.array(np.zeros(days, dtype=np.int64)),
        "time": pa.array(times, pa.timestamp("us", tz="UTC")),
    })
    pq.write_table(table, tmp_path / "runs.parquet")
    assert {r.status for r in catalogue.ingest(tmp_path / "runs.parquet")} == {"ingested"}
    rng = np.random.default_rng(7)
    for day, key in enumerate(keys):
        figures = [Figure(name, 1.0 + rng.normal(0.0, 0.01), "", stderr=0.01, method="least-squares") for name in names]
        if day < short_days:
            figures.append(Figure(short, 1.0, "", stderr=0.01, method="least-squares"))
        catalogue.save_figures(key, "fit", figures)


def test_the_catalogue_shares_the_budget_among_the_judged_quantities(catalogue, tmp_path):
    names = [f"q{i}" for i in range(9)] + ["survival", "loss"]
    _many_quantities(catalogue, tmp_path, names, days=20, short="seldom", short_days=THRESHOLDS.warmup)
    drift = catalogue.drift("q0", apparatus="a", record_alarms=False)
    # loss mirrors survival and takes no share; a quantity on no more days than the
    # warm-up cannot raise an alarm yet and takes none either.
    sharing = drift.limits["budget_shared_by"]
    assert sharing == sorted([f"q{i}" for i in range(9)] + ["survival"])
    assert f"two days |z1 + z2|/sqrt(2 + 2 rho) > {thresholds_for(10).pair_limit:g}" in drift.limits["method"]
    # The judgement is the detector's at the shared limit, day for day.
    judgement = judge([p.date for p in drift.points], [p.value for p in drift.points], [p.stderr for p in drift.points], thresholds=thresholds_for(10))
    assert drift.out_of_limits == [int(i) for i in np.flatnonzero(judgement.out)]
