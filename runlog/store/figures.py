"""Writing figures of merit and per-site counts of a run into the store.

One function per table, on the same :class:`~runlog.store.bulk.Writer` that ingest uses,
so figures computed at ingest go in with the shots, in the same transaction.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable

import numpy as np

from runlog.figures.base import Figure
from runlog.store.bulk import Writer

__all__ = ["store_figures", "read_site_counts", "store_site_counts"]


def store_figures(writer: Writer, run_id: int, kind: str, figures: Iterable[Figure], computed_at: dt.datetime | None = None) -> None:
    """Replace the run's figures of the same names with ``figures``."""
    computed_at = computed_at or dt.datetime.now(dt.timezone.utc)
    for figure in figures:
        writer.execute("DELETE FROM figures WHERE run_id = :r AND name = :n", {"r": run_id, "n": figure.name})
        writer.execute(
            "INSERT INTO figures (run_id, name, kind, value, stderr, ci_low, ci_high, unit, method, method_version, computed_at, successes, trials) "
            "VALUES (:r, :n, :k, :v, :se, :lo, :hi, :u, :m, :mv, :at, :s, :t)",
            {
                "r": run_id,
                "n": figure.name,
                "k": kind,
                "v": float(figure.value),
                "se": None if figure.stderr is None else float(figure.stderr),
                "lo": None if figure.ci_low is None else float(figure.ci_low),
                "hi": None if figure.ci_high is None else float(figure.ci_high),
                "u": figure.unit,
                "m": figure.method,
                "mv": figure.method_version,
                "at": computed_at,
                "s": figure.successes,
                "t": figure.trials,
            },
        )


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
