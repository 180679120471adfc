"""Drift on a 14-day scenario of our own: a step in fill fraction, a step in coherence time,
stable survival; on SQLite and PostgreSQL.

The scenario is invented for this test (binomial loading and survival, Ramsey coherence
times with Gaussian scatter); its truth is the only reference for where the steps are.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow as pa
import pytest
from click.testing import CliRunner

from runlog import ConfigError, Figure
from runlog.cli import cli

START = dt.date(2026, 4, 6)
FILL_STEP_DAY = 6        # fill fraction 0.50 -> 0.42 from this day on
COHERENCE_STEP_DAY = 9   # coherence time 1000 us -> 650 us from this day on
DAYS = 14


def _day_table(day: int, rng: np.random.Generator) -> pa.Table:
    runs, shots, times, load, survive = [], [], [], [], []
    fill = 0.50 if day < FILL_STEP_DAY else 0.42
    date = START + dt.timedelta(days=day)
    for number in range(3):
        key = f"{date:%Y%m%d}-load-{number}"
        start = dt.datetime(date.year, date.month, date.day, 9 + 2 * number, tzinfo=dt.timezone.utc)
        loaded = rng.random((120, 64)) < fill
        kept = loaded & (rng.random((120, 64)) < 0.93)
        runs += [key] * 120
        shots += list(range(120))
        times += [start + dt.timedelta(seconds=3 * i) for i in range(120)]
        load += list(loaded)
        survive += list(kept)
    n = len(runs)
    return pa.table(
        {
            "run": runs,
            "apparatus": ["bench-north"] * n,
            "sequence": ["loading"] * n,
            "shot": pa.array(shots, pa.int64()),
            "time": pa.array(times, pa.timestamp("us", tz="UTC")),
            "p.lattice_depth[uK]": np.full(n, 65.0) if day < FILL_STEP_DAY else np.full(n, 55.0),
            "m.atom_number": np.array([row.sum() for row in load], dtype=float),
            "occ.load": pa.array(load, pa.list_(pa.bool_())),
            "occ.survive": pa.array(survive, pa.list_(pa.bool_())),
        }
    )


def _ramsey_table(day: int) -> pa.Table:
    date = START + dt.timedelta(days=day)
    start = dt.datetime(date.year, date.month, date.day, 16, tzinfo=dt.timezone.utc)
    keys = [f"{date:%Y%m%d}-ramsey-{k}" for k in range(2) for _ in range(5)]
    return pa.table(
        {
            "run": keys,
            "apparatus": ["bench-north"] * 10,
            "sequence": ["ramsey"] * 10,
            "shot": pa.array([i % 5 for i in range(10)], pa.int64()),
            "time": pa.array([start + dt.timedelta(minutes=i) for i in range(10)], pa.timestamp("us", tz="UTC")),
            "p.wait[us]": np.tile(np.linspace(0, 2000, 5), 2),
        }
    )


@pytest.fixture
def scenario(catalogue, tmp_path):
    import pyarrow.parquet as pq

    rng = np.random.default_rng(2026)
    truth = np.random.default_rng(7)
    for day in range(DAYS):
        pq.write_table(_day_table(day, rng), tmp_path / f"load-{day:02d}.parquet")
        pq.write_table(_ramsey_table(day), tmp_path / f"ramsey-{day:02d}.parquet")
    results = catalogue.ingest(sorted(tmp_path.glob("*.parquet")))
    assert {r.status for r in results} == {"ingested"}
    # Coherence times as a derive would store them: one fitted value per Ramsey run.
    for day in range(DAYS):
        date = START + dt.timedelta(days=day)
        true_t = 1000.0 if day < COHERENCE_STEP_DAY else 650.0
        for k in range(2):
            value = true_t + truth.normal(0, 25.0)
            catalogue.save_figures(f"{date:%Y%m%d}-ramsey-{k}", "coherence", [Figure("t2_star", value, "us", stderr=25.0, method="least-squares")])
    return catalogue


def test_steps_are_found_on_their_day_and_a_stable_quantity_has_none(scenario):
    fill = scenario.drift("fill_fraction", apparatus="bench-north")
    assert len(fill.points) == DAYS and [p.date for p in fill.points] == [START + dt.timedelta(days=d) for d in range(DAYS)]
    assert len(fill.changes) in (1, 2)
    assert abs((fill.changes[0].date - (START + dt.timedelta(days=FILL_STEP_DAY))).days) <= 1
    assert fill.changes[0].before == pytest.approx(0.50, abs=0.01) and fill.changes[0].after == pytest.approx(0.42, abs=0.01)

    coherence = scenario.drift("t2_star", apparatus="bench-north")
    assert coherence.unit == "us" and len(coherence.points) == DAYS
    assert len(coherence.changes) in (1, 2)
    assert abs((coherence.changes[0].date - (START + dt.timedelta(days=COHERENCE_STEP_DAY))).days) <= 1

    survival = scenario.drift("survival", apparatus="bench-north")
    assert survival.changes == []
    assert all(p.value == pytest.approx(0.93, abs=0.02) for p in survival.points)


def test_daily_points_pool_counts_exactly(scenario):
    from statsmodels.stats.proportion import proportion_confint  # reference library, tests only

    fill = scenario.drift("fill_fraction", apparatus="bench-north")
    first = fill.points[0]
    occupancy = [scenario.occupancy(f"{START:%Y%m%d}-load-{k}") for k in range(3)]
    loaded = sum(int(o.sum()) for o in occupancy)
    sites = sum(o.size for o in occupancy)
    assert (first.successes, first.trials, first.runs, first.shots) == (loaded, sites, 3, 360)
    # The day's interval is shot-level, over all shots of its three runs; the pooled Wilson
    # interval of the same counts (statsmodels) lies inside it.
    from runlog.figures.counting import fill_fraction

    expected = fill_fraction(np.vstack(occupancy))
    assert (first.ci_low, first.ci_high) == pytest.approx((expected.ci_low, expected.ci_high), rel=1e-12)
    low, high = proportion_confint(loaded, sites, method="wilson")
    assert first.ci_low <= low + 1e-12 and high <= first.ci_high + 1e-12


def test_alarms_are_recorded_once_and_acknowledging_adds_an_annotation(scenario):
    scenario.drift("t2_star", apparatus="bench-north")
    scenario.drift("t2_star", apparatus="bench-north")  # the same findings again
    alarms = scenario.alarms()
    limits = [a for a in alarms if a["quantity"] == "t2_star" and a["reason"] == "limit"]
    assert len(limits) == 1 and abs(dt.date.fromisoformat(limits[0]["date"]) - (START + dt.timedelta(days=COHERENCE_STEP_DAY))).days <= 1
    assert limits[0]["series"]["sequence"] == "ramsey" and limits[0]["series"]["key"].startswith("ramsey@")
    note = scenario.acknowledge(limits[0]["id"], "repump fibre replaced this morning")
    assert note > 0
    assert all(a["id"] != limits[0]["id"] for a in scenario.alarms())
    texts = scenario.annotations(apparatus="bench-north")["text"].tolist()
    assert any("repump fibre replaced" in t for t in texts)


def test_accepting_a_new_level_starts_a_new_baseline_recorded_as_a_note(scenario):
    before = scenario.drift("t2_star", apparatus="bench-north")
    step = START + dt.timedelta(days=COHERENCE_STEP_DAY)
    assert any(p.date > step + dt.timedelta(days=1) for p in (before.points[i] for i in before.out_of_limits))
    (alarm,) = [a for a in scenario.alarms() if a["quantity"] == "t2_star"]
    scenario.acknowledge(alarm["id"], "new lattice alignment", accept=True)
    after = scenario.drift("t2_star", apparatus="bench-north")
    assert after.limits["accepted"] == [alarm["date"]]
    # From the accepted day the days only build the new baseline: nothing is out any more.
    assert [after.points[i].date.isoformat() for i in after.out_of_limits if after.points[i].date.isoformat() >= alarm["date"]] == []
    assert [a["status"] for a in scenario.alarms(status=None) if a["id"] == alarm["id"]] == ["accepted"]
    assert any(t.startswith("new level accepted for t2_star") and "new lattice alignment" in t for t in scenario.annotations(apparatus="bench-north")["text"])


def test_what_else_changed_ranks_the_parameter_that_moved_first(scenario):
    fill = scenario.drift("fill_fraction", apparatus="bench-north")
    ranking = scenario.what_else_changed("fill_fraction", fill.changes[0].date, apparatus="bench-north")
    names = [f"{r['kind']} {r['name']}" for r in ranking]
    # lattice_depth and atom_number moved with the step; survival did not.
    assert set(names[:2]) == {"parameter lattice_depth", "measurement atom_number"}


def test_drift_command_json_has_one_point_per_day(scenario):
    result = CliRunner().invoke(cli, ["--db", scenario.engine.url.render_as_string(hide_password=False), "drift", "fill_fraction", "--apparatus", "bench-north", "--json"])
    assert result.exit_code == 0, result.output
    import json

    data = json.loads(result.output)
    assert set(data) >= {"quantity", "apparatus", "unit", "points", "limits", "changes", "alarms"}
    assert [p["date"] for p in data["points"]] == [(START + dt.timedelta(days=d)).isoformat() for d in range(DAYS)]
    assert set(data["points"][0]) >= {"date", "value", "ci_low", "ci_high", "runs", "shots"}
    assert data["changes"][0]["date"] in {(START + dt.timedelta(days=d)).isoformat() for d in (FILL_STEP_DAY - 1, FILL_STEP_DAY, FILL_STEP_DAY + 1)}
    human = CliRunner().invoke(cli, ["--db", scenario.engine.url.render_as_string(hide_password=False), "drift", "fill_fraction", "--apparatus", "bench-north"])
    assert human.exit_code == 0 and max(len(line) for line in human.output.splitlines()) <= 80


def test_lab_timezone_moves_late_runs_to_the_next_lab_day(catalogue, make_file):
    from conftest import shot_table

    late = dt.datetime(2026, 4, 6, 23, 30, tzinfo=dt.timezone.utc)
    catalogue.ingest(make_file(table=shot_table({"r1": 4}, start=late)))
    assert [p.date for p in catalogue.drift("fill_fraction").points] == [dt.date(2026, 4, 6)]
    catalogue.set_lab_timezone("Europe/Berlin")  # 23:30 UTC is 01:30 the next day in Berlin (CEST)
    with pytest.raises(ConfigError) as caught:
        catalogue.set_lab_timezone("Mars/Olympus_Mons")
    assert str(caught.value) == "lab_timezone: unknown time zone 'Mars/Olympus_Mons' (use an IANA name such as Europe/Berlin)"
    from sqlalchemy import select

    from runlog.store.schema import DailyRollup

    with catalogue.engine.connect() as connection:
        days = {d for (d,) in connection.execute(select(DailyRollup.day).distinct())}
    assert days == {dt.date(2026, 4, 7)}


def test_trusted_binomial_weights_keep_false_changes_rare_and_find_small_steps():
    # Simulation with known truth (binomial daily counts, 14 days): with honest weights the
    # noise scale is floored at 1, so a stable series rarely shows a change.
    from runlog.drift.changepoints import default_penalty, pelt

    rng = np.random.default_rng(0)
    false = found = 0
    for _ in range(300):
        n = rng.integers(5000, 15000, 14)
        p = rng.binomial(n, 0.93) / n
        w = n / (p * (1 - p))
        false += bool(pelt(p, weights=w, penalty=default_penalty(p, w, trusted_weights=True)))
        p = rng.binomial(n, np.where(np.arange(14) < 7, 0.50, 0.48)) / n
        w = n / (p * (1 - p))
        changes = pelt(p, weights=w, penalty=default_penalty(p, w, trusted_weights=True))
        found += len(changes) == 1 and abs(changes[0].index - 7) <= 1
    assert false / 300 <= 0.02
    assert found / 300 >= 0.9


def test_parameter_ranges_filter_the_runs_behind_each_day(scenario):
    # lattice_depth was 65 uK before the fill step and 55 uK after it (the scenario's truth).
    deep = scenario.drift("fill_fraction", apparatus="bench-north", parameters={"lattice_depth": (60.0, 70.0)})
    shallow = scenario.drift("fill_fraction", apparatus="bench-north", parameters={"lattice_depth": (50.0, 58.0)})
    assert [p.date for p in deep.points] == [START + dt.timedelta(days=d) for d in range(FILL_STEP_DAY)]
    assert [p.date for p in shallow.points] == [START + dt.timedelta(days=d) for d in range(FILL_STEP_DAY, DAYS)]
    everything = {p.date: p for p in scenario.drift("fill_fraction", apparatus="bench-north").points}
    for point in deep.points + shallow.points:  # the same pooled counts as the rollups
        assert (point.successes, point.trials) == (everything[point.date].successes, everything[point.date].trials)
    table = scenario.parameters()
    depth = table.set_index("name").loc["lattice_depth"]
    assert (depth["unit"], depth["min"], depth["max"]) == ("uK", 55.0, 65.0)
    figures = scenario.figures(names=["t2_star"])
    assert len(figures) == 2 * DAYS and set(figures["unit"]) == {"us"}


def test_run_against_run_uses_newcombe_on_the_stored_counts(scenario):
    from runlog.figures.intervals import newcombe_difference

    a, b = f"{START:%Y%m%d}-load-0", f"{START + dt.timedelta(days=DAYS - 1):%Y%m%d}-load-0"
    difference = scenario.compare(a, b, "fill_fraction")
    fa = scenario.figures(runs=[a], names=["fill_fraction"])
    counts = []
    for key in (a, b):
        occupancy = scenario.occupancy(key)
        counts += [int(occupancy.sum()), occupancy.size]
    assert difference.value == pytest.approx(counts[0] / counts[1] - counts[2] / counts[3], abs=1e-15)
    assert (difference.ci_low, difference.ci_high) == pytest.approx(newcombe_difference(*counts), abs=1e-15)
    assert fa["value"].iloc[0] == pytest.approx(counts[0] / counts[1])


def test_drift_command_ranks_causes_and_filters_by_parameter(scenario):
    import json

    url = scenario.engine.url.render_as_string(hide_password=False)
    result = CliRunner().invoke(cli, ["--db", url, "drift", "fill_fraction", "--apparatus", "bench-north", "--causes", "--json"])
    data = json.loads(result.output)
    assert {(c["kind"], c["name"]) for c in data["changes"][0]["causes"][:2]} == {("parameter", "lattice_depth"), ("measurement", "atom_number")}
    filtered = CliRunner().invoke(cli, ["--db", url, "drift", "fill_fraction", "--apparatus", "bench-north", "--param", "lattice_depth=60:70", "--json"])
    assert len(json.loads(filtered.output)["points"]) == FILL_STEP_DAY
    bad = CliRunner().invoke(cli, ["--db", url, "drift", "fill_fraction", "--param", "depth=deep"])
    assert bad.exit_code == 2


def test_a_name_stored_in_two_units_is_not_pooled(catalogue, make_file):
    # Fringe phase (deg) and Ramsey phase (rad) share the name 'phase'.
    catalogue.ingest([make_file(runs={"a1": 3}, sequence="phase-scan"), make_file(runs={"b1": 3}, sequence="ramsey", seed=3)])
    catalogue.save_figures("a1", "fringe", [Figure("phase", 30.0, "deg", stderr=1.0, method="least-squares")])
    catalogue.save_figures("b1", "coherence", [Figure("phase", 0.5, "rad", stderr=0.1, method="least-squares")])
    from runlog import NotFoundError

    with pytest.raises(NotFoundError) as caught:
        catalogue.drift("phase", pooled=True)
    assert str(caught.value) == "no single unit for 'phase' (it is stored in deg, rad by different sequences: give a sequence)"
    # Each sequence is its own series: the reference one is judged alone, in its own unit.
    assert catalogue.drift("phase", sequence="ramsey").unit == "rad"
    assert {s["sequence"] for s in catalogue.series("phase")} == {"phase-scan", "ramsey"}
    catalogue.check_drift()


def test_fitted_figures_get_ewma_and_cusum_and_a_named_baseline(scenario):
    coherence = scenario.drift("t2_star", apparatus="bench-north", baseline=(START, START + dt.timedelta(days=4)))
    assert coherence.limits["baseline"] == [START.isoformat(), (START + dt.timedelta(days=4)).isoformat()]
    assert len(coherence.limits["cusum_lower"]) == DAYS
    # The 350 us drop drives the lower CUSUM past h from the step day on.
    first = next(i for i, v in enumerate(coherence.limits["cusum_lower"]) if v > coherence.limits["cusum_h"])
    assert abs(first - COHERENCE_STEP_DAY) <= 1
    assert COHERENCE_STEP_DAY in coherence.out_of_limits or COHERENCE_STEP_DAY + 1 in coherence.out_of_limits
    result = CliRunner().invoke(cli, ["--db", scenario.engine.url.render_as_string(hide_password=False), "drift", "t2_star", "--baseline", f"{START}:{START + dt.timedelta(days=4)}", "--json"])
    assert result.exit_code == 0, result.output
