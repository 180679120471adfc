"""How steady a reference series is: the Allan deviation of its runs and what it means.

The runs of one reference series, in the order they started, give one reading each of a
figure; their Allan deviation (:mod:`runlog.drift.stability`, NIST SP 1065) at averaging
times of 1, 2, 4, ... runs says how far an average of that many runs strays from the next
one. It falls as 1/sqrt(runs) while run-to-run noise dominates and stops falling (or
rises) once slow drift takes over. The minimum is the best the lab gets by averaging, and
the averaging time there is how long the figure stays put: "averaging N runs (about M
shots) reaches X; the figure stays within X for about Z hours". Hours come from the median
spacing between consecutive runs of the series (nights and weekends included in it only
as far as they shift the median), so they are a guide, not a clock.
"""

from __future__ import annotations

import datetime as dt
import math

import numpy as np
from sqlalchemy import select
from sqlalchemy.engine import Connection

from runlog.drift.stability import allan_deviation, octave_taus
from runlog.store import schema as s
from runlog.store.rollups import as_datetime

__all__ = ["steadiness", "in_words"]


def in_words(taus: np.ndarray, deviation: np.ndarray, terms: np.ndarray, *, unit: str, shots_per_run: float, hours_per_run: float) -> dict[str, object]:
    """The lab's reading of an Allan deviation curve over runs (see the module docstring)."""
    trusted = terms >= 3  # a point from fewer squared differences is a rough guide only
    if not trusted.any():
        return {"words": "too few runs for a stability estimate (needs at least 6)"}
    index = np.flatnonzero(trusted)
    best = int(index[np.argmin(deviation[index])])
    runs, value = int(round(taus[best])), float(deviation[best])
    unit_text = f" {unit}" if unit else ""
    shots = int(round(runs * shots_per_run))
    hours = runs * hours_per_run
    out = {"best_runs": runs, "best_shots": shots, "best_deviation": value, "hours": hours, "single_run": float(deviation[0])}
    if best == index[-1]:
        out["words"] = f"averaging {runs} runs (about {shots} shots) reaches {value:.3g}{unit_text}; no drift seen over the longest span judged, about {hours:.2g} hours"
    else:
        out["words"] = f"averaging {runs} runs (about {shots} shots) reaches {value:.3g}{unit_text}; beyond that drift dominates: the figure stays within {value:.3g}{unit_text} for about {hours:.2g} hours"
    return out


def steadiness(connection: Connection, quantity: str, runs: list[int], unit: str) -> dict[str, object]:
    """Allan deviation over the runs ``runs`` (one reading each of ``quantity``) and its meaning."""
    rows = connection.execute(
        select(s.Run.started, s.Run.shot_count, s.FigureRow.value)
        .join(s.FigureRow, s.FigureRow.run_id == s.Run.id)
        .where(s.Run.id.in_(runs), s.FigureRow.name == quantity, s.FigureRow.out_of_range.is_(False))
        .order_by(s.Run.started)
    ).all() if runs else []
    values = np.array([float(v) for _, _, v in rows])
    method = "overlapping Allan deviation (NIST SP 1065) of the series' run values in time order, tau in runs"
    if values.size < 4:
        return {"method": method, "runs": int(values.size), "words": "too few runs for a stability estimate (needs at least 6)", "taus": [], "deviation": [], "terms": []}
    curve = allan_deviation(values, octave_taus(values.size), rate=1.0, overlapping=True)
    started = [as_datetime(t) for t, _, _ in rows]
    spacing = [(b - a).total_seconds() / 3600.0 for a, b in zip(started, started[1:])]
    hours_per_run = float(np.median(spacing)) if spacing else math.nan
    shots_per_run = float(np.median([int(n or 0) for _, n, _ in rows]))
    meaning = in_words(curve.taus, curve.deviation, curve.terms, unit=unit, shots_per_run=shots_per_run, hours_per_run=hours_per_run)
    return {
        "method": method,
        "runs": int(values.size),
        "hours_per_run": hours_per_run,
        "shots_per_run": shots_per_run,
        "taus": curve.taus.tolist(),
        "deviation": curve.deviation.tolist(),
        "terms": curve.terms.tolist(),
        **meaning,
    }
