"""The monitor-table contract, version 1 (docs/monitor-table.md): reading and checking a file.

A monitor table is a slow-control log: values of named monitors at times of their own,
independent of the shots. Two forms, as Parquet or CSV:

- long: columns ``time, monitor, value, unit`` (and optionally ``apparatus``), one row
  per value;
- wide: ``time, <name>[<unit>], ...`` (and optionally ``apparatus``), one row per time, one
  column per monitor; an empty cell is "not logged at this time".

The whole file is checked before anything is written; the first problem found is raised as
a :class:`ContractError` naming the file, the column and the first bad row (0-based).
"""

from __future__ import annotations

import fnmatch
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from runlog.config import Mapping
from runlog.errors import ContractError
from runlog.units import check_unit

__all__ = ["MONITOR_CONTRACT_VERSION", "MonitorSeries", "MonitorTable", "is_monitor_table", "read_monitor_table"]

#: The version of the contract this module checks; a Parquet file may state the version
#: it was written for in its key-value metadata ``runlog.monitor_contract``.
MONITOR_CONTRACT_VERSION = "1"

_LONG = ("time", "monitor", "value", "unit")
_WIDE_COLUMN = re.compile(r"^(?P<name>[^\[\]]+?)\s*\[(?P<unit>[^\[\]]*)\]$")
_SHOT_COLUMNS = ("run", "shot")
_SHOT_PREFIXES = ("p.", "m.", "occ.", "counts.")


@dataclass(frozen=True)
class MonitorSeries:
    """The values of one monitor in one file, in file order (not necessarily time order)."""

    apparatus: str
    name: str
    unit: str
    time_us: np.ndarray  # int64 microseconds since the epoch, UTC
    values: np.ndarray  # float64
    rows: np.ndarray  # the 0-based file row of each value, for messages


@dataclass(frozen=True)
class MonitorTable:
    file: str
    form: str  # 'long' | 'wide'
    series: tuple[MonitorSeries, ...]

    @property
    def value_count(self) -> int:
        return int(sum(s.values.size for s in self.series))


def _columns_of(path: Path) -> list[str]:
    if path.suffix.lower() == ".csv":
        with path.open("r", encoding="utf-8", errors="replace") as handle:
            header = handle.readline()
        return [name.strip().strip('"') for name in header.rstrip("\r\n").split(",")]
    return list(pq.read_schema(path).names)


def is_monitor_table(path: str | Path, mapping: Mapping | None = None) -> bool:
    """Whether ``path`` is to be read as a monitor table rather than a shot table.

    By the folder rule of ``runlog.toml`` (``[monitors] files``, glob patterns matched against
    the path) when it has one, else by the contract: a CSV file is always a monitor table
    (shot tables are Parquet); a Parquet file is one when it has a ``time`` column, no
    ``run``, ``shot`` or ``sequence`` column, and either ``monitor`` and ``value`` columns
    (long form) or only ``<name>[<unit>]`` columns besides ``apparatus`` (wide form), all
    after the ``[columns]`` renames. Anything else goes to the shot-table contract.
    """
    path = Path(path)
    mapping = mapping or Mapping()
    patterns = mapping.monitor_files
    if patterns:
        text = path.as_posix()
        return any(fnmatch.fnmatch(text, pattern) or fnmatch.fnmatch(path.name, pattern) for pattern in patterns)
    if path.suffix.lower() == ".csv":
        return True
    try:
        names = [mapping.rename.get(name, name) for name in _columns_of(path)]
    except Exception:  # unreadable: let the shot-table reader give its refusal
        return False
    if "time" not in names or any(name in names for name in (*_SHOT_COLUMNS, "sequence")):
        return False
    others = [name for name in names if name not in ("time", "apparatus")]
    if {"monitor", "value"} <= set(others):
        return True
    # The wide form; p./m./occ./counts. columns belong to shot tables.
    return bool(others) and all(_WIDE_COLUMN.match(name) and not name.startswith(_SHOT_PREFIXES) for name in others)


def _read(path: Path) -> pa.Table:
    name = str(path)
    try:
        if path.suffix.lower() == ".csv":
            # Every column as text first: times and numbers are checked below, row by row,
            # so that a refusal can name the first bad row.
            header = _columns_of(path)
            options = pacsv.ConvertOptions(column_types={column: pa.string() for column in header}, strings_can_be_null=True)
            return pacsv.read_csv(path, convert_options=options)
        file = pq.ParquetFile(path)
        metadata = file.schema_arrow.metadata or {}
        stated = metadata.get(b"runlog.monitor_contract")
        if stated is not None and stated.decode(errors="replace") != MONITOR_CONTRACT_VERSION:
            raise ContractError(name, f"written for monitor-table contract {stated.decode(errors='replace')!r}; this runlog reads version {MONITOR_CONTRACT_VERSION}")
        return file.read()
    except ContractError:
        raise
    except FileNotFoundError:
        raise ContractError(name, "file not found") from None
    except (pa.ArrowInvalid, OSError) as error:
        raise ContractError(name, f"not a readable {'CSV' if path.suffix.lower() == '.csv' else 'Parquet'} file ({str(error).splitlines()[0]})") from None


def _first(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def _times(file: str, column: pa.ChunkedArray, source: str) -> np.ndarray:
    array = column.combine_chunks()
    if array.null_count:
        raise ContractError(file, "empty time", column=source, row=_first(array.is_null().to_numpy(zero_copy_only=False)))
    if pa.types.is_timestamp(array.type):
        if array.type.tz is None:
            raise ContractError(file, "timestamp has no time zone (write it as UTC or with an offset)", column=source, row=0)
    elif pa.types.is_string(array.type) or pa.types.is_large_string(array.type):
        try:
            array = pc.cast(array, pa.timestamp("us", tz="UTC"))
        except pa.ArrowInvalid:
            for row, text in enumerate(array.to_pylist()):
                try:
                    pc.cast(pa.array([text]), pa.timestamp("us", tz="UTC"))
                except pa.ArrowInvalid:
                    raise ContractError(file, f"'{text}' is not an ISO 8601 time with a zone offset (e.g. 2026-03-01T12:00:00+01:00)", column=source, row=row) from None
            raise
    else:
        raise ContractError(file, f"must be a timestamp with time zone, found {array.type}", column=source, row=0)
    return pc.cast(array, pa.timestamp("us", tz="UTC")).cast(pa.int64()).to_numpy(zero_copy_only=False)


def _numbers(file: str, column: pa.ChunkedArray, source: str, *, allow_empty: bool) -> tuple[np.ndarray, np.ndarray]:
    """(values, present) of a value column; text (CSV) is parsed here."""
    array = column.combine_chunks()
    if pa.types.is_string(array.type) or pa.types.is_large_string(array.type):
        stripped = pc.utf8_trim_whitespace(array)
        array = pc.if_else(pc.equal(stripped, ""), pa.scalar(None, pa.string()), stripped)
        try:
            array = pc.cast(array, pa.float64())
        except pa.ArrowInvalid:
            for row, text in enumerate(array.to_pylist()):
                if text is None:
                    continue
                try:
                    float(text)
                except ValueError:
                    raise ContractError(file, f"'{text}' is not a number", column=source, row=row) from None
            raise
    elif not (pa.types.is_floating(array.type) or pa.types.is_integer(array.type)):
        raise ContractError(file, f"values must be numbers, found {array.type}", column=source, row=0)
    present = array.is_valid().to_numpy(zero_copy_only=False)
    values = pc.cast(array, pa.float64()).fill_null(np.nan).to_numpy(zero_copy_only=False)
    if not allow_empty and not present.all():
        raise ContractError(file, "empty value", column=source, row=_first(~present))
    finite = np.isfinite(values)
    bad = present & ~finite
    if bad.any():
        raise ContractError(file, f"value {values[_first(bad)]} is not finite", column=source, row=_first(bad))
    return values, present


def _labels(file: str, column: pa.ChunkedArray, source: str, what: str) -> tuple[list[str], np.ndarray]:
    """(distinct labels, stripped; per-row index into them) of a text column, without a
    Python loop over the rows (a logger's file has millions)."""
    array = column.combine_chunks()
    if pa.types.is_dictionary(array.type):
        array = array.cast(array.type.value_type)
    if not (pa.types.is_string(array.type) or pa.types.is_large_string(array.type)):
        raise ContractError(file, f"{what} must be text, found {array.type}", column=source, row=0)
    if array.null_count:
        raise ContractError(file, f"empty {what}", column=source, row=_first(array.is_null().to_numpy(zero_copy_only=False)))
    encoded = pc.dictionary_encode(pc.utf8_trim_whitespace(array))
    labels = [str(v) for v in encoded.dictionary.to_pylist()]
    codes = encoded.indices.to_numpy(zero_copy_only=False)
    for code, label in enumerate(labels):
        if not label:
            raise ContractError(file, f"empty {what}", column=source, row=_first(codes == code))
    return labels, codes


def _unit(file: str, text: str, source: str, row: int | None) -> str:
    try:
        return check_unit(text)
    except ValueError as error:
        raise ContractError(file, str(error), column=source, row=row) from None


def _check_duplicates(file: str, series: MonitorSeries, source: str) -> None:
    order = np.argsort(series.time_us, kind="stable")
    ordered = series.time_us[order]
    repeated = ordered[1:] == ordered[:-1]
    if repeated.any():
        # With a stable sort, the later of two equal times is the repeat; report the first.
        rows = series.rows[order[1:][repeated]]
        row = int(rows.min())
        raise ContractError(file, f"monitor '{series.name}' has two values at the same time", column=source, row=row)


def read_monitor_table(path: str | Path, mapping: Mapping | None = None, apparatus: str | None = None) -> MonitorTable:
    """Read and check a whole monitor table; raises :class:`ContractError` on the first problem.

    The apparatus comes from an ``apparatus`` column, else ``apparatus`` (an option), else
    the ``[defaults] apparatus`` of ``runlog.toml``.
    """
    path = Path(path)
    file = str(path)
    mapping = mapping or Mapping()
    table = _read(path)
    sources = {mapping.rename.get(name, name): name for name in table.column_names if name not in mapping.ignore}
    if "time" not in sources:
        raise ContractError(file, "no 'time' column (a monitor table has time and either monitor, value, unit or <name>[<unit>] columns)", column="time")
    if table.num_rows == 0:
        raise ContractError(file, "no rows")
    time_us = _times(file, table[sources["time"]], sources["time"])
    rows = np.arange(table.num_rows)
    if "apparatus" in sources:
        apparatus_names, apparatus_codes = _labels(file, table[sources["apparatus"]], sources["apparatus"], "apparatus")
        apparatus_of_row = True
    else:
        default = apparatus or mapping.apparatus
        if not default:
            raise ContractError(file, "no apparatus: add an 'apparatus' column, give --apparatus, or set [defaults] apparatus in runlog.toml", column="apparatus")
        apparatus_of_row = None
    if apparatus_of_row is None:
        groups = [(default, rows)]
    else:
        groups = [(name, rows[apparatus_codes == code]) for code, name in sorted(enumerate(apparatus_names), key=lambda item: item[1])]
    found: list[MonitorSeries] = []
    long_form = all(name in sources for name in ("monitor", "value"))
    if long_form:
        if "unit" not in sources:
            raise ContractError(file, "the long form needs a 'unit' column ('' for a plain number)", column="unit")
        extra = sorted(set(sources) - {"time", "apparatus", *_LONG})
        if extra:
            raise ContractError(file, "unexpected column in the long form (columns: time, apparatus, monitor, value, unit)", column=sources[extra[0]])
        monitor_names, monitor_codes = _labels(file, table[sources["monitor"]], sources["monitor"], "monitor name")
        values, _ = _numbers(file, table[sources["value"]], sources["value"], allow_empty=False)
        unit_column = table[sources["unit"]].combine_chunks()
        if pa.types.is_dictionary(unit_column.type):
            unit_column = unit_column.cast(unit_column.type.value_type)
        encoded = pc.dictionary_encode(pc.fill_null(unit_column, ""))
        unit_texts = [str(u) for u in encoded.dictionary.to_pylist()]
        unit_codes = encoded.indices.to_numpy(zero_copy_only=False)
        for apparatus_name, group_rows in groups:
            group_monitors = monitor_codes[group_rows]
            for code, name in sorted(enumerate(monitor_names), key=lambda item: item[1]):
                picked = group_rows[group_monitors == code]
                if picked.size == 0:
                    continue
                picked_units = unit_codes[picked]
                given = sorted(set(np.unique(picked_units).tolist()))
                checked = {u: _unit(file, unit_texts[u], sources["unit"], int(picked[_first(picked_units == u)])) for u in given}
                unit = checked[int(picked_units[0])]
                series_values = values[picked].copy()
                if len(given) > 1:
                    from runlog.units import conversion

                    for u in given:
                        if checked[u] == unit:
                            continue
                        factors = conversion(checked[u], unit)
                        at = picked_units == u
                        if factors is None:
                            raise ContractError(file, f"monitor '{name}' in '{checked[u]}' and in '{unit}', which are not the same kind of quantity", column=sources["unit"], row=int(picked[at][0]))
                        series_values[at] = series_values[at] * factors[0] + factors[1]
                series = MonitorSeries(apparatus_name, name, unit, time_us[picked], series_values, picked)
                _check_duplicates(file, series, sources["time"])
                found.append(series)
        form = "long"
    else:
        columns = [name for name in sources if name not in ("time", "apparatus")]
        if not columns:
            raise ContractError(file, "no monitor columns (wide form: time, <name>[<unit>], ...; long form: time, monitor, value, unit)")
        for name in columns:
            if name in _SHOT_COLUMNS:
                raise ContractError(file, "a monitor table has no run or shot columns (is this a shot table?)", column=sources[name])
            match = _WIDE_COLUMN.match(name)
            if match is None:
                raise ContractError(file, "a wide-form column must be <name>[<unit>] (e.g. room_temp[degC], '[]' for a plain number)", column=sources[name])
            monitor, unit = match["name"].strip(), _unit(file, match["unit"], sources[name], None)
            values, present = _numbers(file, table[sources[name]], sources[name], allow_empty=True)
            for apparatus_name, group_rows in groups:
                picked = group_rows[present[group_rows]]
                if picked.size == 0:
                    continue
                series = MonitorSeries(apparatus_name, monitor, unit, time_us[picked], values[picked], picked)
                _check_duplicates(file, series, sources["time"])
                found.append(series)
        names = [(s.apparatus, s.name) for s in found]
        if len(set(names)) != len(names):
            twice = next(n for n in names if names.count(n) > 1)
            raise ContractError(file, f"monitor '{twice[1]}' has more than one column")
        if not found:
            raise ContractError(file, "every monitor column is empty")
        form = "wide"
    return MonitorTable(file, form, tuple(found))
