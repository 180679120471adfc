"""Dates at the calendar's edges: a catalogue written before the time window existed may
hold shots on 9999-12-31 or in the year 1. Filters, drift, alarms and the dashboard pages
must answer about them, never raise ``OverflowError``. On both backends."""

from __future__ import annotations

import datetime as dt

import pyarrow as pa
import pytest

from conftest import shot_table, write_table
from runlog.config import Mapping
from runlog.times import TimeWindow, day_start_utc, shift_day

UTC = dt.timezone.utc
LAST = dt.datetime(9999, 12, 31, 23, 0, tzinfo=UTC)
FIRST = dt.datetime(1, 1, 2, 1, 0, tzinfo=UTC)


def _unchecked_window() -> TimeWindow:
    # What a runlog without [time_window] accepted: anything Python's calendar holds.
    window = object.__new__(TimeWindow)
    object.__setattr__(window, "earliest", dt.datetime(1, 1, 1, tzinfo=UTC))
    object.__setattr__(window, "latest", dt.datetime.max.replace(tzinfo=UTC))
    return window


def _edge_files(tmp_path):
    files = []
    for key, start in (("last-day", LAST), ("first-year", FIRST)):
        table = shot_table({key: 3})
        times = pa.array([start + dt.timedelta(seconds=i) for i in range(3)], pa.timestamp("us", tz="UTC"))
        files.append(write_table(tmp_path / f"{key}.parquet", table.set_column(table.schema.get_field_index("time"), "time", times)))
    files.append(write_table(tmp_path / "ordinary.parquet", shot_table({"ordinary": 4})))
    return files


@pytest.fixture
def edges(catalogue, tmp_path):
    """The catalogue with whatever of the edge files its backend could store."""
    results = catalogue.ingest(_edge_files(tmp_path), config=Mapping(time_window=_unchecked_window()))
    # None of them may stop the command; PostgreSQL cannot hold a month partition ending in
    # the year 10000 and refuses that file on its own.
    assert results[-1].status == "ingested"
    stored = {r.runs[0]: r.status == "ingested" for r in results if r.runs}
    return catalogue, stored


def test_the_window_refuses_what_an_older_runlog_let_in(catalogue, tmp_path):
    results = catalogue.ingest(_edge_files(tmp_path))
    assert [r.status for r in results] == ["refused", "refused", "ingested"]


def test_date_filters_at_the_calendar_edges(edges):
    catalogue, stored = edges
    last = 3 if stored.get("last-day") else 0
    first = 3 if stored.get("first-year") else 0
    cases = {
        "date = '9999-12-31'": last,
        "date != '9999-12-31'": first + 4,
        "date >= '9999-12-31'": last,
        "date > '9999-12-31'": 0,
        "date <= '9999-12-31'": last + first + 4,
        "date in ('9999-12-31', '0001-01-01')": last,
        "date = '0001-01-01'": 0,
        "date = '0001-01-02'": first,
        "date < '0001-01-02'": 0,
        "date between '0001-01-01' and '9999-12-31'": last + first + 4,
        "time >= '9999-12-31T00:00'": last,
    }
    for where, expected in cases.items():
        assert len(catalogue.select(where)) == expected, where


def test_drift_and_alarms_at_the_calendar_edges(edges):
    catalogue, stored = edges
    catalogue.check_drift()
    result = catalogue.drift("fill_fraction", apparatus="bench-a")
    days = [p.date for p in result.points]
    if stored.get("last-day"):
        assert dt.date(9999, 12, 31) in days
    assert isinstance(catalogue.alarms(), list)
    assert catalogue.drift("fill_fraction", apparatus="bench-a", since="9999-12-31", until="9999-12-31").points == ([p for p in result.points if p.date == dt.date(9999, 12, 31)] or [])


def test_dashboard_pages_at_the_calendar_edges(edges, db_url, monkeypatch):
    from streamlit.testing.v1 import AppTest

    from runlog.dashboard import APP, URL_VARIABLE

    monkeypatch.setenv(URL_VARIABLE, db_url)
    at = AppTest.from_file(str(APP), default_timeout=60).run()
    assert not at.exception, at.exception
    for page in ("overview", "drift", "shots"):
        at.switch_page(f"views/{page}.py").run()
        assert not at.exception, (page, [e.message for e in at.exception])


def test_day_helpers_never_overflow():
    assert shift_day(dt.date(9999, 12, 31), 1) == dt.date.max
    assert shift_day(dt.date(1, 1, 1), -1) == dt.date.min
    assert day_start_utc(dt.date(9999, 12, 31), days=1) == dt.datetime.max.replace(tzinfo=UTC)
    from zoneinfo import ZoneInfo

    assert day_start_utc(dt.date(1, 1, 1), ZoneInfo("Asia/Tokyo")) == dt.datetime.min.replace(tzinfo=UTC)
    assert day_start_utc(dt.date(2026, 3, 29), ZoneInfo("Europe/Berlin"), 1) == dt.datetime(2026, 3, 29, 22, 0, tzinfo=UTC)
