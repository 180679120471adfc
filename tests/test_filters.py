"""The filter language: grammar, refusals, units, the two-layer parameter rule, and a
property test against a pandas evaluation of the same filters (SQLite and PostgreSQL).

The meaning checked here is the one documented in docs/filters.md (our own language; no
outside source): a shot lacking a value never matches a comparison on it, ``not``
negates a whole comparison, ``tag`` compares each of the run's tags, ``date`` is the lab
day of the shot in the catalogue's lab time zone, a number with a unit is converted to the
stored unit and rounded to 15 significant digits.
"""

from __future__ import annotations

import datetime as dt
import math
from functools import reduce

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st
from sqlalchemy import func, select

from conftest import BACKENDS, _fresh_postgres_database
from runlog.errors import FilterError
from runlog.filters import MAX_DEPTH, MAX_LENGTH, And, Comparison, Not, Or, Value, compile_filter, known_names, parse
from runlog.selection import select_arrow, select_shots
from runlog.store import schema as s

LAB_ZONE = "Europe/Berlin"  # UTC+1 in early March: lab days start at 23:00 UTC
# Shots of run e1 straddle 23:00 UTC, so the lab day changes inside a run.
E1_START = dt.datetime(2026, 3, 2, 22, 54, tzinfo=dt.timezone.utc)


def _run_rows(apparatus: str, run: str, sequence: str, start: dt.datetime, count: int, *, operator=None, tags=None, status=None, **columns) -> dict[str, list]:
    rows: dict[str, list] = {
        "run": [run] * count,
        "apparatus": [apparatus] * count,
        "sequence": [sequence] * count,
        "shot": list(range(count)),
        "time": [start + dt.timedelta(minutes=2 * i) for i in range(count)],
        "operator": [operator] * count,
        "tags": [tags] * count,
        "status": status or ["ok"] * count,
    }
    for name, values in columns.items():
        rows[name] = values if isinstance(values, list) else [values] * count
    return rows


def _table(runs: list[dict[str, list]], sites: int = 9, seed: int = 3) -> pa.Table:
    names = ["run", "apparatus", "sequence", "shot", "time", "operator", "tags", "status", "p.wait[us]", "p.depth[uK]", "p.beam", "p.flag", "m.atom_number", "m.signal[mV]"]
    merged: dict[str, list] = {name: [] for name in names}
    for rows in runs:
        count = len(rows["run"])
        for name in names:
            merged[name] += rows.get(name, [None] * count)
    n = len(merged["run"])
    rng = np.random.default_rng(seed)
    load = rng.random((n, sites)) < 0.55
    kept = load & (rng.random((n, sites)) < 0.9)
    types = {
        "shot": pa.int64(),
        "time": pa.timestamp("us", tz="UTC"),
        "p.wait[us]": pa.float64(),
        "p.depth[uK]": pa.float64(),
        "p.beam": pa.string(),
        "p.flag": pa.bool_(),
        "m.atom_number": pa.float64(),
        "m.signal[mV]": pa.float64(),
    }
    columns = {name: pa.array(values, types.get(name, pa.string())) for name, values in merged.items()}
    columns["occ.load"] = pa.array(list(load), pa.list_(pa.bool_()))
    columns["occ.survive"] = pa.array(list(kept), pa.list_(pa.bool_()))
    return pa.table(columns)


def lab_tables() -> list[pa.Table]:
    """Two files, two apparatus, runs chosen so every storage case occurs: a scanned
    parameter, one constant, one scanned with shots lacking it, one absent from a run,
    a scanned text and a scanned true/false parameter, a run key on both apparatus."""
    day = dt.datetime(2026, 3, 3, 9, 0, tzinfo=dt.timezone.utc)
    east = [
        _run_rows("east", "e1", "ramsey", E1_START, 8, operator="ana", tags="calibration,daily",
                  **{"p.wait[us]": [0.0, 10, 20, 30, 40, 50, 60, 70], "p.depth[uK]": 60.0, "p.beam": "vertical", "p.flag": True,
                     "m.atom_number": [20.0, 31, 35, 42, 50, 27, 33, 48], "m.signal[mV]": [1.0, 1.5, 2.5, 2.0, 3.5, 4.0, 0.5, 2.5]}),
        _run_rows("east", "e2", "loading", day, 6, tags="daily", status=["ok", "ok", "bad", "ok", "ok", "bad"],
                  **{"p.wait[us]": 100.0, "p.depth[uK]": 60.0, "p.beam": ["vertical", "horizontal", "vertical", "horizontal", "vertical", "vertical"],
                     "p.flag": [True, False, True, False, True, False], "m.atom_number": [35.0, None, 50, 20, None, 41]}),
        _run_rows("east", "e3", "ramsey", day + dt.timedelta(hours=2), 6, operator="ben",
                  **{"p.wait[us]": [10.0, None, 30, None, 50, 60], "p.depth[uK]": 80.0, "m.atom_number": [22.0, 35, 29, 50, 44, 38]}),
        _run_rows("east", "x1", "loading", day + dt.timedelta(hours=4), 4, operator="ana",
                  **{"p.wait[us]": 200.0, "p.depth[uK]": 65.0, "p.beam": "horizontal", "m.atom_number": [30.0, 31, 32, 33]}),
    ]
    west = [
        _run_rows("west", "w1", "loading", day + dt.timedelta(days=1), 7, operator="ana", tags="calibration",
                  **{"p.depth[uK]": 60.0, "p.beam": "horizontal", "m.signal[mV]": [2.0, 2.5, 3.0, 3.5, 4.0, 4.5, 5.0], "m.atom_number": [40.0, 41, 42, 43, 44, 45, 46]}),
        _run_rows("west", "x1", "loading", day + dt.timedelta(days=1, hours=3), 5,
                  **{"p.wait[us]": 200.0, "p.depth[uK]": [50.0, 55, 60, 65, 70], "p.beam": "vertical", "p.flag": False, "m.atom_number": [25.0, 30, 35, 40, 45]}),
    ]
    return [_table(east, seed=3), _table(west, seed=4)]


@pytest.fixture(scope="module", params=BACKENDS)
def lab(request, tmp_path_factory):
    """The lab catalogue, built once per backend; the tests using it only read."""
    import pyarrow.parquet as pq

    import runlog

    folder = tmp_path_factory.mktemp("lab")
    drop = None
    if request.param == "sqlite":
        url = f"sqlite:///{folder / 'catalogue.sqlite'}"
    else:
        url, drop = _fresh_postgres_database(request.getfixturevalue("postgres_url"))
    catalogue = runlog.open(url)
    try:
        catalogue.set_lab_timezone(LAB_ZONE)
        paths = []
        for i, table in enumerate(lab_tables()):
            path = folder / f"lab{i}.parquet"
            pq.write_table(table, path)
            paths.append(path)
        results = catalogue.ingest(paths)
        assert [r.status for r in results] == ["ingested", "ingested"], [r.reason for r in results]
        yield catalogue
    finally:
        catalogue.close()
        if drop is not None:
            drop()


def _keys(frame: pd.DataFrame) -> set[tuple[str, str, int]]:
    return {(a, r, int(n)) for a, r, n in zip(frame["apparatus"], frame["run"], frame["shot"])}


# --- the grammar, without a catalogue -------------------------------------------------


def test_parse_builds_the_tree():
    text = "apparatus = 'east' and (wait between 100 us and 0.5 ms or not beam in ('a', 'b''c')) and flag != TRUE"
    at = text.index
    assert parse(text) == And((
        Comparison("apparatus", "=", (Value("east", None, at("'east'")),), 0),
        Or((
            Comparison("wait", "between", (Value(100.0, "us", at("100")), Value(0.5, "ms", at("0.5"))), at("wait")),
            Not(Comparison("beam", "in", (Value("a", None, at("'a'")), Value("b'c", None, at("'b''c'"))), at("beam"))),
        )),
        Comparison("flag", "!=", (Value(True, None, at("TRUE")),), at("flag")),
    ))


def test_parse_round_trips_through_text():
    text = "x1 >= -1.5e-3 mW or \"p.beam power\" not in (1, 2) and not (tag = 'it''s')"
    tree = parse(text)
    assert parse(str(tree)) == parse(str(parse(str(tree))))
    assert str(tree) == "x1 >= -0.0015 mW or \"p.beam power\" not in (1.0, 2.0) and not (tag = 'it''s')"


def test_keywords_are_case_insensitive_and_names_may_start_with_them():
    text = "order = 1 AND not_ready = True Or android <> 2"
    at = text.index
    assert parse(text) == Or((
        And((Comparison("order", "=", (Value(1.0, None, at("1")),), 0), Comparison("not_ready", "=", (Value(True, None, at("True")),), at("not_ready")))),
        Comparison("android", "!=", (Value(2.0, None, at("2")),), at("android")),
    ))


@pytest.mark.parametrize(
    "text, message",
    [
        ("wait >", "filter, at position 6: expected a number, a 'quoted text', true or false, found the end of the filter"),
        ("wait between 1 or 2", "filter, at position 15: expected 'and', found 'or'"),
        ("wait = 1 us us", "filter, at position 12: expected 'and', 'or', ')' or ',', found 'us'"),
        ("(wait = 1", "filter, at position 9: expected ')', found the end of the filter"),
        ("wait in ()", "filter, at position 9: expected a number, a 'quoted text', true or false, found ')'"),
        ("beam = 'open", "filter, at position 7: expected a number, a 'quoted text', true or false, found an unclosed quote"),
        ("   ", "filter, at position 0: empty filter"),
        ("wait = 1e999", "filter, at position 7: number '1e999' is out of range"),
    ],
)
def test_parse_errors_say_where_and_what_was_expected(text, message):
    with pytest.raises(FilterError) as caught:
        parse(text)
    assert str(caught.value) == message
    assert caught.value.text == text


def test_length_and_depth_are_capped():
    with pytest.raises(FilterError) as caught:
        parse("wait = 1 or " * 200 + "wait = 2")
    assert str(caught.value) == f"filter, at position {MAX_LENGTH}: filter is 2408 characters long; at most {MAX_LENGTH} are accepted"
    with pytest.raises(FilterError) as caught:
        parse("(" * (MAX_DEPTH + 1) + "wait = 1" + ")" * (MAX_DEPTH + 1))
    assert str(caught.value) == f"filter, at position {MAX_DEPTH}: nested deeper than {MAX_DEPTH} levels"
    with pytest.raises(FilterError) as caught:
        parse("not " * 300 + "wait = 1")
    assert str(caught.value) == f"filter, at position 0: nested deeper than {MAX_DEPTH} levels"
    parse("(" * MAX_DEPTH + "wait = 1" + ")" * MAX_DEPTH)  # the cap itself is allowed


# Attempts to smuggle SQL or Python through a filter; each must be refused by the parser.
INJECTIONS = [
    "; drop table shots",
    "wait = 1; drop table shots",
    "' or 1=1 --",
    "run = '' or 1=1 --'",
    "run = 'x' -- comment",
    "wait = 1 /* comment */",
    "__import__('os').system('true')",
    "run = 'x' union select * from runs",
    "wait = (select 1)",
    "wait = 1 or exec('x')",
    "apparatus = \"east\"",  # a double-quoted name where a value belongs
    "wait ＝ 1",  # full-width equals sign
    "аpparatus = 'east'",  # Cyrillic а
    "wait = 1 оr run = 'x'",  # Cyrillic о in 'or'
    "run = 'x\x00'",
    "run = 'x'\x00; drop table shots",
    "wait = 1\u200b",  # zero-width space
    "wait = 1 or " * 300 + "wait = 2",
    "(" * 1000 + "wait = 1" + ")" * 1000,
    "not " * 400 + "wait = 1",
    "run = 'x' || 'y'",
    "run = ?",
    "run = :name",
    "wait = %(x)s",
]


# These parse (a number followed by a unit) and are refused when the unit is looked up.
INJECTIONS_REFUSED_AS_UNITS = ["wait = 0x10", "wait = 1e3e3", "wait = 1 union"]


@pytest.mark.parametrize("text", INJECTIONS, ids=range(len(INJECTIONS)))
def test_injection_attempts_are_refused_by_the_grammar(text):
    with pytest.raises(FilterError) as caught:
        parse(text)
    assert caught.value.position is not None


def test_injection_attempts_leave_the_catalogue_unchanged(lab):
    tables = [s.Shot, s.Run, s.RunParameter, s.ShotParameter, s.ShotMeasurements, s.Occupancy, s.FigureRow, s.Apparatus]

    def counts():
        with lab.engine.connect() as connection:
            return [connection.execute(select(func.count()).select_from(t)).scalar_one() for t in tables]

    before = counts()
    for text in INJECTIONS + INJECTIONS_REFUSED_AS_UNITS:
        with pytest.raises(FilterError):
            select_shots(lab, text)
    # Text values are bound, never spliced: quotes and SQL inside quotes are just text.
    for text in ["run = ''' or 1=1 --'", "beam = 'x''); drop table shots; --'", "operator in ('ana', '; delete from runs')"]:
        selected = select_shots(lab, text)
        assert len(selected) == (19 if "ana" in text else 0)  # ana ran e1, x1 (east) and w1
    # 36 shots in 6 runs; 19 run parameters; per-shot rows only for scanned parameters
    # of shots that have them (29); a measurement row for each shot measured (34).
    assert counts() == before == [36, 6, 19, 29, 34, 72, 18, 2]


# --- names, units and refusals against a catalogue ----------------------------------


def test_known_names(lab):
    assert known_names(lab) == {
        "fields": ["run", "apparatus", "sequence", "operator", "tag", "shot", "status", "time", "date"],
        "parameters": ["beam", "depth", "flag", "wait"],
        "measurements": ["atom_number", "signal"],
        "figures": ["fill_fraction", "loss", "survival"],
        "monitors": [],
    }


REFUSALS = [
    ("wiat > 5", "filter, at position 0: unknown name 'wiat'; did you mean 'wait', 'p.wait'?"),
    ("p.signal > 5", "filter, at position 0: unknown name 'p.signal'; did you mean 'm.signal', 'signal'?"),
    ("wait > 1 uK", "filter, at position 7: 'wait' is stored in 'us'; 'uK' is not a unit of the same dimension"),
    ("wait > 1 parsec_per_banana", "filter, at position 7: unknown unit 'parsec_per_banana'"),
    ("atom_number > 1 s", "filter, at position 14: 'atom_number' is stored in 'no unit'; 's' is not a unit of the same dimension"),
    ("shot > 1 s", "filter, at position 7: 'shot' has no unit: write the number alone, without 's'"),
    ("beam < 'x'", "filter, at position 0: 'beam' is a text parameter: use =, !=, in or not in, not '<'"),
    ("beam = 3", "filter, at position 7: 'beam' holds text: write the value in single quotes, e.g. '3.0'"),
    ("wait = 'long'", "filter, at position 7: 'wait' is a number (stored in 'us'): expected a number, found 'long'"),
    ("flag = 2", "filter, at position 7: 'flag' is true or false, found 2.0"),
    ("date = 'yesterday'", "filter, at position 7: 'yesterday' is not an ISO date such as '2026-03-02'"),
    ("time > 5", "filter, at position 7: 'time' takes an ISO time such as '2026-03-02T09:00' (UTC unless it names a zone) in single quotes, found 5.0"),
    ("run > 'e1'", "filter, at position 0: 'run' is text: use =, !=, in or not in, not '>'"),
]


def test_refusals_name_the_problem(lab):
    for text, message in REFUSALS:
        with pytest.raises(FilterError) as caught:
            select_shots(lab, text)
        assert str(caught.value) == message, text


def test_a_name_that_is_parameter_and_measurement_needs_a_prefix(catalogue, make_file):
    catalogue.ingest([make_file(extra={"m.wait[us]": np.arange(10, dtype=float)})])
    with pytest.raises(FilterError) as caught:
        select_shots(catalogue, "wait > 5")
    assert str(caught.value) == "filter, at position 0: 'wait' is both a parameter and a measurement: write 'p.wait' or 'm.wait'"
    assert len(select_shots(catalogue, "p.wait > 5")) == 9  # shot_table: wait = 10 * shot
    assert len(select_shots(catalogue, "m.wait > 5")) == 4


def test_unit_conversion_matches_the_stored_unit(lab):
    # wait is stored in us (first unit seen); 0.1 ms is 100.00000000000001 us in binary.
    in_ms = select_shots(lab, "wait between 0.01 ms and 0.05 ms")
    in_us = select_shots(lab, "wait between 10 and 50")
    in_ns = select_shots(lab, "wait between 1e4 ns and 5e4 ns")
    assert _keys(in_ms) == _keys(in_us) == _keys(in_ns)
    assert sorted(in_us["p.wait"]) == [10.0, 10, 20, 30, 30, 40, 50, 50]
    assert _keys(select_shots(lab, "wait = 0.07 ms")) == {("east", "e1", 7)}
    assert _keys(select_shots(lab, "depth >= 0.065 mK")) == _keys(select_shots(lab, "depth >= 65"))
    assert len(select_shots(lab, "signal > 0.004 V")) == 2


def test_a_shot_lacking_a_parameter_never_matches_a_comparison(lab):
    # e3 scans wait with shots 1 and 3 lacking it; w1 has no wait at all.
    lacking = {("east", "e3", 1), ("east", "e3", 3)} | {("west", "w1", i) for i in range(7)}
    for text in ["wait != 5", "wait not in (5, 6)", "wait >= 0", "wait < 1e9", "wait between -1 and 1e9"]:
        assert not (_keys(select_shots(lab, text)) & lacking), text
    # ... while `not` negates the whole comparison, so it matches them.
    assert lacking <= _keys(select_shots(lab, "not wait >= 0"))
    assert len(select_shots(lab, "wait >= 0")) + len(select_shots(lab, "not wait >= 0")) == 36


def test_parameter_pruning_uses_run_values_then_shot_values(lab):
    # Constant in e2 (100) and x1 (200), scanned in e1 and e3: only single shots match there.
    assert _keys(select_shots(lab, "wait = 30")) == {("east", "e1", 3), ("east", "e3", 2)}
    assert _keys(select_shots(lab, "wait in (100, 200) and apparatus = 'east'")) == {("east", "e2", i) for i in range(6)} | {("east", "x1", i) for i in range(4)}
    assert _keys(select_shots(lab, "beam = 'horizontal' and run = 'e2'")) == {("east", "e2", 1), ("east", "e2", 3)}
    assert _keys(select_shots(lab, "flag = false and apparatus = 'east'")) == {("east", "e2", i) for i in (1, 3, 5)}
    assert _keys(select_shots(lab, "depth > 62 and apparatus = 'west'")) == {("west", "x1", 3), ("west", "x1", 4)}


def test_run_fields_tags_figures_and_lab_days(lab):
    assert {r for _, r, _ in _keys(select_shots(lab, "tag = 'calibration'"))} == {"e1", "w1"}
    assert {r for _, r, _ in _keys(select_shots(lab, "not tag = 'daily'"))} == {"e3", "x1", "w1"}
    assert {r for _, r, _ in _keys(select_shots(lab, "operator != 'ana'"))} == {"e3"}  # runs without operator never match
    assert len(select_shots(lab, "status = 'bad'")) == 2
    # e1 starts 22:54 UTC on March 2, which is 23:54 in Berlin; shot 3 (23:00 UTC) is on the next lab day.
    assert _keys(select_shots(lab, "date = '2026-03-02'")) == {("east", "e1", i) for i in range(3)}
    assert _keys(select_shots(lab, "date < '2026-03-03'")) == _keys(select_shots(lab, "time < '2026-03-02T23:00:00'"))
    assert _keys(select_shots(lab, "time = '2026-03-03T00:02:00+01:00'")) == {("east", "e1", 4)}
    fill = lab.figures(names=["fill_fraction"])
    above = set(zip(fill["apparatus"][fill["value"] > 0.5], fill["run"][fill["value"] > 0.5]))
    assert 0 < len(above) < 6
    assert {(a, r) for a, r, _ in _keys(select_shots(lab, "fill_fraction > 0.5"))} == above


def test_compile_filter_is_a_condition_over_shots(lab):
    condition = compile_filter(lab, "run = 'x1' and shot >= 2")
    with lab.engine.connect() as connection:
        ids = connection.execute(select(s.Shot.shot).where(condition).order_by(s.Shot.shot)).scalars().all()
    assert ids == [2, 2, 3, 3, 4]


# --- the selection table ----------------------------------------------------------------


def test_selection_of_every_shot_equals_the_runs_shots(lab):
    selected = select_shots(lab, None)
    assert list(selected.columns) == ["run", "apparatus", "sequence", "shot", "time", "p.beam", "p.depth", "p.flag", "p.wait", "m.atom_number", "m.signal"]
    assert selected.attrs["units"] == {"p.beam": "", "p.depth": "uK", "p.flag": "", "p.wait": "us", "m.atom_number": "", "m.signal": "mV"}
    assert list(zip(selected["apparatus"], selected["run"])) == sorted(zip(selected["apparatus"], selected["run"]))
    for (apparatus, run), rows in selected.groupby(["apparatus", "run"], sort=False):
        expected = lab.shots(run, apparatus=apparatus)
        assert list(rows["shot"]) == list(expected["shot"])
        assert list(rows["time"]) == list(expected["time"])
        for column in [c for c in selected.columns if c.startswith(("p.", "m."))]:
            mine = rows[column].reset_index(drop=True)
            theirs = expected[column].reset_index(drop=True) if column in expected else pd.Series([None] * len(rows))
            for a, b in zip(mine, theirs):
                missing_a = a is None or (isinstance(a, float) and math.isnan(a))
                missing_b = b is None or (isinstance(b, float) and math.isnan(b))
                assert missing_a == missing_b, (run, column, a, b)
                if not missing_a:
                    assert (float(a) == float(b)) if not isinstance(a, str) else a == b, (run, column, a, b)


def test_columns_and_limit(lab):
    selected = select_shots(lab, "apparatus = 'west'", columns=["wait", "m.signal"])
    assert list(selected.columns) == ["run", "apparatus", "sequence", "shot", "time", "p.wait", "m.signal"]
    # The first four shots (all of w1) lack wait: a column no selected shot has is left out.
    selected = select_shots(lab, "apparatus = 'west'", columns=["wait", "m.signal"], limit=4)
    assert list(selected.columns) == ["run", "apparatus", "sequence", "shot", "time", "m.signal"]
    assert list(zip(selected["run"], selected["shot"])) == [("w1", 0), ("w1", 1), ("w1", 2), ("w1", 3)]
    table = select_arrow(lab, "run = 'nothing'")
    assert table.num_rows == 0 and table.column_names == ["run", "apparatus", "sequence", "shot", "time"]
    # No run matches, with a limit (a day without data, a mistyped value): an empty selection.
    empty = select_shots(lab, "run = 'nothing'", limit=20)
    assert len(empty) == 0 and list(empty.columns) == ["run", "apparatus", "sequence", "shot", "time"]
    assert select_arrow(lab, "apparatus = 'west' and sequence = 'no-such'", columns=["wait"], limit=3).num_rows == 0
    assert select_arrow(lab, "apparatus = 'east' and depth > 1000 uK", limit=3).num_rows == 0  # runs, but no shot
    assert select_arrow(lab, "run = 'e1'").schema.field("p.wait").metadata == {b"unit": b"us"}


# --- the property: SQL selection equals a pandas evaluation ------------------------------

import pint  # noqa: E402 - the reference's own unit registry, independent of runlog's

_UREG = pint.UnitRegistry()


def _reference_frame(catalogue) -> pd.DataFrame:
    frames = []
    for run in catalogue.runs().itertuples():
        info = catalogue.run(run.run, apparatus=run.apparatus)
        shots = catalogue.shots(run.run, apparatus=run.apparatus)
        shots["apparatus"] = run.apparatus
        shots["sequence"] = info.sequence
        shots["operator"] = info.operator
        shots["tags"] = [info.tags] * len(shots)
        for name, figure in info.figures.items():
            shots[f"f.{name}"] = figure["value"]
        frames.append(shots)
    return pd.concat(frames, ignore_index=True)


_STORED_UNITS = {"wait": "us", "depth": "uK", "signal": "mV", "atom_number": "", "fill_fraction": "", "survival": ""}
_COLUMN = {"wait": "p.wait", "depth": "p.depth", "beam": "p.beam", "flag": "p.flag", "atom_number": "m.atom_number", "signal": "m.signal", "fill_fraction": "f.fill_fraction", "survival": "f.survival"}


def _number(value: Value, name: str) -> float:
    if value.unit is None:
        return float(value.value)
    converted = _UREG.Quantity(float(value.value), value.unit).to(_STORED_UNITS[name]).magnitude
    return float(f"{converted:.15g}")


def _holds(column: pd.Series, operator: str, values: list) -> pd.Series:
    present = column.notna()
    filled = column.where(present, values[0])
    if operator == "between":
        test = (filled >= values[0]) & (filled <= values[1])
    elif operator == "in":
        test = reduce(lambda a, b: a | b, [filled == v for v in values])
    elif operator == "not in":
        test = reduce(lambda a, b: a & b, [filled != v for v in values])
    else:
        test = {"=": filled.__eq__, "!=": filled.__ne__, "<": filled.__lt__, "<=": filled.__le__, ">": filled.__gt__, ">=": filled.__ge__}[operator](values[0])
    return present & test.astype(bool)


def _evaluate(node, frame: pd.DataFrame, zone: str) -> pd.Series:
    if isinstance(node, And):
        return reduce(lambda a, b: a & b, [_evaluate(p, frame, zone) for p in node.parts])
    if isinstance(node, Or):
        return reduce(lambda a, b: a | b, [_evaluate(p, frame, zone) for p in node.parts])
    if isinstance(node, Not):
        return ~_evaluate(node.part, frame, zone)
    name, operator, values = node.name, node.operator, list(node.values)
    if name == "tag":
        texts = [v.value for v in values]
        return frame["tags"].map(lambda tags: any(bool(_holds(pd.Series([t]), operator, texts).iloc[0]) for t in tags)).astype(bool)
    if name == "date":
        days = frame["time"].dt.tz_convert(zone).dt.date
        return _holds(days, operator, [dt.date.fromisoformat(v.value) for v in values])
    if name == "time":
        moments = [pd.Timestamp(v.value) if pd.Timestamp(v.value).tzinfo else pd.Timestamp(v.value, tz="UTC") for v in values]
        return _holds(frame["time"], operator, moments)
    if name in ("run", "apparatus", "sequence", "operator", "status", "shot"):
        column = frame[name] if name != "operator" else frame["operator"].astype(object)
        return _holds(column, operator, [v.value for v in values])
    column = frame[_COLUMN[name]] if _COLUMN[name] in frame else pd.Series([np.nan] * len(frame), index=frame.index)
    if name == "beam":
        return _holds(column, operator, [v.value for v in values])
    if name == "flag":
        return _holds(column.astype(float), operator, [1.0 if v.value else 0.0 for v in values])
    return _holds(column.astype(float), operator, [_number(v, name) for v in values])


def _literal(value, unit: str | None = None) -> Value:
    return Value(value, unit, 0)


@st.composite
def _numbers(draw, base: list[float], units: list[str], stored: str) -> Value:
    number = draw(st.sampled_from(base)) + draw(st.sampled_from([0.0, 0.0, 0.5, -0.5]))
    unit = draw(st.sampled_from([None, *units]))
    if unit is None:
        return _literal(number)
    shown = float(_UREG.Quantity(number, stored).to(unit).magnitude)
    return _literal(float(f"{shown:.12g}"), unit)


_ORDER = ["=", "!=", "<", "<=", ">", ">=", "between", "in", "not in"]
_TEXT = ["=", "!=", "in", "not in"]
_TEXT_VALUES = {
    "run": ["e1", "e2", "e3", "x1", "w1", "zz"],
    "apparatus": ["east", "west"],
    "sequence": ["ramsey", "loading"],
    "operator": ["ana", "ben"],
    "tag": ["calibration", "daily", "other"],
    "status": ["ok", "bad"],
    "beam": ["vertical", "horizontal"],
}
_TIMES = ["2026-03-02T22:58:00", "2026-03-02T23:00:00+00:00", "2026-03-03T10:00:00", "2026-03-04T09:00:00", "2026-03-04T13:00:00+01:00"]


@st.composite
def _comparisons(draw) -> Comparison:
    name = draw(st.sampled_from(["run", "apparatus", "sequence", "operator", "tag", "status", "beam", "shot", "time", "date", "wait", "depth", "flag", "atom_number", "signal", "fill_fraction"]))
    if name in _TEXT_VALUES:
        operator = draw(st.sampled_from(_TEXT))
        pool = _TEXT_VALUES[name]
        make = lambda: _literal(draw(st.sampled_from(pool)))  # noqa: E731
    elif name == "flag":
        operator = draw(st.sampled_from(_TEXT))
        make = lambda: _literal(draw(st.booleans()))  # noqa: E731
    elif name in ("time", "date"):
        operator = draw(st.sampled_from(_ORDER))
        pool = _TIMES if name == "time" else ["2026-03-02", "2026-03-03", "2026-03-04"]
        make = lambda: _literal(draw(st.sampled_from(pool)))  # noqa: E731
    else:
        operator = draw(st.sampled_from(_ORDER))
        spec = {
            "shot": ([0, 1, 2, 3, 5, 7], [], ""),
            "wait": ([0, 10, 30, 50, 70, 100, 200], ["ms", "ns"], "us"),
            "depth": ([50, 55, 60, 65, 80], ["mK", "nK"], "uK"),
            "atom_number": ([20, 30, 35, 42, 50], [], ""),
            "signal": ([1, 2, 2.5, 4], ["V"], "mV"),
            "fill_fraction": ([0.4, 0.5, 0.55, 0.6], [], ""),
        }[name]
        make = lambda: draw(_numbers(*spec))  # noqa: E731
    count = {"between": 2, "in": draw(st.integers(1, 3)), "not in": draw(st.integers(1, 3))}.get(operator, 1)
    values = [make() for _ in range(count)]
    if operator == "between" and name not in ("time", "date"):
        values.sort(key=lambda v: _number(v, name) if name in _STORED_UNITS else float(v.value))
    elif operator == "between":
        values.sort(key=lambda v: str(v.value))
    return Comparison(name, operator, tuple(values), 0)


_filters = st.recursive(
    _comparisons(),
    lambda children: st.one_of(
        st.lists(children, min_size=2, max_size=3).map(lambda parts: And(tuple(parts))),
        st.lists(children, min_size=2, max_size=3).map(lambda parts: Or(tuple(parts))),
        children.map(Not),
    ),
    max_leaves=5,
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(tree=_filters)
def test_selection_equals_a_pandas_evaluation(lab, tree):
    # Evaluated on the text, so the grammar's round trip is part of the property.
    text = str(tree)
    reference_tree = parse(text)
    frame = _reference_frame_cached(lab)
    expected = frame[_evaluate(reference_tree, frame, LAB_ZONE)]
    selected = _keys(select_shots(lab, text))
    event(f"selected {'none' if not selected else 'all' if len(selected) == len(frame) else 'some'}")
    assert selected == _keys(expected), text


_FRAMES: dict[str, pd.DataFrame] = {}


def _reference_frame_cached(catalogue) -> pd.DataFrame:
    key = str(catalogue.engine.url)
    if key not in _FRAMES:
        _FRAMES[key] = _reference_frame(catalogue)
    return _FRAMES[key]
