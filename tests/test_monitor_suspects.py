"""Monitors among the suspects of a change, at the lag that explains it; and the as-of
values of a monitor at the runs' times against a pandas ``merge_asof`` reference."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sqlalchemy import select

from runlog.monitors.align import value_at, values_between
from runlog.store.schema import Monitor

UTC = dt.timezone.utc
START = dt.datetime(2026, 5, 1, 0, 0, tzinfo=UTC)
CHANGE = dt.datetime(2026, 5, 4, 9, 0, tzinfo=UTC)  # the fill fraction drops here
LEAD = dt.timedelta(hours=3)  # ... three hours after the room warmed


def write_shots(path, keys, shot, times, load, *, apparatus: str, sequence: str) -> None:
    """A shot table of one apparatus and sequence with a loading image per shot."""
    shots = pa.table(
        {
            "run": keys,
            "apparatus": [apparatus] * len(keys),
            "sequence": [sequence] * len(keys),
            "shot": pa.array(shot, pa.int64()),
            "time": pa.array(times, pa.timestamp("us", tz="UTC")),
            "occ.load": pa.array([list(x) for x in load], pa.list_(pa.bool_())),
        }
    )
    pq.write_table(shots, path)


def _scenario(tmp_path, seed=7):
    rng = np.random.default_rng(seed)
    runs, shots_per_run, sites = 6 * 48, 10, 64
    keys, shot, times, load = [], [], [], []
    for r in range(runs):
        begin = START + dt.timedelta(minutes=30 * r)
        p = 0.60 if begin < CHANGE else 0.45
        for i in range(shots_per_run):
            keys.append(f"run-{r:03d}")
            shot.append(i)
            times.append(begin + dt.timedelta(seconds=20 * i))
            load.append(rng.random(sites) < p)
    write_shots(tmp_path / "shots.parquet", keys, shot, times, load, apparatus="bench-a", sequence="loading")
    step_s = 60
    n = 6 * 24 * 3600 // step_s
    t = np.array([START + dt.timedelta(seconds=step_s * i) for i in range(n)])
    seconds = np.arange(n) * step_s
    change_s = (CHANGE - START).total_seconds()
    monitors = pa.table(
        {
            "time": pa.array(t, pa.timestamp("us", tz="UTC")),
            "room_temp[degC]": 21.0 + 2.0 * (seconds >= change_s - LEAD.total_seconds()) + 0.05 * rng.standard_normal(n),
            # Steps too, but a day after the fill change: no effect on it.
            "laser_power[mW]": 100.0 + 5.0 * (seconds >= change_s + 20 * 3600) + 0.2 * rng.standard_normal(n),
            "noise_white[V]": rng.standard_normal(n),
            "noise_walk[V]": np.cumsum(0.01 * rng.standard_normal(n)),
        }
    )
    pq.write_table(monitors, tmp_path / "slow.parquet")
    return tmp_path / "shots.parquet", tmp_path / "slow.parquet"


def test_room_temperature_is_the_top_suspect_at_the_right_lag(catalogue, tmp_path):
    results = catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    assert [r.status for r in results] == ["ingested", "ingested"], [r.reason for r in results]
    found = catalogue.suspects("fill_fraction", CHANGE.date(), apparatus="bench-a", top=20)
    monitors = [c for c in found["causes"] if c["kind"] == "monitor"]
    assert monitors[0]["name"] == "room_temp"
    assert monitors[0]["lag_hours"] == pytest.approx(3.0, abs=0.5)
    assert monitors[0]["significant"]
    # Causes are in rank order, and the room temperature ranks above every other monitor.
    names = [c["name"] for c in found["causes"]]
    assert all(names.index("room_temp") < names.index(other) for other in ("laser_power", "noise_white", "noise_walk") if other in names)
    by_name = {c["name"]: c for c in monitors}
    assert not by_name["noise_white"]["significant"]
    assert abs(by_name["room_temp"]["standardised_change"]) > 5 * max(abs(by_name[n]["standardised_change"]) for n in ("laser_power", "noise_white", "noise_walk"))


def test_as_of_values_equal_pandas_merge_asof(catalogue, tmp_path):
    rng = np.random.default_rng(2)
    # Irregular logging with a gap longer than the tolerance, out of order in the file.
    logged = np.sort(rng.choice(np.arange(0, 20_000), 900, replace=False)).astype(np.int64) * 5
    logged = logged[(logged < 40_000) | (logged > 52_000)]
    values = rng.standard_normal(logged.size)
    order = rng.permutation(logged.size)
    when = [START + dt.timedelta(seconds=int(s)) for s in logged]
    pq.write_table(pa.table({"time": pa.array([when[i] for i in order], pa.timestamp("us", tz="UTC")), "v[V]": values[order]}), tmp_path / "m.parquet")
    assert catalogue.ingest(tmp_path / "m.parquet", apparatus="bench-a")[0].status == "ingested"
    queries = np.sort(rng.integers(-1000, 101_000, 500)).astype(np.int64)
    base = int(START.timestamp()) * 1_000_000
    with catalogue.engine.connect() as connection:
        monitor_id = connection.execute(select(Monitor.id).where(Monitor.name == "v")).scalar_one()
        stored_us, stored = values_between(connection, monitor_id, base - 10**12, base + 10**12)
    ours = value_at(base + queries * 1_000_000, stored_us, stored, max_gap_seconds=600)
    left = pd.DataFrame({"t": pd.to_datetime(base + queries * 1_000_000, unit="us", utc=True)})
    right = pd.DataFrame({"t": pd.to_datetime(base + logged * 1_000_000, unit="us", utc=True), "v": values})
    reference = pd.merge_asof(left, right, on="t", direction="backward", tolerance=pd.Timedelta(seconds=600))["v"].to_numpy()
    assert np.isnan(reference).sum() > 10  # the gap and the start are exercised
    np.testing.assert_array_equal(np.isnan(ours), np.isnan(reference))
    np.testing.assert_array_equal(ours[~np.isnan(ours)], reference[~np.isnan(reference)])


def test_drift_chart_overlays_a_monitor_on_a_second_axis_in_lab_time(catalogue, tmp_path):
    from click.testing import CliRunner

    from runlog.cli import cli
    from runlog.plots import drift_chart

    catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    catalogue.set_lab_timezone("Europe/Berlin")
    drift = catalogue.drift("fill_fraction", apparatus="bench-a", record_alarms=False)
    series = catalogue.monitor_series("room_temp", apparatus="bench-a", max_points=2000)
    spec = drift_chart(drift, monitors=[series], zone="Europe/Berlin").to_dict()
    assert spec["resolve"] == {"scale": {"y": "independent"}}
    monitor_layer = spec["layer"][1]["layer"][1]
    assert monitor_layer["encoding"]["y"]["axis"]["orient"] == "right"
    assert monitor_layer["encoding"]["y"]["title"] == "room_temp (degC) (hour mean)"
    rows = next(rows for rows in spec["datasets"].values() if rows and "monitor" in rows[0])
    # The hour of the room's step, 06:00 UTC, is 08:00 in Berlin (CEST) on the chart.
    step = next(r for r in rows if r["monitor"] > 22.0)
    assert step["day"] == "2026-05-04T08:00:00"
    result = CliRunner().invoke(cli, ["--db", catalogue.engine.url.render_as_string(hide_password=False), "plot", "drift", "fill_fraction", "--apparatus", "bench-a", "--monitor", "room_temp", "--out", str(tmp_path / "d.svg")])
    assert result.exit_code == 0, result.output
    assert "room_temp" in (tmp_path / "d.svg").read_text(encoding="utf-8")


def test_shots_carry_the_monitor_at_their_time_like_merge_asof(catalogue, tmp_path):
    catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    frame = catalogue.shots_with_monitors("run-150", ["room_temp", "laser_power"], apparatus="bench-a")
    logged = pq.read_table(tmp_path / "slow.parquet").to_pandas()
    reference = pd.merge_asof(frame[["time"]].assign(time=pd.to_datetime(frame["time"], utc=True)).sort_values("time"), logged, on="time", direction="backward", tolerance=pd.Timedelta(seconds=600))
    np.testing.assert_allclose(frame["room_temp"].to_numpy(), reference["room_temp[degC]"].to_numpy())
    np.testing.assert_allclose(frame["laser_power"].to_numpy(), reference["laser_power[mW]"].to_numpy())
    assert frame.attrs["units"]["room_temp"] == "degC"


def test_each_run_has_each_monitor_mean_and_range_over_its_span(catalogue, tmp_path):
    import json

    from click.testing import CliRunner

    from runlog.cli import cli

    catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    logged = pq.read_table(tmp_path / "slow.parquet").to_pandas().set_index("time").sort_index()
    for key in ("run-000", "run-150", "run-287"):
        info = catalogue.run(key, apparatus="bench-a")
        by_name = {m["name"]: m for m in info.monitors}
        assert sorted(by_name) == ["laser_power", "noise_walk", "noise_white", "room_temp"]
        for name, column in (("room_temp", "room_temp[degC]"), ("laser_power", "laser_power[mW]")):
            inside = logged.loc[info.started : info.finished, column]  # both ends included, as documented
            entry = by_name[name]
            assert entry["count"] == len(inside) and entry["count"] >= 3
            assert entry["mean"] == pytest.approx(inside.mean(), rel=1e-12)
            assert (entry["minimum"], entry["maximum"]) == (inside.min(), inside.max())
            before = logged.loc[: info.started, column]
            assert entry["at_start"] == before.iloc[-1]  # logged every 60 s: within the 600 s gap
        assert by_name["room_temp"]["unit"] == "degC"
    url = catalogue.engine.url.render_as_string(hide_password=False)
    shown = CliRunner().invoke(cli, ["--db", url, "show", "run-150", "--json"])
    assert shown.exit_code == 0, shown.output
    assert json.loads(shown.output)["monitors"] == catalogue.run("run-150").monitors
    text = CliRunner().invoke(cli, ["--db", url, "show", "run-150"])
    assert "monitors over the run (first to last shot)" in text.output and "room_temp" in text.output


def test_plot_drift_marks_the_notes_at_their_lab_time_beside_the_monitors(catalogue, tmp_path):
    from click.testing import CliRunner

    from runlog.cli import cli
    from runlog.plots import drift_chart

    catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    catalogue.set_lab_timezone("Europe/Berlin")
    catalogue.annotate("new coil supply", apparatus="bench-a", at="2026-05-04T09:30:00+00:00")
    drift = catalogue.drift("fill_fraction", apparatus="bench-a", record_alarms=False)
    series = catalogue.monitor_series("room_temp", apparatus="bench-a", max_points=2000)
    spec = drift_chart(drift, monitors=[series], zone="Europe/Berlin").to_dict()
    assert "n1 2026-05-04 11:30: new coil supply" in spec["title"]["subtitle"]
    rows = next(rows for rows in spec["datasets"].values() if rows and "label" in rows[0])
    assert rows == [{"day": "2026-05-04T11:30:00", "label": "n1", "text": "new coil supply"}]
    out = tmp_path / "d.svg"
    result = CliRunner().invoke(cli, ["--db", catalogue.engine.url.render_as_string(hide_password=False), "plot", "drift", "fill_fraction", "--apparatus", "bench-a", "--monitor", "room_temp", "--out", str(out)])
    assert result.exit_code == 0, result.output
    svg = out.read_text(encoding="utf-8")
    assert "new coil supply" in svg and "room_temp" in svg
