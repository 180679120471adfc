"""Control charts for a figure of merit followed over days: EWMA, tabular CUSUM, individuals, p.

Each chart follows the NIST/SEMATECH e-Handbook of Statistical Methods, chapter 6.3, and
returns a frozen value object holding the plotted statistic per point, its control limits
and a boolean ``out_of_control`` array (a point is out of control when it lies strictly
outside its limits). Nothing here reads the catalogue: callers pass the daily values.

Where a chart needs a centre line or a spread that the caller does not give, it estimates
them from a *baseline*: a slice, an index array or a boolean mask selecting the points
known to be in control (for example the first two weeks after a realignment). Without a
baseline all points are used, which is the handbook's practice for a first look but lets
a large shift widen its own limits; pass a baseline when one is known.

Errors: arguments that can never be valid (``lam`` outside (0, 1], a negative ``k``)
raise ``ValueError``; data that cannot carry the chart (too few points, non-finite
values, a baseline with no spread) raise :class:`~runlog.errors.FitError`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runlog.errors import FitError

__all__ = [
    "ControlChart",
    "EwmaChart",
    "IndividualsChart",
    "ProportionChart",
    "CusumChart",
    "ewma_chart",
    "cusum_chart",
    "individuals_chart",
    "p_chart",
]

# Bias factor d2 of the range of two normal observations (handbook 6.3.2.2): sigma = mean moving range / d2.
MOVING_RANGE_D2 = 1.128

Baseline = slice | ArrayLike | None


def _first_true(mask: NDArray[np.bool_]) -> int | None:
    hits = np.flatnonzero(mask)
    return int(hits[0]) if hits.size else None


@dataclass(frozen=True, eq=False)
class ControlChart:
    """A statistic per point with its lower and upper control limits.

    ``lower`` and ``upper`` are arrays of the same length as ``statistic`` even when the
    limits are constant, so every chart plots the same way.
    """

    statistic: NDArray[np.float64]
    center: float
    lower: NDArray[np.float64]
    upper: NDArray[np.float64]
    out_of_control: NDArray[np.bool_]

    @property
    def first_signal(self) -> int | None:
        """0-based index of the first out-of-control point, ``None`` if there is none."""
        return _first_true(self.out_of_control)


@dataclass(frozen=True, eq=False)
class EwmaChart(ControlChart):
    """Exponentially weighted moving average chart; ``sigma`` is the spread of single points."""

    lam: float
    sigma: float
    k: float


@dataclass(frozen=True, eq=False)
class IndividualsChart(ControlChart):
    """Individuals chart; ``sigma`` = ``mean_moving_range`` / d2 with d2 = 1.128."""

    moving_range: NDArray[np.float64]
    mean_moving_range: float
    sigma: float


@dataclass(frozen=True, eq=False)
class ProportionChart(ControlChart):
    """p chart: the statistic is successes / trials per point, ``center`` is the pooled p-bar."""

    trials: NDArray[np.float64]
    overdispersion: float = 1.0


@dataclass(frozen=True, eq=False)
class CusumChart:
    """Tabular CUSUM: ``upper_sum`` accumulates rises above target + k, ``lower_sum`` falls below target - k.

    A point is out of control when either sum exceeds the decision interval ``h``.
    """

    upper_sum: NDArray[np.float64]
    lower_sum: NDArray[np.float64]
    target: float
    k: float
    h: float
    out_of_control: NDArray[np.bool_]

    @property
    def first_signal(self) -> int | None:
        """0-based index of the first point where either sum exceeds ``h``, ``None`` if none."""
        return _first_true(self.out_of_control)


def _series(values: ArrayLike, chart: str, minimum: int = 1) -> NDArray[np.float64]:
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise FitError(chart, f"expected a one-dimensional series, got shape {x.shape}")
    if x.size < minimum:
        raise FitError(chart, f"needs at least {minimum} points, got {x.size}")
    if not np.all(np.isfinite(x)):
        raise FitError(chart, f"non-finite value at index {int(np.flatnonzero(~np.isfinite(x))[0])}")
    return x


def _select(x: NDArray[np.float64], baseline: Baseline, chart: str, minimum: int) -> NDArray[np.float64]:
    if baseline is None:
        chosen = x
    elif isinstance(baseline, slice):
        chosen = x[baseline]
    else:
        index = np.asarray(baseline)
        if index.dtype == bool and index.shape != x.shape:
            raise FitError(chart, f"baseline mask has {index.size} entries for {x.size} points")
        chosen = x[index]
    if chosen.size < minimum:
        raise FitError(chart, f"baseline needs at least {minimum} points, got {chosen.size}")
    return chosen


def ewma_chart(
    values: ArrayLike,
    *,
    lam: float = 0.3,
    target: float | None = None,
    sigma: float | None = None,
    k: float = 3.0,
    baseline: Baseline = None,
    asymptotic: bool = True,
) -> EwmaChart:
    """EWMA chart (handbook 6.3.2.4): z_i = lam x_i + (1 - lam) z_(i-1), starting at z_0 = target.

    ``target`` defaults to the baseline mean and ``sigma`` to the baseline sample
    standard deviation (ddof = 1), as in the handbook. The limits are
    target +- k sigma sqrt(lam / (2 - lam)) when ``asymptotic`` (the handbook's form);
    otherwise the exact limits of point i (1-based),
    target +- k sigma sqrt(lam / (2 - lam) (1 - (1 - lam)^(2 i))), which are narrower
    for the first few points and so catch an early shift sooner.
    """
    if not 0.0 < lam <= 1.0:
        raise ValueError(f"lam must be in (0, 1], got {lam}")
    if k <= 0:
        raise ValueError(f"k must be positive, got {k}")
    x = _series(values, "ewma chart")
    if target is None or sigma is None:
        reference = _select(x, baseline, "ewma chart", 2 if sigma is None else 1)
        if target is None:
            target = float(reference.mean())
        if sigma is None:
            sigma = float(reference.std(ddof=1))
    if not (np.isfinite(sigma) and sigma > 0):
        raise FitError("ewma chart", f"sigma must be positive and finite, got {sigma}")

    z = np.empty_like(x)
    previous = float(target)
    for i, value in enumerate(x):
        previous = lam * value + (1.0 - lam) * previous
        z[i] = previous

    factor = lam / (2.0 - lam)
    if asymptotic:
        half_width = np.full_like(x, k * sigma * np.sqrt(factor))
    else:
        steps = np.arange(1, x.size + 1)
        half_width = k * sigma * np.sqrt(factor * (1.0 - (1.0 - lam) ** (2 * steps)))
    lower = target - half_width
    upper = target + half_width
    return EwmaChart(
        statistic=z,
        center=float(target),
        lower=lower,
        upper=upper,
        out_of_control=(z > upper) | (z < lower),
        lam=float(lam),
        sigma=float(sigma),
        k=float(k),
    )


def cusum_chart(values: ArrayLike, *, target: float, k: float, h: float) -> CusumChart:
    """Tabular CUSUM (handbook 6.3.2.3), with ``k`` (slack) and ``h`` (decision interval) in data units.

    S_hi(i) = max(0, S_hi(i-1) + x_i - target - k) and
    S_lo(i) = max(0, S_lo(i-1) + target - k - x_i), both starting at 0. The handbook
    chooses k as half the shift to detect and h near 4 to 5 standard deviations.
    """
    if k < 0:
        raise ValueError(f"k must be non-negative, got {k}")
    if h <= 0:
        raise ValueError(f"h must be positive, got {h}")
    x = _series(values, "cusum chart")
    upper_sum = np.empty_like(x)
    lower_sum = np.empty_like(x)
    high = low = 0.0
    for i, value in enumerate(x):
        high = max(0.0, high + value - target - k)
        low = max(0.0, low + target - k - value)
        upper_sum[i] = high
        lower_sum[i] = low
    return CusumChart(
        upper_sum=upper_sum,
        lower_sum=lower_sum,
        target=float(target),
        k=float(k),
        h=float(h),
        out_of_control=(upper_sum > h) | (lower_sum > h),
    )


def individuals_chart(values: ArrayLike, *, baseline: Baseline = None) -> IndividualsChart:
    """Individuals chart (handbook 6.3.2.2): limits mean +- 3 mean-moving-range / 1.128.

    The mean and the mean moving range come from the baseline points, taken in order;
    with a mask that leaves gaps, a moving range spans the gap.
    ``moving_range`` is |x_i - x_(i-1)| over all points, NaN for the first.
    """
    x = _series(values, "individuals chart")
    reference = _select(x, baseline, "individuals chart", 2)
    center = float(reference.mean())
    mean_moving_range = float(np.abs(np.diff(reference)).mean())
    if mean_moving_range == 0:
        raise FitError("individuals chart", "baseline points are all equal: no moving range")
    sigma = mean_moving_range / MOVING_RANGE_D2
    moving_range = np.concatenate(([np.nan], np.abs(np.diff(x))))
    lower = np.full_like(x, center - 3.0 * sigma)
    upper = np.full_like(x, center + 3.0 * sigma)
    return IndividualsChart(
        statistic=x,
        center=center,
        lower=lower,
        upper=upper,
        out_of_control=(x > upper) | (x < lower),
        moving_range=moving_range,
        mean_moving_range=mean_moving_range,
        sigma=sigma,
    )


def p_chart(successes: ArrayLike, trials: ArrayLike, *, baseline: Baseline = None, overdispersion: bool = False) -> ProportionChart:
    """p chart for a fraction with a different number of trials per point (handbook 6.3.3.2).

    p-bar is pooled over the baseline points, sum(successes) / sum(trials); point i has
    limits p-bar +- 3 sqrt(p-bar (1 - p-bar) / n_i), clipped to [0, 1].

    The limits assume binomial scatter only. A fill fraction pooled over thousands of
    sites per run also varies from run to run for reasons beyond counting (loading
    conditions drift within a day), so with large n_i many points may fall outside
    limits that are honest for counting noise alone. ``overdispersion=True`` widens them
    by Laney's factor (Laney 2002, Quality Engineering 14:531): the standard deviation
    of the baseline z-scores, estimated from their mean moving range / 1.128, when above 1.
    """
    s = _series(successes, "p chart")
    n = _series(trials, "p chart")
    if s.shape != n.shape:
        raise FitError("p chart", f"{s.size} success counts for {n.size} trial counts")
    if np.any(n <= 0):
        raise FitError("p chart", f"trials must be positive (index {int(np.flatnonzero(n <= 0)[0])})")
    if np.any((s < 0) | (s > n)):
        raise FitError("p chart", f"successes outside [0, trials] (index {int(np.flatnonzero((s < 0) | (s > n))[0])})")
    p = s / n
    # p-bar pools counts rather than averaging fractions, so large runs weigh more (handbook 6.3.3.2).
    center = float(_select(s, baseline, "p chart", 1).sum() / _select(n, baseline, "p chart", 1).sum())
    sigma = np.sqrt(center * (1.0 - center) / n)
    factor = 1.0
    if overdispersion and 0.0 < center < 1.0:
        z = _select((p - center) / sigma, baseline, "p chart", 1)
        if z.size >= 3:
            factor = max(1.0, float(np.mean(np.abs(np.diff(z))) / MOVING_RANGE_D2))
    half_width = 3.0 * sigma * factor
    lower = np.clip(center - half_width, 0.0, 1.0)
    upper = np.clip(center + half_width, 0.0, 1.0)
    return ProportionChart(
        statistic=p,
        center=center,
        lower=lower,
        upper=upper,
        out_of_control=(p > upper) | (p < lower),
        trials=n,
        overdispersion=factor,
    )
