"""Alarms a lab can believe: standardised daily values judged against a baseline that follows the lab.

For each lab day t of one reference series (in order), the baseline is the most recent
``window`` *in-control* days before the day before t (that day is judged together with t
by the two-day rule, so it is not yet part of the baseline both are measured against),
never reaching back past the last accepted new level. From the baseline days (values x_i,
standard errors s_i) come a centre and the day-to-day scatter beyond the days' own errors,
by the DerSimonian-Laird estimator (DerSimonian & Laird 1986, Controlled Clinical Trials
7:177):

    w_i = 1/s_i^2,  Q = sum w_i (x_i - xbar_w)^2,
    tau^2 = max(0, (Q - (k - 1)) / (sum w_i - sum w_i^2 / sum w_i)),
    centre = sum w*_i x_i / sum w*_i  with  w*_i = 1/(s_i^2 + tau^2).

The day is then standardised by its own precision,

    t_t = (x_t - centre) / sigma_t,  sigma_t = sqrt(s_t^2 + tau^2 + 1/sum w*_i),

so a day of one run counts for less than a day of five, and the baseline's own
uncertainty is not mistaken for a change. tau^2 is itself estimated from a few weeks of
days: t_t follows Student's t with Satterthwaite's degrees of freedom
nu = 2 sigma_t^4 / Var(tau^2) (Satterthwaite 1946, Biometrics Bulletin 2:110; Var(tau^2)
from Biggerstaff & Tweedie 1997), and is put back on the normal scale through its
probability, z_t = Phi^-1(F_nu(t_t)) (the Q statistic of Quesenberry 1991, Journal of
Quality Technology 23:213), so the false-alarm rate does not depend on how much scatter
a series has or how long its baseline is. For phases (``period``: a full turn) the
centre is the weighted mean direction (Mardia & Jupp 2000, Directional Statistics, 2.2.1)
and every residual is wrapped to within half a turn: a phase sitting at +-pi raises no
alarm, a real phase step does.

A combined Shewhart-CUSUM scheme (Lucas 1982, Journal of Quality Technology 14:51;
Montgomery, Introduction to Statistical Quality Control, chapters 6 and 9) of four
statistics of z signals:

* the day alone, |z_t| > ``day_limit``: a Shewhart chart for large shifts;
* the day and the one before against the same baseline,
  |z_(t-1) + z_t| / sqrt(2 + 2 rho) > ``pair_limit`` (rho: the correlation the shared
  centre gives them): the most powerful test for a step of a few standard errors that
  must be flagged on its day or the next (the sum of two normal deviates of equal mean);
* an EWMA of z (NIST/SEMATECH e-Handbook 6.3.2.4) with weight ``ewma_weight`` outside
  +-``ewma_limit`` * sqrt(lambda / (2 - lambda)) (the asymptotic EWMA sigma), for slow
  drifts;
* a two-sided tabular CUSUM of z (e-Handbook 6.3.2.3) with reference ``cusum_k`` and
  decision interval ``cusum_h``, reset to zero after each signal (one excursion must not
  flag every later day), started with a head start of ``cusum_head_start`` * h when
  judging begins or after an accepted new level (the fast initial response of Lucas &
  Crosier 1982, Technometrics 24:199).

A day on which any signals is out of control and never enters a later baseline's centre
(nor does the day before it when the two-day rule fired); an excursion (consecutive
out-of-control days) is one alarm, on its first day. The days of an excursion that ended
within ``blip_days`` days do enter the scatter's history: leaving every large deviation
out of it would trim the tails the scatter is made of and bias tau low (by 8 % at one
standard error of scatter, which raised about 30 % more false alarms), while the days of a
real step or drift, out of control for longer, stay out. The first ``warmup`` days after
the start or an accepted level only build the baseline.

The thresholds are calibrated by simulation (``benchmarks/alarms.py --calibrate``,
docs/drift.md) to a budget of about one false alarm per apparatus per month across four
quantities, while a step of 3 daily standard errors is flagged on its lab day or the next
in at least 90 % of cases; an apparatus judging more quantities shares the same budget
among them (:mod:`runlog.drift.budget`).
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
    day_limit: float = 4.0
    pair_limit: float = 2.55
    ewma_weight: float = 0.3
    ewma_limit: float = 4.0
    cusum_k: float = 1.0
    cusum_h: float = 6.0
    cusum_head_start: float = 0.5
    blip_days: int = 2

    def describe(self) -> str:
        return (
            f"standardised daily values against the last {self.window} in-control lab days (DerSimonian-Laird centre and scatter, Student t to normal by Satterthwaite's degrees of freedom); "
            f"day |z| > {self.day_limit:g}, two days |z1 + z2|/sqrt(2 + 2 rho) > {self.pair_limit:g}, EWMA lambda {self.ewma_weight:g} at {self.ewma_limit:g} sigma, "
            f"CUSUM k {self.cusum_k:g}, h {self.cusum_h:g} (reset after a signal, head start {self.cusum_head_start:g} h); excursions of up to {self.blip_days} days count as scatter"
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


def _wrap(residuals: np.ndarray, period: float | None) -> np.ndarray:
    """Residuals as they stand, or (phases) wrapped to within half a turn of zero."""
    if period is None:
        return residuals
    return residuals - period * np.round(residuals / period)


def _normal_scale(t_value: float, freedom: float) -> float:
    """The normal deviate of the same tail probability as ``t_value`` under Student's t
    with ``freedom`` degrees of freedom, by Wallace's approximation (Wallace 1959, Annals
    of Mathematical Statistics 30:1121 [memory]):

        z = sign(t) (8 nu + 1) / (8 nu + 3) sqrt(nu ln(1 + t^2 / nu))

    within 0.016 of the exact value for nu >= 10 and 0.05 for nu >= 3 (checked against
    scipy in tests/test_alarm_rates.py); pure Python, so a drift query imports no scipy."""
    if not math.isfinite(freedom) or freedom > 1e6 or t_value == 0.0:
        return t_value
    return math.copysign((8.0 * freedom + 1.0) / (8.0 * freedom + 3.0) * math.sqrt(freedom * math.log1p(t_value * t_value / freedom)), t_value)


def _mean(values: np.ndarray, weights: np.ndarray, period: float | None) -> float:
    """The weighted mean, or (phases) the weighted mean direction atan2(sum w sin, sum w cos)
    (Mardia & Jupp 2000, Directional Statistics, 2.2.1), in the values' own unit."""
    if period is None:
        return float(np.sum(weights * values) / np.sum(weights))
    turn = 2.0 * math.pi / period
    return float(np.angle(np.sum(weights * np.exp(1j * turn * values)))) / turn


def scatter_of(values: np.ndarray, errors: np.ndarray, period: float | None = None) -> float:
    """tau, the day-to-day scatter beyond the days' own errors (DerSimonian-Laird); for
    phases (``period`` a full turn) on the residuals from the mean direction, wrapped."""
    w = 1.0 / errors**2
    k = values.size
    if k < 2:
        return 0.0
    fixed = _mean(values, w, period)
    q = float(np.sum(w * _wrap(values - fixed, period) ** 2))
    denominator = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    return math.sqrt(max(0.0, (q - (k - 1)) / denominator)) if denominator > 0 else 0.0


def scatter_variance(errors: np.ndarray, tau: float) -> float:
    """Variance of the DerSimonian-Laird tau^2 over days of standard errors ``errors``:
    Var(Q) / (S1 - S2/S1)^2 with S_r = sum w_i^r and

        Var(Q) = 2(k-1) + 4 tau^2 (S1 - 2 S2/S1 + S3/S1^2) + 2 tau^4 (S2 - 2 S3/S1 + S2^2/S1^2)

    (Biggerstaff & Tweedie 1997, Statistics in Medicine 16:753 [memory]; checked by
    simulation in tests/test_alarm_rates.py)."""
    w = 1.0 / errors**2
    k = w.size
    s1, s2, s3 = float(np.sum(w)), float(np.sum(w**2)), float(np.sum(w**3))
    denominator = s1 - s2 / s1
    if k < 2 or denominator <= 0:
        return math.inf
    tau2 = tau * tau
    var_q = 2.0 * (k - 1) + 4.0 * tau2 * (s1 - 2.0 * s2 / s1 + s3 / s1**2) + 2.0 * tau2 * tau2 * (s2 - 2.0 * s3 / s1 + s2 * s2 / s1**2)
    return var_q / denominator**2


def baseline_of(values: np.ndarray, errors: np.ndarray, tau: float | None = None, period: float | None = None) -> tuple[float, float, float]:
    """(centre, tau, standard error of the centre) by DerSimonian-Laird; ``tau`` given: that
    scatter; ``period`` given (phases): the centre is the weighted mean direction."""
    tau2 = scatter_of(values, errors, period) ** 2 if tau is None else tau**2
    w_star = 1.0 / (errors**2 + tau2)
    return _mean(values, w_star, period), math.sqrt(tau2), 1.0 / math.sqrt(float(np.sum(w_star)))


def judge(days: Sequence[dt.date], values: Sequence[float], errors: Sequence[float], *, accepted: Sequence[dt.date] = (), thresholds: Thresholds = THRESHOLDS, fixed: Sequence[bool] | None = None, period: float | None = None) -> Judgement:
    """Judge each day of one series in order (see the module docstring).

    ``fixed`` (one flag per day) names a fixed baseline instead of the rolling one: every
    day is judged against those days. ``period`` (a full turn in the values' unit) judges
    phases on the circle.
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
    fixed_days = None if fixed is None else [j for j in range(n) if fixed[j] and math.isfinite(x[j]) and math.isfinite(s[j]) and s[j] > 0]
    in_control: list[int] = []
    blips: list[int] = []  # days of short excursions: scatter, not changes
    excursion: list[int] = []
    e = cp = cm = 0.0
    head_start = True
    epoch: dt.date | None = None
    ewma_limit = t.ewma_limit * math.sqrt(t.ewma_weight / (2.0 - t.ewma_weight))
    for i, day in enumerate(days):
        latest = max((a for a in accepted_days if a <= day), default=None)
        if latest != epoch:  # a new level accepted: start the baseline again from it
            epoch = latest
            in_control = [j for j in in_control if days[j] >= latest]
            blips = [j for j in blips if days[j] >= latest]
            excursion = []
            e = cp = cm = 0.0
            head_start = True
        usable = math.isfinite(x[i]) and math.isfinite(s[i]) and s[i] > 0
        # The day before, when it was judged, is judged together with this one (the two-day
        # rule), so it is not yet part of the baseline they are both measured against.
        ready = in_control[:-1] if in_control and in_control[-1] == i - 1 and not learning[i - 1] else in_control  # in order
        base = ready[-t.window :] if fixed_days is None else fixed_days
        starts[i] = days[base[0]] if base else None
        if not usable:
            learning[i] = True
            continue
        if len(base) < (t.warmup if fixed_days is None else 2):
            learning[i] = True
            in_control.append(i)
            continue
        # The scatter needs more days than the centre to be estimated well: it comes from
        # up to three windows of in-control days, the centre from the latest window.
        history = sorted([j for j in blips[-3 * t.window :] if j < i - 1] + ready[-3 * t.window :])[-3 * t.window :] if fixed_days is None else base
        c, tau, centre_error = baseline_of(x[base], s[base], scatter_of(x[history], s[history], period), period)
        residual = float(_wrap(np.array([x[i] - c]), period)[0])
        centre[i], scatter[i] = x[i] - residual if period is not None else c, tau
        sigma[i] = math.sqrt(s[i] ** 2 + tau**2 + centre_error**2)
        # The scatter is itself estimated: a day's residual over sigma follows Student's t
        # with Satterthwaite's degrees of freedom 2 sigma^4 / Var(tau^2) rather than the
        # normal, and is put back on the normal scale through its probability
        # (Quesenberry 1991's Q statistic), so the limits keep their false-alarm rate
        # whether the baseline is long or short, with little or much scatter.
        tau_variance = scatter_variance(s[history], tau) if len(history) > 1 else 0.0
        z[i] = _normal_scale(residual / sigma[i], 2.0 * sigma[i] ** 4 / tau_variance if tau_variance > 0 else math.inf)
        if head_start:
            # Fast initial response (Lucas & Crosier 1982): a CUSUM (re)started at the
            # start of judging or after an accepted level begins at half its interval.
            cp = cm = t.cusum_head_start * t.cusum_h
            head_start = False
        e = t.ewma_weight * z[i] + (1.0 - t.ewma_weight) * e
        ewma[i] = e
        cp = max(0.0, cp + z[i] - t.cusum_k)
        cm = max(0.0, cm - z[i] - t.cusum_k)
        upper[i], lower[i] = cp, cm
        if abs(z[i]) > t.day_limit:
            signals[i].append("day")
        previous = i - 1
        if previous >= 0 and not learning[previous] and math.isfinite(x[previous]) and math.isfinite(s[previous]) and s[previous] > 0:
            # The two days against one baseline: the sum of their standardised residuals
            # over its standard deviation, which counts the centre's error shared by both.
            sigma_before = math.sqrt(s[previous] ** 2 + tau**2 + centre_error**2)
            freedom = 2.0 * sigma_before**4 / tau_variance if tau_variance > 0 else math.inf
            z_before = _normal_scale(float(_wrap(np.array([x[previous] - c]), period)[0]) / sigma_before, freedom)
            pair = (z_before + z[i]) / math.sqrt(2.0 + 2.0 * centre_error**2 / (sigma_before * sigma[i]))
            if abs(pair) > t.pair_limit:
                signals[i].append("two days")
                if previous in in_control:
                    in_control.remove(previous)  # it is part of the change, not of the baseline
                    excursion.append(previous)
        if abs(e) > ewma_limit:
            signals[i].append("ewma")
        if cp > t.cusum_h or cm > t.cusum_h:
            signals[i].append("cusum")
            cp = cm = 0.0
        if signals[i]:
            out[i] = True
            excursion.append(i)
        else:
            in_control.append(i)
            if 0 < len(excursion) <= t.blip_days:
                blips.extend(excursion)
            excursion = []
    return Judgement(centre, scatter, sigma, z, ewma, ewma_limit, upper, lower, signals, out, learning, starts)
