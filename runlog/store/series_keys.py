"""Stored series keys: each current run's fingerprint of its constant settings.

A run's reference series is its sequence plus a fingerprint of its constant settings
(defined in :mod:`runlog.drift.reference`). Computing it needs every run of the sequence
(a parameter that takes a new value in most runs is not a setting), so it is kept in the
store instead of being rebuilt from ``run_parameters`` by every drift query:

* ``run_settings``: per run version, its parameters as the series sees them (constants
  rounded at the declared tolerance, the names of scanned ones, declared ``vary``
  parameters left out);
* ``sequence_series``: per apparatus and sequence, the parameters left out as varying
  (found by one SQL aggregate over ``run_settings``) and the hash of the declaration
  (``vary``, ``tolerance``) all of it was computed with;
* ``runs.series_fingerprint``: the fingerprint of every current run;
* ``series_rollups``: per day and series, the counts a drift point needs (refreshed with
  the daily rollups of :mod:`runlog.store.rollups`, and here for the days whose runs
  changed series).

They are written in the transaction that changes what they depend on: an ingest, a
switch of the current analysis version, a withdrawal or restore (:func:`refresh`), and a
new declaration (:func:`rebuild`, only when ``vary`` or ``tolerance`` changed). The
migration to revision 0014 fills them for existing catalogues. A reader that finds a
sequence computed under another declaration, or a current run without a fingerprint,
computes the series from the parameters instead (:func:`fresh`).

``db`` below is a writer of :mod:`runlog.store.bulk` or anything with its ``rows`` and
``execute`` (:func:`over` wraps a SQLAlchemy connection).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections import defaultdict
from collections.abc import Iterable
from dataclasses import dataclass

from sqlalchemy import text

__all__ = ["DEFAULT_TOLERANCE", "Declaration", "declaration_key", "read_declaration", "basis_of", "rounded", "setting_of", "fingerprint", "varying_of", "over", "refresh", "rebuild", "fresh"]

DEFAULT_TOLERANCE = 1e-3
#: A parameter with more distinct constant values than this, and than this share of a
#: sequence's runs, is not a setting (a counter, a time stamp).
VARYING_VALUES = 10
VARYING_SHARE = 0.2
_CHUNK = 500


@dataclass(frozen=True)
class Declaration:
    """What a lab declared for one apparatus (or the defaults)."""

    sequence: str | None = None
    vary: frozenset[str] = frozenset()
    tolerance: float = DEFAULT_TOLERANCE

    def as_dict(self) -> dict[str, object]:
        return {"sequence": self.sequence, "vary": sorted(self.vary), "tolerance": self.tolerance}


def declaration_key(apparatus_id: int) -> str:
    return f"reference.{apparatus_id}"


def parse_declaration(raw: str | None) -> Declaration:
    if not raw:
        return Declaration()
    data = json.loads(raw)
    return Declaration(data.get("sequence"), frozenset(data.get("vary", [])), float(data.get("tolerance", DEFAULT_TOLERANCE)))


def read_declaration(db, apparatus_id: int) -> Declaration:
    found = db.rows("SELECT value FROM settings WHERE key = :k", {"k": declaration_key(apparatus_id)})
    return parse_declaration(found[0][0] if found else None)


def basis_of(declaration: Declaration) -> str:
    """The hash of what a fingerprint depends on in a declaration (not its sequence)."""
    canonical = json.dumps({"vary": sorted(declaration.vary), "tolerance": repr(float(declaration.tolerance))}, sort_keys=True)
    return hashlib.sha256(canonical.encode()).hexdigest()[:16]


def rounded(value: float, tolerance: float) -> str:
    """``value`` rounded to the relative ``tolerance``, as plain decimal text."""
    if value == 0 or not math.isfinite(value):
        return repr(float(value))
    quantum = tolerance * 10 ** math.floor(math.log10(abs(value)))
    result = round(value / quantum) * quantum
    decimals = max(0, -int(math.floor(math.log10(quantum))))
    shown = f"{result:.{decimals}f}"
    return shown.rstrip("0").rstrip(".") if "." in shown else shown


def setting_of(name: str, scanned, number, text_value, declaration: Declaration) -> tuple[bool, bool, str | None] | None:
    """One ``run_parameters`` row as the series sees it: (scanned, with_unit, value), or None
    when it is left out (declared to vary, or without a value)."""
    if name in declaration.vary:
        return None
    if scanned:
        return True, False, None
    if number is not None:
        return False, True, rounded(float(number), declaration.tolerance)
    if text_value is not None:
        return False, False, text_value
    return None


def fingerprint(kept: dict[str, str], scanned: Iterable[str]) -> str:
    """Eight hex digits of the sha256 of the kept constants and the scanned names."""
    canonical = json.dumps([sorted(kept.items()), sorted(scanned)])
    return hashlib.sha256(canonical.encode()).hexdigest()[:8]


def varying_of(value_counts: Iterable[tuple[str, int]], runs: int) -> list[str]:
    """The parameters that take a new value in most runs: (name, distinct values) pairs of
    a sequence with ``runs`` current runs."""
    return sorted(name for name, count in value_counts if count > VARYING_VALUES and count > VARYING_SHARE * runs)


class _Connection:
    """A SQLAlchemy connection with the writer's ``rows``/``execute``/``append``."""

    def __init__(self, connection):
        self._connection = connection

    def rows(self, sql: str, params: dict | None = None) -> list[tuple]:
        return [tuple(row) for row in self._connection.execute(text(sql), params or {})]

    def execute(self, sql: str, params: dict | None = None) -> None:
        self._connection.execute(text(sql), params or {})

    def append(self, table: str, data) -> None:
        if data.num_rows:
            columns = data.column_names
            self._connection.execute(text(f"INSERT INTO {table} ({', '.join(columns)}) VALUES ({', '.join(':' + c for c in columns)})"), data.to_pylist())


def over(connection):
    """``connection`` as a ``db``: writers are used as they are."""
    return connection if hasattr(connection, "rows") else _Connection(connection)


def _chunks(ids: list[int]):
    for start in range(0, len(ids), _CHUNK):
        yield ", ".join(str(int(i)) for i in ids[start : start + _CHUNK])


def _write_settings(db, declaration: Declaration, where: str, params: dict) -> None:
    """Rewrite ``run_settings`` of the runs ``where`` selects (SQL over ``runs r``)."""
    import pyarrow as pa

    db.execute(f"DELETE FROM run_settings WHERE run_id IN (SELECT r.id FROM runs r WHERE {where})", params)
    rows = {"run_id": [], "parameter_id": [], "scanned": [], "with_unit": [], "value": []}
    for run_id, parameter_id, name, scanned, number, text_value in db.rows(
        "SELECT rp.run_id, rp.parameter_id, p.name, rp.scanned, rp.number_value, rp.text_value FROM run_parameters rp "
        f"JOIN parameters p ON p.id = rp.parameter_id WHERE rp.run_id IN (SELECT r.id FROM runs r WHERE {where})",
        params,
    ):
        setting = setting_of(name, bool(scanned), number, text_value, declaration)
        if setting is None:
            continue
        for column, value in zip(rows, (int(run_id), int(parameter_id), *setting)):
            rows[column].append(value)
    schema = pa.schema([("run_id", pa.int64()), ("parameter_id", pa.int64()), ("scanned", pa.bool_()), ("with_unit", pa.bool_()), ("value", pa.string())])
    db.append("run_settings", pa.Table.from_pydict(rows, schema=schema))


def _varying(db, apparatus_id: int, sequence: str) -> list[str]:
    params = {"a": apparatus_id, "q": sequence}
    runs = int(db.rows("SELECT COUNT(*) FROM runs r WHERE r.apparatus_id = :a AND r.sequence = :q AND r.is_current", params)[0][0])
    counts = db.rows(
        "SELECT p.name, COUNT(DISTINCT s.value) FROM run_settings s JOIN runs r ON r.id = s.run_id JOIN parameters p ON p.id = s.parameter_id "
        "WHERE r.apparatus_id = :a AND r.sequence = :q AND r.is_current AND NOT s.scanned GROUP BY p.name",
        params,
    )
    return varying_of(((name, int(count)) for name, count in counts), runs)


def _set_fingerprints(db, apparatus_id: int, sequence: str, varying: list[str], run_ids: list[int] | None) -> None:
    """Store the fingerprint of the current runs ``run_ids`` of the sequence (None: all),
    and refresh the series rollups of the days whose runs changed series."""
    from runlog.store.rollups import refresh_series_rollups

    params = {"a": apparatus_id, "q": sequence}
    base = "FROM runs r WHERE r.apparatus_id = :a AND r.sequence = :q AND r.is_current"
    if run_ids is None:
        wheres = [""]
    else:
        if not run_ids:
            return
        wheres = [f" AND r.id IN ({chunk})" for chunk in _chunks(sorted(run_ids))]
    left_out = set(varying)
    changed: dict[str, list[int]] = defaultdict(list)
    days = set()
    for where in wheres:
        stored = {int(run_id): (fp, day) for run_id, fp, day in db.rows(f"SELECT r.id, r.series_fingerprint, r.day {base}{where}", params)}
        kept: dict[int, dict[str, str]] = {run_id: {} for run_id in stored}
        scanned: dict[int, list[str]] = {run_id: [] for run_id in stored}
        for run_id, name, is_scanned, value in db.rows(f"SELECT s.run_id, p.name, s.scanned, s.value FROM run_settings s JOIN parameters p ON p.id = s.parameter_id WHERE s.run_id IN (SELECT r.id {base}{where})", params):
            if is_scanned:
                scanned[int(run_id)].append(name)
            elif name not in left_out:
                kept[int(run_id)][name] = value
        for run_id, (old, day) in stored.items():
            new = fingerprint(kept[run_id], scanned[run_id])
            if new != old:
                changed[new].append(run_id)
                if day is not None:
                    days.add(day)
    for new, ids in changed.items():
        for chunk in _chunks(ids):
            db.execute(f"UPDATE runs SET series_fingerprint = :f WHERE id IN ({chunk})", {"f": new})
    refresh_series_rollups(db, {(apparatus_id, day, sequence) for day in days})


def _sequence(db, apparatus_id: int, sequence: str, basis: str, run_ids: list[int] | None, stored: dict[str, str]) -> None:
    """Bring one sequence's varying parameters and fingerprints up to date; ``run_ids``
    are the runs whose settings changed (None: all of them)."""
    varying = _varying(db, apparatus_id, sequence)
    shown = json.dumps(varying)
    if stored.get(sequence) != shown:
        # Another set of varying parameters changes every run's fingerprint.
        db.execute("DELETE FROM sequence_series WHERE apparatus_id = :a AND sequence = :q", {"a": apparatus_id, "q": sequence})
        db.execute("INSERT INTO sequence_series (apparatus_id, sequence, basis, varying) VALUES (:a, :q, :b, :v)", {"a": apparatus_id, "q": sequence, "b": basis, "v": shown})
        run_ids = None
    _set_fingerprints(db, apparatus_id, sequence, varying, run_ids)


def rebuild(db, apparatus_id: int | None = None) -> None:
    """Recompute every run's settings and every current run's fingerprint, of one
    apparatus or of all (after a new declaration, and by the migration)."""
    ids = [apparatus_id] if apparatus_id is not None else [int(a) for (a,) in db.rows("SELECT id FROM apparatus ORDER BY id")]
    for one in ids:
        declaration = read_declaration(db, one)
        basis = basis_of(declaration)
        _write_settings(db, declaration, "r.apparatus_id = :a", {"a": one})
        db.execute("DELETE FROM sequence_series WHERE apparatus_id = :a", {"a": one})
        for (sequence,) in db.rows("SELECT DISTINCT sequence FROM runs WHERE apparatus_id = :a ORDER BY sequence", {"a": one}):
            _sequence(db, one, sequence, basis, None, {})


def refresh(db, run_ids: Iterable[int]) -> None:
    """After the run versions ``run_ids`` were written, became current or stopped being
    current: their settings, and the fingerprints of their sequences' current runs."""
    ids = sorted({int(r) for r in run_ids})
    by_apparatus: dict[int, dict[str, list[int]]] = defaultdict(lambda: defaultdict(list))
    for chunk in _chunks(ids):
        for run_id, apparatus_id, sequence in db.rows(f"SELECT id, apparatus_id, sequence FROM runs WHERE id IN ({chunk})"):
            by_apparatus[int(apparatus_id)][sequence].append(int(run_id))
    for apparatus_id, sequences in sorted(by_apparatus.items()):
        declaration = read_declaration(db, apparatus_id)
        basis = basis_of(declaration)
        rows = db.rows("SELECT sequence, basis, varying FROM sequence_series WHERE apparatus_id = :a", {"a": apparatus_id})
        if any(b != basis for _, b, _ in rows):
            rebuild(db, apparatus_id)
            continue
        stored = {sequence: varying for sequence, _, varying in rows}
        for sequence, members in sorted(sequences.items()):
            for chunk in _chunks(members):
                _write_settings(db, declaration, f"r.id IN ({chunk})", {})
            _sequence(db, apparatus_id, sequence, basis, members, stored)


def fresh(db, apparatus_id: int, declaration: Declaration) -> dict[str, list[str]] | None:
    """The varying parameters of each sequence of the apparatus when the stored keys were
    computed under ``declaration``, else None (compute them from the parameters)."""
    basis = basis_of(declaration)
    rows = db.rows("SELECT sequence, basis, varying FROM sequence_series WHERE apparatus_id = :a", {"a": apparatus_id})
    if any(b != basis for _, b, _ in rows):
        return None
    return {sequence: json.loads(varying) for sequence, _, varying in rows}
