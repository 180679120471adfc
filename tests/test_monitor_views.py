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
