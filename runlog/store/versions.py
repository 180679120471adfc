"""Analysis versions of runs in the store: which one is current, withdrawals and restores.

A run (apparatus, key) has one ``runs`` row per analysis version; exactly one of them is
current (``is_current``) unless the run is withdrawn. Owned here, on the writer of
:mod:`runlog.store.bulk` so that each change is one transaction with the rollups it moves:

* :func:`use_version`: make another version current;
* :func:`withdraw` / :func:`restore`: take a file's run versions, or a whole run, out of
  the catalogue (figures, rollups, drift, selections and exports no longer see them) and
  bring them back exactly, with the reason, the author and the times in ``withdrawals``;
* :func:`versions`: every version of a run, with the files it came from.

Nothing here deletes a row: a withdrawn version keeps its shots and figure records.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from dataclasses import dataclass

from runlog.errors import NotFoundError, StoreError
from runlog.store.bulk import Writer
from runlog.store import series_keys
from runlog.store.rollups import as_date, as_datetime, refresh_rollups

__all__ = ["Version", "versions", "use_version", "withdraw", "restore", "withdrawals"]


@dataclass(frozen=True)
class Version:
    """One analysis version of a run, as ``runlog show`` lists it."""

    id: int
    analysis: str
    current: bool
    withdrawn: bool
    shots: int
    ingested_at: dt.datetime | None
    files: tuple[dict[str, object], ...]

    def as_dict(self) -> dict[str, object]:
        return {
            "analysis": self.analysis,
            "current": self.current,
            "withdrawn": self.withdrawn,
            "shots": self.shots,
            "ingested_at": None if self.ingested_at is None else self.ingested_at.isoformat(),
            "files": list(self.files),
        }


def _ids(text: str) -> list[int]:
    return [int(part) for part in (text or "").split(",") if part]


def _run_rows(rows_of, apparatus_id: int, key: str) -> list[tuple]:
    return rows_of(
        "SELECT id, analysis, is_current, withdrawn, day, sequence, shot_count FROM runs WHERE apparatus_id = :a AND key = :k ORDER BY id",
        {"a": apparatus_id, "k": key},
    )


def versions(rows_of, apparatus_id: int, key: str) -> list[Version]:
    """Every version of the run, oldest first. ``rows_of(sql, params)`` runs a query (a
    writer's ``rows``, or a connection's)."""
    out = []
    for run_id, analysis, current, withdrawn, _, _, shots in _run_rows(rows_of, apparatus_id, key):
        files = [
            {"file": file, "sha256": sha, "shots": None if count is None else int(count), "ingested_at": as_datetime(at).isoformat()}
            for file, sha, count, at in rows_of(
                "SELECT l.file, l.sha256, rf.shots, l.finished_at FROM run_files rf JOIN ingest_log l ON l.id = rf.ingest_id "
                "WHERE rf.run_id = :r ORDER BY l.id",
                {"r": run_id},
            )
        ]
        first = min((dt.datetime.fromisoformat(str(f["ingested_at"])) for f in files), default=None)
        out.append(Version(int(run_id), analysis, bool(current), bool(withdrawn), int(shots or 0), first, tuple(files)))
    return out


def _group(row: tuple, apparatus_id: int):
    day, sequence = row[4], row[5]
    return None if day is None else (apparatus_id, as_date(day), sequence)


def _make_current(writer: Writer, apparatus_id: int, key: str, run_id: int | None) -> None:
    writer.execute("UPDATE runs SET is_current = :no WHERE apparatus_id = :a AND key = :k AND is_current", {"no": False, "a": apparatus_id, "k": key})
    if run_id is not None:
        writer.execute("UPDATE runs SET is_current = :yes WHERE id = :r", {"yes": True, "r": run_id})


def use_version(writer: Writer, apparatus_id: int, key: str, analysis: str) -> tuple[str | None, str]:
    """Make version ``analysis`` of the run current and refresh the rollups it moves;
    returns (the version current before, the one current now)."""
    rows = _run_rows(writer.rows, apparatus_id, key)
    target = next((row for row in rows if row[1] == analysis), None)
    if target is None:
        raise NotFoundError("analysis version", analysis, f"run '{key}' has {', '.join(repr(r[1]) for r in rows)}")
    if target[3]:
        raise StoreError(f"analysis version '{analysis}' of run '{key}' is withdrawn: restore it first")
    before = next((row for row in rows if row[2]), None)
    _make_current(writer, apparatus_id, key, int(target[0]))
    series_keys.refresh(writer, [int(row[0]) for row in rows])
    refresh_rollups(writer, {g for g in (_group(target, apparatus_id), before and _group(before, apparatus_id)) if g})
    return (None if before is None else before[1]), analysis


def withdraw(writer: Writer, *, target: str, name: str, runs: Iterable[tuple[int, str]], reason: str, author: str | None, sha256: str | None = None) -> int:
    """Take the run versions ``runs`` ((apparatus id, key, run id) ... see below) out.

    ``runs`` lists (apparatus id, run key) of whole runs (``target='run'``), or the run
    version ids a file wrote (``target='file'``). A withdrawn current version hands
    "current" to the newest other version of its run that is not withdrawn, if any.
    Returns the withdrawal's id.
    """
    if not reason or not reason.strip():
        raise ValueError("a withdrawal needs a reason")
    taken: list[int] = []
    was_current: list[int] = []
    groups = set()
    touched = []
    for apparatus_id, key, run_ids in runs:
        rows = _run_rows(writer.rows, apparatus_id, key)
        touched.append((key, rows))
        chosen = [row for row in rows if int(row[0]) in run_ids and not row[3]]
        for row in chosen:
            taken.append(int(row[0]))
            if row[2]:
                was_current.append(int(row[0]))
            groups.add(_group(row, apparatus_id))
        if not chosen:
            continue
        for row in chosen:
            writer.execute("UPDATE runs SET withdrawn = :yes, is_current = :no WHERE id = :r", {"yes": True, "no": False, "r": int(row[0])})
        if any(row[2] for row in chosen):
            left = [row for row in rows if int(row[0]) not in taken and not row[3]]
            if left:
                _make_current(writer, apparatus_id, key, int(left[-1][0]))
                groups.add(_group(left[-1], apparatus_id))
    if not taken:
        raise StoreError(f"nothing to withdraw: {name} is withdrawn already")
    now = dt.datetime.now(dt.timezone.utc)
    withdrawal_id = int(
        writer.rows(
            "INSERT INTO withdrawals (target, name, sha256, runs, current, reason, author, withdrawn_at) "
            "VALUES (:t, :n, :h, :r, :c, :why, :who, :at) RETURNING id",
            {"t": target, "n": name, "h": sha256, "r": ",".join(map(str, taken)), "c": ",".join(map(str, was_current)), "why": reason.strip(), "who": author, "at": now},
        )[0][0]
    )
    series_keys.refresh(writer, [int(row[0]) for _, key_rows in touched for row in key_rows])
    refresh_rollups(writer, {g for g in groups if g})
    return withdrawal_id


def restore(writer: Writer, withdrawal_id: int, author: str | None) -> list[int]:
    """Undo one withdrawal: its run versions come back, and those that were current are
    current again. Returns the run version ids restored."""
    found = writer.rows("SELECT runs, current, restored_at FROM withdrawals WHERE id = :i", {"i": withdrawal_id})
    if not found:
        raise NotFoundError("withdrawal", str(withdrawal_id))
    runs_text, current_text, restored_at = found[0]
    if restored_at is not None:
        raise StoreError(f"withdrawal {withdrawal_id} was restored already")
    run_ids = _ids(runs_text)
    groups = set()
    for run_id in run_ids:
        apparatus_id, key = writer.rows("SELECT apparatus_id, key FROM runs WHERE id = :r", {"r": run_id})[0]
        writer.execute("UPDATE runs SET withdrawn = :no WHERE id = :r", {"no": False, "r": run_id})
        for row in _run_rows(writer.rows, int(apparatus_id), key):
            if row[2] or int(row[0]) == run_id:
                groups.add(_group(row, int(apparatus_id)))
    for run_id in _ids(current_text):
        apparatus_id, key = writer.rows("SELECT apparatus_id, key FROM runs WHERE id = :r", {"r": run_id})[0]
        _make_current(writer, int(apparatus_id), key, run_id)
    # A run wholly withdrawn and restored while no other version held "current".
    for run_id in run_ids:
        apparatus_id, key = writer.rows("SELECT apparatus_id, key FROM runs WHERE id = :r", {"r": run_id})[0]
        if not writer.rows("SELECT 1 FROM runs WHERE apparatus_id = :a AND key = :k AND is_current", {"a": apparatus_id, "k": key}):
            _make_current(writer, int(apparatus_id), key, run_id)
    writer.execute(
        "UPDATE withdrawals SET restored_at = :at, restored_by = :who WHERE id = :i",
        {"at": dt.datetime.now(dt.timezone.utc), "who": author, "i": withdrawal_id},
    )
    series_keys.refresh(writer, run_ids + _ids(current_text))
    refresh_rollups(writer, {g for g in groups if g})
    return run_ids


def withdrawals(rows_of) -> list[dict[str, object]]:
    """Every withdrawal, newest first, with what it took out and whether it was restored."""
    out = []
    for wid, target, name, sha, runs, reason, author, at, restored_at, restored_by in rows_of(
        "SELECT id, target, name, sha256, runs, reason, author, withdrawn_at, restored_at, restored_by FROM withdrawals ORDER BY id DESC", {}
    ):
        versions = []
        for run_id in _ids(runs):
            found = rows_of("SELECT r.key, a.name, r.analysis FROM runs r JOIN apparatus a ON a.id = r.apparatus_id WHERE r.id = :r", {"r": run_id})
            if found:
                versions.append({"run": found[0][0], "apparatus": found[0][1], "analysis": found[0][2]})
        out.append(
            {
                "id": int(wid),
                "target": target,
                "name": name,
                "sha256": sha,
                "runs": versions,
                "reason": reason,
                "author": author,
                "withdrawn_at": as_datetime(at).isoformat(),
                "restored_at": None if restored_at is None else as_datetime(restored_at).isoformat(),
                "restored_by": restored_by,
            }
        )
    return out
