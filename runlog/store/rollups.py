"""Daily rollups: every figure pooled per apparatus, lab day and sequence.

A lab day is the calendar date in the catalogue's lab time zone (setting
``lab_timezone``, default UTC) on which a run started. Rollups are refreshed, inside the
writing transaction, for exactly the (apparatus, day, sequence) groups that an ingest or
a derive touched, from the figures of the runs in those groups as the additive sums of
:mod:`runlog.drift.pooling` (which makes every daily point: from these rows and from the
figures of chosen runs alike); figures flagged ``out_of_range`` are left out. A drift
query over a year then reads a few hundred rollup rows instead of millions of shots.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from runlog.errors import ConfigError
from runlog.store.bulk import Writer

__all__ = ["DEFAULT_TIMEZONE", "lab_timezone", "lab_day", "group_sums", "refresh_rollups", "refresh_series_rollups", "rebuild_rollups", "check_timezone", "as_date", "as_datetime"]

DEFAULT_TIMEZONE = "UTC"

# The figures of one group's current runs that drift may use (not flagged out of range).
_FIGURES = """
SELECT f.name, f.unit, f.value, f.stderr, r.shot_count, f.successes, f.trials,
       f.counted_shots, f.successes_squares, f.trials_squares, f.successes_trials
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.apparatus_id = :a AND r.day = :d AND r.sequence = :q AND r.is_current AND NOT f.out_of_range
ORDER BY f.name, r.id
"""
# The same with each run's series fingerprint (runlog.store.series_keys), flagged figures
# too: a series holds a quantity when its runs have the figure, its points leave them out.
_SERIES_FIGURES = """
SELECT COALESCE(r.series_fingerprint, ''), f.out_of_range, f.name, f.unit, f.value, f.stderr, r.shot_count, f.successes,
       f.trials, f.counted_shots, f.successes_squares, f.trials_squares, f.successes_trials
FROM figures f JOIN runs r ON r.id = f.run_id
WHERE r.apparatus_id = :a AND r.day = :d AND r.sequence = :q AND r.is_current
ORDER BY f.name, r.id
"""


def group_sums(rows) -> dict[str, tuple[str, dict]]:
    """Per figure name, ``(unit, sums)`` of the runs of one group
    (:func:`runlog.drift.pooling.grouped_sums`), from rows of :data:`_FIGURES`."""
    from runlog.drift.pooling import COUNTS, grouped_sums

    by_name: dict[str, list] = {}
    for row in rows:
        by_name.setdefault(row[0], []).append(row)
    out = {}
    for name, found in by_name.items():
        # As MAX(unit) did: one unit per name and group (the drift query refuses a mixture).
        unit = max((row[1] or "") for row in found)
        columns = list(zip(*found))
        (sums,) = grouped_sums([name] * len(found), columns[2], columns[3], unit, shots=columns[4], counts=dict(zip(COUNTS, columns[5:11]))).values()
        out[name] = (unit, sums)
    return out


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
    from runlog.drift.pooling import SUMS

    columns = ("apparatus_id", "day", "sequence", "name", "unit", *SUMS)
    insert = f"INSERT INTO daily_rollups ({', '.join(columns)}) VALUES ({', '.join(':' + c for c in columns)})"
    groups = sorted(set(groups))
    for apparatus_id, day, sequence in groups:
        params = {"a": apparatus_id, "d": day, "q": sequence}
        writer.execute("DELETE FROM daily_rollups WHERE apparatus_id = :a AND day = :d AND sequence = :q", params)
        for name, (unit, sums) in group_sums(writer.rows(_FIGURES, params)).items():
            writer.execute(insert, {"apparatus_id": apparatus_id, "day": day, "sequence": sequence, "name": name, "unit": unit, **sums})
    refresh_series_rollups(writer, groups)


def refresh_series_rollups(writer: Writer, groups: Iterable[tuple[int, dt.date, str]]) -> None:
    """Recompute the series rollup rows of each (apparatus id, lab day, sequence) group:
    per series fingerprint and figure name, the runs holding it (``held``, flagged figures
    too), how many units their figures came in, and the sums of the unflagged ones (runs 0
    and no sums when all are flagged)."""
    from runlog.drift.pooling import SUMS

    columns = ("apparatus_id", "day", "sequence", "fingerprint", "name", "held", "units", "unit", *SUMS)
    insert = f"INSERT INTO series_rollups ({', '.join(columns)}) VALUES ({', '.join(':' + c for c in columns)})"
    empty = {name: None for name in SUMS} | {"runs": 0, "shots": 0, "value_count": 0, "value_sum": 0.0, "value_square_sum": 0.0}
    for apparatus_id, day, sequence in sorted(set(groups)):
        params = {"a": apparatus_id, "d": day, "q": sequence}
        writer.execute("DELETE FROM series_rollups WHERE apparatus_id = :a AND day = :d AND sequence = :q", params)
        by_series: dict[tuple[str, str], list[tuple]] = {}
        for row in writer.rows(_SERIES_FIGURES, params):
            by_series.setdefault((row[0], row[2]), []).append(row)
        for (fingerprint, name), rows in by_series.items():
            kept = [row[2:] for row in rows if not row[1]]
            unit, sums = group_sums(kept).get(name, ("", empty))
            writer.execute(insert, {"apparatus_id": apparatus_id, "day": day, "sequence": sequence, "fingerprint": fingerprint, "name": name, "held": len(rows), "units": len({row[1] or "" for row in kept}), "unit": unit, **sums})


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
