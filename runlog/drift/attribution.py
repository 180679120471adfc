"""What else changed at a detected change: rank candidate quantities by how much they moved.

For one change date the caller gathers, per candidate (a parameter, a monitored laser
power, a temperature, ...), the values before and after. Each candidate gets

- an effect size: Hedges' g, the difference of means (after - before) in units of the
  pooled standard deviation, times the small-sample correction
  J = Gamma(df/2) / (sqrt(df/2) Gamma((df-1)/2)), df = n_before + n_after - 2
  (Hedges 1981, J. Educational Statistics 6:107), which removes the upward bias of the
  plain standardised difference for the handful of runs a day holds;
- a p-value from a two-sample test, Welch's t by default (scipy.stats.ttest_ind with
  unequal variances: it tests the same difference of means the effect size measures and
  tolerates unequal spreads and sizes, but needs two readings on each side, else its p
  is NaN), or Mann-Whitney U when readings have outliers.

Candidates are sorted by |g|, largest first; p-value then name break ties. The
effect size ranks because a p-value mostly measures how many readings there were.

A setting held constant on both sides has no spread to scale by: if its value differs it
gets g = +-inf and p = 0 (a deliberate change, the strongest evidence there is) and ranks
first; if it is the same it gets g = 0 and p = 1 and ranks with the unchanged, at the
bottom. A candidate with too few readings to scale by (one per side, or three in all
with some spread) gets NaN and ranks after everything else.

Caveats a reader of the ranking should keep: the p-values are not corrected for the
number of candidates, and readings within a day are correlated in time, so p-values are
optimistic; use them to order attention, not as proof.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import special, stats

from runlog.errors import FitError

__all__ = ["CandidateShift", "hedges_g", "rank_candidates"]


@dataclass(frozen=True)
class CandidateShift:
    """How one candidate moved across a change; ``effect_size`` is Hedges' g, positive when it rose."""

    name: str
    effect_size: float
    p_value: float
    before_mean: float
    after_mean: float
    n_before: int
    n_after: int


def _correction(df: int) -> float:
    # Hedges' exact J via log-gamma; the common 1 - 3/(4 df - 1) approximates it.
    return math.exp(special.gammaln(df / 2) - special.gammaln((df - 1) / 2)) / math.sqrt(df / 2)


def hedges_g(before: ArrayLike, after: ArrayLike) -> float:
    """Bias-corrected standardised difference of means, (after - before) / pooled sd x J.

    +-inf when neither side varies but the means differ, 0 when neither varies and they
    agree; NaN with one reading per side, or with three readings in all and some spread
    (J is 0 at df = 1: no spread estimate worth dividing by).
    """
    a = np.asarray(before, dtype=float)
    b = np.asarray(after, dtype=float)
    df = a.size + b.size - 2
    if df < 1:
        return math.nan
    difference = float(b.mean() - a.mean())
    spread = float(np.sum((a - a.mean()) ** 2) + np.sum((b - b.mean()) ** 2))
    if spread == 0.0:
        return 0.0 if difference == 0.0 else math.copysign(math.inf, difference)
    if df < 2:
        return math.nan
    return difference / math.sqrt(spread / df) * _correction(df)


def _p_value(before: np.ndarray, after: np.ndarray, test: str, effect: float) -> float:
    if math.isnan(effect):
        return math.nan
    if math.isinf(effect):
        return 0.0
    if effect == 0.0 and before.var() == 0.0 and after.var() == 0.0:
        return 1.0
    if test == "welch":
        return float(stats.ttest_ind(after, before, equal_var=False).pvalue)
    return float(stats.mannwhitneyu(after, before, alternative="two-sided").pvalue)


def rank_candidates(
    candidates: Mapping[str, tuple[ArrayLike, ArrayLike]],
    *,
    test: Literal["welch", "mann-whitney"] = "welch",
) -> list[CandidateShift]:
    """Rank candidates by |Hedges' g| across a change; ``candidates`` maps name -> (before, after)."""
    if test not in ("welch", "mann-whitney"):
        raise ValueError(f"test must be 'welch' or 'mann-whitney', got {test!r}")
    shifts = []
    for name, (before_values, after_values) in candidates.items():
        before = np.asarray(before_values, dtype=float).ravel()
        after = np.asarray(after_values, dtype=float).ravel()
        for side, values in (("before", before), ("after", after)):
            if values.size == 0:
                raise FitError("change attribution", f"candidate '{name}' has no readings {side} the change")
            if not np.all(np.isfinite(values)):
                raise FitError("change attribution", f"candidate '{name}' has a non-finite reading {side} the change")
        effect = hedges_g(before, after)
        shifts.append(
            CandidateShift(
                name=name,
                effect_size=effect,
                p_value=_p_value(before, after, test, effect),
                before_mean=float(before.mean()),
                after_mean=float(after.mean()),
                n_before=int(before.size),
                n_after=int(after.size),
            )
        )

    def order(shift: CandidateShift) -> tuple[bool, float, float, str]:
        size = abs(shift.effect_size)
        p = shift.p_value
        return (math.isnan(size), 0.0 if math.isnan(size) else -size, math.inf if math.isnan(p) else p, shift.name)

    return sorted(shifts, key=order)
