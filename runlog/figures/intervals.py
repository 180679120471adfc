"""Confidence intervals for a binomial proportion and for the difference of two proportions.

This module owns the interval arithmetic behind every counted figure (fill fraction,
survival, loss, defect-free probability): ``successes`` out of ``trials`` independent
tries, and the two-sided interval for the true proportion at a chosen ``confidence``
(95 % by default). With ``p = x/n``, ``q = 1 - p`` and ``z`` the two-sided normal
quantile of the confidence:

* Wilson score interval (Wilson E.B. 1927, J. Am. Stat. Assoc. 22:209-212)::

      (2np + z^2 ± z sqrt(z^2 + 4npq)) / (2(n + z^2))

* Wilson score interval with continuity correction (Newcombe R.G. 1998, Stat. Med.
  17:857-872, method 4)::

      L = (2np + z^2 - 1 - z sqrt(z^2 - 2 - 1/n + 4p(nq + 1))) / (2(n + z^2))
      U = (2np + z^2 + 1 + z sqrt(z^2 + 2 - 1/n + 4p(nq - 1))) / (2(n + z^2))

* Clopper-Pearson "exact" interval (Clopper C.J. & Pearson E.S. 1934, Biometrika
  26:404-413), the quantiles of beta distributions::

      L = Beta(a/2; x, n - x + 1),   U = Beta(1 - a/2; x + 1, n - x),   a = 1 - confidence

* Difference of two independent proportions, Newcombe's hybrid score interval (Newcombe
  R.G. 1998, Stat. Med. 17:873-890, method 10), built from the two Wilson intervals
  ``(l1, u1)`` and ``(l2, u2)``::

      d = p1 - p2
      L = d - sqrt((p1 - l1)^2 + (u2 - p2)^2)
      U = d + sqrt((u1 - p1)^2 + (p2 - l2)^2)

The Wald interval ``p ± z sqrt(pq/n)`` is deliberately absent: it collapses to a single
point at ``x = 0`` or ``x = n`` and runs outside [0, 1] near the edges, exactly where
loading and survival figures of a well-running apparatus live.

At ``x = 0`` the lower end is exactly 0 and at ``x = n`` the upper end is exactly 1 for
every method; the closed forms reach those limits only up to rounding, so they are set
explicitly.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable

from statistics import NormalDist

__all__ = [
    "INTERVAL_METHODS",
    "clopper_pearson",
    "newcombe_difference",
    "wilson",
    "wilson_continuity",
]


def _check_counts(successes: int, trials: int) -> tuple[int, int]:
    for label, value in (("successes", successes), ("trials", trials)):
        # bool is an int subclass; a True/False here is almost surely a caller mix-up.
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            raise ValueError(f"{label} must be an integer, got {value!r}")
    successes, trials = int(successes), int(trials)
    if trials <= 0:
        raise ValueError(f"trials must be positive, got {trials}")
    if not 0 <= successes <= trials:
        raise ValueError(f"successes must lie between 0 and trials ({trials}), got {successes}")
    return successes, trials


def _normal_quantile(confidence: float) -> float:
    if isinstance(confidence, bool) or not isinstance(confidence, numbers.Real):
        raise ValueError(f"confidence must be a number between 0 and 1, got {confidence!r}")
    if not 0.0 < float(confidence) < 1.0:
        raise ValueError(f"confidence must lie strictly between 0 and 1, got {confidence!r}")
    # The standard library's quantile (Wichura's AS241) agrees with scipy's to ~1e-16 and
    # spares every ingest the import of scipy.stats.
    return NormalDist().inv_cdf(0.5 + float(confidence) / 2.0)


def _pin_edges(successes: int, trials: int, low: float, high: float) -> tuple[float, float]:
    low = 0.0 if successes == 0 else min(max(low, 0.0), 1.0)
    high = 1.0 if successes == trials else min(max(high, 0.0), 1.0)
    return low, high


def wilson(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for ``successes`` out of ``trials`` (Wilson 1927)."""
    x, n = _check_counts(successes, trials)
    z = _normal_quantile(confidence)
    p = x / n
    z2 = z * z
    centre = (2 * n * p + z2) / (2 * (n + z2))
    half_width = z * math.sqrt(z2 + 4 * n * p * (1 - p)) / (2 * (n + z2))
    return _pin_edges(x, n, centre - half_width, centre + half_width)


def wilson_continuity(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval with continuity correction (Newcombe 1998, method 4)."""
    x, n = _check_counts(successes, trials)
    z = _normal_quantile(confidence)
    p = x / n
    q = 1 - p
    z2 = z * z
    denominator = 2 * (n + z2)
    # At the edges the square-root arguments can go negative; those ends are pinned anyway.
    if x == 0:
        low = 0.0
    else:
        root = math.sqrt(z2 - 2 - 1 / n + 4 * p * (n * q + 1))
        low = (2 * n * p + z2 - 1 - z * root) / denominator
    if x == n:
        high = 1.0
    else:
        root = math.sqrt(z2 + 2 - 1 / n + 4 * p * (n * q - 1))
        high = (2 * n * p + z2 + 1 + z * root) / denominator
    return _pin_edges(x, n, low, high)


def clopper_pearson(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Clopper-Pearson exact interval from beta quantiles (Clopper & Pearson 1934)."""
    x, n = _check_counts(successes, trials)
    _normal_quantile(confidence)  # same validation and message as the other methods
    tail = (1.0 - float(confidence)) / 2.0
    from scipy import stats  # only the exact interval needs the beta quantile

    low = 0.0 if x == 0 else float(stats.beta.ppf(tail, x, n - x + 1))
    high = 1.0 if x == n else float(stats.beta.ppf(1.0 - tail, x + 1, n - x))
    return _pin_edges(x, n, low, high)


def newcombe_difference(
    x1: int, n1: int, x2: int, n2: int, confidence: float = 0.95
) -> tuple[float, float]:
    """Interval for ``x1/n1 - x2/n2``, Newcombe's hybrid score method (Newcombe 1998, method 10)."""
    x1, n1 = _check_counts(x1, n1)
    x2, n2 = _check_counts(x2, n2)
    p1, p2 = x1 / n1, x2 / n2
    low1, high1 = wilson(x1, n1, confidence)
    low2, high2 = wilson(x2, n2, confidence)
    difference = p1 - p2
    low = difference - math.hypot(p1 - low1, high2 - p2)
    high = difference + math.hypot(high1 - p1, p2 - low2)
    return max(low, -1.0), min(high, 1.0)


IntervalMethod = Callable[[int, int, float], tuple[float, float]]

INTERVAL_METHODS: dict[str, IntervalMethod] = {
    "wilson": wilson,
    "clopper-pearson": clopper_pearson,
    "wilson-cc": wilson_continuity,
}
