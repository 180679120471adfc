"""Writing figures of merit and per-site counts of a run into the store.

One function per table, on the same :class:`~runlog.store.bulk.Writer` that ingest uses,
so figures computed at ingest go in with the shots, in the same transaction.

Every figure stored is first written as an immutable record (``figure_records``: kind,
model, options, the analysis version and shot count of the run version it used, runlog's
version, when); the run version's ``figures`` row of that name is then replaced by a copy
of the record, so the newest record is the one in force and readers need no history.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterable, Mapping

import numpy as np

from runlog.figures.base import Figure
from runlog.store.bulk import Writer

__all__ = ["store_figures", "read_shot_sums", "read_site_counts", "store_site_counts", "options_text"]

_COLUMNS = (
    "run_id", "name", "kind", "value", "stderr", "ci_low", "ci_high", "unit", "method", "method_version",
    "successes", "trials", "binomial_ci_low", "binomial_ci_high", "binomial_method",
    "counted_shots", "successes_squares", "trials_squares", "successes_trials", "out_of_range", "model", "options", "analysis", "runlog_version", "computed_at",
)


def options_text(options: Mapping[str, object] | None) -> str:
    """The options of a computation as canonical JSON (sorted keys, no None values)."""
    kept = {key: (list(value) if isinstance(value, (tuple, list, np.ndarray)) else value) for key, value in (options or {}).items() if value is not None}
    return json.dumps(kept, sort_keys=True, default=str)


def store_figures(
    writer: Writer,
    run_id: int,
    kind: str,
    figures: Iterable[Figure],
    computed_at: dt.datetime | None = None,
    *,
    options: Mapping[str, object] | None = None,
) -> list[int]:
    """Record ``figures`` for the run version ``run_id`` and put them in force; returns the
    record ids. ``options`` are those the kind was computed with (a figure's own
    ``options``, when it carries them, are merged over these)."""
    from runlog import __version__

    computed_at = computed_at or dt.datetime.now(dt.timezone.utc)
    found = writer.rows("SELECT analysis, shot_count FROM runs WHERE id = :r", {"r": run_id})
    analysis, shots = (found[0][0], int(found[0][1] or 0)) if found else ("", None)
    records = []
    for figure in figures:
        merged = dict(options or {})
        merged.update(getattr(figure, "options", None) or {})
        model = getattr(figure, "model", None) or _model(kind, merged)
        row = {
            "run_id": run_id,
            "name": figure.name,
            "kind": kind,
            "value": float(figure.value),
            "stderr": None if figure.stderr is None else float(figure.stderr),
            "ci_low": None if figure.ci_low is None else float(figure.ci_low),
            "ci_high": None if figure.ci_high is None else float(figure.ci_high),
            "unit": figure.unit,
            "method": figure.method,
            "method_version": figure.method_version,
            "successes": figure.successes,
            "trials": figure.trials,
            "binomial_ci_low": figure.binomial_ci_low,
            "binomial_ci_high": figure.binomial_ci_high,
            "binomial_method": figure.binomial_method,
            **_sums(figure.shot_sums),
            "out_of_range": bool(getattr(figure, "out_of_range", False)),
            "model": model,
            "options": options_text(merged),
            "analysis": analysis,
            "runlog_version": __version__,
            "computed_at": computed_at,
        }
        names = ", ".join(_COLUMNS)
        values = ", ".join(f":{c}" for c in _COLUMNS)
        record_id = int(writer.rows(f"INSERT INTO figure_records ({names}, shots) VALUES ({values}, :shots) RETURNING id", {**row, "shots": shots})[0][0])
        writer.execute("DELETE FROM figures WHERE run_id = :run_id AND name = :name", row)
        writer.execute(f"INSERT INTO figures ({names}, record_id) VALUES ({values}, :record_id)", {**row, "record_id": record_id})
        records.append(record_id)
    return records


def _sums(sums: object | None) -> dict[str, object]:
    if sums is None:
        return {"counted_shots": None, "successes_squares": None, "trials_squares": None, "successes_trials": None}
    return {"counted_shots": sums.shots, "successes_squares": sums.successes_squares, "trials_squares": sums.trials_squares, "successes_trials": sums.successes_trials}


def read_shot_sums(writer: Writer, run_id: int, name: str):
    """The stored sums over shots of the run version's counting figure ``name``, or None."""
    from runlog.figures.shot_level import ShotSums

    rows = writer.rows(
        "SELECT counted_shots, successes, trials, successes_squares, trials_squares, successes_trials FROM figures WHERE run_id = :r AND name = :n",
        {"r": run_id, "n": name},
    )
    if not rows or rows[0][0] is None:
        return None
    shots, successes, trials, y2, x2, xy = rows[0]
    return ShotSums(int(shots), int(successes), int(trials), float(y2), float(x2), float(xy))


def _model(kind: str, options: Mapping[str, object]) -> str:
    """The model a kind fits when the figure does not name its own."""
    if kind == "coherence":
        return f"ramsey, {options.get('envelope') or 'gaussian'} envelope"
    return kind


def _blob(values: np.ndarray) -> bytes:
    return np.ascontiguousarray(values, dtype="<i8").tobytes()


def read_site_counts(writer: Writer, run_id: int, name: str) -> tuple[np.ndarray, np.ndarray] | None:
    rows = writer.rows("SELECT successes, trials FROM site_counts WHERE run_id = :r AND name = :n", {"r": run_id, "n": name})
    if not rows:
        return None
    successes, trials = rows[0]
    return np.frombuffer(bytes(successes), dtype="<i8").copy(), np.frombuffer(bytes(trials), dtype="<i8").copy()


def store_site_counts(writer: Writer, run_id: int, name: str, successes: np.ndarray, trials: np.ndarray) -> None:
    """Replace the run's per-site counts ``name`` (e.g. ``fill``, ``survival``)."""
    writer.execute("DELETE FROM site_counts WHERE run_id = :r AND name = :n", {"r": run_id, "n": name})
    writer.execute(
        "INSERT INTO site_counts (run_id, name, sites, successes, trials) VALUES (:r, :n, :sites, :s, :t)",
        {"r": run_id, "n": name, "sites": int(len(successes)), "s": _blob(successes), "t": _blob(trials)},
    )
