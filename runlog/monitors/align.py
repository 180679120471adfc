"""Monitors at the shots' times: the as-of value of a monitor at given instants.

The value of a monitor at time t is its last logged value at or before t, provided it was
logged at most ``max_gap`` before t (default :data:`MAX_GAP_SECONDS`); otherwise there is
none (NaN). This is a backward as-of join (the semantics of ``pandas.merge_asof`` with
``direction="backward"`` and ``tolerance=max_gap``, which the tests compare against): a
logger's value holds until the next one, and a logger that stopped is not extrapolated.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
from sqlalchemy import func, select, text
from sqlalchemy.engine import Connection

from runlog.store import schema as s
from runlog.store.rollups import as_datetime
from runlog.store.schema import to_epoch_us

__all__ = ["MAX_GAP_SECONDS", "values_between", "value_at", "over_span"]

#: The default longest time a logged value stands for (10 minutes).
MAX_GAP_SECONDS = 600.0


def _utc(us: int) -> dt.datetime:
    return dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(microseconds=int(us))


def values_between(connection: Connection, monitor_id: int, first_us: int, last_us: int) -> tuple[np.ndarray, np.ndarray]:
    """(times in integer microseconds, values) of one monitor in [first, last], in time order."""
    rows = connection.execute(
        text("SELECT time, value FROM monitor_values WHERE monitor_id = :m AND time >= :a AND time <= :b ORDER BY time"),
        {"m": monitor_id, "a": _utc(first_us) if connection.dialect.name != "sqlite" else int(first_us), "b": _utc(last_us) if connection.dialect.name != "sqlite" else int(last_us)},
    ).all()
    if not rows:
        return np.array([], dtype=np.int64), np.array([], dtype=float)
    times = np.array([t if isinstance(t, (int, np.integer)) else to_epoch_us(as_datetime(t)) for t, _ in rows], dtype=np.int64)
    return times, np.array([v for _, v in rows], dtype=float)


def value_at(times_us: np.ndarray, logged_us: np.ndarray, logged_values: np.ndarray, max_gap_seconds: float = MAX_GAP_SECONDS) -> np.ndarray:
    """The as-of value (see the module notes) at each of ``times_us`` from one monitor's
    logged times (sorted) and values; NaN where none was logged within ``max_gap``."""
    times_us = np.asarray(times_us, dtype=np.int64)
    out = np.full(times_us.shape, np.nan)
    if logged_us.size == 0:
        return out
    index = np.searchsorted(logged_us, times_us, side="right") - 1
    found = index >= 0
    gap = np.where(found, times_us - logged_us[np.clip(index, 0, None)], np.iinfo(np.int64).max)
    ok = found & (gap <= int(max_gap_seconds * 1e6))
    out[ok] = logged_values[index[ok]]
    return out


def over_span(connection: Connection, apparatus_id: int, first: dt.datetime, last: dt.datetime, max_gap_seconds: float = MAX_GAP_SECONDS) -> list[dict[str, object]]:
    """Each monitor of an apparatus over [first, last] (a run's first to last shot), by
    name: ``count`` of values logged in the span, their ``mean``, ``minimum`` and
    ``maximum`` (``None`` without values), and ``at_start``, the as-of value at ``first``
    (which is all a run shorter than the logger's interval has). Read from the raw
    values: one range scan of the (monitor, time) key per monitor."""
    monitors = connection.execute(select(s.Monitor.id, s.Monitor.name, s.Monitor.unit).where(s.Monitor.apparatus_id == apparatus_id).order_by(s.Monitor.name)).all()
    if not monitors:
        return []
    v = s.MonitorValue
    stats = {
        int(mid): (int(count), mean, low, high)
        for mid, count, mean, low, high in connection.execute(
            select(v.monitor_id, func.count(), func.avg(v.value), func.min(v.value), func.max(v.value))
            .where(v.monitor_id.in_([int(m) for m, _, _ in monitors]), v.time >= first, v.time <= last)
            .group_by(v.monitor_id)
        )
    }
    out = []
    for mid, name, unit in monitors:
        count, mean, low, high = stats.get(int(mid), (0, None, None, None))
        at_start = connection.execute(
            select(v.value).where(v.monitor_id == mid, v.time <= first, v.time >= first - dt.timedelta(seconds=max_gap_seconds)).order_by(v.time.desc()).limit(1)
        ).scalar()
        out.append(
            {
                "name": name,
                "unit": unit or "",
                "count": count,
                "mean": None if mean is None else float(mean),
                "minimum": None if low is None else float(low),
                "maximum": None if high is None else float(high),
                "at_start": None if at_start is None else float(at_start),
            }
        )
    return out
