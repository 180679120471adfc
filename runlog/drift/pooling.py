"""How the runs of one lab day pool into one drift point, for fitted figures.

Three arithmetics, chosen by the figure's unit:

* **linear** (contrast, frequencies, ...): the inverse-variance weighted mean of the runs
  that have a stderr, its standard error ``1/sqrt(sum w)`` scaled by the Birge ratio
  ``sqrt(chi2 / (k - 1))`` when the ``k`` weighted runs disagree beyond their errors (Birge
  R.T. 1932, Phys. Rev. 40:207). Runs without a stderr do not enter the weighted mean nor
  the Birge ratio's ``k``; a day with no weighted run takes the plain mean and the spread
  between runs over ``sqrt(n)``.
* **circular** (phases, in an angle unit): the weighted mean direction
  ``atan2(sum w sin, sum w cos)`` (Mardia K.V. & Jupp P.E. 2000, Directional Statistics,
  Wiley, section 2.2.1), wrapped to (-half period, half period]; its stderr is
  ``1/sqrt(sum w)`` widened by a Birge ratio from the wrapped residuals; the spread is the
  circular standard deviation ``sqrt(-2 ln R)`` (ibid. eq. 2.3.14). A mean of 359 deg and
  1 deg is 0 deg, not 180 deg. Without stderrs the standard error is the circular
  standard deviation over ``sqrt(n)``.
* **logarithmic** (lifetimes and other times): a time's fitted stderr grows with the time,
  so weights ``1/stderr^2`` of the times themselves favour the short ones and pull the
  mean low. The day pools ``ln T`` instead, whose stderr ``stderr/T`` does not grow with
  ``T``: the weighted mean of ``ln T`` (with the Birge ratio), back-transformed, so the day's
  value is a weighted geometric mean and its interval ``exp(mean ± 1.96 se)`` is
  asymmetric; the reported stderr is ``T * se`` (first order).

Each returns ``(value, ci_low, ci_high, stderr, spread)``.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["ARITHMETICS", "arithmetic_of", "pool"]

Z95 = 1.959963984540054
ARITHMETICS = ("linear", "circular", "logarithmic")


def _root(unit: str):
    from runlog.units import registry

    try:
        return registry().get_root_units(unit or "dimensionless")
    except Exception:  # pint raises several unrelated types for a unit it does not know
        return None


def arithmetic_of(unit: str) -> str:
    """``circular`` for an angle unit, ``logarithmic`` for a time unit, else ``linear``."""
    if not unit:
        return "linear"
    root = _root(unit)
    if root is None:
        return "linear"
    # pint treats angles as dimensionless: an angle is a unit whose root unit is the radian.
    if str(root[1]) == "radian":
        return "circular"
    if str(root[1]) == "second":
        return "logarithmic"
    return "linear"


def half_period(unit: str) -> float:
    """Half a turn in ``unit`` (180 for deg, pi for rad)."""
    factor = _root(unit)[0]
    return math.pi / factor


def _weighted(values: np.ndarray, stderrs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    ok = np.isfinite(stderrs) & (stderrs > 0)
    return values[ok], 1.0 / stderrs[ok] ** 2, ok


def _birge(residuals: np.ndarray, weights: np.ndarray) -> float:
    if len(weights) < 2:
        return 1.0
    chi2 = float(np.sum(weights * residuals**2))
    return max(1.0, math.sqrt(chi2 / (len(weights) - 1)))


def _linear(values: np.ndarray, stderrs: np.ndarray) -> tuple[float, float, float, float, float | None]:
    spread = float(np.std(values, ddof=1)) if len(values) > 1 else None
    kept, weights, _ = _weighted(values, stderrs)
    if len(kept):
        mean = float(np.sum(weights * kept) / np.sum(weights))
        stderr = _birge(kept - mean, weights) / math.sqrt(float(np.sum(weights)))
    else:
        mean = float(np.mean(values))
        stderr = spread / math.sqrt(len(values)) if spread is not None else math.nan
    return mean, mean - Z95 * stderr, mean + Z95 * stderr, stderr, spread


def _circular(values: np.ndarray, stderrs: np.ndarray, unit: str) -> tuple[float, float, float, float, float | None]:
    half = half_period(unit)
    to_rad = math.pi / half
    angles = values * to_rad
    resultant = abs(np.mean(np.exp(1j * angles)))
    spread = math.sqrt(-2.0 * math.log(resultant)) / to_rad if len(values) > 1 and resultant > 0 else None
    kept, weights, ok = _weighted(angles, stderrs * to_rad)
    if len(kept):
        mean = float(np.angle(np.sum(weights * np.exp(1j * kept))))
        residuals = np.angle(np.exp(1j * (kept - mean)))
        stderr = _birge(residuals, weights) / math.sqrt(float(np.sum(weights)))
    else:
        mean = float(np.angle(np.sum(np.exp(1j * angles))))
        stderr = (spread * to_rad) / math.sqrt(len(values)) if spread is not None else math.nan
    mean, stderr = mean / to_rad, stderr / to_rad
    if mean <= -half:
        mean += 2 * half
    return mean, mean - Z95 * stderr, mean + Z95 * stderr, stderr, spread


def _logarithmic(values: np.ndarray, stderrs: np.ndarray) -> tuple[float, float, float, float, float | None]:
    spread = float(np.std(values, ddof=1)) if len(values) > 1 else None
    positive = values > 0
    if not positive.all():
        # ln T needs T > 0; a non-positive fitted time is pooled linearly, as it stands.
        return _linear(values, stderrs)
    logs = np.log(values)
    kept, weights, _ = _weighted(logs, stderrs / values)
    if len(kept):
        mean = float(np.sum(weights * kept) / np.sum(weights))
        error = _birge(kept - mean, weights) / math.sqrt(float(np.sum(weights)))
    else:
        mean = float(np.mean(logs))
        error = float(np.std(logs, ddof=1)) / math.sqrt(len(logs)) if len(logs) > 1 else math.nan
    value = math.exp(mean)
    return value, math.exp(mean - Z95 * error), math.exp(mean + Z95 * error), value * error, spread


def pool(values: object, stderrs: object, unit: str) -> tuple[float, float, float, float, float | None]:
    """One day's ``(value, ci_low, ci_high, stderr, spread)`` from its runs' figures
    (``stderrs`` NaN where a run has none), in the arithmetic its unit calls for."""
    values = np.asarray(values, dtype=float)
    stderrs = np.asarray([math.nan if e is None else e for e in stderrs], dtype=float)
    arithmetic = arithmetic_of(unit)
    if arithmetic == "circular":
        return _circular(values, stderrs, unit)
    if arithmetic == "logarithmic":
        return _logarithmic(values, stderrs)
    return _linear(values, stderrs)
