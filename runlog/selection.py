"""The shots a filter selects, as one table: run fields, parameters and measurements.

Owns the step from a filter (:mod:`runlog.filters`) to a table of shots. One SQL query
selects the shots (run pruning first, then the exact shot condition) with the per-shot
values of the parameters scanned in the candidate runs and the measurement columns; it
is read in chunks. Values constant over a run are not read per shot: they are spread from
``run_parameters`` over the run's rows afterwards, as the catalogue stores them.

Rows are sorted by apparatus, run and shot; columns are ``run``, ``apparatus``,
``sequence``, ``shot``, ``time``, then ``p.<name>`` and ``m.<name>`` (sorted by name) for
the parameters and measurements that at least one selected shot has, then
``monitor.<name>`` for each monitor asked for: its as-of value at the shot's time
(:func:`runlog.filters.as_of_value`, the rule of filters and of
:mod:`runlog.monitors.align`), read in the same query. Units are in
``DataFrame.attrs["units"]`` (Arrow: the field metadata ``unit``).
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import BigInteger, Column, ColumnElement, Float, MetaData, Table, and_, bindparam, case, cast, extract, func, select, type_coerce
from sqlalchemy.engine import Connection

from runlog.errors import NotFoundError
from runlog.units import UnitError
from runlog.filters import CompiledFilter, as_of_value, compile_selection
from runlog.store import schema as s
from runlog.store.partitions import SHOT_PARAMETERS_WITH_TIME
from runlog.store.arrow_reader import arrow_read, fetch_arrow_parallel, fetch_postgres_arrow, is_arrow, parallel_readers

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["BASE_COLUMNS", "Selection", "id_in", "select_shots", "select_arrow", "select_table", "select_on", "select_versions"]

#: The columns every selection starts with.
BASE_COLUMNS = ("run", "apparatus", "sequence", "shot", "time")

#: Connections reading one large selection side by side (SQLite).
PARALLEL_READS = max(1, min(4, os.cpu_count() or 1))

# Rows fetched per round trip: large enough that per-chunk work is amortised, small
# enough that one chunk of Python row objects stays in the tens of megabytes.
CHUNK_ROWS = 100_000

_runs = s.Run.__table__
_shots = s.Shot.__table__
_run_parameters = s.RunParameter.__table__
_shot_parameters = s.ShotParameter.__table__
_apparatus = s.Apparatus.__table__


@dataclass
class Selection:
    """A selection with what an export needs beyond the table: the catalogue ids of the
    shots (row order) and of their runs, and the text of the filter."""

    table: pa.Table
    shot_ids: np.ndarray | None  # per row, when asked for
    run_ids: np.ndarray  # per row
    where: str | None
    units: dict[str, str] = field(default_factory=dict)
    #: The monitor columns asked for (name, unit, apparatus that log it).
    monitors: list = field(default_factory=list)


@dataclass(frozen=True)
class _Run:
    key: str
    apparatus: str
    sequence: str


@dataclass
class _ParameterColumn:
    id: int
    name: str
    unit: str
    kind: str
    constant: dict[int, object] = field(default_factory=dict)  # run id -> value
    scanned: set[int] = field(default_factory=set)  # run ids


def _arrow_type(kind: str) -> pa.DataType:
    return {"text": pa.string(), "boolean": pa.bool_()}.get(kind, pa.float64())


def _time_us(dialect: str):
    # Times as integer microseconds: SQLite stores them so; on PostgreSQL the epoch is
    # numeric (exact) since version 14. Skipping per-row datetime objects halves the read.
    if dialect == "sqlite":
        return type_coerce(_shots.c.time, BigInteger)
    return cast(extract("epoch", _shots.c.time) * 1_000_000, BigInteger)


def _stream(connection: Connection, query, size: int) -> Iterator[list[tuple]]:
    """The rows of ``query`` in chunks, straight from the driver's cursor.

    Every selected column is a plain integer, float or text, so the driver's own values
    are final and SQLAlchemy's per-row result objects (a third of the read time for a
    million shots) are skipped. Values stay bound parameters, processed by their types.
    Runs in the connection's transaction, so it reads the same snapshot as the queries
    before it. PostgreSQL streams through a server-side cursor.
    """
    dialect = connection.dialect
    compiled = query.compile(dialect=dialect, compile_kwargs={"render_postcompile": True})

    def value(name: str) -> object:
        raw = compiled.params[name]
        process = compiled.binds[name].type.bind_processor(dialect)
        return process(raw) if process is not None else raw

    driver = connection.connection.driver_connection
    if dialect.name == "sqlite":
        cursor = driver.cursor()
        cursor.execute(str(compiled), [value(name) for name in compiled.positiontup or []])
    else:
        cursor = driver.cursor(name=f"runlog_select_{uuid.uuid4().hex[:12]}")
        cursor.execute(str(compiled), {name: value(name) for name in compiled.params})
    try:
        while rows := cursor.fetchmany(size):
            yield rows
    finally:
        cursor.close()


def id_in(column, ids: Sequence[int]):
    """``column IN (ids)`` with the integers written into the statement."""
    return column.in_(bindparam(None, [int(i) for i in ids], expanding=True, literal_execute=True))


def _wanted(columns: Sequence[str] | None, parameters: dict[str, object], measurements: dict[str, object]) -> tuple[set[str] | None, set[str] | None]:
    """Which parameter and measurement names the caller asked for (``None``: all)."""
    if columns is None:
        return None, None
    want_p: set[str] = set()
    want_m: set[str] = set()
    for column in columns:
        if column in BASE_COLUMNS:
            continue
        prefix, _, name = column.partition(".")
        if prefix == "p" and name in parameters:
            want_p.add(name)
        elif prefix == "m" and name in measurements:
            want_m.add(name)
        elif column in parameters and column not in measurements:
            want_p.add(column)
        elif column in measurements and column not in parameters:
            want_m.add(column)
        else:
            import difflib

            known = [f"p.{n}" for n in parameters] + [f"m.{n}" for n in measurements] + list(BASE_COLUMNS)
            close = difflib.get_close_matches(column, known, n=3)
            hint = "a parameter and a measurement: write p.<name> or m.<name>" if column in parameters else (f"did you mean {', '.join(repr(c) for c in close)}?" if close else "")
            raise NotFoundError("column", column, hint)
    return want_p, want_m


@dataclass
class _MonitorColumn:
    """One requested monitor: its column, the unit of the column, and per apparatus of
    the candidate runs the monitor's id there and the conversion into that unit."""

    name: str
    unit: str
    apparatus: list[tuple[str, int, object]]  # (apparatus, monitor id, Conversion)


def _monitor_columns(connection: Connection, names: Sequence[str], apparatus_present: set[str]) -> list[_MonitorColumn]:
    """The monitors ``names`` (``room_temp`` or ``monitor.room_temp``) on the apparatus of
    the selection. The column's unit is the monitor's unit on the first of those apparatus
    (by name); another apparatus's values are converted into it."""
    from runlog.units import converter

    lab = tuple(sorted((str(key)[5:], str(value)) for key, value in connection.execute(select(s.Setting.key, s.Setting.value).where(s.Setting.key.like("unit:%")))))
    known: dict[str, list[tuple[str, int, str]]] = {}
    for mid, name, unit, apparatus in connection.execute(select(s.Monitor.id, s.Monitor.name, s.Monitor.unit, _apparatus.c.name).join(_apparatus, _apparatus.c.id == s.Monitor.apparatus_id).order_by(_apparatus.c.name)):
        known.setdefault(name, []).append((apparatus, int(mid), unit or ""))
    out = []
    for asked in dict.fromkeys(names):
        name = asked[len("monitor."):] if asked.startswith("monitor.") and asked[len("monitor."):] in known else asked
        if name not in known:
            import difflib

            close = difflib.get_close_matches(name, list(known), n=3)
            raise NotFoundError("monitor", asked, f"did you mean {', '.join(repr(c) for c in close)}?" if close else "")
        here = [entry for entry in known[name] if entry[0] in apparatus_present]
        unit = (here or known[name])[0][2]
        entries = []
        for apparatus, mid, own in here:
            try:
                entries.append((apparatus, mid, converter(own, unit, lab)))
            except UnitError as error:
                raise UnitError(own, f"monitor '{name}' is logged in '{own}' on {apparatus} and in '{unit}' elsewhere: {error}") from None
        out.append(_MonitorColumn(name, unit, entries))
    return out


def select_table(catalogue, where: str | None = None, *, columns: Sequence[str] | None = None, limit: int | None = None, shot_ids: bool = False, monitors: Sequence[str] = ()) -> Selection:
    """The selected shots as an Arrow table with their run ids and, if asked, their
    shot ids (for exports; reading them costs a sixth more) and ``monitors``' values."""
    engine = catalogue.engine if hasattr(catalogue, "engine") else catalogue
    with arrow_read(engine, parallel=PARALLEL_READS) as fast:
        if fast is not None:
            return select_on(fast, where, columns=columns, limit=limit, shot_ids=shot_ids, monitors=monitors)
    with engine.connect() as connection:
        return select_on(connection, where, columns=columns, limit=limit, shot_ids=shot_ids, monitors=monitors)


def select_on(connection: Connection, where: str | None = None, *, columns: Sequence[str] | None = None, limit: int | None = None, shot_ids: bool = False, monitors: Sequence[str] = ()) -> Selection:
    """:func:`select_table` on an open connection, inside its transaction (so that a
    caller reading more afterwards, like an export, sees the same catalogue)."""
    compiled = compile_selection(connection, where) if where is not None and where.strip() else CompiledFilter(None, None)
    return _select(connection, compiled, where, columns, limit, shot_ids, monitors)


def select_versions(connection: Connection, run_ids: Sequence[int], shot_ids: np.ndarray, where: str | None = None, monitors: Sequence[str] = ()) -> Selection:
    """Exactly the shots ``shot_ids`` of the run versions ``run_ids`` (current or not), in
    the table :func:`select_on` gives: what a pinned selection (:mod:`runlog.pins`) names.

    The run versions are read whole and cut to the shots afterwards: a pin's shots are
    mostly whole runs, and a list of single shots would not fit in one SQL statement.
    Columns that none of the kept shots has a value in are dropped, as a filter's are.
    """
    selection = _select(connection, CompiledFilter(None, None, versions=tuple(sorted(int(r) for r in run_ids))), where, None, None, True, monitors)
    assert selection.shot_ids is not None
    keep = np.isin(selection.shot_ids, np.asarray(shot_ids, dtype=np.int64))
    table = selection.table.filter(pa.array(keep))
    dropped = [i for i, name in enumerate(table.column_names) if name not in BASE_COLUMNS and not name.startswith("monitor.") and table.column(i).null_count == table.num_rows]
    for i in reversed(dropped):
        table = table.remove_column(i)
    units = {name: unit for name, unit in selection.units.items() if name in table.column_names}
    return Selection(table, selection.shot_ids[keep], selection.run_ids[keep], where, units, selection.monitors)


def _select(connection: Connection, compiled: CompiledFilter, where: str | None, columns: Sequence[str] | None, limit: int | None, with_ids: bool, monitors: Sequence[str] = ()) -> Selection:
    dialect = connection.dialect.name
    candidate_ids = compiled.run_ids()
    runs: dict[int, _Run] = {}
    run_shots: dict[int, int] = {}
    first = last = None
    for rid, key, apparatus, sequence, shot_count, started, finished in connection.execute(
        select(_runs.c.id, _runs.c.key, _apparatus.c.name, _runs.c.sequence, _runs.c.shot_count, _runs.c.started, _runs.c.finished)
        .join(_apparatus, _apparatus.c.id == _runs.c.apparatus_id)
        .where(_runs.c.id.in_(candidate_ids))
    ).all():
        runs[int(rid)] = _Run(key, apparatus, sequence)
        run_shots[int(rid)] = int(shot_count or 0)
        first = started if first is None or started < first else first
        last = finished if last is None or finished > last else last
    # The candidate runs are read once; later queries name them as a literal list of
    # integers (from the catalogue itself) rather than repeating the filter's run
    # conditions or binding thousands of values.
    candidates = sorted(runs)
    all_parameters = {name: (int(pid), unit or "", kind) for pid, name, unit, kind in connection.execute(select(s.Parameter.id, s.Parameter.name, s.Parameter.unit, s.Parameter.kind))}
    all_measurements = {name: (int(mid), unit or "") for mid, name, unit in connection.execute(select(s.Measurement.id, s.Measurement.name, s.Measurement.unit))}
    want_p, want_m = _wanted(columns, all_parameters, all_measurements)
    by_id = {pid: name for name, (pid, _, _) in all_parameters.items()}

    parameters: dict[int, _ParameterColumn] = {}
    scanned_here: set[int] = set()  # parameters some candidate run scans
    rp = _run_parameters
    for run_id, pid, scanned, number, text_value in connection.execute(
        select(rp.c.run_id, rp.c.parameter_id, rp.c.scanned, rp.c.number_value, rp.c.text_value).where(id_in(rp.c.run_id, candidates))
    ).all():
        if scanned:
            scanned_here.add(int(pid))
        name = by_id[int(pid)]
        if want_p is not None and name not in want_p:
            continue
        _, unit, kind = all_parameters[name]
        column = parameters.setdefault(int(pid), _ParameterColumn(int(pid), name, unit, kind))
        if scanned:
            column.scanned.add(int(run_id))
        else:
            column.constant[int(run_id)] = text_value if kind == "text" else (None if number is None else (bool(number) if kind == "boolean" else float(number)))
    carried = s.RunMeasurement.__table__
    measurement_ids = {int(m) for (m,) in connection.execute(select(carried.c.measurement_id).where(id_in(carried.c.run_id, candidates)).distinct())}
    measurements = sorted(
        ((name, mid, unit) for name, (mid, unit) in all_measurements.items() if mid in measurement_ids and (want_m is None or name in want_m)),
    )

    # One query: the shots, the per-shot values of scanned parameters, the measurements.
    scanned = sorted((c for c in parameters.values() if c.scanned), key=lambda c: c.name)
    # On PostgreSQL the shot-level tables are partitioned by month of the shot's time
    # (runlog.store.partitions) and the children carry that time: joining on it, and
    # bounding every table by the candidate runs' time span, lets the planner read only
    # the months the runs lie in.
    months = dialect == "postgresql" and first is not None

    def same_shot(child) -> ColumnElement[bool]:
        on = child.c.shot_id == _shots.c.id
        return and_(on, child.c.time == _shots.c.time, child.c.time.between(first, last)) if months else on

    source = _shots
    value_columns = []
    per_shot_parameters = SHOT_PARAMETERS_WITH_TIME if months else _shot_parameters
    for column in scanned:
        alias = per_shot_parameters.alias(f"sp{column.id}")
        source = source.outerjoin(alias, and_(same_shot(alias), alias.c.parameter_id == column.id))
        value_columns.append(alias.c.text_value if column.kind == "text" else alias.c.number_value)
    if measurements:
        # One plain table keyed by shot id on both backends (revision 0017).
        wide = Table("shot_measurements", MetaData(), Column("shot_id", s.BigId), *[Column(s.measurement_column(mid), Float) for _, mid, _ in measurements])
        source = source.outerjoin(wide, wide.c.shot_id == _shots.c.id)
        value_columns += [wide.c[s.measurement_column(mid)] for _, mid, _ in measurements]
    # Each monitor as of the shot's time: one probe per shot and apparatus that logs it,
    # only for the shots of that apparatus's runs.
    monitor_columns = _monitor_columns(connection, monitors, {r.apparatus for r in runs.values()}) if monitors else []
    monitor_parts: list[list[tuple[int, object]]] = []  # per monitor: (value column index, conversion)
    for monitor in monitor_columns:
        parts = []
        for apparatus, mid, conversion in monitor.apparatus:
            value = as_of_value(mid, _shots.c.time, sqlite=dialect == "sqlite")
            mine = [rid for rid, run in runs.items() if run.apparatus == apparatus]
            if len(mine) < len(runs):
                value = case((id_in(_shots.c.run_id, mine), value), else_=None)
            parts.append((len(value_columns), conversion))
            value_columns.append(value.label(None))
        monitor_parts.append(parts)
    query = select(*([_shots.c.id] if with_ids else []), _shots.c.run_id, _shots.c.shot, _time_us(dialect), *value_columns).select_from(source)
    if months:
        query = query.where(_shots.c.time.between(first, last))

    def shaped(condition):
        if limit is None:
            return query.where(condition)
        # A limit needs the final order in SQL; without one, sorting afterwards is cheaper.
        return (
            query.where(condition)
            .join(_runs, _runs.c.id == _shots.c.run_id)
            .join(_apparatus, _apparatus.c.id == _runs.c.apparatus_id)
            .order_by(_apparatus.c.name, _runs.c.key, _shots.c.shot)
            .limit(int(limit))
        )

    exact = _exact_condition(connection, compiled, where, scanned_here, candidates)
    # A large read is cut into run-id ranges, each read on a connection of its own (of the
    # same snapshot): SQLite through ADBC, PostgreSQL through ADBC with imported snapshots.
    readers = 1 if limit is not None else parallel_readers(connection) if is_arrow(connection) else PARALLEL_READS if dialect == "postgresql" else 1
    parts = [shaped(exact(*bounds)) for bounds in _split(run_shots, readers)]
    types = [pa.int64()] * (4 if with_ids else 3) + [_arrow_type(c.kind) if c.kind == "text" else pa.float64() for c in scanned] + [pa.float64()] * (len(measurements) + sum(len(p) for p in monitor_parts))
    arrays = None
    if not candidates:
        # Nothing to read: the shot query of no runs is not even well-formed with a limit.
        arrays = [pa.array([], type=kind) for kind in types]
    elif is_arrow(connection):
        arrays = _read_arrow(connection, parts, types, keys=4 if with_ids else 3)
    elif dialect == "postgresql":
        if limit is None:
            tables = fetch_postgres_arrow(connection, parts, sum(run_shots.values()))
            if tables is not None:
                table = pa.concat_tables(tables) if len(tables) > 1 else tables[0]
                arrays = [column.combine_chunks().cast(kind) for column, kind in zip(table.columns, types)]
        if arrays is None:
            # A plan compiled for this one read costs more than it saves.
            connection.exec_driver_sql("SET LOCAL jit = off")
    if arrays is None:
        arrays = _read_rows(connection, shaped(exact()), types)

    shot_ids = arrays.pop(0).to_numpy(zero_copy_only=False) if with_ids else None
    run_ids = arrays[0].to_numpy(zero_copy_only=False)
    shot_index = arrays[1].to_numpy(zero_copy_only=False)
    # Rows in order: apparatus, run key, shot. Rank the runs once, then sort integers.
    ordered_runs = sorted(runs, key=lambda rid: (runs[rid].apparatus, runs[rid].key))
    run_list = np.array(sorted(runs), dtype=np.int64)
    run_position = np.searchsorted(run_list, run_ids) if len(run_list) else np.zeros(0, dtype=np.int64)
    rank = np.empty(len(run_list), dtype=np.int64)
    rank[np.searchsorted(run_list, np.array(ordered_runs, dtype=np.int64))] = np.arange(len(run_list))
    order = None
    if limit is None and len(shot_index) > 1:
        key = rank[run_position]
        step = np.diff(key)
        # Read in order already is the usual case (run ids follow ingest): check that in
        # one pass before sorting.
        if not ((step >= 0).all() and (np.diff(shot_index)[step == 0] > 0).all()):
            order = np.lexsort((shot_index, key))
    if order is not None:
        run_ids, run_position = run_ids[order], run_position[order]
        shot_ids = shot_ids[order] if shot_ids is not None else None

    def reordered(values: pa.Array) -> pa.Array:
        return values.take(pa.array(order)) if order is not None else values

    def per_run(values: list[object], kind: pa.DataType) -> pa.Array:
        return pa.array(values, type=kind).take(pa.array(run_position))

    listed = [runs[int(rid)] for rid in run_list]
    names: list[str] = list(BASE_COLUMNS)
    out: list[pa.Array] = [
        per_run([r.key for r in listed], pa.string()),
        per_run([r.apparatus for r in listed], pa.string()),
        per_run([r.sequence for r in listed], pa.string()),
        reordered(arrays[1]),
        reordered(arrays[2]).cast(pa.timestamp("us", tz="UTC")),
    ]
    units: dict[str, str] = {}
    scanned_values = {c.id: reordered(arrays[3 + i]) for i, c in enumerate(scanned)}
    for column in sorted(parameters.values(), key=lambda c: c.name):
        kind = _arrow_type(column.kind)
        constant = per_run([column.constant.get(int(rid)) for rid in run_list], kind)
        if column.id in scanned_values:
            is_scanned = per_run([int(rid) in column.scanned for rid in run_list], pa.bool_())
            per_shot = scanned_values[column.id]
            if column.kind == "boolean":
                per_shot = pc.not_equal(per_shot, 0.0)
            values = pc.if_else(is_scanned, per_shot, constant)
        else:
            values = constant
        if values.null_count == len(values):
            continue  # no selected shot has this parameter
        names.append(f"p.{column.name}")
        out.append(values)
        units[f"p.{column.name}"] = column.unit
    for i, (name, _, unit) in enumerate(measurements):
        values = reordered(arrays[3 + len(scanned) + i])
        if values.null_count == len(values):
            continue
        names.append(f"m.{name}")
        out.append(values)
        units[f"m.{name}"] = unit
    for monitor, parts in zip(monitor_columns, monitor_parts):
        # The apparatus' columns exclude each other (each holds only its runs' shots).
        combined = np.full(len(run_ids), np.nan)
        for index, conversion in parts:
            values = reordered(arrays[3 + index]).to_numpy(zero_copy_only=False).astype(float)
            present = ~np.isnan(values)
            combined[present] = conversion(values[present])
        names.append(f"monitor.{monitor.name}")
        out.append(pa.array(combined, pa.float64(), from_pandas=True))
        units[f"monitor.{monitor.name}"] = monitor.unit
    fields = [pa.field(n, a.type, metadata={"unit": units[n]} if n in units else None) for n, a in zip(names, out)]
    table = pa.Table.from_arrays(out, schema=pa.schema(fields))
    return Selection(table, shot_ids.astype(np.int64) if shot_ids is not None else None, run_ids.astype(np.int64), where, units, monitor_columns)


# Below this many shots one connection reads faster than several.
_SPLIT_SHOTS = 200_000


def _split(run_shots: dict[int, int], readers: int) -> list[tuple[int, int] | tuple[()]]:
    """Up to ``readers`` contiguous ranges of run ids holding about equal numbers of
    shots, as (first id, last id); ``[()]`` for one read of everything."""
    total = sum(run_shots.values())
    if readers < 2 or total < _SPLIT_SHOTS:
        return [()]
    ids = sorted(run_shots)
    cumulative = np.cumsum([run_shots[i] for i in ids])
    edges = [int(np.searchsorted(cumulative, total * k / readers)) for k in range(1, readers)]
    bounds = [0, *sorted({min(e + 1, len(ids)) for e in edges}), len(ids)]
    return [(ids[low], ids[high - 1]) for low, high in zip(bounds[:-1], bounds[1:]) if low < high]


def _exact_condition(connection: Connection, compiled: CompiledFilter, where: str | None, scanned_here: set[int], candidates: list[int]):
    """``exact(first, last)``: the filter's exact condition on shots of the candidate runs
    with ids in [first, last] (all candidates without arguments).

    When no candidate run scans any parameter the filter compares (the usual case: most
    parameters are constant over every run), each comparison is decided by the run's
    constant value: the filter is compiled again in that simpler form and applied to the
    candidate runs it keeps. The per-shot test of parameter values and the repeated run
    subqueries drop out of the shot query (measured: a third of its time on SQLite, and
    PostgreSQL then estimates the number of shots right).
    """
    if where is None or not compiled.parameters or compiled.parameters & scanned_here:

        def general(first: int | None = None, last: int | None = None):
            if first is None:
                return compiled.condition
            in_range = _runs.c.id.between(first, last)
            return replace(compiled, runs=in_range if compiled.runs is None else and_(compiled.runs, in_range)).condition

        return general
    simple = compile_selection(connection, where, whole_run=compiled.parameters)
    kept = candidates
    if simple.runs is not None and candidates:
        kept = sorted(int(r) for (r,) in connection.execute(select(_runs.c.id).where(and_(simple.runs, id_in(_runs.c.id, candidates)))))

    def by_runs(first: int | None = None, last: int | None = None):
        ids = kept if first is None else [r for r in kept if first <= r <= last]
        in_runs = id_in(_shots.c.run_id, ids)
        return in_runs if simple.shots is None else and_(in_runs, simple.shots)

    return by_runs


def _read_rows(connection: Connection, query, types: list[pa.DataType]) -> list[pa.Array]:
    """The columns of ``query`` through the driver's row tuples."""
    row_type = pa.struct([pa.field(f"c{i}", kind) for i, kind in enumerate(types)])
    # Arrow turns each chunk of row tuples into columns in C; the row objects of a
    # chunk are dropped before the next one is read.
    chunks = [pa.array(rows, type=row_type) for rows in _stream(connection, query, CHUNK_ROWS)]
    if chunks:
        return [pa.concat_arrays([chunk.field(i) for chunk in chunks]) for i in range(len(types))]
    return [pa.array([], type=kind) for kind in types]


def _read_arrow(connection: Connection, parts: list, types: list[pa.DataType], keys: int) -> list[pa.Array]:
    """The columns of the queries ``parts`` (one after another) as Arrow arrays from the
    ADBC driver, each part read on its own connection of the same snapshot.

    The driver infers a column's type from its first values, so no value column may
    start with NULLs: each is read as ``coalesce(value, 0)`` beside a flag ``value IS
    NULL``, and the NULLs are put back here. The first ``keys`` columns are integers
    that are never NULL.
    """
    columns = list(parts[0].selected_columns)
    read = columns[:keys]
    for column, kind in zip(columns[keys:], types[keys:]):
        read.append(func.coalesce(column, "" if kind == pa.string() else 0.0).label(None))
        read.append(column.is_(None).label(None))
    tables = fetch_arrow_parallel(connection, [part.with_only_columns(*read, maintain_column_froms=True) for part in parts])
    # What was read, column by column: keys, then each value beside its NULL flag. A
    # piece that found no rows comes back typed int64 throughout: cast every piece.
    read_types = [*types[:keys]]
    for kind in types[keys:]:
        read_types += [pa.string() if kind == pa.string() else pa.float64(), pa.int64()]
    schema = pa.schema([pa.field(f"c{i}", kind) for i, kind in enumerate(read_types)])
    table = pa.concat_tables([pa.Table.from_arrays([column.cast(kind) for column, kind in zip(piece.columns, read_types)], schema=schema) for piece in tables])
    arrays = [table.column(i).combine_chunks() for i in range(keys)]
    for i in range(len(types) - keys):
        values = table.column(keys + 2 * i).combine_chunks()
        missing = pc.not_equal(table.column(keys + 2 * i + 1).combine_chunks(), 0)
        arrays.append(pc.if_else(missing, pa.scalar(None, values.type), values))
    return arrays


def select_arrow(catalogue, where: str | None = None, *, columns: Sequence[str] | None = None, limit: int | None = None, monitors: Sequence[str] = ()) -> pa.Table:
    """The shots ``where`` selects (all shots for ``None``), as an Arrow table.

    ``columns`` limits the parameters and measurements to those named (``p.wait``,
    ``m.atom_number``, or a bare name that is only one of the two); the base columns are
    always there. ``limit`` keeps the first rows in the table's order. ``monitors`` adds a
    column ``monitor.<name>`` per monitor: its as-of value at each shot's time (the last
    value logged at or before it, at most 600 s before; else null; docs/filters.md).
    """
    return select_table(catalogue, where, columns=columns, limit=limit, monitors=monitors).table


def select_shots(catalogue, where: str | None = None, *, columns: Sequence[str] | None = None, limit: int | None = None, monitors: Sequence[str] = ()) -> "pd.DataFrame":
    """The shots ``where`` selects, as a DataFrame (see :func:`select_arrow`); units in
    ``DataFrame.attrs["units"]``, a value a shot lacks is NaN (numbers) or None."""
    selection = select_table(catalogue, where, columns=columns, limit=limit, monitors=monitors)
    frame = selection.table.to_pandas(types_mapper=None)
    frame.attrs["units"] = dict(selection.units)
    return frame
