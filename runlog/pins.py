"""Pinned selections: the shots a filter chose, frozen for a paper or a thesis.

A pin records, in one transaction that reads one snapshot of the catalogue, the filter
text, the exact shots it selected (their ids), the analysis version of each run they
belong to, the figure records then in force and the run's exported fields (times, lab
day, operator, tags). Nothing a pin names is ever changed or deleted (run versions and
figure records are immutable; a withdrawal only hides), so :func:`pinned_selection`
gives the same shots, and an export of the pin the same bytes, however the catalogue
moved on: newer analysis versions becoming current, figures derived again, tags added.

:func:`pins` lists the pins with what the catalogue as it stands would change in each:
per run and figure, the pinned record against the record in force for the run's current
version, with the difference in combined standard errors (:func:`runlog.impact.sigma`).
"""

from __future__ import annotations

import datetime as dt
import json
import zlib
from dataclasses import dataclass

import numpy as np
from sqlalchemy import text
from sqlalchemy.engine import Engine

from runlog.errors import NotFoundError, StoreError
from runlog.impact import sigma
from runlog.selection import Selection, select_on, select_versions

__all__ = ["PinnedRun", "Pin", "make_pin", "pins", "load_pin", "changes", "withdrawn_since", "other_versions_pinned", "pinned_selection", "run_fields", "thawed", "pack_ids", "unpack_ids"]


def pack_ids(ids: np.ndarray) -> bytes:
    """Sorted shot ids as zlib-compressed little-endian int64 differences (a run's ids
    are mostly consecutive, so the differences are mostly 1 and compress ~1000x)."""
    ordered = np.sort(np.asarray(ids, dtype=np.int64))
    return zlib.compress(np.diff(ordered, prepend=0).astype("<i8").tobytes(), 6)


def unpack_ids(blob: bytes) -> np.ndarray:
    return np.cumsum(np.frombuffer(zlib.decompress(blob), dtype="<i8")).astype(np.int64)


@dataclass(frozen=True)
class PinnedRun:
    """One run version of a pin: its shots and the figure records in force then."""

    run_id: int
    analysis: str
    shot_count: int
    shot_ids: np.ndarray
    records: tuple[int, ...]
    fields: dict[str, object] | None  # the run's exported fields at pin time (None: before 0011)


@dataclass(frozen=True)
class Pin:
    id: int
    name: str
    where: str
    created_at: dt.datetime
    author: str | None
    runlog_version: str
    shots: int
    runs: tuple[PinnedRun, ...]


def _rows(connection, sql: str, params: dict | None = None) -> list[tuple]:
    return [tuple(row) for row in connection.execute(text(sql), params or {})]


def _iso(value) -> str | None:
    from runlog.store.rollups import as_date, as_datetime

    if value is None:
        return None
    if isinstance(value, (dt.datetime, int)):
        return as_datetime(value).isoformat()
    return as_date(value).isoformat()


def run_fields(connection, run_ids: list[int]) -> dict[int, dict[str, object]]:
    """The exported fields of run versions: key, apparatus, analysis, sequence, started,
    finished, lab day, operator, notes, tags (sorted, comma-separated), shot count and the
    shots left out of the figures by their status."""
    from runlog.selection import id_in
    from runlog.store import schema as s
    from sqlalchemy import select

    runs, apparatus, tags = s.Run.__table__, s.Apparatus.__table__, s.RunTag.__table__
    out: dict[int, dict[str, object]] = {}
    for start in range(0, len(run_ids), 10_000):
        chunk = run_ids[start : start + 10_000]
        for r in connection.execute(
            select(runs.c.id, runs.c.key, apparatus.c.name, runs.c.analysis, runs.c.sequence, runs.c.started, runs.c.finished, runs.c.day, runs.c.operator, runs.c.notes, runs.c.shot_count, runs.c.excluded_shots)
            .join(apparatus, apparatus.c.id == runs.c.apparatus_id)
            .where(id_in(runs.c.id, chunk))
        ):
            out[int(r.id)] = {
                "run": r.key,
                "apparatus": r.name,
                "analysis": r.analysis,
                "sequence": r.sequence,
                "started": r.started,
                "finished": r.finished,
                "day": r.day,
                "operator": r.operator,
                "notes": r.notes,
                "tags": [],
                "shots": int(r.shot_count or 0),
                "excluded_shots": int(r.excluded_shots or 0),
            }
        for run_id, tag in connection.execute(select(tags.c.run_id, tags.c.tag).where(id_in(tags.c.run_id, chunk))):
            out[int(run_id)]["tags"].append(tag)
    for fields in out.values():
        fields["tags"] = ",".join(sorted(fields["tags"])) or None
    return out


def _frozen(fields: dict[str, object]) -> str:
    return json.dumps({k: (_iso(v) if k in ("started", "finished", "day") else v) for k, v in fields.items()}, sort_keys=True)


def thawed(text_value: str | None) -> dict[str, object] | None:
    """The run fields a pin froze, with times and the lab day as Python values again."""
    if not text_value:
        return None
    fields = json.loads(text_value)
    for key in ("started", "finished"):
        fields[key] = dt.datetime.fromisoformat(fields[key])
    if fields.get("day") is not None:
        fields["day"] = dt.date.fromisoformat(fields["day"])
    return fields


def make_pin(engine: Engine, name: str, where: str, *, author: str | None = None) -> Pin:
    """Freeze the shots ``where`` selects now under ``name`` (unique); returns the pin.

    The selection is read and the pin written in one transaction: on SQLite it takes the
    write lock first (``BEGIN IMMEDIATE``), so no ingest lands between the read and the
    write; on PostgreSQL it reads one snapshot (repeatable read) and the pin names only
    run versions and records of that snapshot, which nothing deletes.
    """
    from runlog import __version__

    if not name or not name.strip():
        raise ValueError("a pin needs a name")
    if not where or not where.strip():
        raise ValueError("a pin needs a filter (--where); 'shot >= 0' selects every shot")
    name = name.strip()
    options = {"isolation_level": "REPEATABLE READ"} if engine.dialect.name == "postgresql" else {"sqlite_begin": "IMMEDIATE"}
    with engine.connect().execution_options(**options) as connection:
        with connection.begin():
            if _rows(connection, "SELECT 1 FROM pins WHERE name = :n", {"n": name}):
                raise StoreError(f"a pin named '{name}' exists already: pins are never changed, choose another name")
            selection = select_on(connection, where, shot_ids=True)
            if selection.table.num_rows == 0:
                raise StoreError(f"the filter selects no shots: nothing to pin ({where})")
            assert selection.shot_ids is not None
            run_ids = sorted({int(r) for r in np.unique(selection.run_ids)})
            fields = run_fields(connection, run_ids)
            records: dict[int, list[int]] = {}
            for start in range(0, len(run_ids), 10_000):
                chunk = ",".join(str(r) for r in run_ids[start : start + 10_000])
                for run_id, record_id in _rows(connection, f"SELECT run_id, record_id FROM figures WHERE run_id IN ({chunk}) AND record_id IS NOT NULL"):
                    records.setdefault(int(run_id), []).append(int(record_id))
            now = dt.datetime.now(dt.timezone.utc)
            pin_id = int(
                _rows(
                    connection,
                    "INSERT INTO pins (name, where_text, created_at, author, runlog_version, shots, runs) VALUES (:n, :w, :at, :who, :v, :shots, :runs) RETURNING id",
                    {"n": name, "w": where, "at": _bind_time(connection, now), "who": author, "v": __version__, "shots": int(selection.table.num_rows), "runs": len(run_ids)},
                )[0][0]
            )
            order = np.argsort(selection.run_ids, kind="stable")
            run_of, ids_of = selection.run_ids[order], selection.shot_ids[order]
            edges = np.flatnonzero(np.diff(run_of)) + 1
            for ids, run_id in zip(np.split(ids_of, edges), run_of[np.r_[0, edges]] if len(run_of) else []):
                run_id = int(run_id)
                connection.execute(
                    text(
                        "INSERT INTO pin_runs (pin_id, run_id, analysis, shot_count, shots, shot_ids, figure_records, run_fields) "
                        "VALUES (:p, :r, :a, :count, :shots, :ids, :records, :fields)"
                    ),
                    {
                        "p": pin_id,
                        "r": run_id,
                        "a": fields[run_id]["analysis"],
                        "count": fields[run_id]["shots"],
                        "shots": len(ids),
                        "ids": pack_ids(ids),
                        "records": ",".join(str(r) for r in sorted(records.get(run_id, []))),
                        "fields": _frozen(fields[run_id]),
                    },
                )
        return load_pin(connection, name)


def _bind_time(connection, value: dt.datetime):
    from runlog.store.schema import to_epoch_us

    return to_epoch_us(value) if connection.dialect.name == "sqlite" else value


def load_pin(connection, name: str) -> Pin:
    from runlog.store.rollups import as_datetime

    found = _rows(connection, "SELECT id, name, where_text, created_at, author, runlog_version, shots FROM pins WHERE name = :n", {"n": name})
    if not found:
        known = [n for (n,) in _rows(connection, "SELECT name FROM pins ORDER BY name")]
        raise NotFoundError("pin", name, f"pins: {', '.join(known)}" if known else "no pins yet (runlog pin NAME --where EXPR)")
    pin_id, pin_name, where, created_at, author, version, shots = found[0]
    runs = tuple(
        PinnedRun(int(run_id), analysis, int(count), unpack_ids(bytes(blob)), tuple(int(r) for r in (records or "").split(",") if r), thawed(frozen))
        for run_id, analysis, count, blob, records, frozen in _rows(
            connection, "SELECT run_id, analysis, shot_count, shot_ids, figure_records, run_fields FROM pin_runs WHERE pin_id = :p ORDER BY run_id", {"p": pin_id}
        )
    )
    return Pin(int(pin_id), pin_name, where, as_datetime(created_at), author, version, int(shots), runs)


def pinned_selection(connection, pin: Pin, monitors=()) -> Selection:
    """The pin's shots, in the table a filter gives (:func:`runlog.selection.select_versions`)."""
    ids = np.concatenate([run.shot_ids for run in pin.runs]) if pin.runs else np.zeros(0, np.int64)
    return select_versions(connection, [run.run_id for run in pin.runs], ids, pin.where, tuple(monitors))


_RECORD = "SELECT id, name, value, stderr, unit, analysis FROM figure_records WHERE id IN ({ids}) ORDER BY id"


def _records(connection, ids: list[int]) -> dict[str, tuple]:
    if not ids:
        return {}
    return {row[1]: row for row in _rows(connection, _RECORD.format(ids=",".join(str(int(i)) for i in ids)))}


def changes(connection, pin: Pin) -> list[dict[str, object]]:
    """What the catalogue as it stands would change in the pin: for every pinned run
    whose current version or figures in force differ from the pinned ones, one entry per
    figure in the form of the impact report (``runlog.impact``): old (pinned) and new
    (in force now) value ± stderr with their analysis versions, and ``sigma``."""
    out = []
    for run in pin.runs:
        key_row = _rows(connection, "SELECT r.apparatus_id, r.key, a.name FROM runs r JOIN apparatus a ON a.id = r.apparatus_id WHERE r.id = :r", {"r": run.run_id})[0]
        current = _rows(connection, "SELECT id, analysis FROM runs WHERE apparatus_id = :a AND key = :k AND is_current", {"a": key_row[0], "k": key_row[1]})
        now_ids = [] if not current else [int(r) for (r,) in _rows(connection, "SELECT record_id FROM figures WHERE run_id = :r AND record_id IS NOT NULL", {"r": current[0][0]})]
        if current and int(current[0][0]) == run.run_id and sorted(now_ids) == sorted(run.records):
            continue
        old_rows, new_rows = _records(connection, list(run.records)), _records(connection, now_ids)
        for name in sorted(set(old_rows) | set(new_rows)):
            old, new = old_rows.get(name), new_rows.get(name)
            if old is not None and new is not None and old[0] == new[0]:
                continue
            entry: dict[str, object] = {
                "run": key_row[1],
                "apparatus": key_row[2],
                "figure": name,
                "old": None if old is None else {"value": old[2], "stderr": old[3], "analysis": run.analysis, "unit": old[4] or "", "record": int(old[0])},
                "new": None if new is None else {"value": new[2], "stderr": new[3], "analysis": current[0][1], "unit": new[4] or "", "record": int(new[0])},
                "sigma": None,
                "withdrawn": not current,
            }
            if old is not None and new is not None:
                entry["difference"] = new[2] - old[2]
                entry["sigma"] = sigma(old[2], old[3], new[2], new[3])
            out.append(entry)
    return out


def withdrawn_since(connection, pin: Pin) -> list[dict[str, object]]:
    """The pinned run versions withdrawn since (``runlog withdraw``): the pin still exports
    them as pinned, and says so."""
    out = []
    for run in pin.runs:
        row = _rows(connection, "SELECT r.key, a.name, r.analysis, r.withdrawn FROM runs r JOIN apparatus a ON a.id = r.apparatus_id WHERE r.id = :r", {"r": run.run_id})[0]
        if row[3]:
            out.append({"run": row[0], "apparatus": row[1], "analysis": row[2]})
    return out


def other_versions_pinned(connection, run_ids: list[int]) -> list[dict[str, object]]:
    """For run versions about to be exported by a filter: the pins that hold another
    analysis version of the same runs (what a fresh export differs from), by pin and run."""
    out = []
    for start in range(0, len(run_ids), 5000):
        chunk = ",".join(str(int(r)) for r in run_ids[start : start + 5000])
        out += [
            {"pin": pin, "run": key, "apparatus": apparatus, "pinned_analysis": pinned, "exported_analysis": exported}
            for pin, key, apparatus, pinned, exported in _rows(
                connection,
                "SELECT p.name, r.key, a.name, old.analysis, r.analysis FROM runs r JOIN apparatus a ON a.id = r.apparatus_id "
                "JOIN runs old ON old.apparatus_id = r.apparatus_id AND old.key = r.key AND old.id <> r.id "
                f"JOIN pin_runs pr ON pr.run_id = old.id JOIN pins p ON p.id = pr.pin_id WHERE r.id IN ({chunk})",
            )
        ]
    return sorted(out, key=lambda e: (e["pin"], e["apparatus"], e["run"]))


def pins(connection) -> list[dict[str, object]]:
    """Every pin, by name: filter, when, by whom, shots, runs, the analysis versions it
    holds, and ``changes`` (see :func:`changes`)."""
    out = []
    for (name,) in _rows(connection, "SELECT name FROM pins ORDER BY name"):
        pin = load_pin(connection, name)
        versions = []
        for run in pin.runs:
            fields = run.fields or {}
            if not fields:
                row = _rows(connection, "SELECT r.key, a.name FROM runs r JOIN apparatus a ON a.id = r.apparatus_id WHERE r.id = :r", {"r": run.run_id})[0]
                fields = {"run": row[0], "apparatus": row[1]}
            versions.append({"run": fields["run"], "apparatus": fields["apparatus"], "analysis": run.analysis, "shots": len(run.shot_ids), "figure_records": list(run.records)})
        out.append(
            {
                "name": pin.name,
                "where": pin.where,
                "created_at": pin.created_at.isoformat(),
                "author": pin.author,
                "runlog_version": pin.runlog_version,
                "shots": pin.shots,
                "runs": len(pin.runs),
                "versions": sorted(versions, key=lambda v: (v["apparatus"], v["run"])),
                "changes": changes(connection, pin),
                "withdrawn_since": withdrawn_since(connection, pin),
            }
        )
    return out
