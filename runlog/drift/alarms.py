"""Alarms: drift findings kept until a person has looked at them.

A detected change in level, or the first day of each excursion outside the control
limits, becomes an alarm (apparatus, quantity, day, size, method). Alarms are recorded
once (the same finding found again is not duplicated, nor reopened once acknowledged);
acknowledging one with a note turns the note into an annotation on that day.
Alarms are advisory: they do not replace the lab's interlocks or rules.
"""

from __future__ import annotations

import datetime as dt
import getpass
from zoneinfo import ZoneInfo

from sqlalchemy import and_, select, update
from sqlalchemy.engine import Connection

from runlog.drift.series import Drift
from runlog.errors import NotFoundError
from runlog.store import schema as s

__all__ = ["ALARM_KEY", "findings", "record", "list_alarms", "acknowledge"]

#: The columns that identify one alarm: the same finding found again is the same alarm.
ALARM_KEY = ("apparatus_id", "quantity", "sequence", "day", "reason")


def findings(drift: Drift) -> list[dict[str, object]]:
    """The alarm-worthy findings of a drift result, oldest first."""
    found: list[dict[str, object]] = []
    previous = -2
    for index in drift.out_of_limits:
        if index != previous + 1:  # only the first day of each excursion
            point = drift.points[index]
            centre = drift.limits.get("center")
            found.append({"day": point.date, "reason": "limit", "method": str(drift.limits.get("method", "")), "value": point.value, "size": None if centre is None else point.value - float(centre)})
        previous = index
    for change in drift.changes:
        found.append({"day": change.date, "reason": "change", "method": change.method, "value": change.after, "size": change.after - change.before})
    return sorted(found, key=lambda f: (f["day"], f["reason"]))


def _as_dict(row, apparatus: str) -> dict[str, object]:
    return {
        "id": row.id,
        "apparatus": apparatus,
        "quantity": row.quantity,
        "sequence": row.sequence or None,
        "date": (row.day if isinstance(row.day, dt.date) else dt.date.fromisoformat(str(row.day))).isoformat(),
        "reason": row.reason,
        "method": row.method,
        "value": row.value,
        "size": row.size,
        "status": row.status,
    }


def record(connection: Connection, drift: Drift) -> list[dict[str, object]]:
    """Store the findings of ``drift`` as alarms (new ones open); returns all of them.

    Idempotent under concurrency: each finding is an insert that does nothing when the
    alarms' unique key (apparatus, quantity, sequence, day, reason) already holds it, so
    two processes recording the same drift at once both succeed and leave one alarm (a
    select-then-insert let both see "absent" and one fail on the key).
    """
    apparatus_id = connection.execute(select(s.Apparatus.id).where(s.Apparatus.name == drift.apparatus)).scalar_one()
    now = dt.datetime.now(dt.timezone.utc)
    if connection.dialect.name == "postgresql":
        from sqlalchemy.dialects.postgresql import insert
    else:
        from sqlalchemy.dialects.sqlite import insert
    out = []
    for finding in findings(drift):
        connection.execute(
            insert(s.Alarm.__table__)
            .values(
                apparatus_id=apparatus_id, quantity=drift.quantity, sequence=drift.sequence or "", day=finding["day"], reason=finding["reason"],
                method=finding["method"], value=finding["value"], size=finding["size"], detail="", status="open", created_at=now,
            )
            .on_conflict_do_nothing(index_elements=list(ALARM_KEY))
        )
        key = and_(
            s.Alarm.apparatus_id == apparatus_id,
            s.Alarm.quantity == drift.quantity,
            s.Alarm.sequence == (drift.sequence or ""),
            s.Alarm.day == finding["day"],
            s.Alarm.reason == finding["reason"],
        )
        out.append(_as_dict(connection.execute(select(s.Alarm).where(key)).one(), drift.apparatus))
    return out


def list_alarms(connection: Connection, *, status: str | None = "open", apparatus: str | None = None) -> list[dict[str, object]]:
    query = select(s.Alarm, s.Apparatus.name).join(s.Apparatus, s.Apparatus.id == s.Alarm.apparatus_id).order_by(s.Alarm.day, s.Alarm.id)
    if status is not None:
        query = query.where(s.Alarm.status == status)
    if apparatus is not None:
        query = query.where(s.Apparatus.name == apparatus)
    return [_as_dict(row, row.name) for row in connection.execute(query)]


def acknowledge(connection: Connection, alarm_id: int, note: str, zone: ZoneInfo, author: str | None = None) -> int:
    """Mark an alarm acknowledged; the note becomes an annotation on the alarm's day."""
    row = connection.execute(select(s.Alarm).where(s.Alarm.id == alarm_id)).first()
    if row is None:
        raise NotFoundError("alarm", str(alarm_id))
    now = dt.datetime.now(dt.timezone.utc)
    day = row.day if isinstance(row.day, dt.date) else dt.date.fromisoformat(str(row.day))
    at = dt.datetime(day.year, day.month, day.day, tzinfo=zone)
    text = f"{row.quantity} {row.reason} ({row.method}): {note.strip()}" if note.strip() else f"{row.quantity} {row.reason} acknowledged"
    try:
        author = author or getpass.getuser()
    except Exception:  # no login name in some containers
        author = None
    annotation = connection.execute(
        s.Annotation.__table__.insert().returning(s.Annotation.id),
        {"apparatus_id": row.apparatus_id, "run_id": None, "at": at, "text": text, "author": author, "created_at": now},
    ).scalar_one()
    connection.execute(update(s.Alarm).where(s.Alarm.id == alarm_id).values(status="acknowledged", acknowledged_at=now, annotation_id=annotation))
    return int(annotation)
