"""Shot-level intervals for a fraction pooled over shots (fill fraction, survival, loss).

Sites of one shot are not independent tries: laser power, trap depth and the loading
itself change from shot to shot, so all sites of a shot move together. Pooling every site
of every shot as one Bernoulli trial (the binomial interval of
:mod:`runlog.figures.intervals`) then gives an interval far too narrow. This module treats
each shot as a cluster and the figure as a ratio estimate over clusters:

* shot ``i`` has ``y_i`` successes out of ``x_i`` tries (occupied sites out of sites;
  atoms kept out of atoms loaded); the figure is ``R = sum(y) / sum(x)``;
* its variance is the ratio estimator's, from the spread between shots (Cochran W.G. 1977,
  Sampling Techniques, 3rd ed., Wiley, section 6.3, eq. 6.9 without the finite-population
  correction, shots being a sample of an unlimited supply)::

      v(R) = n / (n - 1) * sum((y_i - R x_i)^2) / sum(x)^2

* the interval is the Wilson score interval at the effective sample size
  ``n_eff = sum(x) / deff``, with the design effect ``deff = v(R) / (R(1-R)/sum(x))``
  (Kish L. 1965, Survey Sampling, Wiley, section 8.2) floored at 1, and ``n_eff`` shrunk by
  ``(z / t_{n-1})^2`` so that the interval's width follows Student's t on ``n - 1`` degrees
  of freedom (the degrees-of-freedom adjustment of Korn E.L. & Graubard B.I. 1998, Survey
  Methodology 24:193-201). Wilson rather than ``R ± t sqrt(v)`` keeps the interval inside
  [0, 1] and of non-zero width when every shot is at 0 or 1 (a run where no atom was lost).

The sums are additive over files and over the runs of a day (:class:`ShotSums`), so the
store keeps them beside the counts and pools them without reading shots again. With fewer
than two shots the spread between shots cannot be estimated and there is no shot-level
interval.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

__all__ = ["SHOT_LEVEL_METHOD", "ShotSums", "shot_level_interval"]

#: The ``method`` of a figure whose ``ci_low``/``ci_high`` come from this module.
SHOT_LEVEL_METHOD = "shot-ratio"


@dataclass(frozen=True)
class ShotSums:
    """The sums over shots the shot-level interval needs: ``shots`` (n), ``successes``
    (sum y), ``trials`` (sum x), ``successes_squares`` (sum y^2), ``trials_squares``
    (sum x^2) and ``successes_trials`` (sum x y)."""

    shots: int
    successes: int
    trials: int
    successes_squares: float
    trials_squares: float
    successes_trials: float

    @classmethod
    def of(cls, successes: object, trials: object) -> "ShotSums":
        """The sums of per-shot counts (arrays of one entry per shot)."""
        y = np.asarray(successes, dtype=np.float64)
        x = np.asarray(trials, dtype=np.float64)
        if y.shape != x.shape or y.ndim != 1:
            raise ValueError(f"per-shot successes and trials must be 1-d arrays of one length, got {y.shape} and {x.shape}")
        if np.any(y < 0) or np.any(y > x):
            raise ValueError("per-shot successes must lie between 0 and the shot's trials")
        return cls(int(len(y)), int(y.sum()), int(x.sum()), float(y @ y), float(x @ x), float(x @ y))

    def __add__(self, other: "ShotSums") -> "ShotSums":
        return ShotSums(
            self.shots + other.shots,
            self.successes + other.successes,
            self.trials + other.trials,
            self.successes_squares + other.successes_squares,
            self.trials_squares + other.trials_squares,
            self.successes_trials + other.successes_trials,
        )

    def complement(self) -> "ShotSums":
        """The sums of ``x - y`` (failures) per shot: loss from survival."""
        failures_squares = self.trials_squares - 2.0 * self.successes_trials + self.successes_squares
        return ShotSums(self.shots, self.trials - self.successes, self.trials, failures_squares, self.trials_squares, self.trials_squares - self.successes_trials)


def _t_quantile(probability: float, dof: int) -> float:
    from scipy.special import stdtrit  # scipy.special, not scipy.stats: cheap at ingest

    return float(stdtrit(dof, probability))


@dataclass(frozen=True)
class ShotInterval:
    low: float
    high: float
    stderr: float
    design_effect: float


def shot_level_interval(sums: ShotSums, confidence: float = 0.95) -> ShotInterval | None:
    """The shot-level interval of ``sums.successes / sums.trials`` (module docstring), or
    ``None`` with fewer than two shots or no trials."""
    n, total = sums.shots, sums.trials
    if n < 2 or total <= 0:
        return None
    ratio = sums.successes / total
    residual_squares = sums.successes_squares - 2.0 * ratio * sums.successes_trials + ratio * ratio * sums.trials_squares
    variance = max(residual_squares, 0.0) * n / ((n - 1) * total * total)
    binomial = ratio * (1.0 - ratio) / total
    design_effect = max(1.0, variance / binomial) if binomial > 0 else 1.0
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    t = _t_quantile(0.5 + confidence / 2.0, n - 1)
    effective = total / design_effect * (z / t) ** 2
    low, high = _wilson(ratio, effective, z)
    if sums.successes == 0:
        low = 0.0
    if sums.successes == total:
        high = 1.0
    return ShotInterval(low, high, math.sqrt(max(variance, binomial)), design_effect)


def _wilson(p: float, n: float, z: float) -> tuple[float, float]:
    """Wilson's score interval at a real-valued sample size ``n`` (Wilson 1927)."""
    z2 = z * z
    centre = (p + z2 / (2 * n)) / (1 + z2 / n)
    half = z * math.sqrt(p * (1 - p) / n + z2 / (4 * n * n)) / (1 + z2 / n)
    return max(0.0, centre - half), min(1.0, centre + half)
