"""Daily rollups: every figure pooled per apparatus, lab day and sequence.

A lab day is the calendar date in the catalogue's lab time zone (setting
``lab_timezone``, default UTC) on which a run started. Rollups are refreshed, inside the
writing transaction, for exactly the (apparatus, day, sequence) groups that an ingest or
a derive touched, by one aggregate over the figures of the runs in those groups; a drift
query over a year then reads a few hundred rollup rows instead of millions of shots.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from runlog.errors import ConfigError
from runlog.store.bulk import Writer

__all__ = ["DEFAULT_TIMEZONE", "lab_timezone", "lab_day", "refresh_rollups", "refresh_series_rollups", "rebuild_rollups", "check_timezone", "as_date", "as_datetime"]

DEFAULT_TIMEZONE = "UTC"

_AGGREGATE = """
INSERT INTO daily_rollups (apparatus_id, day, sequence, name, unit, runs, shots, successes, trials,
                           counted_shots, successes_squares, trials_squares, successes_trials,
                           value_count, value_sum, value_square_sum, weight_sum, weighted_value_sum,
                           weighted_square_sum)
SELECT r.apparatus_id, r.day, r.sequence, f.name, MAX(f.unit), COUNT(*), SUM(r.shot_count),
       SUM(f.successes), SUM(f.trials),
       SUM(f.counted_shots), SUM(f.successes_squares), SUM(f.trials_squares), SUM(f.successes_trials),
       COUNT(f.value), SUM(f.value), SUM(f.value * f.value),
       SUM(CASE WHEN f.stderr > 0 THEN 1.0 / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value / (f.stderr * f.stderr) END),
       SUM(CASE WHEN f.stderr > 0 THEN f.value * f.value / (f.stderr * f.stderr) END)
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.apparatus_id = :a AND r.day = :d AND r.sequence = :q AND r.is_current
GROUP BY r.apparatus_id, r.day, r.sequence, f.name
"""

# One run without the sums over shots makes a series' day's sums NULL (as the drift query
# pooled them run by run), where SQL's SUM would skip it.
_ALL_OR_NONE = "CASE WHEN COUNT(CASE WHEN f.trials IS NOT NULL AND f.{0} IS NULL THEN 1 END) > 0 THEN NULL ELSE SUM(CASE WHEN f.trials IS NOT NULL THEN f.{0} END) END"

_SERIES_AGGREGATE = f"""
INSERT INTO series_rollups (apparatus_id, day, sequence, fingerprint, name, unit, units, runs, shots, successes, trials,
                            counted_shots, successes_squares, trials_squares, successes_trials)
SELECT r.apparatus_id, r.day, r.sequence, COALESCE(r.series_fingerprint, ''), f.name,
       MAX(COALESCE(f.unit, '')), COUNT(DISTINCT COALESCE(f.unit, '')), COUNT(*), SUM(r.shot_count),
       SUM(CASE WHEN f.trials IS NOT NULL THEN f.successes END), SUM(f.trials),
       {_ALL_OR_NONE.format("counted_shots")}, {_ALL_OR_NONE.format("successes_squares")},
       {_ALL_OR_NONE.format("trials_squares")}, {_ALL_OR_NONE.format("successes_trials")}
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.apparatus_id = :a AND r.day = :d AND r.sequence = :q AND r.is_current
GROUP BY r.apparatus_id, r.day, r.sequence, COALESCE(r.series_fingerprint, ''), f.name
"""


def check_timezone(name: str) -> str:
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError("lab_timezone", f"unknown time zone '{name}' (use an IANA name such as Europe/Berlin)") from None
    return name


def lab_timezone(writer: Writer) -> ZoneInfo:
    rows = writer.rows("SELECT value FROM settings WHERE key = 'lab_timezone'")
    return ZoneInfo(rows[0][0] if rows else DEFAULT_TIMEZONE)


def lab_day(moment: dt.datetime, zone: ZoneInfo) -> dt.date:
    return moment.astimezone(zone).date()


def refresh_rollups(writer: Writer, groups: Iterable[tuple[int, dt.date, str]]) -> None:
    """Recompute the rollup rows of each (apparatus id, lab day, sequence) group."""
    groups = sorted(set(groups))
    for apparatus_id, day, sequence in groups:
        params = {"a": apparatus_id, "d": day, "q": sequence}
        writer.execute("DELETE FROM daily_rollups WHERE apparatus_id = :a AND day = :d AND sequence = :q", params)
        writer.execute(_AGGREGATE, params)
    refresh_series_rollups(writer, groups)


def refresh_series_rollups(writer: Writer, groups: Iterable[tuple[int, dt.date, str]]) -> None:
    """Recompute the series rollup rows of each (apparatus id, lab day, sequence) group."""
    for apparatus_id, day, sequence in sorted(set(groups)):
        params = {"a": apparatus_id, "d": day, "q": sequence}
        writer.execute("DELETE FROM series_rollups WHERE apparatus_id = :a AND day = :d AND sequence = :q", params)
        writer.execute(_SERIES_AGGREGATE, params)


def rebuild_rollups(writer: Writer) -> int:
    """Recompute every run's lab day in the current time zone and every rollup; returns groups."""
    zone = lab_timezone(writer)
    runs = writer.rows("SELECT id, started FROM runs")
    for run_id, started in runs:
        writer.execute("UPDATE runs SET day = :d WHERE id = :r", {"d": lab_day(as_datetime(started), zone), "r": run_id})
    writer.execute("DELETE FROM daily_rollups")
    writer.execute("DELETE FROM series_rollups")
    groups = [(int(a), as_date(d), q) for a, d, q in writer.rows("SELECT DISTINCT apparatus_id, day, sequence FROM runs")]
    refresh_rollups(writer, groups)
    return len(groups)


def as_datetime(value) -> dt.datetime:
    # SQLite hands back integer microseconds, PostgreSQL an aware datetime.
    if isinstance(value, dt.datetime):
        return value if value.tzinfo else value.replace(tzinfo=dt.timezone.utc)
    return dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(microseconds=int(value))


def as_date(value) -> dt.date:
    return value if isinstance(value, dt.date) else dt.date.fromisoformat(str(value))
