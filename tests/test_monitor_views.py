"""Monitors on the dashboard's pages (AppTest, both backends): each run's monitors over its
span, the drift page's overlay in lab time with notes marked, the overview's monitor list."""

from __future__ import annotations

import datetime as dt

import pyarrow.parquet as pq
import pytest

import runlog
from runlog.dashboard import URL_VARIABLE

from test_dashboard import _forget_cached, charts, open_page, start, table
from test_monitor_suspects import _scenario


@pytest.fixture
def monitored(db_url, tmp_path, monkeypatch):
    """The monitor scenario (room temperature step three hours before a fill-fraction
    drop) with its lab in Berlin, handed to the app."""
    with runlog.open(db_url) as catalogue:
        results = catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
        assert [r.status for r in results] == ["ingested", "ingested"]
        catalogue.set_lab_timezone("Europe/Berlin")
    monkeypatch.setenv(URL_VARIABLE, db_url)
    with runlog.open(db_url) as opened:
        yield opened, tmp_path
    _forget_cached(db_url)


def test_run_page_lists_each_monitor_over_the_run(monitored):
    catalogue, tmp_path = monitored
    at = open_page(start(), "run_detail")
    assert not at.exception, at.exception
    shown = table(at, "monitor", "mean", "min", "max", "values", "at start").set_index("monitor")
    apparatus = at.selectbox(key="run-apparatus").value
    run = at.query_params["run"] if isinstance(at.query_params["run"], str) else at.query_params["run"][0]
    expected = {m["name"]: m for m in catalogue.run(run, apparatus=apparatus).monitors}
    assert sorted(shown.index) == sorted(expected)
    for name, entry in expected.items():
        assert shown.loc[name, "mean"] == entry["mean"] and shown.loc[name, "values"] == entry["count"]
        assert (shown.loc[name, "min"], shown.loc[name, "max"]) == (entry["minimum"], entry["maximum"])
    assert shown.loc["room_temp", "unit"] in ("degC", "°C")


def test_drift_page_overlays_chosen_monitors_in_lab_time_beside_the_notes(monitored):
    catalogue, _ = monitored
    # A note at 09:30 UTC on the day of the fill change: 11:30 in Berlin (CEST).
    catalogue.annotate("realigned the MOT beams", apparatus="bench-a", at="2026-05-04T09:30:00+00:00")
    at = open_page(start(), "drift")
    at.multiselect(key="drift-quantities-bench-a").set_value(["fill_fraction"]).run()
    at.multiselect(key="drift-monitors-bench-a").set_value(["room_temp"]).run()
    assert not at.exception, at.exception
    (chart,) = [c for c in charts(at) if c["spec"].get("title", {}).get("text", "").startswith("fill fraction")]
    spec = chart["spec"]
    assert spec["resolve"] == {"scale": {"y": "independent"}}
    # The layers are nested: find the monitor's line and the notes by their descriptions.
    found = {}

    def walk(node):
        for layer in node.get("layer", []):
            if "description" in layer:
                found[layer["description"]] = layer
            walk(layer)

    walk(spec)
    assert {"monitor room_temp", "monitor range room_temp", "notes", "daily values"} <= set(found)
    assert found["monitor room_temp"]["encoding"]["y"]["axis"]["orient"] == "right"
    datasets = {}
    for element in at.get("vega_lite_chart"):
        for d in element.proto.datasets:
            import pyarrow as pa

            datasets[d.name] = pa.ipc.open_stream(d.data.data).read_all().to_pandas()
    monitor = next(frame for frame in datasets.values() if "mean" in frame.columns and "count" in frame.columns)
    expected = catalogue.monitor_series("room_temp", apparatus="bench-a", max_points=2000)
    assert len(monitor) == len(expected)
    # The room's step (06:00 UTC) is drawn at 08:00, the lab's wall-clock time in Berlin.
    first_warm = monitor[monitor["mean"] > 22.0]["when"].iloc[0]
    assert str(first_warm).startswith("2026-05-04T08:00")
    notes = next(frame for frame in datasets.values() if "text" in frame.columns and "local_time" in frame.columns)
    assert list(notes["when"]) == ["2026-05-04T11:30:00Z"]
    assert any("Right axis: room_temp" in c.value for c in at.caption)


def test_overview_lists_monitors_and_warns_of_one_that_stopped_reporting(db_url, tmp_path, monkeypatch):
    """Two monitors logged every 30 s up to now, one of which went silent three hours ago:
    the overview lists both with their latest values and warns of the silent one only."""
    import numpy as np
    import pyarrow as pa

    now = dt.datetime.now(dt.timezone.utc).replace(microsecond=0)
    times = [now - dt.timedelta(hours=6) + dt.timedelta(seconds=30 * i) for i in range(6 * 120)]
    alive = 21.0 + 0.01 * np.arange(len(times))
    quiet = [t <= now - dt.timedelta(hours=3) for t in times]
    table = pa.table(
        {
            "time": pa.array(times, pa.timestamp("us", tz="UTC")),
            "room_temp[degC]": alive,
            "water_temp[degC]": pa.array([18.0 if q else None for q in quiet], pa.float64()),
        }
    )
    pq.write_table(table, tmp_path / "fresh.parquet")
    with runlog.open(db_url) as catalogue:
        catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
        assert catalogue.ingest(tmp_path / "fresh.parquet", apparatus="bench-b")[0].status == "ingested"
    monkeypatch.setenv(URL_VARIABLE, db_url)
    try:
        at = start()
        shown = table_of(at).set_index(["apparatus", "monitor"])
        assert shown.loc[("bench-b", "room_temp"), "latest"] == pytest.approx(alive[-1])
        assert shown.loc[("bench-b", "room_temp"), "state"] == "reporting"
        assert shown.loc[("bench-b", "water_temp"), "state"] == "stopped reporting"
        assert shown.loc[("bench-b", "water_temp"), "usually every"] == "30 s"
        # The scenario's monitors of May 2026 stopped long ago.
        assert shown.loc[("bench-a", "room_temp"), "state"] == "stopped reporting"
        warnings = [w.value for w in at.warning]
        assert any(w.startswith("bench-b · monitor water_temp stopped reporting: nothing for 3.0 h, usually every 30 s") for w in warnings), warnings
        assert not any("bench-b · monitor room_temp" in w for w in warnings)
    finally:
        _forget_cached(db_url)


def table_of(at):
    return table(at, "monitor", "latest", "usually every", "state")


def test_digest_lists_monitors_at_the_end_of_the_day_and_warns_of_a_silent_one(catalogue, tmp_path):
    import json

    import pyarrow as pa
    from click.testing import CliRunner

    from runlog.cli import cli
    from runlog.digest import build_digest, digest_html, digest_text

    catalogue.ingest(list(_scenario(tmp_path)), apparatus="bench-a")
    start_at = dt.datetime(2026, 5, 1, tzinfo=dt.timezone.utc)
    times = [start_at + dt.timedelta(seconds=60 * i) for i in range(int(2.5 * 24 * 60))]  # to 05-03 12:00
    pq.write_table(pa.table({"time": pa.array(times, pa.timestamp("us", tz="UTC")), "ion_pump[uA]": [0.5] * len(times)}), tmp_path / "pump.parquet")
    assert catalogue.ingest(tmp_path / "pump.parquet", apparatus="bench-a")[0].status == "ingested"

    calm = build_digest(catalogue, day=dt.date(2026, 5, 2))
    (entry,) = calm["apparatus"]
    assert {m["name"]: m["stopped_reporting"] for m in entry["monitors"]} == {"ion_pump": False, "laser_power": False, "noise_walk": False, "noise_white": False, "room_temp": False}
    assert "WARNING: monitor" not in digest_text(calm)

    found = build_digest(catalogue, day=dt.date(2026, 5, 3))
    assert found["monitors_as_of"] == "2026-05-04T00:00:00+00:00"
    by_name = {m["name"]: m for m in found["apparatus"][0]["monitors"]}
    assert by_name["ion_pump"]["stopped_reporting"] and by_name["ion_pump"]["interval_seconds"] == 60
    assert by_name["ion_pump"]["latest_value"] == 0.5 and by_name["ion_pump"]["latest_time"] == "2026-05-03T11:59:00+00:00"
    assert not by_name["room_temp"]["stopped_reporting"]
    text = digest_text(found)
    assert "  WARNING: monitor ion_pump stopped reporting: nothing for 12.0 h, usually every 60 s (last at 2026-05-03 11:59)" in text.splitlines()
    assert "    room_temp: " in text and "degC at 2026-05-04 00:00:00 (every 60 s)" in text
    page = digest_html(found)
    assert "<p class='warn'>monitor ion_pump stopped reporting" in page and "<td>ion_pump</td><td>0.5</td><td>uA</td>" in page
    url = catalogue.engine.url.render_as_string(hide_password=False)
    shown = CliRunner().invoke(cli, ["--db", url, "digest", "--day", "2026-05-03", "--json"])
    assert shown.exit_code == 0, shown.output
    assert json.loads(shown.output)["apparatus"][0]["monitors"] == json.loads(json.dumps(found["apparatus"][0]["monitors"]))
