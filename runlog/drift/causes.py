"""The stored readings of the runs as candidate sources for the suspects of a change.

Registers three sources with :mod:`runlog.drift.candidates`: the constant numeric
parameters of the runs (one value per run), per-shot measurements (one mean per run, so
shots correlated within a run count once) and the other stored figures of the runs (one
value per run, with its standard error). :func:`what_else_changed` ranks all registered
sources' candidates for one change day.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import and_, select, text
from sqlalchemy.engine import Connection

from runlog.drift.candidates import Candidate, Window, rank, register_source, sources
from runlog.store import schema as s
from runlog.times import shift_day

__all__ = ["what_else_changed", "run_ids"]


def run_ids(connection: Connection, apparatus_id: int, first: dt.date, last: dt.date) -> list[int]:
    return [r for (r,) in connection.execute(select(s.Run.id).where(and_(s.Run.apparatus_id == apparatus_id, s.Run.day >= first, s.Run.day <= last, s.Run.is_current)))]


def _sides(connection: Connection, apparatus_id: int, window: Window) -> tuple[list[int], list[int]]:
    before = run_ids(connection, apparatus_id, window.before_first, shift_day(window.day, -1))
    after = run_ids(connection, apparatus_id, window.day, window.after_last)
    return before, after


def _paired(name: str, kind: str, sides: list[dict[str, list]], unit: str = "") -> Candidate | None:
    before, after = sides[0].get(name), sides[1].get(name)
    if not before or not after:
        return None
    values_b = tuple(v for v, _ in before)
    values_a = tuple(v for v, _ in after)
    errors_b = tuple(e for _, e in before)
    errors_a = tuple(e for _, e in after)
    with_errors = all(e is not None and e > 0 for e in errors_b + errors_a)
    return Candidate(name, kind, values_b, values_a, errors_b if with_errors else None, errors_a if with_errors else None, unit)


def parameter_candidates(connection: Connection, apparatus_id: int, window: Window, quantity: str) -> list[Candidate]:
    sides = []
    units: dict[str, str] = {}
    for runs in _sides(connection, apparatus_id, window):
        values: dict[str, list] = {}
        if runs:
            query = (
                select(s.Parameter.name, s.Parameter.unit, s.RunParameter.number_value)
                .join(s.Parameter, s.Parameter.id == s.RunParameter.parameter_id)
                .where(and_(s.RunParameter.run_id.in_(runs), s.RunParameter.scanned.is_(False), s.RunParameter.number_value.is_not(None)))
            )
            for name, unit, value in connection.execute(query):
                values.setdefault(name, []).append((float(value), None))
                units[name] = unit or ""
        sides.append(values)
    return [c for name in sorted(units) if (c := _paired(name, "parameter", sides, units[name])) is not None]


def figure_candidates(connection: Connection, apparatus_id: int, window: Window, quantity: str) -> list[Candidate]:
    sides = []
    units: dict[str, str] = {}
    for runs in _sides(connection, apparatus_id, window):
        values: dict[str, list] = {}
        if runs:
            query = select(s.FigureRow.name, s.FigureRow.unit, s.FigureRow.value, s.FigureRow.stderr).where(and_(s.FigureRow.run_id.in_(runs), s.FigureRow.name != quantity, s.FigureRow.out_of_range.is_(False)))
            for name, unit, value, stderr in connection.execute(query):
                values.setdefault(name, []).append((float(value), stderr))
                units[name] = unit or ""
        sides.append(values)
    return [c for name in sorted(units) if (c := _paired(name, "figure", sides, units[name])) is not None]


def measurement_candidates(connection: Connection, apparatus_id: int, window: Window, quantity: str) -> list[Candidate]:
    sides = []
    units: dict[str, str] = {}
    for runs in _sides(connection, apparatus_id, window):
        values: dict[str, list] = {}
        if runs:
            measured = connection.execute(
                select(s.Measurement.id, s.Measurement.name, s.Measurement.unit).where(s.Measurement.id.in_(select(s.RunMeasurement.measurement_id).where(s.RunMeasurement.run_id.in_(runs)).distinct()))
            ).all()
            for measurement_id, name, unit in measured:
                column = s.measurement_column(measurement_id)  # an integer-derived identifier
                listed = ",".join(str(int(r)) for r in runs)
                rows = connection.execute(
                    text(f"SELECT AVG(sm.{column}) FROM shot_measurements sm JOIN shots ON shots.id = sm.shot_id WHERE shots.run_id IN ({listed}) AND sm.{column} IS NOT NULL GROUP BY shots.run_id")
                ).all()
                values[name] = [(float(v), None) for (v,) in rows if v is not None]
                units[name] = unit or ""
        sides.append(values)
    return [c for name in sorted(units) if (c := _paired(name, "measurement", sides, units[name])) is not None]


register_source("parameters", parameter_candidates)
register_source("measurements", measurement_candidates)
register_source("figures", figure_candidates)

# Monitors (runlog.monitors) join the candidates, each at its best time lag.
from runlog.drift import monitor_suspects  # noqa: E402,F401  (registers its source)


def what_else_changed(connection: Connection, apparatus_id: int, day: dt.date, quantity: str, *, window: int = 3, top: int = 10) -> list[dict[str, object]]:
    """Setting changes, then candidates ranked by |standardised change| across ``day``."""
    span = Window.around(day, window)
    candidates: list[Candidate] = []
    for source in sources().values():
        candidates.extend(source(connection, apparatus_id, span, quantity))
    return [suspect.as_dict() for suspect in rank(candidates)[:top]]


def suspects(connection: Connection, apparatus_id: int, day: dt.date, quantity: str, zone, *, window: int = 3, top: int = 10) -> dict[str, object]:
    """For a change on ``day``: the notes of that day and the day before first (operator
    notes, run notes, acknowledgements), then the ranked suspects, then a plain verdict."""
    from runlog.drift.reference import notes_between

    notes = notes_between(connection, apparatus_id, day - dt.timedelta(days=1), day, zone)
    causes = what_else_changed(connection, apparatus_id, day, quantity, window=window, top=top)
    settings = [c for c in causes if c["setting_changed"]]
    moved = [c for c in causes if c["significant"] and not c["setting_changed"]]
    if notes:
        verdict = f"{len(notes)} note{'s' if len(notes) > 1 else ''} on {day - dt.timedelta(days=1)} or {day}: read {'them' if len(notes) > 1 else 'it'} first"
    elif settings or moved:
        verdict = "no note; " + "; ".join(c["words"] for c in (settings + moved)[:3])
    else:
        verdict = "nothing explains this change: no note, no setting changed, nothing else moved beyond its errors"
    return {"day": day.isoformat(), "notes": notes, "causes": causes, "verdict": verdict, "method": "standardised change per candidate; Benjamini-Hochberg (1995) q < 0.05 marks a significant one"}
