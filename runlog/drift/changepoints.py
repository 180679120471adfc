"""Change points in the level of a daily series: where the mean shifts and stays shifted.

The model is a piecewise-constant mean with Gaussian scatter. The cost of a segment is
its (weighted) sum of squared deviations from its own (weighted) mean; the best
segmentation minimises total cost + penalty x number of changes, found exactly by PELT
(Killick, Fearnhead & Eckley 2012, JASA 107:1590). :func:`single_change` is the
least-squares split into two segments, with no penalty and no test.

Index convention: :attr:`Change.index` is the 0-based position of the first point of the
new segment, which is also the number of points before the change and the 1-based
number of the last point of the old segment. For the Nile flow 1871-1970 the change
is at index 28: observation 28 (1898) is the last high year, as Cobb (1978) states it.

Weights are inverse variances, 1 / stderr^2, for daily points of unequal uncertainty.

Default penalty (when ``penalty`` is None): ``PENALTY_FACTOR * 2 * scale^2 * ln(n)``, a
BIC-type penalty for one new mean and one location per change, made stricter by
``PENALTY_FACTOR`` because a dashboard that cries wolf is ignored. ``scale`` is the
noise of a single unit-weight point, estimated from neighbour differences
d_i = (x_(i+1) - x_i) / sqrt(1/w_i + 1/w_(i+1)), which have variance scale^2 whatever
the level. A level shift spoils only one difference, so the estimate drops the largest
10 % of |d| (at least one) and corrects the mean square of the rest for that trimming
as for a normal sample: E[d^2 | |d| <= z] = 1 - 2 z phi(z) / p for the kept fraction p,
z = Phi^-1((1 + p) / 2). The plain standard deviation of the values would take the step
for noise; the median absolute deviation of d, also robust, is so noisy for two weeks of
points (13 differences) that it lets about three times as many false changes through. With correct
stderr weights, scale is near 1; above 1 it absorbs day-to-day scatter the stderrs do
not carry.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from statistics import NormalDist

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runlog.errors import FitError

__all__ = ["Change", "PENALTY_FACTOR", "noise_scale", "default_penalty", "pelt", "single_change"]

# Chosen by simulation of stable Gaussian series of 10 to 365 points: with 2.5 about
# 2 % of 14-point series and under 1 % of 30-point series show a false change, while a
# 4-sigma step in the middle of 14 points is found; tests/test_changepoints.py holds
# the simulation.
PENALTY_FACTOR = 2.5

# Fraction of the largest neighbour differences the noise estimate ignores.
_TRIM_FRACTION = 0.1


@dataclass(frozen=True)
class Change:
    """A level shift: ``index`` is the first point of the new segment; ``size`` = after - before."""

    index: int
    before: float
    after: float
    size: float = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "size", self.after - self.before)


def _prepare(values: ArrayLike, weights: ArrayLike | None) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    x = np.asarray(values, dtype=float)
    if x.ndim != 1:
        raise FitError("change point", f"expected a one-dimensional series, got shape {x.shape}")
    if not np.all(np.isfinite(x)):
        raise FitError("change point", f"non-finite value at index {int(np.flatnonzero(~np.isfinite(x))[0])}")
    if weights is None:
        return x, np.ones_like(x)
    w = np.asarray(weights, dtype=float)
    if w.shape != x.shape:
        raise FitError("change point", f"{w.size} weights for {x.size} values")
    bad = ~(np.isfinite(w) & (w > 0))
    if np.any(bad):
        raise FitError("change point", f"weights must be positive and finite (index {int(np.flatnonzero(bad)[0])})")
    return x, w


class _SegmentCost:
    """Weighted sum of squared deviations of any segment [start, end) in O(1), from cumulative sums."""

    def __init__(self, x: NDArray[np.float64], w: NDArray[np.float64]):
        # Centring first keeps the cumulative sums of squares from cancelling catastrophically.
        self.level = float(np.average(x, weights=w))
        centred = x - self.level
        self.w = np.concatenate(([0.0], np.cumsum(w)))
        self.wx = np.concatenate(([0.0], np.cumsum(w * centred)))
        self.wxx = np.concatenate(([0.0], np.cumsum(w * centred**2)))

    def __call__(self, start: NDArray[np.intp] | int, end: NDArray[np.intp] | int) -> NDArray[np.float64]:
        weight = self.w[end] - self.w[start]
        total = self.wx[end] - self.wx[start]
        # Rounding can leave a tiny negative cost for a flat segment; a cost is never below zero.
        return np.maximum(self.wxx[end] - self.wxx[start] - total**2 / weight, 0.0)

    def mean(self, start: int, end: int) -> float:
        return float((self.wx[end] - self.wx[start]) / (self.w[end] - self.w[start]) + self.level)


def noise_scale(values: ArrayLike, weights: ArrayLike | None = None) -> float:
    """Noise of one unit-weight point from trimmed neighbour differences (see the module docstring).

    Falls back to the root mean square of all differences when the kept ones are all
    zero (a noiseless step); returns 0 only for a constant series.
    """
    x, w = _prepare(values, weights)
    if x.size < 3:
        raise FitError("change point", f"needs at least 3 points to estimate the noise, got {x.size}")
    d = np.diff(x) / np.sqrt(1.0 / w[1:] + 1.0 / w[:-1])
    squares = np.sort(d**2)
    kept = squares.size - max(1, math.ceil(_TRIM_FRACTION * squares.size))
    p = kept / squares.size
    normal = NormalDist()
    z = normal.inv_cdf((1.0 + p) / 2.0)
    variance = float(squares[:kept].mean()) / (1.0 - 2.0 * z * normal.pdf(z) / p)
    if variance == 0.0:
        variance = float(squares.mean())
    return math.sqrt(variance)


def default_penalty(values: ArrayLike, weights: ArrayLike | None = None, *, trusted_weights: bool = False) -> float:
    """The penalty :func:`pelt` uses when none is given: PENALTY_FACTOR * 2 * scale^2 * ln(n).

    ``trusted_weights``: the weights are honest inverse variances (binomial counts, fit
    errors), so the points scatter at least that much and ``scale`` is at least 1. On two
    weeks of points the trimmed estimate alone often comes out near 0.7 for truly
    unit-scale noise, which halves the penalty and lets false changes through.
    """
    x = np.asarray(values, dtype=float)
    scale = noise_scale(x, weights)
    if trusted_weights and weights is not None:
        scale = max(scale, 1.0)
    return PENALTY_FACTOR * 2.0 * scale**2 * math.log(x.size)


def _changes(cost: _SegmentCost, bounds: list[int]) -> list[Change]:
    """Changes between consecutive segments given all segment boundaries [0, ..., n]."""
    means = [cost.mean(a, b) for a, b in zip(bounds[:-1], bounds[1:])]
    return [Change(index=b, before=m0, after=m1) for b, m0, m1 in zip(bounds[1:-1], means[:-1], means[1:])]


def pelt(
    values: ArrayLike,
    *,
    penalty: float | None = None,
    min_size: int = 2,
    weights: ArrayLike | None = None,
) -> list[Change]:
    """All level shifts of the optimal penalised segmentation, in order of index.

    Minimises sum of segment costs + ``penalty`` x number of changes over segmentations
    whose segments hold at least ``min_size`` points. ``penalty`` is in the units of
    the cost, (value units)^2 x weight; None takes :func:`default_penalty`.
    """
    if min_size < 1:
        raise ValueError(f"min_size must be at least 1, got {min_size}")
    if penalty is not None and not (math.isfinite(penalty) and penalty >= 0):
        raise ValueError(f"penalty must be finite and non-negative, got {penalty}")
    x, w = _prepare(values, weights)
    n = x.size
    if n < 2 * min_size:
        return []
    if penalty is None:
        penalty = default_penalty(x, w)

    cost = _SegmentCost(x, w)
    best = np.full(n + 1, np.inf)  # best[t]: optimal penalised cost of the first t points
    best[0] = -penalty
    last_change = np.zeros(n + 1, dtype=np.intp)
    candidates = np.array([0], dtype=np.intp)
    # PELT drops a candidate s once best[s] + cost(s, t) > best[t]: no later end can then
    # prefer s. With min_size > 1 that argument only holds for ends T >= t + min_size
    # (the rival split at t needs a whole segment after it), so a candidate's removal
    # waits min_size - 1 steps; this keeps the result exact. A newcomer joins after the
    # step at which its first segment would be one point short, so every candidate in
    # the list can end a segment at t.
    expires = np.array([n + 1], dtype=np.intp)
    for t in range(min_size, n + 1):
        alive = expires > t
        candidates, expires = candidates[alive], expires[alive]
        totals = best[candidates] + cost(candidates, t)
        i = int(np.argmin(totals))
        best[t] = totals[i] + penalty
        last_change[t] = candidates[i]
        beaten = totals > best[t]
        expires[beaten] = np.minimum(expires[beaten], t + min_size)
        newcomer = t - min_size + 1
        if newcomer >= min_size:
            candidates = np.append(candidates, newcomer)
            expires = np.append(expires, n + 1)

    bounds = [n]
    while bounds[-1] > 0:
        bounds.append(int(last_change[bounds[-1]]))
    return _changes(cost, bounds[::-1])


def single_change(values: ArrayLike, *, min_size: int = 2, weights: ArrayLike | None = None) -> Change:
    """The least-squares split into two segments of at least ``min_size`` points.

    Always returns a split, however small; whether it matters is the caller's call (or
    use :func:`pelt`, which weighs it against a penalty).
    """
    if min_size < 1:
        raise ValueError(f"min_size must be at least 1, got {min_size}")
    x, w = _prepare(values, weights)
    n = x.size
    if n < 2 * min_size:
        raise FitError("change point", f"needs at least {2 * min_size} points for a split, got {n}")
    cost = _SegmentCost(x, w)
    splits = np.arange(min_size, n - min_size + 1)
    totals = cost(0, splits) + cost(splits, n)
    split = int(splits[np.argmin(totals)])
    return _changes(cost, [0, split, n])[0]
