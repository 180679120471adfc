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
  the day's runs, its standard error scaled by the Birge ratio when the runs disagree
  by more than their errors, and the spread between runs.

Limits and alarms come from :mod:`runlog.drift.detect`: each day standardised by its own
precision against a rolling baseline of in-control days (or the days after the last
accepted new level). Changes in level come from PELT (Killick et al. 2012) on the daily
values weighted by their inverse variances, with the documented default penalty of
:mod:`runlog.drift.changepoints`.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field

import numpy as np
from sqlalchemy import and_, case, exists, func, or_, select
from sqlalchemy.engine import Connection

from runlog.drift.changepoints import default_penalty, pelt
from runlog.drift.detect import THRESHOLDS, Thresholds, judge
from runlog.errors import NotFoundError
from runlog.figures.intervals import wilson
from runlog.drift.pooling import arithmetic_of, half_period, pool
from runlog.figures.shot_level import ShotSums, shot_level_interval
from runlog.store import schema as s

__all__ = ["DriftPoint", "DriftChange", "Drift", "daily_points", "filtered_points", "series_points", "drift_of"]

Z95 = 1.959963984540054


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
    """One point per lab day that has data, pooled over runs (and sequences unless given)."""
    r = s.DailyRollup
    query = (
        select(
            r.day,
            func.sum(r.runs),
            func.sum(r.shots),
            func.sum(r.successes),
            func.sum(r.trials),
            func.sum(r.counted_shots),
            func.sum(r.successes_squares),
            func.sum(r.trials_squares),
            func.sum(r.successes_trials),
            func.sum(r.value_count),
            func.sum(r.value_sum),
            func.sum(r.value_square_sum),
            func.sum(r.weight_sum),
            func.sum(r.weighted_value_sum),
            func.sum(r.weighted_square_sum),
            func.max(r.unit),
        )
        .where(and_(r.apparatus_id == apparatus_id, r.name == quantity))
        .group_by(r.day)
        .order_by(r.day)
    )
    if sequence is not None:
        query = query.where(r.sequence == sequence)
    if since is not None:
        query = query.where(r.day >= since)
    if until is not None:
        query = query.where(r.day <= until)
    _one_unit(connection, select(r.unit).where(and_(r.apparatus_id == apparatus_id, r.name == quantity, *([r.sequence == sequence] if sequence is not None else []))).distinct(), quantity)
    points: list[DriftPoint] = []
    unit, counting = "", False
    for day, *sums, day_unit in connection.execute(query):
        unit = day_unit or unit
        point = _point(day, *sums)
        if point is not None:
            counting = counting or point.trials is not None
            points.append(point)
    return points, unit, counting


def _one_unit(connection: Connection, units_query, quantity: str) -> None:
    """Refuse to pool a figure stored in several units (different kinds may share a name)."""
    units = sorted(u or "(none)" for (u,) in connection.execute(units_query))
    if len(units) > 1:
        raise NotFoundError("single unit for", quantity, f"it is stored in {', '.join(units)} by different sequences: give a sequence")


def _point(day, runs, shots, successes, trials, counted, y2, x2, xy, count, total, squares, weights, weighted, weighted_squares) -> DriftPoint | None:
    """One day's point from the pooled sums of its runs (see the module docstring)."""
    day = day if isinstance(day, dt.date) else dt.date.fromisoformat(str(day))
    if trials:
        successes, trials = int(successes), int(trials)
        p = successes / trials
        # SUM over runs is NULL if any run lacks the sums, so a day is shot-level only when
        # all of its runs are.
        honest = shot_level_interval(ShotSums(int(counted), successes, trials, float(y2), float(x2), float(xy))) if counted is not None and y2 is not None else None
        if honest is not None:
            return DriftPoint(day, p, honest.low, honest.high, int(runs), int(shots), honest.stderr, None, successes, trials)
        low, high = wilson(successes, trials)
        return DriftPoint(day, p, low, high, int(runs), int(shots), math.sqrt(p * (1 - p) / trials), None, successes, trials)
    spread = None
    if count and count > 1:
        spread = math.sqrt(max(0.0, (squares - total * total / count) / (count - 1)))
    if weights:
        mean = weighted / weights
        stderr = 1.0 / math.sqrt(weights)
        if count and count > 1:
            # Birge ratio: runs that disagree beyond their errors widen the day's error.
            chi2 = max(0.0, weighted_squares - weighted * weighted / weights)
            stderr *= max(1.0, math.sqrt(chi2 / (count - 1)))
    elif count:
        mean = total / count
        stderr = (spread / math.sqrt(count)) if spread is not None else math.nan
    else:
        return None
    return DriftPoint(day, mean, mean - Z95 * stderr, mean + Z95 * stderr, int(runs), int(shots), stderr, spread)


def _all_or_none(column):
    """SUM of ``column`` over a day's counted runs, NULL when one of them lacks it (as
    SQL's SUM in the rollups: one run without sums over shots makes them NULL)."""
    f = s.FigureRow
    counted = f.trials.is_not(None)
    return case((func.count(case((and_(counted, column.is_(None)), 1))) > 0, None), else_=func.sum(case((counted, column))))


def filtered_points(connection: Connection, quantity: str, apparatus_id: int, parameters: dict[str, tuple[float, float]] | None = None, *, runs: list[int] | None = None, selection: list | None = None, sequence: str | None = None, since: dt.date | None = None, until: dt.date | None = None) -> tuple[list[DriftPoint], str, bool]:
    """Daily points over only the given runs (``runs``, or a series' ``selection``, see
    :func:`runlog.drift.reference.series_of`) and the runs whose parameters lie in the
    given ranges.

    A run matches a range when its constant value lies in it, or when its whole scanned
    range does. Pools the runs' stored figures per day, exactly as the rollups do: the
    counts of counting figures summed per day in SQL, the fitted figures of a day pooled
    from each run's value and stderr (:func:`runlog.drift.pooling.pool`).
    """
    f, r = s.FigureRow, s.Run
    conditions = [r.apparatus_id == apparatus_id, f.name == quantity, r.is_current]
    if runs is not None:
        conditions.append(r.id.in_(runs))
    if selection is not None:
        from runlog.drift.reference import selected

        conditions.append(selected(selection))
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
        conditions.append(exists(matches))
    if sequence is not None:
        conditions.append(r.sequence == sequence)
    if since is not None:
        conditions.append(r.day >= since)
    if until is not None:
        conditions.append(r.day <= until)
    unit_of = func.coalesce(f.unit, "")
    counted = f.trials.is_not(None)
    query = (
        select(
            r.day,
            unit_of,
            func.count(),
            func.sum(r.shot_count),
            func.sum(case((counted, f.successes))),
            func.sum(f.trials),
            _all_or_none(f.counted_shots),
            _all_or_none(f.successes_squares),
            _all_or_none(f.trials_squares),
            _all_or_none(f.successes_trials),
        )
        .join(r, r.id == f.run_id)
        .where(and_(*conditions))
        .group_by(r.day, unit_of)
        .order_by(r.day)
    )
    return _pooled(connection, quantity, connection.execute(query).all(), conditions)


def series_points(connection: Connection, quantity: str, apparatus_id: int, selection: list, *, since: dt.date | None = None, until: dt.date | None = None) -> tuple[list[DriftPoint], str, bool]:
    """Daily points of a series' ``selection`` (see :func:`runlog.drift.reference.series_of`)
    from the series rollups: the same points as :func:`filtered_points` over its runs."""
    from runlog.drift.reference import selected

    sr = s.SeriesRollup
    conditions = [sr.apparatus_id == apparatus_id, sr.name == quantity, or_(*(and_(sr.sequence == q, sr.fingerprint == fp, *([sr.day.not_in(left_out)] if left_out else [])) for q, fp, left_out in selection))]
    if since is not None:
        conditions.append(sr.day >= since)
    if until is not None:
        conditions.append(sr.day <= until)
    query = select(sr.day, sr.unit, sr.units, sr.runs, sr.shots, sr.successes, sr.trials, sr.counted_shots, sr.successes_squares, sr.trials_squares, sr.successes_trials).where(and_(*conditions)).order_by(sr.day)
    rows = connection.execute(query).all()
    if len({row[1] for row in rows}) > 1 or any(row[2] > 1 for row in rows) or len({row[0] for row in rows}) < len(rows):
        # Several units, or a day of two settings: pooled run by run (which names the units).
        return filtered_points(connection, quantity, apparatus_id, selection=selection, since=since, until=until)
    r, f = s.Run, s.FigureRow
    runs = [r.apparatus_id == apparatus_id, f.name == quantity, r.is_current, selected(selection)]
    return _pooled(connection, quantity, [(row[0], row[1], *row[3:]) for row in rows], runs)


def _pooled(connection: Connection, quantity: str, days: list[tuple], conditions: list) -> tuple[list[DriftPoint], str, bool]:
    """Points from per-day sums (day, unit, runs, shots, successes, trials, counted shots,
    sums of squares and products); a day without counts pools its runs' fitted figures,
    read with ``conditions`` (over figures and runs)."""
    f, r = s.FigureRow, s.Run
    units = sorted({row[1] for row in days})
    if len(units) > 1:
        raise NotFoundError("single unit for", quantity, f"it is stored in {', '.join(u or '(none)' for u in units)} by different sequences: give a sequence")
    unit = units[0] if units else ""
    fitted: dict[object, tuple[list[float], list[float | None]]] = {}
    wanted = [row[0] for row in days if not row[5]]
    for start in range(0, len(wanted), 500):
        rows = connection.execute(select(r.day, f.value, f.stderr).join(r, r.id == f.run_id).where(and_(*conditions, r.day.in_(wanted[start : start + 500]))).order_by(r.day, r.id))
        for day, value, stderr in rows:
            fitted.setdefault(day, ([], []))
            fitted[day][0].append(value)
            fitted[day][1].append(stderr)
    points = []
    for day, _, count, shots, successes, trials, *sums in days:
        if trials:
            point = _point(day, count, shots, successes, trials, *sums, count, 0.0, 0.0, None, None, None)
        else:
            # Fitted figures: linear, circular (angles) or logarithmic (times) pooling.
            value, low, high, stderr, spread = pool(*fitted[day], unit)
            day = day if isinstance(day, dt.date) else dt.date.fromisoformat(str(day))
            point = DriftPoint(day, value, low, high, int(count), int(shots), stderr, spread)
        if point is not None:
            points.append(point)
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


def _limits(points: list[DriftPoint], accepted: list[dt.date], thresholds: Thresholds, baseline: tuple[dt.date, dt.date] | None):
    days = [p.date for p in points]
    values = np.array([p.value for p in points])
    errors = np.array([p.stderr for p in points])
    fixed = None
    if baseline is not None:
        fixed = [baseline[0] <= d <= baseline[1] for d in days]
    judgement = judge(days, values, errors, accepted=accepted, thresholds=thresholds, fixed=fixed)
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
    if chosen is not None and "run_ids" in chosen:
        points, unit, counting = filtered_points(connection, quantity, apparatus_id, parameters, runs=chosen["run_ids"], since=since, until=until)
    elif chosen is not None:
        points, unit, counting = series_points(connection, quantity, apparatus_id, chosen["selection"], since=since, until=until)
    else:
        points, unit, counting = filtered_points(connection, quantity, apparatus_id, parameters, sequence=sequence, since=since, until=until)
    if not counting and points and arithmetic_of(unit) == "circular":
        points = _unwrapped(points, half_period(unit))
    key = chosen["key"] if chosen else ""
    result = Drift(quantity, apparatus_name, unit, chosen["series"].sequence if chosen else sequence, points, {}, [], counting, series=reference.describe(chosen) if chosen else None, other_series=others)
    if chosen is not None:
        result.settings = reference.setting_changes(connection, apparatus_id, chosen, zone)
    if len(points) < 3:
        result.limits = {"note": "fewer than 3 days with data: no limits or changes"}
        return result
    accepted = _accepted_days(connection, apparatus_id, quantity, key)
    limits, judgement = _limits(points, accepted, thresholds, baseline)
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
