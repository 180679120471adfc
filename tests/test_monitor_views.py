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
