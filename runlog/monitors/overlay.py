"""A monitor over a span of time for a chart, from its rollups, and the list of monitors.

A chart of a year of 1 Hz values needs thousands of points, not 30 million: the series is
read from the finest rollup (minute, hour, lab day) that gives at most ``max_points``
periods over the span, each with its mean, minimum, maximum and count.
"""

from __future__ import annotations

import datetime as dt

import pandas as pd
from sqlalchemy import and_, select
from sqlalchemy.engine import Connection

from runlog.errors import NotFoundError
from runlog.store import schema as s
from runlog.store.schema import to_epoch_us

__all__ = ["STOPPED_INTERVALS", "INTERVAL_VALUES", "resolution_for", "monitor_series", "monitor_list", "duration_words", "stopped_words"]

_SECONDS = {"minute": 60.0, "hour": 3600.0, "day": 86400.0}


def resolution_for(first: dt.datetime, last: dt.datetime, max_points: int) -> str:
    """The finest rollup giving at most ``max_points`` periods over [first, last]."""
    span = max((last - first).total_seconds(), 1.0)
    for resolution in ("minute", "hour"):
        if span / _SECONDS[resolution] <= max_points:
            return resolution
    return "day"


def _monitor_id(connection: Connection, name: str, apparatus: str | None) -> tuple[int, str]:
    query = select(s.Monitor.id, s.Monitor.unit, s.Apparatus.name).join(s.Apparatus, s.Apparatus.id == s.Monitor.apparatus_id).where(s.Monitor.name == name)
    if apparatus is not None:
        query = query.where(s.Apparatus.name == apparatus)
    rows = connection.execute(query).all()
    if not rows:
        raise NotFoundError("monitor", name)
    if len(rows) > 1:
        raise NotFoundError("monitor", name, f"on several apparatus ({', '.join(sorted(r[2] for r in rows))}): give the apparatus")
    return int(rows[0][0]), str(rows[0][1])


def monitor_series(connection: Connection, name: str, *, apparatus: str | None = None, since: dt.datetime | None = None, until: dt.datetime | None = None, max_points: int = 2_000) -> pd.DataFrame:
    """Columns ``start`` (UTC), ``mean``, ``minimum``, ``maximum``, ``count`` of one monitor
    over [since, until] (default: all it logged); ``attrs`` give unit and resolution."""
    monitor_id, unit = _monitor_id(connection, name, apparatus)
    first, last = connection.execute(select(s.Monitor.first_time, s.Monitor.last_time).where(s.Monitor.id == monitor_id)).one()
    since, until = since or first, until or last
    resolution = resolution_for(since, until, max_points)
    # Plain driver rows and one vectorised time conversion: per-row type processing of a
    # year of hours costs more than the query.
    sqlite = connection.dialect.name == "sqlite"
    bounds = (to_epoch_us(since), to_epoch_us(until)) if sqlite else (since, until)
    rows = connection.exec_driver_sql(
        "SELECT start, value_sum, value_count, minimum, maximum FROM monitor_rollups "
        f"WHERE monitor_id = {int(monitor_id)} AND resolution = '{resolution}' AND start >= {'?' if sqlite else '%(a)s'} AND start <= {'?' if sqlite else '%(b)s'} ORDER BY start",
        bounds if sqlite else {"a": bounds[0], "b": bounds[1]},
    ).fetchall()
    frame = pd.DataFrame(rows, columns=["start", "sum", "count", "minimum", "maximum"])
    frame["start"] = pd.to_datetime(frame["start"], unit="us", utc=True) if sqlite else pd.to_datetime(frame["start"], utc=True)
    frame["mean"] = frame["sum"] / frame["count"]
    frame = frame[["start", "mean", "minimum", "maximum", "count"]]
    frame.attrs.update(unit=unit, resolution=resolution, monitor=name)
    return frame


#: A monitor has stopped reporting when nothing was logged for more than this many of its
#: usual intervals (and for more than ``silent_after``, default an hour).
STOPPED_INTERVALS = 10
#: How many of a monitor's last values set its usual interval (the median gap between them).
INTERVAL_VALUES = 101


def _usual_interval(connection: Connection, monitor_id: int, now: dt.datetime) -> tuple[float | None, dt.datetime | None, float | None]:
    """(median gap in seconds between the monitor's last values at or before ``now``,
    the last time, its value): one backward read of the (monitor, time) key."""
    rows = connection.execute(
        select(s.MonitorValue.time, s.MonitorValue.value).where(and_(s.MonitorValue.monitor_id == monitor_id, s.MonitorValue.time <= now)).order_by(s.MonitorValue.time.desc()).limit(INTERVAL_VALUES)
    ).all()
    if not rows:
        return None, None, None
    times = [to_epoch_us(t) for t, _ in rows]
    gaps = sorted((a - b) / 1e6 for a, b in zip(times[:-1], times[1:]))
    interval = None
    if gaps:
        middle = len(gaps) // 2
        interval = gaps[middle] if len(gaps) % 2 else (gaps[middle - 1] + gaps[middle]) / 2
    return interval, rows[0][0], float(rows[0][1])


def monitor_list(connection: Connection, *, now: dt.datetime | None = None, silent_after: dt.timedelta = dt.timedelta(hours=1)) -> list[dict[str, object]]:
    """Every monitor as of ``now`` (default: now): apparatus, name, unit, values, first and
    last time logged, its latest value at or before ``now``, its usual interval (the median
    gap between its last :data:`INTERVAL_VALUES` values), how long it has been silent, and
    whether it **stopped reporting**: silent for more than :data:`STOPPED_INTERVALS` usual
    intervals and more than ``silent_after`` (files from a logger arrive in batches, so a
    shorter silence is not called stopped), or nothing logged by ``now`` at all."""
    now = now or dt.datetime.now(dt.timezone.utc)
    rows = connection.execute(
        select(s.Monitor.id, s.Apparatus.name, s.Monitor.name, s.Monitor.unit, s.Monitor.value_count, s.Monitor.first_time, s.Monitor.last_time)
        .join(s.Apparatus, s.Apparatus.id == s.Monitor.apparatus_id)
        .order_by(s.Apparatus.name, s.Monitor.name)
    ).all()
    found = []
    for monitor_id, apparatus, name, unit, count, first, last in rows:
        interval, latest_time, latest = _usual_interval(connection, int(monitor_id), now)
        silent = None if latest_time is None else (now - latest_time).total_seconds()
        limit = max(STOPPED_INTERVALS * (interval or 0.0), silent_after.total_seconds())
        found.append(
            {
                "apparatus": apparatus,
                "name": name,
                "unit": unit,
                "values": int(count),
                "first": first.isoformat() if first else None,
                "last": last.isoformat() if last else None,
                "latest_time": latest_time.isoformat() if latest_time else None,
                "latest_value": latest,
                "interval_seconds": interval,
                "silent_seconds": silent,
                "stopped_after_seconds": limit,
                "stopped_reporting": bool(silent is None or silent > limit),
            }
        )
    return found


def duration_words(seconds: float | None) -> str:
    """A duration in plain words: 45 s, 12 min, 3.5 h, 2.0 days."""
    if seconds is None:
        return "unknown"
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    if seconds < 172800:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} days"


def stopped_words(monitor: dict[str, object], zone: dt.tzinfo) -> str:
    """One line on a monitor of :func:`monitor_list` that stopped reporting, times in ``zone``."""
    if monitor["latest_time"] is None:
        return f"monitor {monitor['name']} has logged nothing"
    last = dt.datetime.fromisoformat(str(monitor["latest_time"])).astimezone(zone).strftime("%Y-%m-%d %H:%M")
    return f"monitor {monitor['name']} stopped reporting: nothing for {duration_words(monitor['silent_seconds'])}, usually every {duration_words(monitor['interval_seconds'])} (last at {last})"
