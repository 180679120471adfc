"""Monitors as suspects of a change, each at the time lag that explains it best.

A monitor (room temperature, a laser power, ...) may act on the atoms hours later: a room
warming at 06:00 may show as a fill-fraction drop at 09:00. For a change of ``quantity`` on
a lab day, the quantity's per-run values over the compared days locate the change in time
(the split of the runs, in time order, that leaves the least squared scatter about the two
side means). For each monitor and each lag L in 0..``MAX_LAG_HOURS`` (steps of
``LAG_STEP_HOURS``), the monitor is read at every run's time minus L (as-of, within
:data:`runlog.monitors.align.MAX_GAP_SECONDS`), and the runs before the change are compared
with those after it: the standardised change of the monitor against its own scatter on
each side (:func:`runlog.drift.candidates.standardised_change`). A monitor whose step
precedes the change by L separates the two sides cleanly only at that lag; one that stepped
at another time is mixed on one side, and its scatter there swallows the difference.

The lag with the largest |standardised change| is the monitor's; its p-value is then
multiplied by the number of lags tried (Bonferroni over the lags, ``Candidate.tests``)
before the Benjamini-Hochberg control across all candidates of the change. Runs a few
minutes apart make readings correlated in time, so the p-values stay optimistic; the
ranking points at likely causes, it does not prove one.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
from sqlalchemy import and_, select
from sqlalchemy.engine import Connection

from runlog.drift.candidates import Candidate, Window, register_source, standardised_change
from runlog.monitors.align import MAX_GAP_SECONDS, value_at, values_between
from runlog.store import schema as s
from runlog.store.rollups import as_datetime
from runlog.store.schema import to_epoch_us

__all__ = ["MAX_LAG_HOURS", "LAG_STEP_HOURS", "change_time", "monitor_candidates"]

MAX_LAG_HOURS = 12.0
LAG_STEP_HOURS = 0.25
_MIN_SIDE = 3  # runs a side needs for a scatter to judge by
_HOUR_US = 3_600_000_000


def change_time(times_us: np.ndarray, values: np.ndarray) -> int | None:
    """Index of the first run after the change: the split with the least squared scatter
    about the two side means (each side at least ``_MIN_SIDE`` runs); None if too few runs."""
    n = values.size
    if n < 2 * _MIN_SIDE:
        return None
    cumulative = np.cumsum(values)
    squares = np.cumsum(values**2)
    best, best_cost = None, np.inf
    for k in range(_MIN_SIDE, n - _MIN_SIDE + 1):
        left = squares[k - 1] - cumulative[k - 1] ** 2 / k
        right_sum = cumulative[-1] - cumulative[k - 1]
        right = (squares[-1] - squares[k - 1]) - right_sum**2 / (n - k)
        if left + right < best_cost:
            best, best_cost = k, left + right
    return best


def _runs(connection: Connection, apparatus_id: int, window: Window, quantity: str) -> tuple[np.ndarray, np.ndarray]:
    rows = connection.execute(
        select(s.Run.started, s.Run.finished, s.FigureRow.value)
        .join(s.FigureRow, s.FigureRow.run_id == s.Run.id)
        .where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current, s.Run.day >= window.before_first, s.Run.day <= window.after_last, s.FigureRow.name == quantity, s.FigureRow.out_of_range.is_(False)))
    ).all()
    if not rows:
        return np.array([], dtype=np.int64), np.array([], dtype=float)
    # A run's time is its middle: the monitor is read where the shots were taken.
    times = np.array([(to_epoch_us(as_datetime(a)) + to_epoch_us(as_datetime(b))) // 2 for a, b, _ in rows], dtype=np.int64)
    values = np.array([v for _, _, v in rows], dtype=float)
    order = np.argsort(times, kind="stable")
    return times[order], values[order]


def monitor_candidates(connection: Connection, apparatus_id: int, window: Window, quantity: str) -> list[Candidate]:
    """One candidate per monitor of the apparatus, read at its best lag (module notes)."""
    monitors = connection.execute(select(s.Monitor.id, s.Monitor.name, s.Monitor.unit).where(s.Monitor.apparatus_id == apparatus_id)).all()
    if not monitors:
        return []
    times, values = _runs(connection, apparatus_id, window, quantity)
    split = change_time(times, values)
    if split is None:
        return []
    lags = np.arange(0.0, MAX_LAG_HOURS + LAG_STEP_HOURS / 2, LAG_STEP_HOURS)
    first = int(times[0] - lags[-1] * _HOUR_US - MAX_GAP_SECONDS * 1e6)
    candidates = []
    for monitor_id, name, unit in monitors:
        logged_us, logged = values_between(connection, monitor_id, first, int(times[-1]))
        best: tuple[float, float, np.ndarray, np.ndarray] | None = None
        for lag in lags:
            reading = value_at(times - int(lag * _HOUR_US), logged_us, logged)
            before, after = reading[:split], reading[split:]
            before, after = before[np.isfinite(before)], after[np.isfinite(after)]
            if before.size < _MIN_SIDE or after.size < _MIN_SIDE:
                continue
            z = standardised_change(Candidate(name, "monitor", tuple(before), tuple(after)))[4]
            if np.isfinite(z) and (best is None or abs(z) > best[0]):
                best = (abs(z), float(lag), before, after)
        if best is not None:
            candidates.append(Candidate(name, "monitor", tuple(best[2]), tuple(best[3]), unit=unit, lag=best[1] * 3600.0, tests=int(lags.size)))
    return candidates


register_source("monitors", monitor_candidates)
