"""Alarms: drift findings kept until a person has looked at them.

The first day of each excursion of a reference series out of control
(:mod:`runlog.drift.detect`), and a change of the series' constant settings with no note
that day or the day before ("setting changed without a note"), become alarms (apparatus,
quantity, series, day, size, method). Changes in level found afterwards by PELT are shown
beside the points but raise no alarm of their own: the calibrated statistics carry the
false-alarm budget. Alarms are recorded once (the same finding found again is not
duplicated, nor reopened once acknowledged); acknowledging one with a note turns the note
into an annotation on that day, and acknowledging with *accept* starts a new baseline
from the alarm's day (the new level is then the reference), recorded as a note too.
A quantity that is the exact complement of another of the same shots (``loss`` is
1 - ``survival``, :data:`runlog.drift.budget.MIRRORED`) raises no alarm of its own: its
excursions are the other's, and counting them twice would spend the false-alarm budget
twice on one event; its drift is still shown. The quantities of an apparatus share its
budget (:mod:`runlog.drift.budget`).
Alarms are advisory: they do not replace the lab's interlocks or rules.
"""

from __future__ import annotations

import datetime as dt
import getpass
import json
from zoneinfo import ZoneInfo

from sqlalchemy import and_, select, update
from sqlalchemy.engine import Connection

from runlog.drift.budget import MIRRORED
from runlog.drift.series import Drift
from runlog.errors import NotFoundError
from runlog.store import schema as s

__all__ = ["ALARM_KEY", "MIRRORED", "findings", "record", "list_alarms", "acknowledge"]

#: The columns that identify one alarm: the same finding found again is the same alarm.
ALARM_KEY = ("apparatus_id", "quantity", "sequence", "series_key", "day", "reason")



def findings(drift: Drift) -> list[dict[str, object]]:
    """The alarm-worthy findings of a drift result, oldest first."""
    found: list[dict[str, object]] = []
    previous = -2
    signals = {e["index"]: e["signals"] for e in drift.excursions}
    for index in drift.out_of_limits:
        if index != previous + 1:  # only the first day of each excursion
            point = drift.points[index]
            centres = drift.limits.get("centre")
            centre = centres[index] if isinstance(centres, list) else drift.limits.get("center")
            how = ", ".join(signals.get(index, []))
            method = str(drift.limits.get("method", "")) if not how else f"{how} signalled"
            found.append({"day": point.date, "reason": "limit", "method": method[:100], "value": point.value, "size": None if centre is None else point.value - float(centre)})
        previous = index
    for setting in drift.settings:
        if not setting["noted"]:
            found.append({"day": dt.date.fromisoformat(setting["day"]), "reason": "setting", "method": "setting changed without a note", "value": None, "size": None, "detail": setting["words"]})
    return sorted(found, key=lambda f: (f["day"], f["reason"]))


def _as_dict(row, apparatus: str) -> dict[str, object]:
    return {
        "id": row.id,
        "apparatus": apparatus,
        "quantity": row.quantity,
        "sequence": row.sequence or None,
        "series": _series(row),
        "date": (row.day if isinstance(row.day, dt.date) else dt.date.fromisoformat(str(row.day))).isoformat(),
        "reason": row.reason,
        "method": row.method,
        "value": row.value,
        "size": row.size,
        "status": row.status,
    }


def _series(row) -> dict[str, object] | None:
    if not row.series_key:
        return None
    sequence, _, fingerprint = row.series_key.partition("@")
    try:
        label = json.loads(row.detail or "{}").get("series")
    except ValueError:
        label = None
    return {"key": row.series_key, "sequence": sequence, "fingerprint": fingerprint, "label": label or row.series_key}


def record(connection: Connection, drift: Drift) -> list[dict[str, object]]:
    """Store the findings of ``drift`` as alarms (new ones open); returns all of them.

    Idempotent under concurrency: each finding is an insert that does nothing when the
    alarms' unique key (apparatus, quantity, sequence, series, day, reason) already holds it, so
    two processes recording the same drift at once both succeed and leave one alarm (a
    select-then-insert let both see "absent" and one fail on the key).
    """
    if drift.quantity in MIRRORED:
        return []
    apparatus_id = connection.execute(select(s.Apparatus.id).where(s.Apparatus.name == drift.apparatus)).scalar_one()
    now = dt.datetime.now(dt.timezone.utc)
    if connection.dialect.name == "postgresql":
        from sqlalchemy.dialects.postgresql import insert
    else:
        from sqlalchemy.dialects.sqlite import insert
    out = []
    series_key = drift.series["key"] if drift.series else ""
    sequence = "" if drift.series else (drift.sequence or "")
    for finding in findings(drift):
        detail = {"series": drift.series["label"]} if drift.series else {}
        if finding.get("detail"):
            detail["finding"] = finding["detail"]
        connection.execute(
            insert(s.Alarm.__table__)
            .values(
                apparatus_id=apparatus_id, quantity=drift.quantity, sequence=sequence, series_key=series_key, day=finding["day"], reason=finding["reason"],
                method=finding["method"], value=finding["value"], size=finding["size"], detail=json.dumps(detail), status="open", created_at=now,
            )
            .on_conflict_do_nothing(index_elements=list(ALARM_KEY))
        )
        key = and_(
            s.Alarm.apparatus_id == apparatus_id,
            s.Alarm.quantity == drift.quantity,
            s.Alarm.sequence == sequence,
            s.Alarm.series_key == series_key,
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


def acknowledge(connection: Connection, alarm_id: int, note: str, zone: ZoneInfo, author: str | None = None, *, accept: bool = False) -> int:
    """Mark an alarm acknowledged; the note becomes an annotation on the alarm's day.

    ``accept``: the level since the alarm's day is the new reference; the series' baseline
    starts again from that day (status ``accepted``), and the annotation says so.
    """
    row = connection.execute(select(s.Alarm).where(s.Alarm.id == alarm_id)).first()
    if row is None:
        raise NotFoundError("alarm", str(alarm_id))
    now = dt.datetime.now(dt.timezone.utc)
    day = row.day if isinstance(row.day, dt.date) else dt.date.fromisoformat(str(row.day))
    at = dt.datetime(day.year, day.month, day.day, tzinfo=zone)
    text = f"{row.quantity} {row.reason} ({row.method}): {note.strip()}" if note.strip() else f"{row.quantity} {row.reason} acknowledged"
    if accept:
        where = f" of series {row.series_key}" if row.series_key else ""
        text = f"new level accepted for {row.quantity}{where} from {day.isoformat()}" + (f": {note.strip()}" if note.strip() else "")
    try:
        author = author or getpass.getuser()
    except Exception:  # no login name in some containers
        author = None
    annotation = connection.execute(
        s.Annotation.__table__.insert().returning(s.Annotation.id),
        {"apparatus_id": row.apparatus_id, "run_id": None, "at": at, "text": text, "author": author, "created_at": now},
    ).scalar_one()
    connection.execute(update(s.Alarm).where(s.Alarm.id == alarm_id).values(status="accepted" if accept else "acknowledged", acknowledged_at=now, annotation_id=annotation))
    return int(annotation)
