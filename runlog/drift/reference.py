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
import json
import re
from collections import defaultdict
from dataclasses import dataclass, field

from sqlalchemy import and_, func, or_, select
from sqlalchemy.engine import Connection

from runlog.store import schema as s
from runlog.store import series_keys as keys
from runlog.store.rollups import as_date
from runlog.store.series_keys import DEFAULT_TOLERANCE, Declaration
from runlog.units import unit_text

__all__ = ["Declaration", "Series", "describe", "declaration_of", "declare", "run_series", "stored_series", "series_of", "chain_runs", "selected", "reference_series", "pick_reference", "setting_changes", "notes_between", "DEFAULT_TOLERANCE"]

RECENT_DAYS = 28
LINK_GAP = 7


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


def declaration_of(connection: Connection, apparatus_id: int) -> Declaration:
    return keys.read_declaration(keys.over(connection), apparatus_id)


def declare(connection: Connection, apparatus_id: int, declaration: Declaration) -> None:
    """Store a lab's declaration for one apparatus (replacing an earlier one); when its
    ``vary`` or ``tolerance`` changed, the stored series keys are recomputed with it."""
    db = keys.over(connection)
    before = keys.read_declaration(db, apparatus_id)
    db.execute("DELETE FROM settings WHERE key = :k", {"k": keys.declaration_key(apparatus_id)})
    db.execute("INSERT INTO settings (key, value) VALUES (:k, :v)", {"k": keys.declaration_key(apparatus_id), "v": json.dumps(declaration.as_dict(), sort_keys=True)})
    if keys.basis_of(before) != keys.basis_of(declaration) or keys.fresh(db, apparatus_id, declaration) is None:
        keys.rebuild(db, apparatus_id)


_ACKNOWLEDGEMENT = re.compile(r"^\S+ (limit|change|setting)\b|^new level accepted")


def _shown(kept: dict[str, str], units: dict[str, str]) -> tuple[tuple[str, str], ...]:
    # People read the settings (labels, alarms, digest): units as runlog prints them (µK, µs).
    return tuple((name, f"{value} {unit_text(units[name])}".strip() if name in units else value) for name, value in kept.items())


@dataclass
class RunTable:
    """The current runs of one apparatus with their day, sequence and series."""

    day: dict[int, dt.date] = field(default_factory=dict)
    series: dict[int, Series] = field(default_factory=dict)
    values: dict[int, dict[str, str]] = field(default_factory=dict)  # run -> constant name -> rounded text


def run_series(connection: Connection, apparatus_id: int, declaration: Declaration | None = None) -> RunTable:
    """Every current run of the apparatus with its series, computed from its parameters
    (the definition; the drift query reads the stored keys, :func:`stored_series`)."""
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
        setting = keys.setting_of(name, is_scanned, number, text, declaration)
        if setting is None:
            continue
        if setting[0]:
            scanned[run_id].add(name)
        else:
            constants[run_id][name] = setting[2]
            if setting[1]:
                units[name] = unit or ""
    # A parameter with a new value in most runs of a sequence is not a setting.
    by_sequence: dict[str, list[int]] = defaultdict(list)
    for run_id, sequence in sequence_of.items():
        by_sequence[sequence].append(run_id)
    for sequence, members in by_sequence.items():
        seen: dict[str, set[str]] = defaultdict(set)
        for run_id in members:
            for name, value in constants[run_id].items():
                seen[name].add(value)
        varying = set(keys.varying_of(((name, len(values)) for name, values in seen.items()), len(members)))
        for run_id in members:
            kept = {name: value for name, value in sorted(constants[run_id].items()) if name not in varying}
            table.series[run_id] = Series(sequence, keys.fingerprint(kept, scanned[run_id]), _shown(kept, units), tuple(sorted(scanned[run_id])))
            table.values[run_id] = kept
    return table


@dataclass
class StoredSeries:
    """The series of the runs holding one quantity, from the stored keys: per (sequence,
    fingerprint) its runs per lab day, and its settings (``values``, from one run)."""

    days: dict[tuple[str, str], dict[dt.date, int]] = field(default_factory=dict)
    series: dict[tuple[str, str], Series] = field(default_factory=dict)
    values: dict[tuple[str, str], dict[str, str]] = field(default_factory=dict)
    # Computed in memory (stored keys out of date): the runs of each group and day.
    run_ids: dict[tuple[str, str], dict[dt.date, list[int]]] | None = None


def stored_series(connection: Connection, apparatus_id: int, quantity: str, declaration: Declaration | None = None) -> StoredSeries | None:
    """The series holding ``quantity`` from the stored keys (:mod:`runlog.store.series_keys`),
    or None when they were not computed under the apparatus' declaration (the caller
    then computes them, :func:`run_series`)."""
    declaration = declaration or declaration_of(connection, apparatus_id)
    varying = keys.fresh(keys.over(connection), apparatus_id, declaration)
    if varying is None:
        return None
    sr, r = s.SeriesRollup, s.Run
    rows = connection.execute(select(sr.sequence, sr.fingerprint, sr.day, sr.held).where(and_(sr.apparatus_id == apparatus_id, sr.name == quantity))).all()
    found = StoredSeries()
    for sequence, fp, day, count in rows:
        if not fp or sequence not in varying:
            return None
        days = found.days.setdefault((sequence, fp), {})
        days[as_date(day)] = days.get(as_date(day), 0) + int(count)
    examples: dict[tuple[str, str], int] = {}
    for sequence, fp in found.days:
        example = connection.execute(select(func.min(r.id)).where(and_(r.apparatus_id == apparatus_id, r.sequence == sequence, r.series_fingerprint == fp, r.is_current))).scalar()
        if example is None:
            return None
        examples[(sequence, fp)] = int(example)
    settings: dict[int, list[tuple]] = defaultdict(list)
    ids = sorted(examples.values())
    for start in range(0, len(ids), 500):
        query = (
            select(s.RunSetting.run_id, s.Parameter.name, s.Parameter.unit, s.RunSetting.scanned, s.RunSetting.with_unit, s.RunSetting.value)
            .join(s.Parameter, s.Parameter.id == s.RunSetting.parameter_id)
            .where(s.RunSetting.run_id.in_(ids[start : start + 500]))
        )
        for run_id, *row in connection.execute(query):
            settings[int(run_id)].append(tuple(row))
    for (sequence, fp), example in examples.items():
        left_out = set(varying[sequence])
        kept, units, scanned = {}, {}, []
        for name, unit, is_scanned, with_unit, value in sorted(settings[example]):
            if is_scanned:
                scanned.append(name)
            elif name not in left_out:
                kept[name] = value
                if with_unit:
                    units[name] = unit or ""
        if keys.fingerprint(kept, scanned) != fp:
            return None  # a run's settings changed without its fingerprint
        found.series[(sequence, fp)] = Series(sequence, fp, _shown(dict(sorted(kept.items())), units), tuple(sorted(scanned)))
        found.values[(sequence, fp)] = kept
    return found


def _from_table(connection: Connection, apparatus_id: int, quantity: str, table: RunTable) -> StoredSeries:
    """The same as :func:`stored_series`, from series computed in memory."""
    found = StoredSeries(run_ids={})
    for run_id in sorted(_runs_with(connection, apparatus_id, quantity)):
        series = table.series[run_id]
        group = (series.sequence, series.fingerprint)
        found.run_ids.setdefault(group, {}).setdefault(table.day[run_id], []).append(run_id)
        found.days.setdefault(group, {})[table.day[run_id]] = len(found.run_ids[group][table.day[run_id]])
        found.series.setdefault(group, series)
        found.values.setdefault(group, table.values[run_id])
    return found


def _found(connection: Connection, apparatus_id: int, quantity: str, table: RunTable | None) -> StoredSeries:
    if table is None:
        stored = stored_series(connection, apparatus_id, quantity)
        if stored is not None:
            return stored
        table = run_series(connection, apparatus_id)
    return _from_table(connection, apparatus_id, quantity, table)


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
    grows), ``members`` all settings with their days, ``runs`` the number of runs judged:
    on a day two settings share (the change day) the later setting's runs only;
    ``selection`` says which (sequence, fingerprint, days left out) and :func:`chain_runs`
    lists them. From the stored keys, or from ``table`` (computed by :func:`run_series`).
    """
    found = _found(connection, apparatus_id, quantity, table)
    if not found.days:
        return []
    grouped: dict[str, dict[str, object]] = {}
    for group, days in found.days.items():
        series = found.series[group]
        grouped[series.key] = {"series": series, "group": group, "counts": days, "day_set": set(days), "first": min(days), "last": max(days), "days": len(days)}
    last = max(e["last"] for e in grouped.values())
    recent_from = last - dt.timedelta(days=RECENT_DAYS)
    out = []
    for chain in _link(list(grouped.values())):
        runs = 0
        days: set[dt.date] = set()
        selection = []
        for position, member in enumerate(chain):
            later = set().union(*(m["day_set"] for m in chain[position + 1 :])) if position + 1 < len(chain) else set()
            left_out = member["day_set"] & later
            runs += sum(count for day, count in member["counts"].items() if day not in left_out)
            selection.append((*member["group"], sorted(left_out)))
            days |= member["day_set"]
        entry = {
            "series": chain[-1]["series"],
            "key": chain[0]["series"].key,
            "members": [{"series": m["series"], "first": m["first"], "last": m["last"], "days": m["days"], "values": found.values[m["group"]]} for m in chain],
            "runs": runs,
            "selection": selection,
            "days": len(days),
            "recent_days": sum(d >= recent_from for d in days),
            "first": min(days),
            "last": max(days),
        }
        if found.run_ids is not None:
            entry["run_ids"] = sorted(r for (sequence, fp, left_out) in selection for day, ids in found.run_ids[(sequence, fp)].items() if day not in left_out for r in ids)
        out.append(entry)
    out.sort(key=lambda e: (-e["recent_days"], -e["days"], -e["runs"], e["key"]))
    return out


def chain_runs(connection: Connection, apparatus_id: int, quantity: str, entry: dict[str, object]) -> list[int]:
    """The ids of the runs an entry of :func:`series_of` judges, in id order."""
    if "run_ids" in entry:
        return list(entry["run_ids"])
    r, f = s.Run, s.FigureRow
    query = select(r.id).join(f, f.run_id == r.id).where(and_(r.apparatus_id == apparatus_id, r.is_current, f.name == quantity, selected(entry["selection"]))).order_by(r.id)
    return [int(i) for i in connection.execute(query).scalars()]


def selected(selection: list[tuple[str, str, list[dt.date]]]):
    """SQL condition on ``runs``: the runs of an entry's ``selection`` (see :func:`series_of`)."""
    r = s.Run
    return or_(*(and_(r.sequence == sequence, r.series_fingerprint == fp, *([r.day.not_in(left_out)] if left_out else [])) for sequence, fp, left_out in selection))


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
    return pick_reference(connection, apparatus_id, series_of(connection, apparatus_id, quantity, table), sequence)


def pick_reference(connection: Connection, apparatus_id: int, found: list[dict[str, object]], sequence: str | None = None) -> dict[str, object] | None:
    """The reference series among the entries ``found`` of :func:`series_of`, or None."""
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


def setting_changes(connection: Connection, apparatus_id: int, entry: dict[str, object], zone) -> list[dict[str, object]]:
    """The setting changes within a chain of :func:`series_of`: the day each later setting
    started, the constants that changed, and the notes of that day and the day before
    (none: "setting changed without a note")."""
    found = []
    members = entry["members"]
    for old, new in zip(members, members[1:]):
        day = new["first"]
        before, after = old["values"], new["values"]
        changed = [{"name": n, "before": before.get(n), "after": after.get(n)} for n in sorted(set(before) | set(after)) if before.get(n) != after.get(n)]
        notes = notes_between(connection, apparatus_id, day - dt.timedelta(days=1), day, zone)
        words = "; ".join(f"{c['name']} {c['before']} -> {c['after']}" for c in changed)
        found.append({"day": day.isoformat(), "from": old["series"].key, "to": new["series"].key, "changed": changed, "notes": notes, "noted": bool(notes), "words": ("setting changed: " if notes else "setting changed without a note: ") + words})
    return found
