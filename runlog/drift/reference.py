"""Reference series: the runs of one apparatus that are alike enough to be compared day by day.

A run's series is its sequence plus a *fingerprint* of its constant settings: every
parameter held constant in the run, numbers rounded to the relative ``tolerance``
(default 1e-3: 65.001 and 65.004 uK are one setting, 65 and 55 uK are two), texts as they
are; the names of the parameters the run scans are part of the fingerprint too (a scan
of the load time is not a run at fixed load time), their values are not. Left out are
the parameters a lab declares may vary (``vary``) and, found automatically, a parameter
that takes a new value in most runs of a sequence (a counter or a time stamp is not a
setting).

A lab may declare, per apparatus, its reference sequence in ``runlog.toml``::

    [reference."lattice-east"]
    sequence = "ramsey"            # the sequence whose runs are the reference
    vary = ["repetition"]          # parameters that may change without starting a new series
    tolerance = 0.001              # relative rounding of constant values

The reference series of a quantity is the series, within the declared sequence if one
is declared, with the most lab days holding that quantity in the latest 28 days with
data (then over all days; then most runs). Daily points, limits and alarms are computed
per series, so a headline number never mixes unlike runs.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import re
from collections import Counter, defaultdict
from dataclasses import dataclass, field

from sqlalchemy import and_, select
from sqlalchemy.engine import Connection

from runlog.store import schema as s
from runlog.store.rollups import as_date
from runlog.units import unit_text

__all__ = ["Declaration", "Series", "describe", "declaration_of", "declare", "run_series", "series_of", "reference_series", "setting_changes", "notes_between", "DEFAULT_TOLERANCE"]

DEFAULT_TOLERANCE = 1e-3
RECENT_DAYS = 28
LINK_GAP = 7


@dataclass(frozen=True)
class Declaration:
    """What a lab declared for one apparatus (or the defaults)."""

    sequence: str | None = None
    vary: frozenset[str] = frozenset()
    tolerance: float = DEFAULT_TOLERANCE

    def as_dict(self) -> dict[str, object]:
        return {"sequence": self.sequence, "vary": sorted(self.vary), "tolerance": self.tolerance}


@dataclass(frozen=True)
class Series:
    """One sequence and the fingerprint of its constant settings."""

    sequence: str
    fingerprint: str
    constants: tuple[tuple[str, str], ...] = ()
    scanned: tuple[str, ...] = ()

    @property
    def key(self) -> str:
        return f"{self.sequence}@{self.fingerprint}"

    @property
    def label(self) -> str:
        parts = [f"{name}={value}" for name, value in self.constants]
        if self.scanned:
            parts.append("scan of " + ", ".join(self.scanned))
        return f"{self.sequence} ({'; '.join(parts)})" if parts else self.sequence

    def as_dict(self) -> dict[str, object]:
        return {"key": self.key, "sequence": self.sequence, "fingerprint": self.fingerprint, "label": self.label, "constants": dict(self.constants), "scanned": list(self.scanned)}


def _setting_key(apparatus_id: int) -> str:
    return f"reference.{apparatus_id}"


def declaration_of(connection: Connection, apparatus_id: int) -> Declaration:
    raw = connection.execute(select(s.Setting.value).where(s.Setting.key == _setting_key(apparatus_id))).scalar()
    if not raw:
        return Declaration()
    data = json.loads(raw)
    return Declaration(data.get("sequence"), frozenset(data.get("vary", [])), float(data.get("tolerance", DEFAULT_TOLERANCE)))


def declare(connection: Connection, apparatus_id: int, declaration: Declaration) -> None:
    """Store a lab's declaration for one apparatus (replacing an earlier one)."""
    connection.execute(s.Setting.__table__.delete().where(s.Setting.key == _setting_key(apparatus_id)))
    connection.execute(s.Setting.__table__.insert().values(key=_setting_key(apparatus_id), value=json.dumps(declaration.as_dict(), sort_keys=True)))


def _rounded(value: float, tolerance: float) -> str:
    """``value`` rounded to the relative ``tolerance``, as plain decimal text."""
    if value == 0 or not math.isfinite(value):
        return repr(float(value))
    quantum = tolerance * 10 ** math.floor(math.log10(abs(value)))
    rounded = round(value / quantum) * quantum
    decimals = max(0, -int(math.floor(math.log10(quantum))))
    text = f"{rounded:.{decimals}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


_ACKNOWLEDGEMENT = re.compile(r"^\S+ (limit|change|setting)\b|^new level accepted")


@dataclass
class RunTable:
    """The current runs of one apparatus with their day, sequence and series."""

    day: dict[int, dt.date] = field(default_factory=dict)
    series: dict[int, Series] = field(default_factory=dict)
    values: dict[int, dict[str, str]] = field(default_factory=dict)  # run -> constant name -> rounded text


def run_series(connection: Connection, apparatus_id: int, declaration: Declaration | None = None) -> RunTable:
    """Every current run of the apparatus with its series (see the module docstring)."""
    declaration = declaration or declaration_of(connection, apparatus_id)
    runs = connection.execute(select(s.Run.id, s.Run.day, s.Run.sequence).where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current))).all()
    table = RunTable()
    sequence_of = {}
    for run_id, day, sequence in runs:
        table.day[run_id] = as_date(day)
        sequence_of[run_id] = sequence
    constants: dict[int, dict[str, str]] = defaultdict(dict)
    scanned: dict[int, set[str]] = defaultdict(set)
    units: dict[str, str] = {}
    query = (
        select(s.RunParameter.run_id, s.Parameter.name, s.Parameter.unit, s.RunParameter.scanned, s.RunParameter.number_value, s.RunParameter.text_value)
        .join(s.Parameter, s.Parameter.id == s.RunParameter.parameter_id)
        .join(s.Run, s.Run.id == s.RunParameter.run_id)
        .where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current))
    )
    for run_id, name, unit, is_scanned, number, text in connection.execute(query):
        if name in declaration.vary:
            continue
        if is_scanned:
            scanned[run_id].add(name)
        elif number is not None:
            constants[run_id][name] = _rounded(float(number), declaration.tolerance)
            units[name] = unit or ""
        elif text is not None:
            constants[run_id][name] = text
    # A parameter with a new value in most runs of a sequence is not a setting.
    by_sequence: dict[str, list[int]] = defaultdict(list)
    for run_id, sequence in sequence_of.items():
        by_sequence[sequence].append(run_id)
    for sequence, members in by_sequence.items():
        seen: dict[str, set[str]] = defaultdict(set)
        for run_id in members:
            for name, value in constants[run_id].items():
                seen[name].add(value)
        varying = {name for name, values in seen.items() if len(values) > 10 and len(values) > 0.2 * len(members)}
        for run_id in members:
            kept = {name: value for name, value in sorted(constants[run_id].items()) if name not in varying}
            # People read the settings (labels, alarms, digest): units as runlog prints them (µK, µs).
            shown = tuple((name, f"{value} {unit_text(units[name])}".strip() if name in units else value) for name, value in kept.items())
            canonical = json.dumps([sorted(kept.items()), sorted(scanned[run_id])])
            fingerprint = hashlib.sha256(canonical.encode()).hexdigest()[:8]
            table.series[run_id] = Series(sequence, fingerprint, shown, tuple(sorted(scanned[run_id])))
            table.values[run_id] = kept
    return table


def _runs_with(connection: Connection, apparatus_id: int, quantity: str) -> set[int]:
    query = select(s.FigureRow.run_id).join(s.Run, s.Run.id == s.FigureRow.run_id).where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current, s.FigureRow.name == quantity))
    return set(connection.execute(query).scalars())


def _link(entries: list[dict[str, object]]) -> list[list[dict[str, object]]]:
    """Chain series that follow one another: a setting changed, the runs went on.

    A series continues an earlier one of the same sequence and scanned parameters when it
    starts no earlier than one lab day before the earlier one's last day and at most
    ``LINK_GAP`` days after it; series that run side by side for longer (three lattice
    depths on the same days) stay apart.
    """
    chains: list[list[dict[str, object]]] = []
    for entry in sorted(entries, key=lambda e: (e["first"], e["series"].key)):
        series = entry["series"]
        candidates = [
            chain for chain in chains
            if chain[-1]["series"].sequence == series.sequence and chain[-1]["series"].scanned == series.scanned
            and chain[-1]["last"] - dt.timedelta(days=1) <= entry["first"] <= chain[-1]["last"] + dt.timedelta(days=LINK_GAP)
            and entry["last"] > chain[-1]["last"]
        ]
        if candidates:
            max(candidates, key=lambda c: (c[-1]["last"], c[-1]["days"])).append(entry)
        else:
            chains.append([entry])
    return chains


def series_of(connection: Connection, apparatus_id: int, quantity: str, table: RunTable | None = None) -> list[dict[str, object]]:
    """The series holding ``quantity`` on the apparatus, most recent days first.

    Each entry is a chain of settings that followed one another (see :func:`_link`): its
    ``series`` is the latest setting, ``key`` the first one's (stable while the chain
    grows), ``members`` all settings with their days, ``runs`` the runs judged: on a day
    two settings share (the change day) the later setting's runs only.
    """
    table = table or run_series(connection, apparatus_id)
    with_quantity = _runs_with(connection, apparatus_id, quantity)
    if not with_quantity:
        return []
    grouped: dict[str, dict[str, object]] = {}
    for run_id in sorted(with_quantity):
        series = table.series[run_id]
        entry = grouped.setdefault(series.key, {"series": series, "runs": [], "days": set()})
        entry["runs"].append(run_id)
        entry["days"].add(table.day[run_id])
    for entry in grouped.values():
        entry["first"], entry["last"] = min(entry["days"]), max(entry["days"])
        entry["day_set"] = entry["days"]
        entry["days"] = len(entry["days"])
    last = max(table.day[r] for r in with_quantity)
    recent_from = last - dt.timedelta(days=RECENT_DAYS)
    out = []
    for chain in _link(list(grouped.values())):
        runs: list[int] = []
        days: set[dt.date] = set()
        for position, member in enumerate(chain):
            later = set().union(*(m["day_set"] for m in chain[position + 1 :])) if position + 1 < len(chain) else set()
            runs += [r for r in member["runs"] if table.day[r] not in later]
            days |= member["day_set"]
        out.append({
            "series": chain[-1]["series"],
            "key": chain[0]["series"].key,
            "members": [{"series": m["series"], "first": m["first"], "last": m["last"], "days": m["days"]} for m in chain],
            "runs": sorted(runs),
            "days": len(days),
            "recent_days": sum(d >= recent_from for d in days),
            "first": min(days),
            "last": max(days),
        })
    out.sort(key=lambda e: (-e["recent_days"], -e["days"], -len(e["runs"]), e["key"]))
    return out


def describe(entry: dict[str, object]) -> dict[str, object]:
    """A chain of :func:`series_of` as plain data: key, sequence, fingerprint, label, settings over time."""
    latest: Series = entry["series"]
    out = latest.as_dict()
    out["key"] = entry["key"]
    out["current"] = latest.key
    out["settings"] = [{"key": m["series"].key, "label": m["series"].label, "first": m["first"].isoformat(), "last": m["last"].isoformat()} for m in entry["members"]]
    if len(entry["members"]) > 1:
        out["label"] = f"{latest.label}, since {entry['members'][-1]['first'].isoformat()} ({len(entry['members']) - 1} earlier setting{'s' if len(entry['members']) > 2 else ''})"
    return out


def reference_series(connection: Connection, apparatus_id: int, quantity: str, *, sequence: str | None = None, table: RunTable | None = None) -> dict[str, object] | None:
    """The reference series of ``quantity`` (see the module docstring), or None."""
    found = series_of(connection, apparatus_id, quantity, table)
    wanted = sequence or declaration_of(connection, apparatus_id).sequence
    if wanted is not None:
        within = [e for e in found if e["series"].sequence == wanted]
        if within or sequence is not None:
            found = within
    return found[0] if found else None


def notes_between(connection: Connection, apparatus_id: int, first: dt.date, last: dt.date, zone) -> list[dict[str, object]]:
    """Notes of the lab days ``first``..``last``: annotations (acknowledgements among them) and run notes."""
    start = dt.datetime.combine(first, dt.time(), zone)
    end = dt.datetime.combine(last + dt.timedelta(days=1), dt.time(), zone)
    out: list[dict[str, object]] = []
    rows = connection.execute(
        select(s.Annotation.at, s.Annotation.text, s.Annotation.author, s.Run.key)
        .outerjoin(s.Run, s.Run.id == s.Annotation.run_id)
        .where(and_(s.Annotation.apparatus_id == apparatus_id, s.Annotation.at >= start, s.Annotation.at < end))
        .order_by(s.Annotation.at)
    ).all()
    for at, text, author, run in rows:
        kind = "acknowledgement" if _ACKNOWLEDGEMENT.search(text) else "note"
        out.append({"at": at.isoformat(), "day": at.astimezone(zone).date().isoformat(), "kind": kind, "run": run, "text": text, "author": author})
    run_notes = connection.execute(
        select(s.Run.day, s.Run.key, s.Run.notes, s.Run.started, s.Run.operator)
        .where(and_(s.Run.apparatus_id == apparatus_id, s.Run.is_current, s.Run.day >= first, s.Run.day <= last, s.Run.notes.is_not(None), s.Run.notes != ""))
        .order_by(s.Run.started)
    ).all()
    for day, key, text, started, operator in run_notes:
        out.append({"at": started.isoformat() if isinstance(started, dt.datetime) else str(started), "day": as_date(day).isoformat(), "kind": "run note", "run": key, "text": text, "author": operator})
    return out


def setting_changes(connection: Connection, apparatus_id: int, entry: dict[str, object], table: RunTable, zone) -> list[dict[str, object]]:
    """The setting changes within a chain of :func:`series_of`: the day each later setting
    started, the constants that changed, and the notes of that day and the day before
    (none: "setting changed without a note")."""
    found = []
    members = entry["members"]
    example = {}
    for run_id, series in table.series.items():
        example.setdefault(series.key, run_id)
    for old, new in zip(members, members[1:]):
        day = new["first"]
        before, after = table.values[example[old["series"].key]], table.values[example[new["series"].key]]
        changed = [{"name": n, "before": before.get(n), "after": after.get(n)} for n in sorted(set(before) | set(after)) if before.get(n) != after.get(n)]
        notes = notes_between(connection, apparatus_id, day - dt.timedelta(days=1), day, zone)
        words = "; ".join(f"{c['name']} {c['before']} -> {c['after']}" for c in changed)
        found.append({"day": day.isoformat(), "from": old["series"].key, "to": new["series"].key, "changed": changed, "notes": notes, "noted": bool(notes), "words": ("setting changed: " if notes else "setting changed without a note: ") + words})
    return found
