"""Ingest: shot-table files into the catalogue, each file all or nothing.

A file is read twice, in record batches, so peak memory does not grow with its size:
pass 1 checks every row and gathers what the write needs (runs, shot indices, which
parameters are constant over each run); pass 2, inside one write transaction, appends
shots, per-shot parameters, measurements and occupancy. A file whose SHA-256 is already
in the ingest log as ingested is ``already-present`` and writes nothing; a refused file
writes only its refusal to the ingest log.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import time
from collections import Counter
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd  # pyarrow imports it anyway on its first conversion
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
from sqlalchemy import func, insert, select
from sqlalchemy.engine import Engine

from runlog.config import Mapping
from runlog.contract import FROM_COUNTS, MAX_MEASUREMENTS, Batch, Layout, normalise_batch, read_layout, threshold_counts
from runlog.store import series_keys
from runlog.store.rollups import as_date, as_datetime, lab_day, lab_timezone, refresh_rollups
from runlog.errors import ContractError, one_line
from runlog.figures.shot_level import ShotSums
from runlog.store.bulk import Writer, open_writer, short_write
from runlog.store.failures import describe
from runlog.store.measurement_columns import make_columns
from runlog.store.schema import IngestLogEntry, Measurement, measurement_column
from runlog.units import LabUnits, UnitError, converter

__all__ = ["IngestResult", "ingest_files", "expand_paths", "file_sha256", "BATCH_ROWS"]

BATCH_ROWS = 65_536
KEEP_BYTES = 128 * 2**20  # checked batches kept between the two passes, at most
_CLOSE = 1e-12  # relative tolerance when comparing parameter values after a unit conversion

Progress = Callable[[str, int, int], None]  # (file, rows done, rows total)


@dataclass(frozen=True)
class IngestResult:
    """How one file ended: ``ingested``, ``already-present`` or ``refused`` (with a reason).

    One word in the library, ``--json``, the ingest log, the CLI lines, the dashboard and
    the docs. Catalogues written before that hold ``rejected`` in their ingest log;
    :meth:`runlog.Catalogue.ingest_log` reads it as ``refused``.
    """

    file: str
    status: str
    runs: tuple[str, ...] = ()
    shots: int = 0
    reason: str | None = None
    #: What the configuration's [[rules]] gave for this file's runs: ``DeriveResult`` or
    #: ``FitError`` objects (empty without rules).
    derived: tuple = ()
    #: A monitor table (runlog.monitors): the monitors it brought and how many values.
    monitors: tuple[str, ...] = ()
    values: int = 0
    #: Why a file was refused: ``"contract"`` or ``"data"`` (the file's own fault), or a
    #: store failure that is not (``"busy"``, ``"permission"``, ``"unavailable"``:
    #: :mod:`runlog.store.failures`), after which the same file may be tried again.
    cause: str | None = None

    @property
    def files_fault(self) -> bool:
        """Whether the file itself was refused (``runlog watch`` quarantines only those)."""
        return self.status == "refused" and self.cause in ("contract", "data", None)

    def as_dict(self) -> dict[str, object]:
        found: dict[str, object] = {
            "file": self.file,
            "status": self.status,
            "run": self.runs[0] if len(self.runs) == 1 else (list(self.runs) if self.runs else None),
            "runs": list(self.runs),
            "shots": self.shots,
            "reason": self.reason,
        }
        if self.monitors:
            found |= {"monitors": list(self.monitors), "values": self.values}
        return found


@dataclass
class _Parameter:
    kind: str
    unit: str
    present: int = 0
    constant: bool = True
    first: object = None
    minimum: float = np.inf
    maximum: float = -np.inf


@dataclass
class _Run:
    key: str
    apparatus: str
    sequence: str
    first_row: int
    started_us: int = np.iinfo(np.int64).max
    finished_us: int = np.iinfo(np.int64).min
    shots: list[np.ndarray] = field(default_factory=list)
    rows: list[np.ndarray] = field(default_factory=list)
    operator: str | None = None
    notes: str | None = None
    # The analysis version the file gives the run's shots ('' = the unnamed one).
    analysis: str | None = None
    tags: set[str] = field(default_factory=set)
    parameters: dict[str, _Parameter] = field(default_factory=dict)
    image_sites: dict[str, int] = field(default_factory=dict)
    has_image: dict[str, bool] = field(default_factory=dict)
    measurement_counts: dict[str, int] = field(default_factory=dict)
    # Per-site counts of this file's shots: name -> (successes, trials), for counting figures.
    site_counts: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    # Sums over this file's shots (runlog.figures.shot_level.ShotSums) for the same names.
    shot_sums: dict[str, object] = field(default_factory=dict)
    # Shots of this file left out of the figures by their status.
    excluded: int = 0
    # Photon counts per image: (shot indices, shots x sites matrix) per batch.
    photon_counts: dict[str, list[tuple[np.ndarray, np.ndarray]]] = field(default_factory=dict)
    # The threshold of each image whose occupancy comes from its counts.
    thresholds: dict[str, float] = field(default_factory=dict)
    # Filled in the write transaction.
    run_id: int = 0
    apparatus_id: int = 0
    day: dt.date | None = None
    groups: set = field(default_factory=set)  # rollup groups touched before this file
    per_shot: set[str] = field(default_factory=set)

    @property
    def shot_count(self) -> int:
        return int(sum(len(s) for s in self.shots))


def file_sha256(path: Path) -> tuple[str, int]:
    digest = hashlib.sha256()
    size = 0
    with open(path, "rb") as handle:
        while chunk := handle.read(1 << 20):
            digest.update(chunk)
            size += len(chunk)
    return digest.hexdigest(), size


def hash_file(path: Path) -> tuple[tuple[int, int, int, int] | None, str, int]:
    """(signature, SHA-256, size) of a file to ingest; an unreadable one is a :class:`ContractError`."""
    name = str(path)
    before = _signature(path)
    try:
        sha, size = file_sha256(path)
    except FileNotFoundError:
        raise ContractError(name, "file not found") from None
    except IsADirectoryError:
        raise ContractError(name, "is a folder, not a file") from None
    except OSError as error:
        raise ContractError(name, f"cannot read file ({_short(error)})") from None
    return before, sha, size


def _signature(path: Path) -> tuple[int, ...] | None:
    """What tells that a file changed: device, inode, size, modification time and status
    change time (``None``: gone). A writer can put size and modification time back
    (``os.utime``); the status change time moves with every write and cannot be set."""
    try:
        stat = path.stat()
    except FileNotFoundError:
        return None
    return stat.st_dev, stat.st_ino, stat.st_size, stat.st_mtime_ns, stat.st_ctime_ns


def _unchanged_since(path: Path, before: tuple[int, ...] | None) -> None:
    """Refuse a file that was replaced, written to or deleted while it was being read:
    what was checked, hashed and written would not be one file."""
    now = _signature(path)
    if now is None:
        raise ContractError(str(path), "the file disappeared while being read; nothing was written")
    if now != before:
        raise ContractError(str(path), "the file changed while being read (still being written?); nothing was written, ingest it again once it is complete")


def expand_paths(paths: Iterable[str | Path]) -> list[Path]:
    """Files as given, folders as their ``*.parquet`` and ``*.csv`` (monitor) files (sorted, not recursive)."""
    out: list[Path] = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            out.extend(sorted(p for p in (*path.glob("*.parquet"), *path.glob("*.csv")) if p.is_file()))
        else:
            out.append(path)
    return out


def _open(path: Path, text_columns: list[str] | None = None) -> pq.ParquetFile:
    try:
        return pq.ParquetFile(path, read_dictionary=text_columns)
    except FileNotFoundError:
        raise ContractError(str(path), "file not found") from None
    except IsADirectoryError:
        raise ContractError(str(path), "is a folder, not a file") from None
    except (pa.ArrowException, OSError) as error:
        raise ContractError(str(path), f"not a readable Parquet file ({_short(error)})") from None


def _short(error: Exception) -> str:
    return str(error).strip().splitlines()[0][:200] if str(error).strip() else type(error).__name__


def _batches(path: Path, parquet: pq.ParquetFile, layout: Layout) -> Iterator[tuple[int, Batch]]:
    first_row = 0
    try:
        for record_batch in parquet.iter_batches(batch_size=BATCH_ROWS, columns=layout.sources()):
            yield first_row, normalise_batch(layout, record_batch, first_row)
            first_row += record_batch.num_rows
    except (pa.ArrowException, OSError) as error:
        raise ContractError(str(path), f"unreadable or truncated Parquet data near row {first_row} ({_short(error)})") from None


def _group(run_index: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """Row positions of each run present in a batch, in row order within each run."""
    order = np.argsort(run_index, kind="stable")
    ordered = run_index[order]
    cuts = np.flatnonzero(np.diff(ordered)) + 1
    return [(int(run_index[part[0]]), part) for part in np.split(order, cuts) if len(part)]


class _Plan:
    """What pass 1 learned of a file: its runs, and their per-run parameter statistics."""

    def __init__(self, path: Path, layout: Layout, mapping: Mapping | None = None):
        self.path = path
        self.layout = layout
        # Which shot statuses count in figures, and what a sequence's second image shows.
        self.mapping = mapping if mapping is not None else Mapping()
        self.rows = 0
        self.runs: list[_Run] = []
        self.index: dict[tuple[str, str], int] = {}
        # UTC calendar months the shots fall in, with their shots: PostgreSQL needs their
        # partitions (one for a sparse year: runlog.store.partitions).
        self.months: Counter[dt.date] = Counter()

    def run_index(self, batch: Batch) -> np.ndarray:
        """The position in ``self.runs`` of every row's (apparatus, run), adding new runs."""
        # factorize hashes; np.unique would sort the strings, several times slower.
        apparatus_codes, apparatus_names = pd.factorize(batch.apparatus)
        run_codes, run_names = pd.factorize(batch.run)
        pairs = apparatus_codes.astype(np.int64) * len(run_names) + run_codes
        unique, first, inverse = np.unique(pairs, return_index=True, return_inverse=True)
        mapping = np.empty(len(unique), dtype=np.int64)
        for position, pair in enumerate(unique):
            key = (str(apparatus_names[pair // len(run_names)]), str(run_names[pair % len(run_names)]))
            found = self.index.get(key)
            if found is None:
                found = len(self.runs)
                self.index[key] = found
                row = int(first[position])
                self.runs.append(_Run(key[1], key[0], str(batch.sequence[row]), batch.first_row + row))
            mapping[position] = found
        return mapping[inverse.reshape(-1)]

    def add(self, batch: Batch) -> None:
        file = str(self.path)
        layout = self.layout
        run_index = self.run_index(batch)
        lengths = {name: pc.fill_null(pc.list_value_length(array), -1).to_numpy(zero_copy_only=False) for name, array in batch.occupancy.items()}
        for position, rows in _group(run_index):
            run = self.runs[position]
            sequences = batch.sequence[rows]
            differs = sequences != run.sequence
            if differs.any():
                row = batch.first_row + int(rows[np.flatnonzero(differs)[0]])
                raise ContractError(file, f"run '{run.key}' changes sequence from '{run.sequence}' to '{sequences[differs][0]}'", column=layout.source("sequence"), row=row)
            run.shots.append(batch.shot[rows])
            run.rows.append(rows + batch.first_row)
            times = batch.time_us[rows]
            run.started_us = min(run.started_us, int(times.min()))
            run.finished_us = max(run.finished_us, int(times.max()))
            for attribute in ("operator", "notes"):
                values = getattr(batch, attribute)
                if values is not None and getattr(run, attribute) is None:
                    present = [v for v in values[rows] if v]
                    if present:
                        setattr(run, attribute, str(present[0]))
            if batch.analysis is not None:
                self._add_analysis(run, batch, rows)
            if batch.tags is not None:
                for value in set(batch.tags[rows]) - {None}:
                    tags = {t.strip() for t in str(value).split(",") if t.strip()}
                    if any(len(t) > 200 for t in tags):
                        row = batch.first_row + int(rows[0])
                        raise ContractError(file, "a tag longer than 200 characters", column=layout.source("tags"), row=row)
                    run.tags.update(tags)
            for name, values in batch.measurements.items():
                run.measurement_counts[name] = run.measurement_counts.get(name, 0) + int(np.count_nonzero(~np.isnan(values[rows])))
            for column in layout.by_role("parameter"):
                self._add_parameter(run, column.name, column.kind, column.unit, batch.parameters[column.name][rows])
            for column in layout.by_role("occupancy"):
                run_lengths = lengths[column.name][rows]
                has_image = run.has_image.setdefault(column.name, bool(run_lengths[0] >= 0))
                bad = (run_lengths < 0) if has_image else (run_lengths >= 0)
                if bad.any():
                    row = batch.first_row + int(rows[np.flatnonzero(bad)[0]])
                    state = "lacks" if has_image else "has"
                    raise ContractError(file, f"shot {state} this image while other shots of run '{run.key}' do not: a run has an image in all its shots or in none", column=column.source, row=row)
                if not has_image:
                    continue
                expected = run.image_sites.setdefault(column.name, int(run_lengths[0]))
                bad = run_lengths != expected
                if bad.any():
                    row = batch.first_row + int(rows[np.flatnonzero(bad)[0]])
                    raise ContractError(file, f"occupancy list has {int(run_lengths[bad][0])} sites, earlier shots of run '{run.key}' have {expected}", column=column.source, row=row)
            for column in layout.by_role("counts"):
                self._add_counts(run, column.source, column.name, batch, rows)
        self.months.update(_month_counts(batch.time_us))
        self.rows += batch.length

    def _add_counts(self, run: _Run, source: str, name: str, batch: Batch, rows: np.ndarray) -> None:
        lists = batch.counts[name]
        lengths = pc.fill_null(pc.list_value_length(lists), -1).to_numpy(zero_copy_only=False)[rows]
        present = rows[lengths >= 0]
        if present.size == 0:
            return
        sites = run.image_sites.get(name, int(lengths[lengths >= 0][0]))
        bad = (lengths >= 0) & (lengths != sites)
        if bad.any():
            row = batch.first_row + int(rows[np.flatnonzero(bad)[0]])
            raise ContractError(str(self.path), f"counts list has {int(lengths[bad][0])} sites, the image of run '{run.key}' has {sites}", column=source, row=row)
        run.photon_counts.setdefault(name, []).append((batch.shot[present], _number_matrix(lists, present, sites)))

    def set_thresholds(self) -> None:
        """Each run's threshold for every image whose occupancy comes from its counts."""
        from runlog.errors import FitError
        from runlog.figures.detection import fit_counts

        for column in self.layout.by_role("occupancy"):
            if column.kind != FROM_COUNTS:
                continue
            for run in self.runs:
                parts = run.photon_counts.get(column.name)
                if not parts:
                    continue
                fixed = self.layout.threshold(column.name)
                if fixed is not None:
                    run.thresholds[column.name] = fixed
                    continue
                try:
                    run.thresholds[column.name] = fit_counts(np.concatenate([m for _, m in parts])).threshold
                except FitError as error:
                    raise ContractError(
                        str(self.path),
                        f"run '{run.key}': no occupancy threshold from the counts ({error.reason}); set [occupancy] threshold in runlog.toml",
                        column=column.source,
                        row=run.first_row,
                    ) from None

    def _add_analysis(self, run: _Run, batch: Batch, rows: np.ndarray) -> None:
        """A run's shots in one file come from one analysis version."""
        values = batch.analysis[rows]
        names = [v.strip() if v else "" for v in values]
        first = run.analysis if run.analysis is not None else names[0]
        for position, name in enumerate(names):
            if name != first:
                row = batch.first_row + int(rows[position])
                raise ContractError(str(self.path), f"run '{run.key}' changes analysis from '{first}' to '{name}': a file gives each run's shots one analysis version", column=self.layout.source("analysis"), row=row)
        run.analysis = first

    @staticmethod
    def _add_parameter(run: _Run, name: str, kind: str, unit: str, values: np.ndarray) -> None:
        stats = run.parameters.setdefault(name, _Parameter(kind, unit))
        if kind == "text":
            present = values[values != None]  # noqa: E711 - elementwise on an object array
            if len(present) == 0:
                return
            value: object = present[0]
            uniform = bool((present == value).all())
        else:
            present = values[~np.isnan(values)]
            if len(present) == 0:
                return
            low, high = float(present.min()), float(present.max())
            stats.minimum = min(stats.minimum, low)
            stats.maximum = max(stats.maximum, high)
            value, uniform = float(present[0]), low == high
        if stats.present == 0:
            stats.first = value
        if not uniform or value != stats.first:
            stats.constant = False
        stats.present += len(present)

    def finish(self) -> None:
        file = str(self.path)
        if self.rows == 0:
            raise ContractError(file, "file has no rows")
        shot_source = self.layout.source("shot")
        first_bad: tuple[int, str] | None = None
        for run in self.runs:
            shots = np.concatenate(run.shots)
            rows = np.concatenate(run.rows)
            order = np.argsort(shots, kind="stable")
            ordered = shots[order]
            duplicate = ordered[1:] == ordered[:-1]
            if duplicate.any():
                row = int(rows[order][1:][duplicate].min())
                if first_bad is None or row < first_bad[0]:
                    first_bad = (row, f"duplicate shot index {int(shots[rows == row][0])} in run '{run.key}'")
            run.shots, run.rows = [shots], [rows]
        if first_bad is not None:
            raise ContractError(file, first_bad[1], column=shot_source, row=first_bad[0])
        for run in self.runs:
            if run.analysis is None:
                run.analysis = self.layout.analysis or ""
            for stats in run.parameters.values():
                if stats.present < run.shot_count:
                    stats.constant = False
        self.set_thresholds()


def _month_counts(time_us: np.ndarray) -> dict[dt.date, int]:
    """How many of integer-microsecond times fall in each UTC calendar month (first days)."""
    months, counts = np.unique(time_us.astype("datetime64[us]").astype("datetime64[M]"), return_counts=True)
    return {month.astype("datetime64[D]").item(): int(count) for month, count in zip(months, counts)}


def _times(time_us: np.ndarray) -> pa.Array:
    return pa.array(time_us, pa.int64()).cast(pa.timestamp("us", tz="UTC"))


def _utc(us: int) -> dt.datetime:
    return dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(microseconds=int(us))


def _one(writer: Writer, sql: str, params: dict) -> object:
    rows = writer.rows(sql, params)
    return rows[0][0] if rows else None


class _Catalogue:
    """The ids the write needs: apparatus, parameters and measurements, created on demand."""

    def __init__(self, writer: Writer, file: str, lab: LabUnits = ()):
        self.writer = writer
        self.file = file
        self.lab = self._lab_units(lab)
        self.apparatus: dict[str, int] = {}
        self.parameters: dict[str, tuple[int, str, str]] = {}
        self.measurements: dict[str, tuple[int, str]] = {}

    def _lab_units(self, configured: LabUnits) -> LabUnits:
        """The catalogue's lab-defined units with the configuration's new ones recorded, so
        that filters know them; a name whose definition changed is refused."""
        stored = {str(key)[5:]: str(value) for key, value in self.writer.rows("SELECT key, value FROM settings WHERE key LIKE 'unit:%'")}
        for name, definition in configured:
            if name in stored and stored[name] != definition:
                raise ContractError(self.file, f"[units] {name} = '{definition}', but the catalogue's values in {name} were stored with {name} = '{stored[name]}'; give the new definition a new name")
            if name not in stored:
                self.writer.execute("INSERT INTO settings (key, value) VALUES (:key, :value)", {"key": f"unit:{name}", "value": definition})
                stored[name] = definition
        return tuple(sorted(stored.items()))

    def converter(self, unit: str, stored_unit: str, what: str, name: str, column: str):
        try:
            return converter(unit, stored_unit, self.lab)
        except UnitError as error:
            reason = "" if error.kind == "dimension" else f": {error}"
            raise ContractError(self.file, f"unit '{unit}' cannot be converted to the stored unit '{stored_unit}' of {what} '{name}'{reason}", column=column) from None

    def apparatus_id(self, name: str) -> int:
        if name not in self.apparatus:
            found = _one(self.writer, "SELECT id FROM apparatus WHERE name = :name", {"name": name})
            if found is None:
                self.writer.execute("INSERT INTO apparatus (name) VALUES (:name)", {"name": name})
                found = _one(self.writer, "SELECT id FROM apparatus WHERE name = :name", {"name": name})
            self.apparatus[name] = int(found)
        return self.apparatus[name]

    def parameter(self, name: str, kind: str, unit: str, column: str) -> tuple[int, str, str]:
        if name not in self.parameters:
            rows = self.writer.rows("SELECT id, unit, kind FROM parameters WHERE name = :name", {"name": name})
            if not rows:
                self.writer.execute("INSERT INTO parameters (name, unit, kind) VALUES (:name, :unit, :kind)", {"name": name, "unit": unit, "kind": kind})
                rows = self.writer.rows("SELECT id, unit, kind FROM parameters WHERE name = :name", {"name": name})
            pid, stored_unit, stored_kind = rows[0]
            if stored_kind != kind:
                raise ContractError(self.file, f"parameter '{name}' is stored as {stored_kind}, this file has {kind}", column=column)
            if kind != "text":
                self.converter(unit, stored_unit, "parameter", name, column)
            self.parameters[name] = (int(pid), stored_unit, stored_kind)
        return self.parameters[name]

    def measurement(self, name: str, unit: str, column: str) -> tuple[int, str]:
        if name not in self.measurements:
            rows = self.writer.rows("SELECT id, unit FROM measurements WHERE name = :name", {"name": name})
            if not rows:  # _add_measurements made every name of the file before
                raise ContractError(self.file, f"measurement '{name}' is not in the catalogue (removed while this file was written?); ingest the file again", column=column)
            mid, stored_unit = rows[0]
            self.converter(unit, stored_unit, "measurement", name, column)
            self.measurements[name] = (int(mid), stored_unit)
        return self.measurements[name]


#: New measurement names made per schema transaction.
_NAMES_PER_CHANGE = 50


def _add_measurements(engine: Engine, layout: Layout) -> None:
    """Make the file's new measurement names and the columns of ``shot_measurements`` they
    need, ahead of its data transaction, in short transactions of their own.

    A name whose column was made ahead (:mod:`runlog.store.measurement_columns`: on
    PostgreSQL columns come in blocks, so as not to change every month partition for each
    name) is one row of ``measurements``. A new column needs the table to itself for a
    moment; inside the data transaction it would keep every dashboard reader of
    measurements waiting until the whole file is written, and a reader idle in a
    transaction would block the ingest without bound (:func:`runlog.store.bulk.short_write`
    bounds the wait). A name made for a file that is then refused stays, with no values:
    harmless, and the next file of it needs no change.
    """
    wanted = {column.name: (column.unit, column.source) for column in layout.by_role("measurement")}
    if not wanted:
        return
    table = Measurement.__table__
    with engine.connect() as connection:
        known = set(connection.execute(select(table.c.name).where(table.c.name.in_(list(wanted)))).scalars())
    missing = [name for name in wanted if name not in known]
    for start in range(0, len(missing), _NAMES_PER_CHANGE):
        names = missing[start : start + _NAMES_PER_CHANGE]

        def make(connection, names=names) -> None:
            present = set(connection.execute(select(table.c.name).where(table.c.name.in_(names))).scalars())
            count = connection.execute(select(func.count()).select_from(table)).scalar_one()
            ids = []
            for name in names:
                if name in present:  # another writer made it meanwhile
                    continue
                unit, source = wanted[name]
                if count >= MAX_MEASUREMENTS:
                    raise ContractError(layout.file, f"the catalogue already holds {count} measurement names, the most it can (each is a column of the store): a new one cannot be added", column=source)
                ids.append(connection.execute(insert(table).values(name=name, unit=unit).returning(table.c.id)).scalar_one())
                count += 1
            make_columns(connection, ids, MAX_MEASUREMENTS)

        short_write(engine, make, what=f"adding {len(names)} measurement name(s) for {layout.file}", table="shot_measurements")


def _to_stored(value: float, unit: str, stored_unit: str, lab: LabUnits) -> float:
    return float(converter(unit, stored_unit, lab)(float(value)))


def _same(a: object, b: object) -> bool:
    if isinstance(a, str) or isinstance(b, str):
        return a == b
    return bool(np.isclose(float(a), float(b), rtol=_CLOSE, atol=0.0))


def _write_runs(writer: Writer, plan: _Plan, ids: _Catalogue) -> None:
    """Create or extend the runs of the file; decide which parameters need per-shot rows."""
    layout = plan.layout
    file = str(plan.path)
    for column in layout.by_role("parameter"):
        ids.parameter(column.name, column.kind, column.unit, column.source)
    for column in layout.by_role("measurement"):
        ids.measurement(column.name, column.unit, column.source)
    shot_source = layout.source("shot")
    zone = lab_timezone(writer)
    new_parameters: list[dict[str, object]] = []
    new_measurements: list[dict[str, object]] = []
    for run in plan.runs:
        apparatus_id = ids.apparatus_id(run.apparatus)
        versions = writer.rows(
            "SELECT id, sequence, shot_count, started, day, analysis, is_current, withdrawn, operator, notes FROM runs WHERE apparatus_id = :a AND key = :k",
            {"a": apparatus_id, "k": run.key},
        )
        # The file lands in its analysis version of the run: extending it, or as a new one.
        found = [v[:5] for v in versions if v[5] == run.analysis]
        if found and versions[[v[5] for v in versions].index(run.analysis)][7]:
            raise ContractError(file, f"analysis version '{run.analysis}' of run '{run.key}' is withdrawn: restore it before adding shots to it", column=layout.source("analysis"), row=run.first_row)
        started, finished = _utc(run.started_us), _utc(run.finished_us)
        run.apparatus_id = apparatus_id
        if found:
            run_id, sequence, stored_count, stored_started, stored_day = found[0]
            run.run_id = int(run_id)
            run.groups.add((apparatus_id, as_date(stored_day), sequence) if stored_day is not None else None)
            started = min(started, as_datetime(stored_started))
            run.day = lab_day(started, zone)
            if sequence != run.sequence:
                raise ContractError(file, f"run '{run.key}' is stored with sequence '{sequence}', this file says '{run.sequence}'", column=layout.source("sequence"), row=run.first_row)
            stored = np.array([r[0] for r in writer.rows("SELECT shot FROM shots WHERE run_id = :r", {"r": run.run_id})], dtype=np.int64)
            clash = np.isin(run.shots[0], stored)
            if clash.any():
                row = int(run.rows[0][clash].min())
                raise ContractError(file, f"shot index {int(run.shots[0][run.rows[0] == row][0])} of run '{run.key}' is already in the catalogue", column=shot_source, row=row)
            writer.execute(
                "UPDATE runs SET started = :s, day = :d, "
                "finished = CASE WHEN finished > :f THEN finished ELSE :f END, "
                "shot_count = shot_count + :n, operator = COALESCE(operator, :o), notes = COALESCE(notes, :t) WHERE id = :r",
                {"s": started, "d": run.day, "f": finished, "n": run.shot_count, "o": run.operator, "t": run.notes, "r": run.run_id},
            )
            _merge_parameters(writer, run, ids, int(stored_count))
            for name, sites in run.image_sites.items():
                stored_sites = _one(writer, "SELECT sites FROM images WHERE run_id = :r AND name = :n", {"r": run.run_id, "n": name})
                if stored_sites is not None and int(stored_sites) != sites:
                    raise ContractError(file, f"occupancy list has {sites} sites, stored shots of run '{run.key}' have {int(stored_sites)}", column=f"occ.{name}", row=run.first_row)
        else:
            run.day = lab_day(started, zone)
            # A new analysis version becomes the run's current one; the version it replaces
            # keeps its shots and figures, and its rollup group is refreshed without it.
            for version_id, sequence, _, _, stored_day, _, is_current, _, operator, notes in versions:
                if sequence != run.sequence:
                    raise ContractError(file, f"run '{run.key}' is stored with sequence '{sequence}', this file says '{run.sequence}'", column=layout.source("sequence"), row=run.first_row)
                if is_current:
                    run.groups.add((apparatus_id, as_date(stored_day), sequence) if stored_day is not None else None)
                    run.operator = run.operator or operator
                    run.notes = run.notes or notes
                    writer.execute("UPDATE runs SET is_current = :no WHERE id = :r", {"no": False, "r": version_id})
            writer.execute(
                "INSERT INTO runs (apparatus_id, key, analysis, is_current, withdrawn, sequence, started, finished, day, shot_count, operator, notes) "
                "VALUES (:a, :k, :v, :yes, :no, :q, :s, :f, :d, :n, :o, :t)",
                {"a": apparatus_id, "k": run.key, "v": run.analysis, "yes": True, "no": False, "q": run.sequence, "s": started, "f": finished, "d": run.day, "n": run.shot_count, "o": run.operator, "t": run.notes},
            )
            run.run_id = int(_one(writer, "SELECT id FROM runs WHERE apparatus_id = :a AND key = :k AND analysis = :v", {"a": apparatus_id, "k": run.key, "v": run.analysis}))
            for name, stats in run.parameters.items():
                if stats.present == 0:
                    continue
                pid, stored_unit, kind = ids.parameters[name]
                new_parameters.append(_run_parameter_row(run.run_id, pid, stats, stored_unit, ids.lab))
                if not stats.constant:
                    run.per_shot.add(name)
            new_measurements.extend(
                {"run_id": run.run_id, "measurement_id": ids.measurements[name][0], "shots": count}
                for name, count in run.measurement_counts.items()
                if count
            )
        for name, count in run.measurement_counts.items() if found else ():
            if count == 0:
                continue
            mid = ids.measurements[name][0]
            if writer.rows("SELECT 1 FROM run_measurements WHERE run_id = :r AND measurement_id = :m", {"r": run.run_id, "m": mid}):
                writer.execute("UPDATE run_measurements SET shots = shots + :n WHERE run_id = :r AND measurement_id = :m", {"n": count, "r": run.run_id, "m": mid})
            else:
                writer.execute("INSERT INTO run_measurements (run_id, measurement_id, shots) VALUES (:r, :m, :n)", {"r": run.run_id, "m": mid, "n": count})
        for tag in sorted(run.tags):
            if not writer.rows("SELECT 1 FROM run_tags WHERE run_id = :r AND tag = :t", {"r": run.run_id, "t": tag}):
                writer.execute("INSERT INTO run_tags (run_id, tag) VALUES (:r, :t)", {"r": run.run_id, "t": tag})
        for name, sites in run.image_sites.items():
            if _one(writer, "SELECT id FROM images WHERE run_id = :r AND name = :n", {"r": run.run_id, "n": name}) is None:
                column = next(c for c in layout.by_role("occupancy") if c.name == name)
                shape = column.shape or (sites,)
                if int(np.prod(shape)) != sites:
                    raise ContractError(file, f"lattice shape {','.join(map(str, shape))} does not hold {sites} sites", column=column.source, row=run.first_row)
                role = "loading" if name == layout.loading else _second_role(plan, run) if name == layout.survival else "other"
                writer.execute(
                    "INSERT INTO images (run_id, name, role, sites, shape) VALUES (:r, :n, :role, :sites, :shape)",
                    {"r": run.run_id, "n": name, "role": role, "sites": sites, "shape": ",".join(map(str, shape))},
                )
    _append_rows(writer, "run_parameters", new_parameters, _RUN_PARAMETER_SCHEMA)
    _append_rows(writer, "run_measurements", new_measurements, _RUN_MEASUREMENT_SCHEMA)


_RUN_PARAMETER_SCHEMA = pa.schema(
    [("run_id", pa.int64()), ("parameter_id", pa.int64()), ("scanned", pa.bool_()), ("number_value", pa.float64()),
     ("text_value", pa.string()), ("minimum", pa.float64()), ("maximum", pa.float64())]
)
_RUN_FILE_SCHEMA = pa.schema([("run_id", pa.int64()), ("ingest_id", pa.int64()), ("shots", pa.int64()), ("first_shot_id", pa.int64()), ("last_shot_id", pa.int64())])
_RUN_MEASUREMENT_SCHEMA = pa.schema([("run_id", pa.int64()), ("measurement_id", pa.int64()), ("shots", pa.int64())])


def _run_parameter_row(run_id: int, pid: int, stats: _Parameter, stored_unit: str, lab: LabUnits) -> dict[str, object]:
    number = text_value = minimum = maximum = None
    if stats.kind == "text":
        text_value = str(stats.first) if stats.constant else None
    else:
        minimum = _to_stored(stats.minimum, stats.unit, stored_unit, lab)
        maximum = _to_stored(stats.maximum, stats.unit, stored_unit, lab)
        minimum, maximum = min(minimum, maximum), max(minimum, maximum)
        number = _to_stored(float(stats.first), stats.unit, stored_unit, lab) if stats.constant else None
    return {"run_id": run_id, "parameter_id": pid, "scanned": not stats.constant, "number_value": number, "text_value": text_value, "minimum": minimum, "maximum": maximum}


def _append_rows(writer: Writer, table: str, rows: list[dict[str, object]], schema: pa.Schema) -> None:
    # Dozens of small rows per file go in as one append rather than one statement each.
    if rows:
        writer.append(table, pa.Table.from_pylist(rows, schema=schema))


def _merge_parameters(writer: Writer, run: _Run, ids: _Catalogue, stored_count: int) -> None:
    """A run continued by this file: a parameter stays constant only if every shot agrees."""
    stored = {
        int(pid): (bool(scanned), number, text_value, lo, hi)
        for pid, scanned, number, text_value, lo, hi in writer.rows(
            "SELECT parameter_id, scanned, number_value, text_value, minimum, maximum FROM run_parameters WHERE run_id = :r",
            {"r": run.run_id},
        )
    }
    names_by_id = {}
    for name, stats in run.parameters.items():
        pid, stored_unit, kind = ids.parameters[name]
        names_by_id[pid] = name
        old = stored.get(pid)
        new_constant = stats.constant and stats.present == run.shot_count
        new_value = None
        if stats.present and new_constant:
            new_value = str(stats.first) if kind == "text" else _to_stored(float(stats.first), stats.unit, stored_unit, ids.lab)
        if old is None:
            if stats.present == 0:
                continue
            # Stored shots lack this parameter: it cannot be constant over the run.
            stats_copy = _Parameter(stats.kind, stats.unit, stats.present, False, stats.first, stats.minimum, stats.maximum)
            _append_rows(writer, "run_parameters", [_run_parameter_row(run.run_id, pid, stats_copy, stored_unit, ids.lab)], _RUN_PARAMETER_SCHEMA)
            run.per_shot.add(name)
            continue
        scanned, number, text_value, lo, hi = old
        old_value = text_value if kind == "text" else number
        still_constant = not scanned and new_constant and new_value is not None and _same(old_value, new_value)
        if not still_constant:
            run.per_shot.add(name)
            if not scanned:
                _backfill(writer, run.run_id, pid, number, text_value)
        if kind != "text" and stats.present:
            lo_new = _to_stored(stats.minimum, stats.unit, stored_unit, ids.lab)
            hi_new = _to_stored(stats.maximum, stats.unit, stored_unit, ids.lab)
            lo = min(x for x in (lo, lo_new, hi_new) if x is not None)
            hi = max(x for x in (hi, lo_new, hi_new) if x is not None)
        writer.execute(
            "UPDATE run_parameters SET scanned = :s, number_value = :n, text_value = :t, minimum = :lo, maximum = :hi "
            "WHERE run_id = :r AND parameter_id = :p",
            {
                "s": not still_constant,
                "n": number if still_constant else None,
                "t": text_value if still_constant else None,
                "lo": lo,
                "hi": hi,
                "r": run.run_id,
                "p": pid,
            },
        )
    for pid, (scanned, number, text_value, lo, hi) in stored.items():
        if pid in names_by_id or scanned:
            continue
        # A constant of the stored shots that this file's shots lack.
        _backfill(writer, run.run_id, pid, number, text_value)
        writer.execute(
            "UPDATE run_parameters SET scanned = :s, number_value = NULL, text_value = NULL WHERE run_id = :r AND parameter_id = :p",
            {"s": True, "r": run.run_id, "p": pid},
        )


def _backfill(writer: Writer, run_id: int, pid: int, number: float | None, text_value: str | None) -> None:
    # Partitioned children carry their shot's time, the partition key.
    key = ", time" if writer.partitioned else ""
    writer.execute(
        f"INSERT INTO shot_parameters (shot_id, parameter_id, number_value, text_value{key}) "
        f"SELECT id, :p, :n, :t{key} FROM shots WHERE run_id = :r",
        {"p": pid, "n": number, "t": text_value, "r": run_id},
    )


def _pack(array: pa.ListArray) -> pa.Array:
    """Each row's occupancy as packed bits (numpy.packbits, big-endian bit order)."""
    lengths = pc.list_value_length(array).to_numpy(zero_copy_only=False)
    values = array.flatten().to_numpy(zero_copy_only=False).astype(bool, copy=False)
    out: list[pa.Array] = []
    positions: list[np.ndarray] = []
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    for length in np.unique(lengths):
        rows = np.flatnonzero(lengths == length)
        length = int(length)
        matrix = values[(starts[rows][:, None] + np.arange(length)[None, :])] if length else np.zeros((len(rows), 0), bool)
        packed = np.packbits(matrix, axis=1)
        width = packed.shape[1]
        if width == 0:
            out.append(pa.array([b""] * len(rows), pa.binary()))
        else:
            fixed = pa.FixedSizeBinaryArray.from_buffers(pa.binary(width), len(rows), [None, pa.py_buffer(packed.tobytes())])
            out.append(fixed.cast(pa.binary()))
        positions.append(rows)
    if len(out) == 1:
        return out[0]
    merged = pa.concat_arrays(out)
    return merged.take(pa.array(np.argsort(np.concatenate(positions), kind="stable")))


def _write_shots(writer: Writer, path: Path, batches: Iterable[tuple[int, Batch]], plan: _Plan, ids: _Catalogue, progress: Progress | None) -> tuple[int, int]:
    """Append the file's shots; returns (shots written, id of the file's first shot)."""
    layout = plan.layout
    next_id = _one(writer, "SELECT MAX(id) FROM shots", {})
    base = 1 if next_id is None else int(next_id) + 1
    run_ids = np.array([run.run_id for run in plan.runs], dtype=np.int64)
    parameter_columns = sorted(layout.by_role("parameter"), key=lambda c: ids.parameters[c.name][0])
    per_shot = {c.name: np.array([c.name in run.per_shot for run in plan.runs], dtype=bool) for c in parameter_columns}
    measurement_columns = sorted(layout.by_role("measurement"), key=lambda c: ids.measurements[c.name][0])
    image_ids = {}
    for run in plan.runs:
        for name in run.image_sites:
            image_ids[(run.run_id, name)] = int(_one(writer, "SELECT id FROM images WHERE run_id = :r AND name = :n", {"r": run.run_id, "n": name}))
    written = 0
    derived = [c.name for c in layout.by_role("occupancy") if c.kind == FROM_COUNTS]
    for first_row, batch in batches:
        run_index = plan.run_index(batch)
        for name in derived:
            thresholds = np.array([run.thresholds.get(name, np.inf) for run in plan.runs])
            batch.occupancy[name] = threshold_counts(batch.counts[name], thresholds[run_index])
        shot_ids = base + first_row + np.arange(batch.length, dtype=np.int64)
        status = batch.status if batch.status is not None else None
        status_array = pa.array(np.where(status == None, "ok", status).astype(str) if status is not None else np.full(batch.length, "ok"))  # noqa: E711
        writer.append(
            "shots",
            pa.table(
                {
                    "id": shot_ids,
                    "run_id": run_ids[run_index],
                    "shot": batch.shot,
                    "time": _times(batch.time_us),
                    "status": status_array,
                }
            ),
        )
        _append_shot_parameters(writer, batch, run_index, shot_ids, parameter_columns, per_shot, ids)
        _append_measurements(writer, batch, shot_ids, measurement_columns, ids)
        for column in layout.by_role("occupancy"):
            image = np.array([image_ids.get((run.run_id, column.name), -1) for run in plan.runs], dtype=np.int64)
            lists = batch.occupancy[column.name]
            keep = image[run_index] >= 0
            if not keep.any():
                continue
            if not keep.all():
                lists = lists.filter(pa.array(keep))
            data = {"shot_id": shot_ids[keep], "image_id": image[run_index][keep], "bits": _pack(lists)}
            if writer.partitioned:
                data["time"] = _times(batch.time_us[keep])
            writer.append("occupancy", pa.table(data))
        _count_sites(plan, batch, run_index)
        written += batch.length
        if progress is not None:
            progress(str(path), written, plan.rows)
    return written, base


def _record_files(writer: Writer, plan: _Plan, log_id: int, first_id: int) -> None:
    """Which shot ids of this file went into which run version (the file's shots have
    consecutive ids in row order, so each run's are the ids of its rows)."""
    rows = [
        {"run_id": run.run_id, "ingest_id": log_id, "shots": run.shot_count, "first_shot_id": first_id + int(run.rows[0].min()), "last_shot_id": first_id + int(run.rows[0].max())}
        for run in plan.runs
    ]
    _append_rows(writer, "run_files", rows, _RUN_FILE_SCHEMA)


def _store_photon_counts(writer: Writer, plan: _Plan) -> None:
    """One row per run and image with counts: shot indices, counts, the threshold used."""
    for run in plan.runs:
        for name, parts in run.photon_counts.items():
            image_id = _one(writer, "SELECT id FROM images WHERE run_id = :r AND name = :n", {"r": run.run_id, "n": name})
            if image_id is None:
                continue
            shots = np.concatenate([shot for shot, _ in parts]).astype("<i8")
            matrix = np.concatenate([m for _, m in parts]).astype("<f8")
            writer.execute(
                "INSERT INTO photon_counts (run_id, image_id, sites, threshold, shots, counts) VALUES (:r, :i, :n, :t, :s, :c)",
                {"r": run.run_id, "i": int(image_id), "n": int(matrix.shape[1]), "t": run.thresholds.get(name), "s": shots.tobytes(), "c": np.ascontiguousarray(matrix).tobytes()},
            )


def _rollup_groups(plan: _Plan) -> set[tuple[int, dt.date, str]]:
    groups = {(run.apparatus_id, run.day, run.sequence) for run in plan.runs}
    for run in plan.runs:
        groups |= {group for group in run.groups if group is not None}
    return groups


def _occupancy_matrix(lists: pa.ListArray, rows: np.ndarray, sites: int) -> np.ndarray:
    """The (len(rows), sites) boolean occupancy of the given rows of a list column."""
    return _list_matrix(lists, rows, sites, bool)


def _number_matrix(lists: pa.ListArray, rows: np.ndarray, sites: int) -> np.ndarray:
    """The (len(rows), sites) float64 values of the given rows of a counts column."""
    return _list_matrix(lists, rows, sites, np.float64)


def _list_matrix(lists: pa.ListArray, rows: np.ndarray, sites: int, dtype) -> np.ndarray:
    lengths = pc.fill_null(pc.list_value_length(lists), 0).to_numpy(zero_copy_only=False)
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    values = lists.flatten().to_numpy(zero_copy_only=False).astype(dtype, copy=False)
    return values[starts[rows][:, None] + np.arange(sites)[None, :]]


def _second_role(plan: _Plan, run: _Run) -> str:
    """The stored role of a run's second image: ``survival`` only when it shows the same
    atoms after a hold; ``rearranged`` when the sequence moves atoms in between."""
    return "survival" if plan.mapping.second_image_role(run.sequence) == "survival" else "rearranged"


def _counting_rows(plan: _Plan, batch: Batch) -> np.ndarray:
    """Which rows of the batch have a status that counts in figures (no status: ``ok``)."""
    if batch.status is None:
        return np.full(batch.length, "ok" in plan.mapping.counting_status)
    status = np.where(batch.status == None, "ok", batch.status).astype(str)  # noqa: E711
    return np.isin(status, list(plan.mapping.counting_status))


def _count_sites(plan: _Plan, batch: Batch, run_index: np.ndarray) -> None:
    """Add this batch's per-site loading and survival counts to each run's tally, from the
    shots whose status counts; the others are tallied as left out."""
    layout = plan.layout
    counting = _counting_rows(plan, batch)
    for position, rows in _group(run_index):
        run = plan.runs[position]
        run.excluded += int(np.count_nonzero(~counting[rows]))
    if layout.loading is None:
        return
    for position, rows in _group(run_index):
        run = plan.runs[position]
        rows = rows[counting[rows]]
        if not run.has_image.get(layout.loading) or len(rows) == 0:
            continue
        sites = run.image_sites[layout.loading]
        loaded = _occupancy_matrix(batch.occupancy[layout.loading], rows, sites)
        _add_counts(run, "fill", loaded.sum(axis=0), np.full(sites, len(rows), dtype=np.int64))
        _add_sums(run, "fill", ShotSums.of(loaded.sum(axis=1), np.full(len(rows), sites)))
        if layout.survival is not None and run.has_image.get(layout.survival) and run.image_sites[layout.survival] == sites and _second_role(plan, run) == "survival":
            kept = _occupancy_matrix(batch.occupancy[layout.survival], rows, sites)
            _add_counts(run, "survival", (loaded & kept).sum(axis=0), loaded.sum(axis=0))
            _add_sums(run, "survival", ShotSums.of((loaded & kept).sum(axis=1), loaded.sum(axis=1)))


def _add_sums(run: _Run, name: str, sums: ShotSums) -> None:
    run.shot_sums[name] = run.shot_sums[name] + sums if name in run.shot_sums else sums


def _add_counts(run: _Run, name: str, successes: np.ndarray, trials: np.ndarray) -> None:
    if name in run.site_counts:
        old_successes, old_trials = run.site_counts[name]
        successes, trials = old_successes + successes, old_trials + trials
    run.site_counts[name] = (successes.astype(np.int64), trials.astype(np.int64))


def _record_counting_status(writer: Writer, mapping: Mapping) -> None:
    """Keep the counting statuses in the catalogue's settings, so that figures derived later
    (``runlog derive``) leave out the same shots as ingest did."""
    import json

    value = json.dumps(sorted(mapping.counting_status))
    stored = writer.rows("SELECT value FROM settings WHERE key = 'counting_status'")
    if stored and stored[0][0] == value or (not stored and mapping.counting_status == ("ok",)):
        return
    writer.execute("DELETE FROM settings WHERE key = 'counting_status'")
    writer.execute("INSERT INTO settings (key, value) VALUES ('counting_status', :v)", {"v": value})


def _store_counting_figures(writer: Writer, plan: _Plan, interval: str) -> None:
    """Fill fraction, survival and loss of every run this file touched, from all its shots."""
    for run in plan.runs:
        if run.excluded:
            writer.execute("UPDATE runs SET excluded_shots = excluded_shots + :n WHERE id = :r", {"n": run.excluded, "r": run.run_id})
    if not any(run.site_counts for run in plan.runs):
        return
    from runlog.figures.counting import counted_figure, survival_figures
    from runlog.store.figures import read_shot_sums, read_site_counts, store_figures, store_site_counts

    for run in plan.runs:
        figures = []
        for name, (successes, trials) in run.site_counts.items():
            stored = read_site_counts(writer, run.run_id, name)
            sums = run.shot_sums[name]
            if stored is not None and len(stored[0]) == len(successes):
                successes, trials = successes + stored[0], trials + stored[1]
                earlier = read_shot_sums(writer, run.run_id, "fill_fraction" if name == "fill" else "survival")
                if earlier is not None:
                    sums = sums + earlier
            store_site_counts(writer, run.run_id, name, successes, trials)
            if sums.trials == 0:
                continue  # no loaded site: survival is undefined, and no figure is made up
            if name == "fill":
                figures.append(counted_figure("fill_fraction", sums, interval))
            else:
                figures.extend(survival_figures(sums, interval))
        if figures:
            store_figures(writer, run.run_id, "counting", figures, options={"interval": interval})


def _append_shot_parameters(writer, batch, run_index, shot_ids, columns, per_shot, ids) -> None:
    row_parts, id_parts, number_parts, text_parts = [], [], [], []
    for column in columns:
        values = batch.parameters[column.name]
        needed = per_shot[column.name][run_index]
        if not needed.any():
            continue
        pid, stored_unit, kind = ids.parameters[column.name]
        if kind == "text":
            keep = needed & (values != None)  # noqa: E711
            text_parts.append(pa.array(values[keep], pa.string()))
            number_parts.append(pa.nulls(int(keep.sum()), pa.float64()))
        else:
            keep = needed & ~np.isnan(values)
            number_parts.append(pa.array(converter(column.unit, stored_unit, ids.lab)(values[keep].astype(float)), pa.float64()))
            text_parts.append(pa.nulls(int(keep.sum()), pa.string()))
        row_parts.append(np.flatnonzero(keep))
        id_parts.append(np.full(int(keep.sum()), pid, dtype=np.int64))
    if not row_parts:
        return
    rows = np.concatenate(row_parts)
    shots = shot_ids[rows]
    pids = np.concatenate(id_parts)
    order = pa.array(np.lexsort((pids, shots)))
    table = {
        "shot_id": shots,
        "parameter_id": pids,
        "number_value": pa.concat_arrays(number_parts),
        "text_value": pa.concat_arrays(text_parts),
    }
    if writer.partitioned:
        table["time"] = _times(batch.time_us[rows])
    writer.append("shot_parameters", pa.table(table).take(order))


def _append_measurements(writer, batch, shot_ids, columns, ids) -> None:
    """One wide row per shot that has any measured value; NaN becomes NULL (missing)."""
    if not columns:
        return
    data: dict[str, pa.Array] = {}
    present = np.zeros(batch.length, dtype=bool)
    for column in columns:
        mid, stored_unit = ids.measurements[column.name]
        values = converter(column.unit, stored_unit, ids.lab)(batch.measurements[column.name])
        missing = np.isnan(values)
        present |= ~missing
        data[measurement_column(mid)] = values, missing
    if not present.any():
        return
    keep = None if present.all() else present
    # One plain table keyed by shot id on both backends (revision 0017): no time here.
    table = {"shot_id": shot_ids if keep is None else shot_ids[keep]}
    for name, (values, missing) in data.items():
        if keep is not None:
            values, missing = values[keep], missing[keep]
        table[name] = pa.array(values, pa.float64(), mask=missing if missing.any() else None)
    writer.append("shot_measurements", pa.table(table))


def _storable(text: str | None) -> str | None:
    # A refusal quotes what the file held (and its name): control characters are escaped,
    # so a NUL (PostgreSQL cannot store it) never reaches the log and a newline in a file
    # name cannot forge lines of the output.
    return None if text is None else "".join(c if c >= " " and c != "\x7f" else repr(c)[1:-1] for c in text)


def _log(engine: Engine, result: IngestResult, sha: str, size: int, started: dt.datetime, read_s: float, write_s: float, writer: Writer | None = None) -> int | None:
    """Write the ingest-log entry (inside the writer's transaction when given; its id then)."""
    row = {
        "file": _storable(result.file),
        "sha256": sha,
        "size": size,
        "status": result.status,
        "reason": _storable(result.reason),
        "runs": ",".join(result.runs) or None,
        "shots": result.shots,
        "started_at": started,
        "finished_at": dt.datetime.now(dt.timezone.utc),
        "read_seconds": read_s,
        "write_seconds": write_s,
    }
    if writer is not None:
        columns = ", ".join(row)
        return int(writer.rows(f"INSERT INTO ingest_log ({columns}) VALUES ({', '.join(':' + c for c in row)}) RETURNING id", row)[0][0])
    with engine.begin() as connection:
        connection.execute(insert(IngestLogEntry), row)
    return None


def ingest_file(engine: Engine, path: Path, mapping: Mapping, progress: Progress | None = None, after_write: Callable | None = None) -> IngestResult:
    """Ingest one file in one transaction; every refusal becomes a result, not an exception."""
    started = dt.datetime.now(dt.timezone.utc)
    name = str(path)
    sha, size = "", 0
    read_s = write_s = 0.0
    try:
        before, sha, size = hash_file(path)
        tick = time.perf_counter()
        layout = read_layout(name, _open(path).schema_arrow, mapping)
        # Text columns are read as dictionaries: a run key repeats over all its shots.
        text_columns = [c.source for c in layout.columns if c.role in ("reserved", "optional") and c.name not in ("shot", "time")]
        text_columns += [c.source for c in layout.by_role("parameter") if c.kind == "text"]
        parquet = _open(path, text_columns)
        plan = _Plan(path, layout, mapping)
        # Checked batches are kept for the write while they fit a fixed budget, so a small
        # file is read once; a larger one is read again, and memory stays bounded either way.
        kept: list[tuple[int, Batch]] | None = []
        kept_bytes = 0
        for first_row, batch in _batches(path, parquet, layout):
            plan.add(batch)
            if kept is not None:
                kept_bytes += batch.nbytes()
                if kept_bytes <= KEEP_BYTES:
                    kept.append((first_row, batch))
                else:
                    kept = None
        plan.finish()
        read_s = time.perf_counter() - tick
        tick = time.perf_counter()
        _add_measurements(engine, layout)
        writer = open_writer(engine, plan.months)
        try:
            if writer.rows("SELECT 1 FROM ingest_log WHERE sha256 = :h AND status = 'ingested'", {"h": sha}):
                return IngestResult(name, "already-present", tuple(r.key for r in plan.runs), plan.rows)
            ids = _Catalogue(writer, name, mapping.units)
            _write_runs(writer, plan, ids)
            batches = kept if kept is not None else _batches(path, parquet, layout)
            shots, first_id = _write_shots(writer, path, batches, plan, ids, progress)
            _store_photon_counts(writer, plan)
            _record_counting_status(writer, mapping)
            _store_counting_figures(writer, plan, mapping.interval)
            series_keys.refresh(writer, [run.run_id for run in plan.runs])
            refresh_rollups(writer, _rollup_groups(plan))
            if after_write is not None:
                after_write(writer, [run.run_id for run in plan.runs])
            write_s = time.perf_counter() - tick
            result = IngestResult(name, "ingested", tuple(r.key for r in plan.runs), shots)
            _unchanged_since(path, before)
            log_id = _log(engine, result, sha, size, started, read_s, write_s, writer)
            _record_files(writer, plan, int(log_id), first_id)
            commit_file(writer)
            return result
        finally:
            writer.close()
    except Exception as error:  # noqa: BLE001 - any failure of one file is that file's refusal
        return record_refusal(engine, name, error, sha, size, started, read_s, write_s)


def commit_file(writer) -> None:
    """Commit one file's write transaction (shots or monitor values)."""
    if os.environ.get("RUNLOG_TEST_PAUSE_BEFORE_COMMIT"):
        # Lets the crash tests kill the process with the transaction still open.
        time.sleep(float(os.environ["RUNLOG_TEST_PAUSE_BEFORE_COMMIT"]))
    writer.commit()


def record_refusal(engine: Engine, name: str, error: Exception, sha: str, size: int, started: dt.datetime, read_s: float, write_s: float) -> IngestResult:
    """The refusal of one file as a result, written to the ingest log when the catalogue can take it."""
    if isinstance(error, ContractError):
        result = IngestResult(name, "refused", reason=_storable(str(error)), cause="contract")
    else:
        failure = describe(error, doing="writing this file")
        result = IngestResult(name, "refused", reason=_storable(f"{name}: {failure.message}"), cause=failure.kind)
    try:
        _log(engine, result, sha, size, started, read_s, write_s)
    except Exception as error:  # noqa: BLE001 - a catalogue that cannot take the refusal either
        failure = describe(error, doing="recording the refusal")
        if result.cause in ("contract", "data"):
            result = replace(result, reason=f"{result.reason} (not recorded in the ingest log: {failure.message})")
    return result


def ingest_files(engine: Engine, paths: Iterable[str | Path], mapping: Mapping | None = None, progress: Progress | None = None, after_write: Callable | None = None, apparatus: str | None = None) -> list[IngestResult]:
    """Ingest every file (folders give their ``*.parquet`` and ``*.csv``); one result per file, in order.

    ``apparatus`` is that of monitor tables without an apparatus column (before the
    ``[defaults]`` of the mapping)."""
    from runlog.monitors.contract import is_monitor_table
    from runlog.monitors.ingest import ingest_monitor_file

    mapping = mapping or Mapping()
    results = []
    for raw in paths:
        files = expand_paths([raw])
        if not files:
            # A folder without shot tables is a mistake worth saying so (a wrong day's
            # folder, files not yet copied): a refusal of the folder, never a silent success.
            results.append(IngestResult(str(raw), "refused", reason=one_line(f"{raw}: no *.parquet or *.csv files in this folder"), cause="contract"))
            continue
        # Monitor tables are told apart by the contract (or runlog.toml's [monitors] files rule).
        results.extend(ingest_monitor_file(engine, path, mapping, apparatus) if is_monitor_table(path, mapping) else ingest_file(engine, path, mapping, progress, after_write) for path in files)
    return results
