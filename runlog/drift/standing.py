"""Where a headline figure stands against its baseline: the morning question, per figure.

For one apparatus, quantity and lab day: the reference series' point of that day (or the
latest before it), its baseline centre, the difference in the figure's unit and in
standard errors (the day's z of :mod:`runlog.drift.detect`), and a state:

* ``in limits``: the day is in control;
* ``changed``: out of control, the excursion started with the day or two-day test (a step);
* ``drifting``: out of control through the EWMA or CUSUM only (a slow move);
* ``building baseline``: too few in-control days yet to judge;
* ``no data``: the series has no point on or before the day.

``stale`` says how many lab days the latest point is older than the day asked about.
"""

from __future__ import annotations

import datetime as dt

__all__ = ["HEADLINE", "standing"]

#: The figures the overview and the digest lead with, when an apparatus has them.
HEADLINE = ("fill_fraction", "survival", "t2_star", "contrast")


def standing(drift, day: dt.date, alarms: list[dict[str, object]] | None = None) -> dict[str, object]:
    """The standing of one drift result (``Catalogue.drift``) on ``day``; ``alarms`` (recorded
    ones, default the drift's own) give the id of the alarm of the current excursion."""
    base = {"quantity": drift.quantity, "apparatus": drift.apparatus, "unit": drift.unit, "series": drift.series, "day": day.isoformat()}
    before = [i for i, p in enumerate(drift.points) if p.date <= day]
    if not before:
        return {**base, "state": "no data", "stale_days": None, "words": f"{drift.quantity}: no data on or before {day.isoformat()}"}
    i = before[-1]
    point = drift.points[i]
    centres = drift.limits.get("centre") or []
    centre = centres[i] if i < len(centres) else None
    z = drift.z[i] if i < len(drift.z) else None
    learning = drift.limits.get("learning") or []
    out = set(drift.out_of_limits)
    if i in out:
        start = i
        while start - 1 in out:
            start -= 1
        signals = next((e["signals"] for e in drift.excursions if e["index"] == start), [])
        state = "changed" if {"day", "two days"} & set(signals) else "drifting"
        since = drift.points[start].date.isoformat()
    else:
        state = "building baseline" if (i < len(learning) and learning[i]) or centre is None else "in limits"
        since = None
    key = (drift.series or {}).get("key")
    alarm = next((a for a in (drift.alarms if alarms is None else alarms) if since is not None and a.get("date") == since and a.get("quantity") == drift.quantity and a.get("apparatus") == drift.apparatus and ((a.get("series") or {}).get("key") == key)), None)
    size = None if centre is None else point.value - centre
    unit = f" {drift.unit}" if drift.unit else ""
    if size is None:
        words = f"{drift.quantity} {point.value:.4g}{unit}: {state}"
    else:
        words = f"{drift.quantity} {point.value:.4g} ± {point.stderr:.2g}{unit}: {state}, {size:+.3g}{unit} from its baseline {centre:.4g} ({z:+.1f} standard errors)"
    if since:
        words += f", since {since}"
    stale = (day - point.date).days
    if stale > 0:
        words += f"; latest data {point.date.isoformat()}, {stale} day{'s' if stale > 1 else ''} old"
    return {
        **base,
        "date": point.date.isoformat(),
        "value": point.value,
        "stderr": point.stderr,
        "ci_low": point.ci_low,
        "ci_high": point.ci_high,
        "centre": centre,
        "size": size,
        "z": z,
        "state": state,
        "since": since,
        "alarm": alarm["id"] if alarm else None,
        "stale_days": stale,
        "words": words,
    }
