"""Shot-level intervals of counting figures: coverage by seeded simulation when the loading
probability varies from shot to shot, and the pooled binomial interval failing there.

The figure estimated is the mean per-shot loading (or survival) probability over the
shots a run could take; each simulated run draws the per-shot probabilities from a beta
distribution of mean ``truth`` and standard deviation ``spread`` (the issue's 0.08), then
each site of a shot from that shot's probability.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from runlog.figures.counting import counted_figure, fill_fraction, survival
from runlog.figures.shot_level import ShotSums, shot_level_interval
from runlog.figures.sorting import target_fill_fraction

SLOW = os.environ.get("RUNLOG_SLOW_TESTS") == "1"


def _beta(rng, mean: float, spread: float, size: int) -> np.ndarray:
    k = mean * (1 - mean) / spread**2 - 1
    return rng.beta(mean * k, (1 - mean) * k, size)


def _fill_coverage(rng, runs: int, shots: int, sites: int, spread: float, truth: float = 0.5) -> tuple[float, float]:
    honest = pooled = 0
    for _ in range(runs):
        p = _beta(rng, truth, spread, shots)
        loading = rng.random((shots, sites)) < p[:, None]
        figure = fill_fraction(loading)
        honest += figure.ci_low <= truth <= figure.ci_high
        pooled += figure.binomial_ci_low <= truth <= figure.binomial_ci_high
    return honest / runs, pooled / runs


@pytest.mark.parametrize("shots,sites", [(20, 100), (50, 1000)])
def test_fill_fraction_interval_covers_the_truth_when_loading_varies(shots, sites):
    # 1500 seeded runs: the coverage's own standard error is 0.56 %, so 93-97 % is +-3.5 sigma.
    rng = np.random.default_rng(20261302 + sites)
    honest, pooled = _fill_coverage(rng, 6000 if SLOW else 1500, shots, sites, spread=0.08)
    assert 0.93 <= honest <= 0.97, honest
    # The pooled binomial interval treats every site as an independent try: far too narrow.
    assert pooled < 0.80, pooled


def test_fill_fraction_interval_without_spread_is_not_too_narrow():
    rng = np.random.default_rng(7)
    honest, pooled = _fill_coverage(rng, 1500, 30, 100, spread=1e-9)
    assert 0.93 <= honest <= 0.985, honest
    assert 0.93 <= pooled <= 0.97, pooled


def test_survival_interval_covers_the_truth_when_survival_varies():
    # Loaded atoms vary per shot (ratio estimate with unequal cluster sizes), and the
    # survival probability has a shot-to-shot spread of 0.05 around 0.9.
    rng = np.random.default_rng(11)
    runs, shots, sites, truth = 1500, 30, 100, 0.9
    honest = pooled = 0
    for _ in range(runs):
        load = _beta(rng, 0.5, 0.08, shots)
        keep = _beta(rng, truth, 0.05, shots)
        loading = rng.random((shots, sites)) < load[:, None]
        kept = loading & (rng.random((shots, sites)) < keep[:, None])
        figure, _ = survival(loading, kept)
        honest += figure.ci_low <= truth <= figure.ci_high
        pooled += figure.binomial_ci_low <= truth <= figure.binomial_ci_high
    assert 0.93 <= honest / runs <= 0.97, honest / runs
    assert pooled / runs < 0.85, pooled / runs


def test_target_fill_interval_is_shot_level():
    rng = np.random.default_rng(5)
    runs, truth, hits = 1000, 0.95, 0
    for _ in range(runs):
        p = _beta(rng, truth, 0.03, 25)
        occupancy = rng.random((25, 64)) < p[:, None]
        figure = target_fill_fraction(occupancy, np.arange(64))
        hits += figure.ci_low <= truth <= figure.ci_high
    assert 0.93 <= hits / runs <= 0.97, hits / runs


def test_sums_add_over_files_as_over_shots():
    rng = np.random.default_rng(1)
    y = rng.integers(0, 50, 40)
    x = y + rng.integers(0, 50, 40)
    whole = ShotSums.of(y, x)
    parts = ShotSums.of(y[:15], x[:15]) + ShotSums.of(y[15:], x[15:])
    assert parts.shots == whole.shots and parts.successes == whole.successes and parts.trials == whole.trials
    assert parts.successes_squares == pytest.approx(whole.successes_squares)
    assert parts.successes_trials == pytest.approx(whole.successes_trials)
    loss = whole.complement()
    assert loss == ShotSums.of(x - y, x)


def test_one_shot_has_no_shot_level_interval():
    figure = counted_figure("fill_fraction", ShotSums.of([3], [4]))
    assert figure.ci_low is None and figure.stderr is None
    assert figure.binomial_ci_low is not None
    assert shot_level_interval(ShotSums.of([0, 0], [0, 0])) is None


def test_ingest_stores_shot_level_and_binomial_intervals_and_pools_files(catalogue, make_file):
    # One run split over two files: the stored interval is the one of all its shots.
    from runlog.figures.intervals import wilson

    first = make_file(runs={"r1": 12}, seed=3)
    second = make_file(runs={"r1": 9}, seed=4, first_shot=12)
    catalogue.ingest([first, second])
    figures = catalogue.run("r1").figures
    import pyarrow.parquet as pq

    loads = [np.array(pq.read_table(p).column("occ.load").to_pylist(), dtype=bool) for p in (first, second)]
    survives = [np.array(pq.read_table(p).column("occ.survive").to_pylist(), dtype=bool) for p in (first, second)]
    loading, kept = np.vstack(loads), np.vstack(survives)
    expected = fill_fraction(loading)
    stored = figures["fill_fraction"]
    assert stored["method"] == "shot-ratio" and stored["binomial_method"] == "wilson"
    assert (stored["ci_low"], stored["ci_high"], stored["stderr"]) == pytest.approx((expected.ci_low, expected.ci_high, expected.stderr), rel=1e-12)
    assert (stored["binomial_ci_low"], stored["binomial_ci_high"]) == pytest.approx(wilson(int(loading.sum()), loading.size), rel=1e-12)
    kept_figure, lost_figure = survival(loading, kept)
    assert (figures["survival"]["ci_low"], figures["survival"]["ci_high"]) == pytest.approx((kept_figure.ci_low, kept_figure.ci_high), rel=1e-12)
    assert (figures["loss"]["ci_low"], figures["loss"]["ci_high"]) == pytest.approx((lost_figure.ci_low, lost_figure.ci_high), rel=1e-12)
    # The derive path recomputes the same numbers from the stored occupancy.
    derived = {f.name: f for f in catalogue.derive("r1", kind="counting").figures}
    assert derived["fill_fraction"].ci_low == pytest.approx(expected.ci_low, rel=1e-12)


def test_daily_drift_points_use_the_shot_level_interval(catalogue, make_file):
    import datetime as dt

    start = dt.datetime(2026, 3, 2, 9, 0, tzinfo=dt.timezone.utc)
    paths = [make_file(runs={f"d{day}": 15}, seed=day, start=start + dt.timedelta(days=day)) for day in range(4)]
    catalogue.ingest(paths)
    drift = catalogue.drift("fill_fraction", apparatus="bench-a")
    import pyarrow.parquet as pq

    for day, point in enumerate(drift.points):
        loading = np.array(pq.read_table(paths[day]).column("occ.load").to_pylist(), dtype=bool)
        expected = fill_fraction(loading)
        assert (point.ci_low, point.ci_high, point.stderr) == pytest.approx((expected.ci_low, expected.ci_high, expected.stderr), rel=1e-12)


def test_migration_gives_old_counting_figures_the_shot_level_interval(db_url, make_file):
    import runlog
    from runlog.store import migrate
    from runlog.store.engine import make_engine

    engine = make_engine(db_url)
    migrate.upgrade(engine)
    engine.dispose()
    path = make_file(runs={"r1": 14}, seed=9)
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(path)
        before = catalogue.run("r1").figures
        migrate.downgrade(catalogue.engine, "0007")
        with catalogue.engine.connect() as connection:
            from sqlalchemy import text

            low, method = connection.execute(text("SELECT ci_low, method FROM figures WHERE name = 'fill_fraction'")).one()
        assert method == "wilson" and low == pytest.approx(before["fill_fraction"]["binomial_ci_low"])
        migrate.upgrade(catalogue.engine)
        after = catalogue.run("r1").figures
        for name in ("fill_fraction", "survival", "loss"):
            for key in ("value", "ci_low", "ci_high", "stderr", "binomial_ci_low", "binomial_ci_high"):
                assert after[name][key] == pytest.approx(before[name][key], rel=1e-12), (name, key)
            assert (after[name]["method"], after[name]["binomial_method"]) == ("shot-ratio", "wilson")
        drift_points = catalogue.drift("fill_fraction", apparatus="bench-a").points
        assert drift_points[0].ci_low == pytest.approx(before["fill_fraction"]["ci_low"], rel=1e-12)
