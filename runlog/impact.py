"""The impact report: what a new analysis version (or a re-derived figure) moved.

For one run and two of its analysis versions (by default the current one and the one
before it), every figure in force in either is set side by side: old and new value with
their standard errors, the analysis versions, and the difference in units of the combined
standard error, ``sigma = (new - old) / sqrt(stderr_old**2 + stderr_new**2)``. The two
values come from overlapping shots, so they are not independent and this ``sigma`` is a
yardstick of size, not a significance test (common practice, no published source).

With a single version, the report compares each figure in force with the record of the
same figure before it (a figure derived again, e.g. with another envelope).

Each entry also names the drift point that moves (the run's apparatus, lab day and
sequence: its daily rollup) and the pins holding the old version of the run.
"""

from __future__ import annotations

import json
import math

from runlog.errors import NotFoundError
from runlog.store.rollups import as_date

__all__ = ["impact", "sigma"]


def sigma(old: float, old_stderr: float | None, new: float, new_stderr: float | None) -> float | None:
    """``(new - old) / sqrt(se_old² + se_new²)``; ``None`` without both standard errors,
    or when both are zero."""
    if old_stderr is None or new_stderr is None:
        return None
    combined = math.hypot(old_stderr, new_stderr)
    if combined == 0:
        return None
    return (new - old) / combined


_RECORD = "SELECT id, name, value, stderr, unit, analysis, model, options, computed_at FROM figure_records WHERE {where} ORDER BY id"


def _side(row, analysis: str) -> dict[str, object]:
    return {
        "value": row[2],
        "stderr": row[3],
        "analysis": analysis,
        "unit": row[4] or "",
        "record": int(row[0]),
        "model": row[6],
        "options": json.loads(row[7]) if row[7] else {},
    }


def impact(rows_of, apparatus_id: int, key: str, from_analysis: str | None = None, to_analysis: str | None = None) -> list[dict[str, object]]:
    """The impact entries of run ``key`` (see the module docstring), sorted by figure name.

    ``rows_of(sql, params)`` runs a query on the caller's connection.
    """
    versions = rows_of(
        "SELECT id, analysis, is_current, withdrawn, day, sequence FROM runs WHERE apparatus_id = :a AND key = :k ORDER BY id",
        {"a": apparatus_id, "k": key},
    )
    by_name = {row[1]: row for row in versions}
    for asked in (from_analysis, to_analysis):
        if asked is not None and asked not in by_name:
            raise NotFoundError("analysis version", asked, f"run '{key}' has {', '.join(repr(v[1]) for v in versions)}")
    if to_analysis is None:
        current = [v for v in versions if v[2]]
        to_row = current[0] if current else versions[-1]
    else:
        to_row = by_name[to_analysis]
    if from_analysis is None:
        earlier = [v for v in versions if v[0] < to_row[0] and not v[3]]
        from_row = earlier[-1] if earlier else to_row
    else:
        from_row = by_name[from_analysis]
    pins = {}
    for name, run_id in rows_of("SELECT p.name, pr.run_id FROM pin_runs pr JOIN pins p ON p.id = pr.pin_id ORDER BY p.name", {}):
        pins.setdefault(int(run_id), []).append(name)
    apparatus = rows_of("SELECT name FROM apparatus WHERE id = :a", {"a": apparatus_id})[0][0]

    new_rows = {row[1]: row for row in rows_of(_RECORD.format(where="id IN (SELECT record_id FROM figures WHERE run_id = :r)"), {"r": to_row[0]})}
    if from_row[0] != to_row[0]:
        old_rows = {row[1]: row for row in rows_of(_RECORD.format(where="id IN (SELECT record_id FROM figures WHERE run_id = :r)"), {"r": from_row[0]})}
    else:
        # One version: each figure in force against its record before.
        old_rows = {}
        for row in rows_of(_RECORD.format(where="run_id = :r"), {"r": to_row[0]}):
            current = new_rows.get(row[1])
            if current is not None and row[0] < current[0]:
                old_rows[row[1]] = row
    out = []
    for name in sorted(set(old_rows) | set(new_rows)):
        old, new = old_rows.get(name), new_rows.get(name)
        entry: dict[str, object] = {
            "run": key,
            "apparatus": apparatus,
            "figure": name,
            "old": None if old is None else _side(old, from_row[1]),
            "new": None if new is None else _side(new, to_row[1]),
            "sigma": None,
        }
        if old is not None and new is not None:
            entry["difference"] = new[2] - old[2]
            entry["sigma"] = sigma(old[2], old[3], new[2], new[3])
            moved = new[2] != old[2] or new[3] != old[3]
        else:
            moved = True
        days = {(as_date(v[4]).isoformat(), v[5]) for v in (from_row, to_row) if v[4] is not None}
        entry["drift"] = [{"apparatus": apparatus, "day": day, "sequence": sequence} for day, sequence in sorted(days)] if moved else []
        entry["pins"] = sorted(pins.get(int(from_row[0]), [])) if moved and from_row[0] != to_row[0] else []
        out.append(entry)
    return out
