"""Alarms a lab can believe: standardised daily values judged against a baseline that follows the lab.

For each lab day t of one reference series (in order), the baseline is the most recent
``window`` *in-control* days before t, never reaching back past the last accepted new
level. From the baseline days (values x_i, standard errors s_i) come a centre and the
day-to-day scatter beyond the days' own errors, by the DerSimonian-Laird estimator
(DerSimonian & Laird 1986, Controlled Clinical Trials 7:177):

    w_i = 1/s_i^2,  Q = sum w_i (x_i - xbar_w)^2,
    tau^2 = max(0, (Q - (k - 1)) / (sum w_i - sum w_i^2 / sum w_i)),
    centre = sum w*_i x_i / sum w*_i  with  w*_i = 1/(s_i^2 + tau^2).

The day is then standardised by its own precision,

    z_t = (x_t - centre) / sqrt(s_t^2 + tau^2 + 1/sum w*_i),

so a day of one run counts for less than a day of five, and the baseline's own
uncertainty is not mistaken for a change. Three statistics of z signal:

* the day alone, |z_t| > ``day_limit`` (a Shewhart chart of standardised values);
* the day and the one before, |z_(t-1) + z_t| / sqrt(2) > ``pair_limit``: the matched
  test for a step that must be caught within two lab days;
* an EWMA of z (NIST/SEMATECH e-Handbook 6.3.2.4) with weight ``ewma_weight`` outside
  +-``ewma_limit`` * sqrt(lambda / (2 - lambda)) (the asymptotic EWMA sigma);
* a two-sided tabular CUSUM of z (e-Handbook 6.3.2.3) with reference ``cusum_k`` and
  decision interval ``cusum_h``, reset to zero after each signal (one excursion must not
  flag every later day).

A day on which any signals is out of control and never enters a later baseline; an
excursion (consecutive out-of-control days) is one alarm, on its first day. The first
``warmup`` days after the start or an accepted level only build the baseline.

The thresholds are calibrated by simulation (``benchmarks/alarms.py``, docs/drift.md) to
a budget of about one false alarm per apparatus per month across its quantities, while a
step of 3 daily standard errors is flagged by the second lab day after its day in at least
90 % of cases (and on its day or the next in about 84 %).
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Thresholds", "THRESHOLDS", "Judgement", "judge", "baseline_of"]


@dataclass(frozen=True)
class Thresholds:
    """Alarm thresholds; the defaults are the calibrated ones (see the module docstring)."""

    window: int = 28
    warmup: int = 7
    day_limit: float = 3.5
    pair_limit: float = 2.9
    ewma_weight: float = 0.3
    ewma_limit: float = 4.0
    cusum_k: float = 1.0
    cusum_h: float = 6.0

    def describe(self) -> str:
        return (
            f"standardised daily values against the last {self.window} in-control lab days (DerSimonian-Laird centre and scatter); "
            f"day |z| > {self.day_limit:g}, two days |z1 + z2|/sqrt 2 > {self.pair_limit:g}, EWMA lambda {self.ewma_weight:g} at {self.ewma_limit:g} sigma, "
            f"CUSUM k {self.cusum_k:g}, h {self.cusum_h:g} (reset after a signal)"
        )


THRESHOLDS = Thresholds()


@dataclass
class Judgement:
    """Per day: the baseline's centre and scatter, z, the statistics and what signalled."""

    centre: np.ndarray
    scatter: np.ndarray  # tau, the day-to-day scatter beyond the days' own errors
    sigma: np.ndarray  # the denominator of z
    z: np.ndarray
    ewma: np.ndarray
    ewma_limit: float
    cusum_upper: np.ndarray
    cusum_lower: np.ndarray
    signals: list[list[str]]  # per day: 'day', 'two days', 'ewma', 'cusum'
    out: np.ndarray  # bool per day
    learning: np.ndarray  # bool per day: building the baseline, not judged
    baseline_start: list[dt.date | None] = field(default_factory=list)

    def excursions(self) -> list[int]:
        """Index of the first day of each run of consecutive out-of-control days."""
        starts = []
        previous = False
        for index, out in enumerate(self.out):
            if out and not previous:
                starts.append(index)
            previous = bool(out)
        return starts


def scatter_of(values: np.ndarray, errors: np.ndarray) -> float:
    """tau, the day-to-day scatter beyond the days' own errors (DerSimonian-Laird)."""
    w = 1.0 / errors**2
    k = values.size
    fixed = float(np.sum(w * values) / np.sum(w))
    q = float(np.sum(w * (values - fixed) ** 2))
    denominator = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    return math.sqrt(max(0.0, (q - (k - 1)) / denominator)) if k > 1 and denominator > 0 else 0.0


def baseline_of(values: np.ndarray, errors: np.ndarray, tau: float | None = None) -> tuple[float, float, float]:
    """(centre, tau, standard error of the centre) by DerSimonian-Laird; ``tau`` given: that scatter."""
    tau2 = scatter_of(values, errors) ** 2 if tau is None else tau**2
    w_star = 1.0 / (errors**2 + tau2)
    centre = float(np.sum(w_star * values) / np.sum(w_star))
    return centre, math.sqrt(tau2), 1.0 / math.sqrt(float(np.sum(w_star)))


def judge(days: Sequence[dt.date], values: Sequence[float], errors: Sequence[float], *, accepted: Sequence[dt.date] = (), thresholds: Thresholds = THRESHOLDS, fixed: Sequence[bool] | None = None) -> Judgement:
    """Judge each day of one series in order (see the module docstring).

    ``fixed`` (one flag per day) names a fixed baseline instead of the rolling one: every
    day is judged against those days.
    """
    x = np.asarray(values, dtype=float)
    s = np.asarray(errors, dtype=float)
    n = x.size
    t = thresholds
    centre, scatter, sigma, z, ewma = (np.full(n, np.nan) for _ in range(5))
    upper, lower = np.zeros(n), np.zeros(n)
    out = np.zeros(n, dtype=bool)
    learning = np.zeros(n, dtype=bool)
    signals: list[list[str]] = [[] for _ in range(n)]
    starts: list[dt.date | None] = [None] * n
    accepted_days = sorted(accepted)
    in_control: list[int] = []
    e = cp = cm = 0.0
    epoch: dt.date | None = None
    ewma_limit = t.ewma_limit * math.sqrt(t.ewma_weight / (2.0 - t.ewma_weight))
    for i, day in enumerate(days):
        latest = max((a for a in accepted_days if a <= day), default=None)
        if latest != epoch:  # a new level accepted: start the baseline again from it
            epoch = latest
            in_control = [j for j in in_control if days[j] >= latest]
            e = cp = cm = 0.0
        usable = math.isfinite(x[i]) and math.isfinite(s[i]) and s[i] > 0
        base = in_control[-t.window :] if fixed is None else [j for j in range(n) if fixed[j] and math.isfinite(x[j]) and s[j] > 0]
        starts[i] = days[base[0]] if base else None
        if not usable:
            learning[i] = True
            continue
        if len(base) < (t.warmup if fixed is None else 2):
            learning[i] = True
            in_control.append(i)
            continue
        # The scatter needs more days than the centre to be estimated well: it comes from
        # up to three windows of in-control days, the centre from the latest window.
        history = in_control[-3 * t.window :] if fixed is None else base
        c, tau, centre_error = baseline_of(x[base], s[base], scatter_of(x[history], s[history]))
        centre[i], scatter[i] = c, tau
        sigma[i] = math.sqrt(s[i] ** 2 + tau**2 + centre_error**2)
        z[i] = (x[i] - c) / sigma[i]
        e = t.ewma_weight * z[i] + (1.0 - t.ewma_weight) * e
        ewma[i] = e
        cp = max(0.0, cp + z[i] - t.cusum_k)
        cm = max(0.0, cm - z[i] - t.cusum_k)
        upper[i], lower[i] = cp, cm
        if abs(z[i]) > t.day_limit:
            signals[i].append("day")
        if i > 0 and math.isfinite(z[i - 1]) and abs(z[i - 1] + z[i]) / math.sqrt(2.0) > t.pair_limit:
            signals[i].append("two days")
        if abs(e) > ewma_limit:
            signals[i].append("ewma")
        if cp > t.cusum_h or cm > t.cusum_h:
            signals[i].append("cusum")
            cp = cm = 0.0
        if signals[i]:
            out[i] = True
        else:
            in_control.append(i)
    return Judgement(centre, scatter, sigma, z, ewma, ewma_limit, upper, lower, signals, out, learning, starts)
