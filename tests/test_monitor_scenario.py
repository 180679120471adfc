"""The issue's "done when" walked on a scenario of our own, different from the one in
test_monitor_suspects: a lab in New York whose slow-control logger writes a long-form CSV
in kelvin every ~45 s (jittered); the room warms by 2.5 K five hours before the fill
fraction drops; a laser power steps thirty hours before it (outside any lag tried, with no
effect); humidity is noise. Checked on both backends: the room temperature is the top
suspect at the right lag and the laser power is not; the monitor's values at the shots'
times, in filters and in the shots table, equal a pandas ``merge_asof`` reference; each
run's monitors over its span; the monitor list."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from runlog.selection import select_shots

from test_monitor_suspects import write_shots

UTC = dt.timezone.utc
START = dt.datetime(2026, 10, 5, 4, 0, tzinfo=UTC)
CHANGE = dt.datetime(2026, 10, 9, 18, 0, tzinfo=UTC)
LEAD_HOURS = 5.0


def _scenario(tmp_path, seed=41):
    rng = np.random.default_rng(seed)
    keys, shot, times, load = [], [], [], []
    for r in range(8 * 72):  # a run every 20 minutes for 8 days
        begin = START + dt.timedelta(minutes=20 * r)
        p = 0.55 if begin < CHANGE else 0.42
        for i in range(8):
            keys.append(f"ny-{r:04d}")
            shot.append(i)
            times.append(begin + dt.timedelta(seconds=15 * i))
            load.append(rng.random(100) < p)
    write_shots(tmp_path / "shots.parquet", keys, shot, times, load, apparatus="tweezer-ny", sequence="load")
    # The logger: every 45 s +- 5 s, all three monitors on each line, long form, kelvin.
    seconds = np.cumsum(rng.uniform(40, 50, int(8 * 86400 / 45)))
    logged = pd.to_datetime(int(START.timestamp()) + seconds, unit="s", utc=True).round("ms")
    since_change = seconds - (CHANGE - START).total_seconds()
    values = {
        "room_temp": 294.65 + 2.5 * (since_change >= -LEAD_HOURS * 3600) + 0.04 * rng.standard_normal(seconds.size),
        "laser_power": 35.0 + 3.0 * (since_change >= -30 * 3600) + 0.1 * rng.standard_normal(seconds.size),
        "humidity": 40.0 + rng.standard_normal(seconds.size),
    }
    units = {"room_temp": "K", "laser_power": "mW", "humidity": "percent"}
    rows = pd.concat([pd.DataFrame({"time": logged.strftime("%Y-%m-%dT%H:%M:%S.%f%z"), "apparatus": "tweezer-ny", "monitor": name, "value": v, "unit": units[name]}) for name, v in values.items()])
    rows = rows.sample(frac=1.0, random_state=3)  # out of order, as the contract allows
    rows.to_csv(tmp_path / "slow-control.csv", index=False)
    reference = pd.DataFrame({"time": logged, **values})
    return tmp_path / "shots.parquet", tmp_path / "slow-control.csv", reference


@pytest.fixture
def lab(catalogue, tmp_path):
    shots, log, reference = _scenario(tmp_path)
    catalogue.set_lab_timezone("America/New_York")
    results = catalogue.ingest([shots, log])
    assert [r.status for r in results] == ["ingested", "ingested"], [r.reason for r in results]
    return catalogue, reference


def _as_of(frame: pd.DataFrame, reference: pd.DataFrame, column: str) -> np.ndarray:
    left = pd.DataFrame({"time": pd.to_datetime(frame["time"], utc=True).astype("datetime64[ns, UTC]"), "row": np.arange(len(frame))}).sort_values("time")
    right = reference[["time", column]].astype({"time": "datetime64[ns, UTC]"}).sort_values("time")
    joined = pd.merge_asof(left, right, on="time", direction="backward", tolerance=pd.Timedelta(seconds=600))
    return joined.sort_values("row")[column].to_numpy()


def test_room_temperature_leads_the_fill_change_and_the_laser_power_does_not(lab):
    catalogue, _ = lab
    found = catalogue.suspects("fill_fraction", CHANGE.astimezone(dt.timezone(dt.timedelta(hours=-4))).date(), apparatus="tweezer-ny", top=20)
    monitors = [c for c in found["causes"] if c["kind"] == "monitor"]
    assert monitors[0]["name"] == "room_temp" and monitors[0]["significant"]
    assert monitors[0]["lag_hours"] == pytest.approx(LEAD_HOURS, abs=0.5)
    by_name = {c["name"]: c for c in monitors}
    assert not by_name["humidity"]["significant"]
    names = [c["name"] for c in found["causes"]]
    assert names.index("room_temp") < names.index("laser_power")
    assert abs(by_name["room_temp"]["standardised_change"]) > 3 * abs(by_name["laser_power"]["standardised_change"])


def test_filters_and_shot_columns_equal_merge_asof(lab):
    catalogue, reference = lab
    everything = select_shots(catalogue, monitors=["room_temp", "laser_power"])
    expected = _as_of(everything, reference, "room_temp")
    # Logged all along, every 45 s: only the shots before the first value have none.
    assert np.isnan(expected).sum() == (pd.to_datetime(everything["time"], utc=True) < reference["time"].min()).sum() > 0
    for name in ("room_temp", "laser_power"):
        ours, theirs = everything[f"monitor.{name}"].to_numpy(), _as_of(everything, reference, name)
        np.testing.assert_array_equal(np.isnan(ours), np.isnan(theirs))
        np.testing.assert_allclose(ours[~np.isnan(ours)], theirs[~np.isnan(theirs)], rtol=0, atol=1e-9)
    assert everything.attrs["units"]["monitor.room_temp"] == "K"
    keys = list(zip(everything["run"], everything["shot"]))
    for text, keep in (
        ("room_temp > 23 degC", expected > 296.15),
        ("room_temp > 296.15 K", expected > 296.15),
        ("room_temp <= 73 degF and shot < 4", (expected <= (73 - 32) * 5 / 9 + 273.15) & (everything["shot"].to_numpy() < 4)),
        ("not room_temp between 295 K and 296.5 K", ~((expected >= 295) & (expected <= 296.5))),
    ):
        found = select_shots(catalogue, text)
        assert set(zip(found["run"], found["shot"])) == {k for k, k_keep in zip(keys, keep) if k_keep}, text
    # The warm shots are those from five hours before the change on.
    warm = select_shots(catalogue, "room_temp > 23 degC")
    first = pd.to_datetime(warm["time"], utc=True).min()
    assert abs((first - (CHANGE - dt.timedelta(hours=LEAD_HOURS))).total_seconds()) < 20 * 60


def test_runs_carry_their_monitors_and_the_list_knows_when_they_stopped(lab):
    catalogue, reference = lab
    step = CHANGE - dt.timedelta(hours=LEAD_HOURS)
    # The run across the room's step: its range spans the step.
    runs = catalogue.runs(apparatus="tweezer-ny")
    across = runs[(pd.to_datetime(runs["started"], utc=True) <= step) & (pd.to_datetime(runs["finished"], utc=True) >= step)]
    key = across["run"].iloc[0] if len(across) else runs[pd.to_datetime(runs["started"], utc=True) > step]["run"].iloc[0]
    info = catalogue.run(key, apparatus="tweezer-ny")
    room = next(m for m in info.monitors if m["name"] == "room_temp")
    inside = reference[(reference["time"] >= info.started) & (reference["time"] <= info.finished)]["room_temp"]
    assert room["count"] == len(inside) and room["mean"] == pytest.approx(inside.mean(), rel=1e-12)
    assert (room["minimum"], room["maximum"]) == (inside.min(), inside.max())
    last = reference["time"].max().to_pydatetime()
    fresh = {m["name"]: m for m in catalogue.monitors(now=last + dt.timedelta(minutes=20))}
    assert not any(m["stopped_reporting"] for m in fresh.values())
    assert fresh["room_temp"]["interval_seconds"] == pytest.approx(45, abs=3)
    assert fresh["room_temp"]["latest_value"] == reference["room_temp"].iloc[-1]
    assert all(m["stopped_reporting"] for m in catalogue.monitors(now=last + dt.timedelta(hours=2)))
