"""What else changed: beside a change in one quantity, what moved on the same date.

For a change on day D of one apparatus, the runs of the ``window`` lab days before D are
compared with those of D and the days after it, candidate by candidate: every constant
numeric parameter (one value per run), every per-shot measurement (values of the shots,
at most ``max_values`` a side) and every other stored figure (one value per run). The
ranking is by |Hedges' g| with a Welch p-value (:mod:`runlog.drift.attribution`); it
points at likely causes, it does not prove one.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import asdict

import numpy as np
from sqlalchemy import and_, select, text
from sqlalchemy.engine import Connection

from runlog.drift.attribution import rank_candidates
from runlog.store import schema as s

__all__ = ["what_else_changed"]


def _run_ids(connection: Connection, apparatus_id: int, first: dt.date, last: dt.date) -> list[int]:
    return [r for (r,) in connection.execute(select(s.Run.id).where(and_(s.Run.apparatus_id == apparatus_id, s.Run.day >= first, s.Run.day <= last, s.Run.is_current)))]


def _parameters(connection: Connection, runs: list[int]) -> dict[str, list[float]]:
    values: dict[str, list[float]] = {}
    if runs:
        query = (
            select(s.Parameter.name, s.RunParameter.number_value)
            .join(s.Parameter, s.Parameter.id == s.RunParameter.parameter_id)
            .where(and_(s.RunParameter.run_id.in_(runs), s.RunParameter.scanned.is_(False), s.RunParameter.number_value.is_not(None)))
        )
        for name, value in connection.execute(query):
            values.setdefault(f"parameter {name}", []).append(float(value))
    return values


def _figures(connection: Connection, runs: list[int], skip: str) -> dict[str, list[float]]:
    values: dict[str, list[float]] = {}
    if runs:
        for name, value in connection.execute(select(s.FigureRow.name, s.FigureRow.value).where(and_(s.FigureRow.run_id.in_(runs), s.FigureRow.name != skip))):
            values.setdefault(f"figure {name}", []).append(float(value))
    return values


def _measurements(connection: Connection, runs: list[int], max_values: int) -> dict[str, list[float]]:
    values: dict[str, list[float]] = {}
    if not runs:
        return values
    measured = connection.execute(
        select(s.Measurement.id, s.Measurement.name).where(s.Measurement.id.in_(select(s.RunMeasurement.measurement_id).where(s.RunMeasurement.run_id.in_(runs)).distinct()))
    ).all()
    for measurement_id, name in measured:
        column = s.measurement_column(measurement_id)  # an integer-derived identifier
        rows = connection.execute(
            text(f"SELECT sm.{column} FROM shot_measurements sm JOIN shots ON shots.id = sm.shot_id WHERE shots.run_id IN ({','.join(str(int(r)) for r in runs)}) AND sm.{column} IS NOT NULL LIMIT {int(max_values)}")
        ).all()
        values[f"measurement {name}"] = [float(v) for (v,) in rows]
    return values


def what_else_changed(connection: Connection, apparatus_id: int, day: dt.date, quantity: str, *, window: int = 3, max_values: int = 20_000, top: int = 10) -> list[dict[str, object]]:
    """Candidates ranked by how much they moved across ``day`` (largest |effect| first)."""
    before_runs = _run_ids(connection, apparatus_id, day - dt.timedelta(days=window), day - dt.timedelta(days=1))
    after_runs = _run_ids(connection, apparatus_id, day, day + dt.timedelta(days=window - 1))
    if not before_runs or not after_runs:
        return []
    sides = []
    for runs in (before_runs, after_runs):
        side = _parameters(connection, runs)
        side.update(_figures(connection, runs, quantity))
        side.update(_measurements(connection, runs, max_values))
        sides.append(side)
    candidates = {name: (np.array(sides[0][name]), np.array(sides[1][name])) for name in sorted(set(sides[0]) & set(sides[1])) if len(sides[0][name]) and len(sides[1][name])}
    if not candidates:
        return []
    return [asdict(c) for c in rank_candidates(candidates)[:top]]
