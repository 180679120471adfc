"""The catalogue's short lists (apparatus, lab days, sequences, figure names and units), on
SQLite and PostgreSQL, against what the full tables they replace give.

These lists feed pickers (the dashboard's drift page first): each asks the database for
distinct values only. Every check compares a list with the same list read the old way,
from every row of ``Catalogue.runs()`` or ``Catalogue.figures()``, and with the values
worked out by hand from the scenario the test writes (no published source: the expected
values are ours, from the times and names below).

Also here: the DataFrame reads build their frames from plain tuples, and give the very
frames pandas built from the database's row objects before.
"""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

import pandas as pd
import pytest

import runlog
import runlog.catalogue
from runlog import Figure, NotFoundError
from runlog.store import schema as s

from conftest import shot_table

UTC = dt.timezone.utc
NEW_YORK = "America/New_York"  # UTC-5 in these days of March 2026 (summer time starts on the 8th)

# (apparatus, sequence, first shot time in UTC, runs); every run has 10 shots, 2 s apart.
SCENARIO = [
    ("bench-a", "loading", dt.datetime(2026, 3, 2, 23, 50, tzinfo=UTC), {"a1": 10, "a2": 10}),
    ("bench-a", "Ramsey", dt.datetime(2026, 3, 3, 4, 30, tzinfo=UTC), {"a3": 10}),
    ("bench-a", "loading", dt.datetime(2026, 3, 5, 12, 0, tzinfo=UTC), {"a4": 10}),
    ("bench-b", "loading", dt.datetime(2026, 3, 4, 2, 0, tzinfo=UTC), {"b1": 10}),
]
# Worked out by hand from the times above: a2 starts 20 s after a1, still on 2 March.
DAYS_UTC = {"bench-a": [dt.date(2026, 3, 5), dt.date(2026, 3, 3), dt.date(2026, 3, 2)], "bench-b": [dt.date(2026, 3, 4)]}
# In New York a3 (04:30 UTC) started at 23:30 on 2 March and b1 (02:00 UTC) at 21:00 on 3 March.
DAYS_NEW_YORK = {"bench-a": [dt.date(2026, 3, 5), dt.date(2026, 3, 2)], "bench-b": [dt.date(2026, 3, 3)]}


def _fill(catalogue, make_file) -> None:
    files = [make_file(table=shot_table(runs, apparatus=apparatus, sequence=sequence, start=start, seed=index)) for index, (apparatus, sequence, start, runs) in enumerate(SCENARIO)]
    results = catalogue.ingest(files)
    assert [r.status for r in results] == ["ingested"] * len(SCENARIO)
    # One name in two units, by two sequences: fringe phase in degrees, Ramsey phase in radians.
    catalogue.save_figures("a1", "fringe", [Figure("fringe_phase", 30.0, "deg", stderr=1.0, method="least-squares")])
    catalogue.save_figures("a3", "coherence", [Figure("ramsey_phase", 0.5, "rad", stderr=0.1, method="least-squares"), Figure("t2_star", 650.0, "us", stderr=40.0, method="least-squares")])


def _old_lab_days(catalogue, apparatus: str | None) -> list[dt.date]:
    """Lab days as the dashboard found them before: every run's start in the lab time zone."""
    started = catalogue.runs(apparatus=apparatus)["started"]
    local = pd.to_datetime(started, utc=True).dt.tz_convert(ZoneInfo(catalogue.lab_timezone))
    return sorted(local.dt.date.unique().tolist(), reverse=True)


def _old_figure_units(catalogue, apparatus: str | None) -> pd.DataFrame:
    rows = catalogue.figures(apparatus=apparatus)[["name", "unit", "sequence"]].drop_duplicates()
    return rows.sort_values(["name", "unit", "sequence"]).reset_index(drop=True)


def test_apparatus_and_sequences_equal_those_of_every_run(catalogue, make_file):
    _fill(catalogue, make_file)
    every_run = catalogue.runs()
    assert catalogue.apparatus_names() == sorted(every_run["apparatus"].unique()) == ["bench-a", "bench-b"]
    # Sorted as Python sorts text (capitals first), whatever the database's collation.
    assert catalogue.sequences() == sorted(every_run["sequence"].unique()) == ["Ramsey", "loading"]
    for apparatus in ("bench-a", "bench-b"):
        assert catalogue.sequences(apparatus=apparatus) == sorted(catalogue.runs(apparatus=apparatus)["sequence"].unique())
    assert catalogue.sequences(apparatus="bench-b") == ["loading"]

    # An apparatus row without runs is not offered, as it was not among the runs before.
    with catalogue.engine.begin() as connection:
        connection.execute(s.Apparatus.__table__.insert(), {"name": "bench-c"})
    assert catalogue.apparatus_names() == ["bench-a", "bench-b"]
    assert catalogue.sequences(apparatus="bench-c") == [] and catalogue.lab_days(apparatus="bench-c") == []


def test_lab_days_follow_the_lab_time_zone_as_the_run_starts_do(catalogue, make_file):
    _fill(catalogue, make_file)
    for apparatus, days in DAYS_UTC.items():
        assert catalogue.lab_days(apparatus=apparatus) == _old_lab_days(catalogue, apparatus) == days
    assert catalogue.lab_days() == _old_lab_days(catalogue, None) == sorted(set(sum(DAYS_UTC.values(), [])), reverse=True)
    assert all(type(day) is dt.date for day in catalogue.lab_days())

    catalogue.set_lab_timezone(NEW_YORK)
    for apparatus, days in DAYS_NEW_YORK.items():
        assert catalogue.lab_days(apparatus=apparatus) == _old_lab_days(catalogue, apparatus) == days
    assert catalogue.lab_days() == _old_lab_days(catalogue, None) == [dt.date(2026, 3, 5), dt.date(2026, 3, 3), dt.date(2026, 3, 2)]


def test_figure_names_and_units_equal_those_of_every_figure_row(catalogue, make_file):
    _fill(catalogue, make_file)
    every_figure = catalogue.figures()
    assert catalogue.figure_names() == sorted(every_figure["name"].unique()) == ["fill_fraction", "fringe_phase", "loss", "ramsey_phase", "survival", "t2_star"]
    assert catalogue.figure_names(apparatus="bench-a") == sorted(catalogue.figures(apparatus="bench-a")["name"].unique())
    assert catalogue.figure_names(apparatus="bench-b") == sorted(catalogue.figures(apparatus="bench-b")["name"].unique()) == ["fill_fraction", "loss", "survival"]

    for apparatus in (None, "bench-a", "bench-b"):
        pd.testing.assert_frame_equal(catalogue.figure_units(apparatus=apparatus), _old_figure_units(catalogue, apparatus))
    units = catalogue.figure_units(apparatus="bench-a")
    assert list(units.columns) == ["name", "unit", "sequence"]
    assert units.query("name == 'fringe_phase'")[["unit", "sequence"]].values.tolist() == [["deg", "loading"]]
    assert units.query("name == 't2_star'")[["unit", "sequence"]].values.tolist() == [["us", "Ramsey"]]
    assert units.query("name == 'fill_fraction'")[["unit", "sequence"]].values.tolist() == [["", "Ramsey"], ["", "loading"]]


def test_an_empty_catalogue_has_empty_lists(catalogue):
    assert catalogue.apparatus_names() == [] and catalogue.lab_days() == [] and catalogue.sequences() == []
    assert catalogue.figure_names() == []
    units = catalogue.figure_units()
    assert units.empty and list(units.columns) == ["name", "unit", "sequence"]


def test_an_unknown_apparatus_is_named_with_the_close_ones(catalogue, make_file):
    _fill(catalogue, make_file)
    for ask in (catalogue.lab_days, catalogue.sequences, catalogue.figure_names, catalogue.figure_units):
        with pytest.raises(NotFoundError) as raised:
            ask(apparatus="bench-aa")
        assert str(raised.value) == "no apparatus 'bench-aa' (did you mean 'bench-a', 'bench-b'?)"


def test_frames_built_from_tuples_equal_those_built_from_the_rows(catalogue, make_file, monkeypatch):
    _fill(catalogue, make_file)
    catalogue.annotate("moved the imaging lens", run="a1")
    catalogue.annotate("oven refilled", apparatus="bench-b", at=dt.datetime(2026, 3, 4, 8, 0, tzinfo=UTC))

    def reads():
        return {
            "runs": catalogue.runs(),
            "figures": catalogue.figures(),
            "parameters": catalogue.parameters(),
            "annotations": catalogue.annotations(),
            "ingest_log": catalogue.ingest_log(),
            "shots": catalogue.shots("a3"),
            "figure_units": catalogue.figure_units(),
        }

    now = reads()

    def from_rows(rows, columns, **options):  # how the frames were built before
        return pd.DataFrame(rows, columns=columns, **options)

    monkeypatch.setattr(runlog.catalogue, "_frame", from_rows)
    before = reads()
    for name, frame in now.items():
        assert len(frame), name  # every read has rows to compare
        pd.testing.assert_frame_equal(frame, before[name], obj=name)
    assert now["runs"]["started"].dtype == "datetime64[us, UTC]" and now["figures"]["value"].dtype == "float64"
