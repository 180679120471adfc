"""Monitor rollups: a monitor downsampled per minute, hour and lab day (count, sum, sum of
squares, minimum, maximum), kept at ingest so that a chart of a year of 1 Hz values reads
thousands of rows, not tens of millions.

Sums rather than means are stored so that two files' parts of one period merge exactly.
Lab days are those of the catalogue's ``lab_timezone``; as every zone's offset is a whole
number of minutes, a lab day is a whole number of minute periods and is built from them.
"""

from __future__ import annotations

from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa

from runlog.store.bulk import Writer
from runlog.store.schema import to_epoch_us

__all__ = ["RESOLUTIONS", "PERIOD_US", "Summary", "summarise", "merge_rollups", "store_rollups"]

RESOLUTIONS = ("minute", "hour", "day")
#: Length of a minute and an hour period in microseconds (a lab day varies with DST).
PERIOD_US = {"minute": 60_000_000, "hour": 3_600_000_000}

Summary = dict[str, np.ndarray]  # start, count, sum, square_sum, minimum, maximum


def _group(start: np.ndarray, count: np.ndarray, total: np.ndarray, squares: np.ndarray, low: np.ndarray, high: np.ndarray) -> Summary:
    order = np.argsort(start, kind="stable")
    start, count, total, squares, low, high = (a[order] for a in (start, count, total, squares, low, high))
    first = np.flatnonzero(np.r_[True, start[1:] != start[:-1]])
    return {
        "start": start[first],
        "count": np.add.reduceat(count, first),
        "sum": np.add.reduceat(total, first),
        "square_sum": np.add.reduceat(squares, first),
        "minimum": np.minimum.reduceat(low, first),
        "maximum": np.maximum.reduceat(high, first),
    }


def _coarser(minutes: Summary, start: np.ndarray) -> Summary:
    return _group(start, minutes["count"], minutes["sum"], minutes["square_sum"], minutes["minimum"], minutes["maximum"])


def _lab_day_starts(minute_starts: np.ndarray, zone: ZoneInfo) -> np.ndarray:
    local = pd.to_datetime(minute_starts, unit="us", utc=True).tz_convert(zone)
    midnight = local.normalize()  # the lab day's first instant, in the lab's zone
    return np.asarray(midnight.tz_convert("UTC").as_unit("us").asi8, dtype=np.int64)


def summarise(time_us: np.ndarray, values: np.ndarray, zone: ZoneInfo) -> dict[str, Summary]:
    """The rollups of one monitor's new values, per resolution."""
    ones = np.ones(values.size, dtype=np.int64)
    minute = PERIOD_US["minute"]
    minutes = _group(time_us // minute * minute, ones, values, values * values, values, values)
    hour = PERIOD_US["hour"]
    return {
        "minute": minutes,
        "hour": _coarser(minutes, minutes["start"] // hour * hour),
        "day": _coarser(minutes, _lab_day_starts(minutes["start"], zone)),
    }


def merge_rollups(a: Summary, b: Summary) -> Summary:
    """Two summaries of one monitor and resolution as one (periods in both are pooled)."""
    return _group(*(np.concatenate([a[k], b[k]]) for k in ("start", "count", "sum", "square_sum", "minimum", "maximum")))


def _stored(writer: Writer, monitor_id: int, resolution: str, first: int, last: int) -> Summary:
    rows = writer.rows(
        "SELECT start, value_count, value_sum, value_square_sum, minimum, maximum FROM monitor_rollups "
        "WHERE monitor_id = :m AND resolution = :r AND start >= :a AND start <= :b",
        {"m": monitor_id, "r": resolution, "a": _aware(first), "b": _aware(last)},
    )
    if not rows:
        return {k: np.array([], dtype=np.int64 if k in ("start", "count") else float) for k in ("start", "count", "sum", "square_sum", "minimum", "maximum")}
    start = np.array([v if isinstance(v, (int, np.integer)) else to_epoch_us(v) for v, *_ in rows], dtype=np.int64)
    columns = list(zip(*rows))
    return {
        "start": start,
        "count": np.array(columns[1], dtype=np.int64),
        "sum": np.array(columns[2], dtype=float),
        "square_sum": np.array(columns[3], dtype=float),
        "minimum": np.array(columns[4], dtype=float),
        "maximum": np.array(columns[5], dtype=float),
    }


def _aware(us: int):
    import datetime as dt

    return dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(microseconds=int(us))


def store_rollups(writer: Writer, monitor_id: int, new: dict[str, Summary]) -> None:
    """Merge the new values' rollups into the stored ones, inside the writer's transaction:
    the periods they touch are read, pooled, deleted and written back."""
    for resolution, summary in new.items():
        if summary["start"].size == 0:
            continue
        first, last = int(summary["start"][0]), int(summary["start"][-1])
        stored = _stored(writer, monitor_id, resolution, first, last)
        merged = merge_rollups(stored, summary) if stored["start"].size else summary
        if stored["start"].size:
            writer.execute(
                "DELETE FROM monitor_rollups WHERE monitor_id = :m AND resolution = :r AND start >= :a AND start <= :b",
                {"m": monitor_id, "r": resolution, "a": _aware(first), "b": _aware(last)},
            )
        size = merged["start"].size
        writer.append(
            "monitor_rollups",
            pa.table(
                {
                    "monitor_id": pa.array(np.full(size, monitor_id, dtype=np.int64)),
                    "resolution": pa.array([resolution] * size, pa.string()),
                    "start": pa.array(merged["start"], pa.int64()).cast(pa.timestamp("us", tz="UTC")),
                    "value_count": pa.array(merged["count"], pa.int64()),
                    "value_sum": pa.array(merged["sum"], pa.float64()),
                    "value_square_sum": pa.array(merged["square_sum"], pa.float64()),
                    "minimum": pa.array(merged["minimum"], pa.float64()),
                    "maximum": pa.array(merged["maximum"], pa.float64()),
                }
            ),
        )
