"""Drift of one quantity of one apparatus: daily points, control limits, changes, alarms.

Owns the drift query. By default it reads one reference series
(:mod:`runlog.drift.reference`: a sequence plus the fingerprint of its constant settings),
so a headline number never mixes unlike runs; ``series`` names another, ``pooled`` reads
every run of the apparatus (or of ``sequence``) as before. Daily points pool the stored
figures of the series' runs per lab day (never shots):

* counting figures (fill fraction, survival, loss): the day's pooled counts, with the
  shot-level interval and stderr of :mod:`runlog.figures.shot_level` over all the day's
  shots (the Wilson interval and binomial standard error of the pooled counts only for
  runs stored before the sums over shots were kept);
* fitted figures (coherence time, contrast, ...): the inverse-variance weighted mean of
  the day's runs in the arithmetic of the figure's unit (linear; circular for phases;
  ln T for times), its standard error scaled by the Birge ratio when the runs disagree
  by more than their errors, and the spread between runs (:mod:`runlog.drift.pooling`,
  the same for the rollup rows and the figures of chosen runs). Figures flagged
  ``out_of_range`` are left out.

Limits and alarms come from :mod:`runlog.drift.detect`: each day standardised by its own
precision against a rolling baseline of in-control days (or the days after the last
accepted new level). Changes in level come from PELT (Killick et al. 2012) on the daily
values weighted by their inverse variances, with the documented default penalty of
:mod:`runlog.drift.changepoints`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
from sqlalchemy import and_, exists, or_, select
from sqlalchemy.engine import Connection

from runlog.drift.budget import judged_quantities, thresholds_for
from runlog.drift.changepoints import default_penalty, pelt
from runlog.drift.detect import THRESHOLDS, Thresholds, judge
from runlog.errors import NotFoundError
from runlog.drift.pooling import COUNTS, add_sums, arithmetic_of, grouped_sums, half_period
from runlog.store import schema as s

__all__ = ["DriftPoint", "DriftChange", "Drift", "daily_points", "filtered_points", "series_points", "drift_of"]


@dataclass(frozen=True)
class DriftPoint:
    date: dt.date
    value: float
    ci_low: float
    ci_high: float
    runs: int
    shots: int
    stderr: float
    spread: float | None = None  # standard deviation between the day's runs (fitted figures)
    successes: int | None = None
    trials: int | None = None


@dataclass(frozen=True)
class DriftChange:
    date: dt.date
    index: int
    before: float
    after: float
    method: str


@dataclass
class Drift:
    quantity: str
    apparatus: str
    unit: str
    sequence: str | None
    points: list[DriftPoint]
    limits: dict[str, object]
    changes: list[DriftChange]
    counting: bool
    out_of_limits: list[int] = field(default_factory=list)
    alarms: list[dict[str, object]] = field(default_factory=list)
    # Notes near the series: ``at`` is a timezone-aware datetime here and ISO text only in
    # :meth:`as_dict`, so that every reader gets one type whatever its fraction of a second.
    annotations: list[dict[str, object]] = field(default_factory=list)
    series: dict[str, object] | None = None  # the reference series judged (None: pooled runs)
    other_series: list[dict[str, object]] = field(default_factory=list)
    settings: list[dict[str, object]] = field(default_factory=list)  # setting changes of the series
    excursions: list[dict[str, object]] = field(default_factory=list)  # first day of each, with its signals
    z: list[float | None] = field(default_factory=list)

    def as_dict(self) -> dict[str, object]:
        def point(index: int, p: DriftPoint) -> dict[str, object]:
            out = {"date": p.date.isoformat(), "value": p.value, "ci_low": p.ci_low, "ci_high": p.ci_high, "stderr": p.stderr, "runs": p.runs, "shots": p.shots}
            if self.z:
                out["z"] = self.z[index]
            if p.spread is not None:
                out["spread"] = p.spread
            return out

        return {
            "quantity": self.quantity,
            "apparatus": self.apparatus,
            "unit": self.unit,
            "sequence": self.sequence,
            "series": self.series,
            "points": [point(i, p) for i, p in enumerate(self.points)],
            "limits": self.limits,
            "changes": [{"date": c.date.isoformat(), "before": c.before, "after": c.after, "method": c.method} for c in self.changes],
            "alarms": self.alarms,
            "excursions": self.excursions,
            "settings": self.settings,
            "other_series": self.other_series,
            "annotations": [{**note, "at": note["at"].isoformat()} for note in self.annotations],
        }


def _apparatus_id(connection: Connection, quantity: str, apparatus: str | None) -> tuple[int, str]:
    names = connection.execute(
        select(s.Apparatus.id, s.Apparatus.name).where(s.Apparatus.id.in_(select(s.DailyRollup.apparatus_id).where(s.DailyRollup.name == quantity).distinct())).order_by(s.Apparatus.name)
    ).all()
    if apparatus is None:
        if len(names) == 1:
            return int(names[0][0]), names[0][1]
        if not names:
            known = [n for (n,) in connection.execute(select(s.DailyRollup.name).distinct().order_by(s.DailyRollup.name))]
            raise NotFoundError("quantity", quantity, f"known: {', '.join(known)}" if known else "the catalogue has no figures yet")
        raise NotFoundError("single apparatus for", quantity, f"give --apparatus; it is measured on {', '.join(n for _, n in names)}")
    for apparatus_id, name in names:
        if name == apparatus:
            return int(apparatus_id), name
    if connection.execute(select(s.Apparatus.id).where(s.Apparatus.name == apparatus)).first() is None:
        raise NotFoundError("apparatus", apparatus)
    raise NotFoundError("quantity", quantity, f"apparatus '{apparatus}' has no such figure")


def daily_points(connection: Connection, quantity: str, apparatus_id: int, *, sequence: str | None = None, since: dt.date | None = None, until: dt.date | None = None) -> tuple[list[DriftPoint], str, bool]:
    """One point per lab day that has data, from the daily rollups (pooled over sequences
    unless one is given); the same point :func:`filtered_points` makes from the figures."""
    from runlog.drift.pooling import SUMS

    r = s.DailyRollup
    query = select(r.day, r.unit, *(getattr(r, name) for name in SUMS)).where(and_(r.apparatus_id == apparatus_id, r.name == quantity)).order_by(r.day, r.sequence)
    if sequence is not None:
        query = query.where(r.sequence == sequence)
    if since is not None:
        query = query.where(r.day >= since)
    if until is not None:
        query = query.where(r.day <= until)
    _one_unit(connection, select(r.unit).where(and_(r.apparatus_id == apparatus_id, r.name == quantity, *([r.sequence == sequence] if sequence is not None else []))).distinct(), quantity)
    days: dict[object, list[dict]] = {}
    unit = ""
    for day, day_unit, *sums in connection.execute(query):
        unit = day_unit or unit
        days.setdefault(day, []).append(dict(zip(SUMS, sums)))
    points = [p for p in (_point(day, add_sums(rows), unit) for day, rows in days.items()) if p is not None]
    return points, unit, any(p.trials is not None for p in points)


def _one_unit(connection: Connection, units_query, quantity: str) -> None:
    """Refuse to pool a figure stored in several units (different kinds may share a name)."""
    units = sorted(u or "(none)" for (u,) in connection.execute(units_query))
    if len(units) > 1:
        raise NotFoundError("single unit for", quantity, f"it is stored in {', '.join(units)} by different sequences: give a sequence")


def _point(day, sums: dict | None, unit: str) -> DriftPoint | None:
    """One day's point from the added sums of its runs (:func:`runlog.drift.pooling.day_point`)."""
    from runlog.drift.pooling import day_point

    made = day_point(sums, unit)
    if made is None:
        return None
    value, low, high, stderr, spread = made
    day = day if isinstance(day, dt.date) else dt.date.fromisoformat(str(day))
    counted = bool(sums.get("trials"))
    return DriftPoint(day, value, low, high, int(sums["runs"]), int(sums["shots"]), stderr, spread, int(sums["successes"]) if counted else None, int(sums["trials"]) if counted else None)


def filtered_points(connection: Connection, quantity: str, apparatus_id: int, parameters: dict[str, tuple[float, float]] | None = None, *, runs: list[int] | None = None, selection: list | None = None, sequence: str | None = None, since: dt.date | None = None, until: dt.date | None = None) -> tuple[list[DriftPoint], str, bool]:
    """Daily points over only the given runs (``runs``, or a series' ``selection``, see
    :func:`runlog.drift.reference.series_of`) and the runs whose parameters lie in the given ranges.

    A run matches a range when its constant value lies in it, or when its whole scanned
    range does. Pools the runs' stored figures per day, exactly as the rollups do (one
    arithmetic, :mod:`runlog.drift.pooling`); figures flagged ``out_of_range`` are left out.
    """
    f, r = s.FigureRow, s.Run
    query = (
        select(r.day, r.shot_count, f.value, f.stderr, f.successes, f.trials, f.counted_shots, f.successes_squares, f.trials_squares, f.successes_trials, f.unit)
        .join(r, r.id == f.run_id)
        .where(and_(r.apparatus_id == apparatus_id, f.name == quantity, r.is_current, f.out_of_range.is_(False)))
        .order_by(r.day, r.id)
    )
    if runs is not None:
        query = query.where(r.id.in_(runs))
    if selection is not None:
        from runlog.drift.reference import selected

        query = query.where(selected(selection))
    for name, (low, high) in (parameters or {}).items():
        parameter_id = connection.execute(select(s.Parameter.id).where(s.Parameter.name == name)).scalar()
        if parameter_id is None:
            raise NotFoundError("parameter", name)
        rp = s.RunParameter
        matches = select(rp.run_id).where(
            and_(
                rp.run_id == r.id,
                rp.parameter_id == parameter_id,
                or_(
                    and_(rp.scanned.is_(False), rp.number_value >= low, rp.number_value <= high),
                    and_(rp.scanned.is_(True), rp.minimum >= low, rp.maximum <= high),
                ),
            )
        )
        query = query.where(exists(matches))
    if sequence is not None:
        query = query.where(r.sequence == sequence)
    if since is not None:
        query = query.where(r.day >= since)
    if until is not None:
        query = query.where(r.day <= until)
    rows = connection.execute(query).all()
    if len({row[-1] or "" for row in rows}) > 1:
        units = sorted({row[-1] or "(none)" for row in rows})
        raise NotFoundError("single unit for", quantity, f"it is stored in {', '.join(units)} by different sequences: give a sequence")
    unit = next((row[-1] for row in rows if row[-1]), "")
    columns = list(zip(*rows)) if rows else [()] * 11
    by_day = grouped_sums(columns[0], columns[2], columns[3], unit, shots=columns[1], counts=dict(zip(COUNTS, columns[4:10])))
    points = [p for p in (_point(day, sums, unit) for day, sums in by_day.items()) if p is not None]
    return points, unit, any(p.trials is not None for p in points)


def series_points(connection: Connection, quantity: str, apparatus_id: int, selection: list, *, since: dt.date | None = None, until: dt.date | None = None) -> tuple[list[DriftPoint], str, bool]:
    """Daily points of a series' ``selection`` (see :func:`runlog.drift.reference.series_of`)
    from the series rollups (:mod:`runlog.store.rollups`): the points :func:`filtered_points`
    makes from the figures of its runs, read from one row per lab day."""
    from runlog.drift.pooling import SUMS

    sr = s.SeriesRollup
    conditions = [sr.apparatus_id == apparatus_id, sr.name == quantity, or_(*(and_(sr.sequence == q, sr.fingerprint == fp, *([sr.day.not_in(left_out)] if left_out else [])) for q, fp, left_out in selection))]
    if since is not None:
        conditions.append(sr.day >= since)
    if until is not None:
        conditions.append(sr.day <= until)
    rows = connection.execute(select(sr.day, sr.unit, sr.units, *(getattr(sr, name) for name in SUMS)).where(and_(*conditions)).order_by(sr.day)).all()
    rows = [row for row in rows if row[3]]  # days whose figures are all flagged out of range have no point
    if len({row[1] for row in rows}) > 1 or any(row[2] > 1 for row in rows) or len({row[0] for row in rows}) < len(rows):
        # Several units (which the run-by-run pooling names), or a day of two settings.
        return filtered_points(connection, quantity, apparatus_id, selection=selection, since=since, until=until)
    unit = rows[0][1] if rows else ""
    points = [p for p in (_point(day, dict(zip(SUMS, sums)), unit) for day, _, _, *sums in rows) if p is not None]
    return points, unit, any(p.trials is not None for p in points)


def _unwrapped(points: list[DriftPoint], half: float) -> list[DriftPoint]:
    """Daily phases shifted by whole turns so that each lies within half a turn of the day
    before: a phase drifting through 180 deg is charted as a drift, not as a jump of a
    full turn (limits and changes are judged on this series)."""
    from dataclasses import replace

    values = np.unwrap(np.array([p.value for p in points]), period=2 * half)
    return [replace(p, value=float(v), ci_low=p.ci_low + float(v) - p.value, ci_high=p.ci_high + float(v) - p.value) for p, v in zip(points, values)]


def _accepted_days(connection: Connection, apparatus_id: int, quantity: str, series_key: str) -> list[dt.date]:
    """Days from which a new level was accepted (an alarm acknowledged with "accept")."""
    a = s.Alarm
    rows = connection.execute(select(a.day).where(and_(a.apparatus_id == apparatus_id, a.quantity == quantity, a.series_key == series_key, a.status == "accepted"))).scalars()
    return sorted({d if isinstance(d, dt.date) else dt.date.fromisoformat(str(d)) for d in rows})


def _limits(points: list[DriftPoint], accepted: list[dt.date], thresholds: Thresholds, baseline: tuple[dt.date, dt.date] | None, period: float | None = None):
    days = [p.date for p in points]
    values = np.array([p.value for p in points])
    errors = np.array([p.stderr for p in points])
    fixed = None
    if baseline is not None:
        fixed = [baseline[0] <= d <= baseline[1] for d in days]
    judgement = judge(days, values, errors, accepted=accepted, thresholds=thresholds, fixed=fixed, period=period)
    sigma = judgement.sigma
    # The day limits are around the centre at +-day_limit of each day's own sigma; the
    # EWMA of standardised values is drawn back in the figure's unit around the centre
    # with its own (narrower) limits, so each line has the limits of its statistic.
    spread = np.sqrt(np.nanmean(errors**2) + np.nan_to_num(judgement.scatter) ** 2)
    def listed(array):
        return [None if not np.isfinite(v) else float(v) for v in array]
    limits: dict[str, object] = {
        "method": thresholds.describe(),
        "center": None if not np.isfinite(judgement.centre).any() else float(judgement.centre[np.isfinite(judgement.centre)][-1]),
        "centre": listed(judgement.centre),
        "scatter": listed(judgement.scatter),
        "lower": listed(judgement.centre - thresholds.day_limit * sigma),
        "upper": listed(judgement.centre + thresholds.day_limit * sigma),
        "ewma": listed(judgement.centre + judgement.ewma * spread),
        "ewma_lower": listed(judgement.centre - judgement.ewma_limit * spread),
        "ewma_upper": listed(judgement.centre + judgement.ewma_limit * spread),
        "ewma_z": listed(judgement.ewma),
        "ewma_limit_z": judgement.ewma_limit,
        "cusum_upper": judgement.cusum_upper.tolist(),
        "cusum_lower": judgement.cusum_lower.tolist(),
        "cusum_h": thresholds.cusum_h,
        "accepted": [d.isoformat() for d in accepted],
        "learning": [bool(v) for v in judgement.learning],
    }
    if baseline is not None:
        limits["baseline"] = [baseline[0].isoformat(), baseline[1].isoformat()]
    else:
        start = judgement.baseline_start[-1]
        in_control = [d for d, out in zip(days, judgement.out) if not out and start is not None and d >= start]
        limits["baseline"] = [start.isoformat(), in_control[-1].isoformat()] if in_control else None
    return limits, judgement


def drift_of(connection: Connection, quantity: str, *, apparatus: str | None = None, sequence: str | None = None, series: str | None = None, pooled: bool = False, since: dt.date | None = None, until: dt.date | None = None, baseline: tuple[dt.date, dt.date] | None = None, parameters: dict[str, tuple[float, float]] | None = None, thresholds: Thresholds = THRESHOLDS, zone=None) -> Drift:
    """The drift of ``quantity`` on one apparatus, for its reference series by default
    (``series``: another, by key; ``pooled``: all runs, or all of ``sequence``), from the
    stored figures of the runs (never from shots)."""
    from zoneinfo import ZoneInfo

    from runlog.drift import reference

    zone = zone or ZoneInfo("UTC")
    apparatus_id, apparatus_name = _apparatus_id(connection, quantity, apparatus)
    # Parameter ranges are the reader's own choice of comparable runs: they replace the series.
    pooled = pooled or bool(parameters)
    chosen = None
    others: list[dict[str, object]] = []
    if not pooled:
        found = reference.series_of(connection, apparatus_id, quantity)
        if series is not None:
            picked = [e for e in found if series == e["key"] or any(m["series"].key == series for m in e["members"])]
            if not picked:
                raise NotFoundError("series", series, "known: " + ", ".join(e["key"] for e in found) if found else f"apparatus '{apparatus_name}' has no series with {quantity}")
            chosen = picked[0]
        else:
            chosen = reference.pick_reference(connection, apparatus_id, found, sequence)
            if chosen is None:
                raise NotFoundError("series of", quantity, f"sequence '{sequence}' has no runs with it" if sequence else f"apparatus '{apparatus_name}' has none")
        others = [{**reference.describe(e), "days": e["days"], "runs": e["runs"], "first": e["first"].isoformat(), "last": e["last"].isoformat(), "reference": e["key"] == chosen["key"]} for e in found]
    if chosen is None:
        points, unit, counting = filtered_points(connection, quantity, apparatus_id, parameters, sequence=sequence, since=since, until=until)
    elif "run_ids" in chosen:  # series computed in memory: their stored keys were out of date
        points, unit, counting = filtered_points(connection, quantity, apparatus_id, runs=chosen["run_ids"], since=since, until=until)
    else:
        points, unit, counting = series_points(connection, quantity, apparatus_id, chosen["selection"], since=since, until=until)
    # Phases are judged on the circle: the baseline's centre is a mean direction and every
    # residual is wrapped (runlog.drift.detect); the unwrapped series is what is charted.
    period = 2.0 * half_period(unit) if not counting and points and arithmetic_of(unit) == "circular" else None
    if period is not None:
        points = _unwrapped(points, period / 2.0)
    key = chosen["key"] if chosen else ""
    result = Drift(quantity, apparatus_name, unit, chosen["series"].sequence if chosen else sequence, points, {}, [], counting, series=reference.describe(chosen) if chosen else None, other_series=others)
    if chosen is not None:
        result.settings = reference.setting_changes(connection, apparatus_id, chosen, zone)
    if len(points) < 3:
        result.limits = {"note": "fewer than 3 days with data: no limits or changes"}
        return result
    accepted = _accepted_days(connection, apparatus_id, quantity, key)
    # The apparatus' quantities share one false-alarm budget (runlog.drift.budget).
    sharing = judged_quantities(connection, apparatus_id, thresholds)
    thresholds = thresholds_for(len(sharing), thresholds)
    limits, judgement = _limits(points, accepted, thresholds, baseline, period)
    limits["budget_shared_by"] = sharing
    result.limits = limits
    result.z = [None if not np.isfinite(v) else float(v) for v in judgement.z]
    result.out_of_limits = [int(i) for i in np.flatnonzero(judgement.out)]
    result.excursions = [{"date": points[i].date.isoformat(), "index": i, "signals": judgement.signals[i], "z": float(judgement.z[i]), "size": float(points[i].value - judgement.centre[i])} for i in judgement.excursions()]
    values = np.array([p.value for p in points])
    stderr = np.array([p.stderr for p in points])
    weights = 1.0 / stderr**2 if np.all(np.isfinite(stderr)) and np.all(stderr > 0) else None
    penalty = default_penalty(values, weights, trusted_weights=True)
    method = "pelt (Killick et al. 2012), penalty 2.5*2*max(1,scale)^2*ln(n)"
    for change in pelt(values, weights=weights, penalty=penalty, min_size=2):
        result.changes.append(DriftChange(points[change.index].date, change.index, float(change.before), float(change.after), method))
    return result
