"""Series across runs: one figure of many runs against a parameter they differ in, fitted
with a stated model (fringe contrast vs walk steps, sorting success vs target array size,
T2* vs lattice depth).

Each run is one point (x = the run's constant parameter value, y = its figure, σ = the
figure's standard error). Models (:data:`SERIES_MODELS`):

* ``exponential``: y = A exp(−k x). Figures ``amplitude`` A (y's unit), ``per_step``
  exp(−k) (the fraction kept per unit of x: per walk step when x counts steps) and
  ``decay_constant`` 1/k (x's unit); the fit runs in k, so a flat series is k ≈ 0 rather
  than an infinite constant, and ``decay_constant`` is left out when k is within two
  standard errors of zero.
* ``power_law``: y = A x^b (x > 0). Figures ``amplitude`` A (y at x = 1 in x's unit) and
  ``exponent`` b.
* ``linear``: y = a + b x. Figures ``intercept`` a and ``slope`` b.

Weighted least squares with weights 1/σ² (:func:`runlog.figures.fitting.least_squares_fit`),
started from the linear fit of the model's linearised form. The covariance takes the σ as
absolute and is scaled by the Birge ratio χ²/dof when that exceeds 1, so a scatter between
runs larger than their own errors widens the result instead of being ignored (Birge R.T.
1932, Phys. Rev. 40, 207; the PDG's scale factor, Particle Data Group, Review of Particle
Physics, Introduction, "Unconstrained averaging" [memory]). Without standard errors on every
point, the fit is unweighted and the covariance scaled by the residual variance
(``curve_fit(absolute_sigma=False)``). Derived figures take their error by the delta method.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit

__all__ = ["SERIES_MODELS", "SeriesFit", "fit_series", "series_model"]

#: The models a series can be fitted with; the first is the default.
SERIES_MODELS = ("exponential", "power_law", "linear")

_METHOD = "weighted-least-squares/birge"
_METHOD_VERSION = "1"
_KIND = "series"


@dataclass(frozen=True)
class SeriesFit:
    """A fitted series: its figures, χ² of the weighted fit, degrees of freedom, and the
    raw parameters of the model (for drawing it: :func:`series_model`)."""

    figures: tuple[Figure, ...]
    chi_square: float | None
    degrees_of_freedom: int
    params: tuple[float, ...]
    weighted: bool


def series_model(model: str):
    """The model function ``f(x, *params)`` of a series model (params as in :class:`SeriesFit`)."""
    if model == "exponential":
        return lambda x, amplitude, rate: amplitude * np.exp(-rate * x)
    if model == "power_law":
        return lambda x, amplitude, exponent: amplitude * np.power(x, exponent)
    if model == "linear":
        return lambda x, intercept, slope: intercept + slope * x
    raise ValueError(f"unknown series model '{model}': use {', '.join(SERIES_MODELS)}")


def _ratio_unit(numerator: str, denominator: str) -> str:
    if not denominator:
        return numerator
    return f"{numerator or '1'}/{denominator}" if "/" not in denominator and " " not in denominator else f"{numerator or '1'}/({denominator})"


def fit_series(
    x: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    stderr: np.ndarray | Sequence[float] | None = None,
    *,
    model: str = "exponential",
    x_unit: str = "",
    y_unit: str = "",
) -> SeriesFit:
    """Fit the points (one per run) with ``model``; see the module docstring.

    Raises :class:`FitError` with fewer than three distinct x, a power law over x ≤ 0, an
    exponential or power law over y ≤ 0 at the start (no linearised start), or when the
    fit engine refuses (no dependence on x beyond chance, degenerate parameters).
    """
    xs = np.asarray(x, dtype=float)
    ys = np.asarray(y, dtype=float)
    function = series_model(model)
    if xs.shape != ys.shape or xs.ndim != 1:
        raise ValueError("x and y need one value per run")
    if not (np.all(np.isfinite(xs)) and np.all(np.isfinite(ys))):
        raise FitError(_KIND, "a member run has a non-finite parameter or figure value")
    if np.unique(xs).size < 3:
        raise FitError(_KIND, f"{np.unique(xs).size} distinct parameter values; a series needs at least 3 for 2 model parameters")
    sigma = None
    if stderr is not None:
        errors = np.asarray([np.nan if e is None else e for e in stderr], dtype=float)
        if np.all(np.isfinite(errors)) and np.all(errors > 0):
            sigma = errors
    if model == "power_law" and np.any(xs <= 0):
        raise FitError(_KIND, "a power law needs parameter values above zero")
    if model in ("exponential", "power_law") and np.any(ys <= 0):
        raise FitError(_KIND, f"the {model.replace('_', ' ')} model needs figure values above zero")

    weights = None if sigma is None else 1.0 / sigma**2
    if model == "exponential":
        slope, intercept = np.polyfit(xs, np.log(ys), 1, w=None if weights is None else np.sqrt(weights) * ys)
        start, names, typical = [math.exp(intercept), -slope], ("amplitude", "rate"), [float(np.max(np.abs(ys))), 1.0 / max(float(np.ptp(xs)), 1e-300)]
    elif model == "power_law":
        slope, intercept = np.polyfit(np.log(xs), np.log(ys), 1, w=None if weights is None else np.sqrt(weights) * ys)
        start, names, typical = [math.exp(intercept), slope], ("amplitude", "exponent"), [float(np.max(np.abs(ys))), 1.0]
    else:
        slope, intercept = np.polyfit(xs, ys, 1, w=None if weights is None else np.sqrt(weights))
        span = max(float(np.ptp(ys)), float(np.max(np.abs(ys))), 1e-300)
        start, names, typical = [intercept, slope], ("intercept", "slope"), [span, span / max(float(np.ptp(xs)), 1e-300)]
    result = least_squares_fit(function, xs, ys, start, names=names, sigma=sigma, kind=_KIND, typical=typical)
    params = np.asarray(result.params, dtype=float)
    covariance = np.asarray(result.covariance, dtype=float)
    chi_square = None
    if sigma is not None:
        chi_square = float(result.residual_sum_of_squares)
        covariance = covariance * max(1.0, chi_square / result.dof)
    errors = np.sqrt(np.diag(covariance))
    common = {"method": _METHOD if sigma is not None else "least-squares", "method_version": _METHOD_VERSION}
    figures: list[Figure] = []
    if model == "exponential":
        amplitude, rate = params
        figures.append(Figure("amplitude", float(amplitude), y_unit, stderr=float(errors[0]), **common))
        kept = math.exp(-rate)
        figures.append(Figure("per_step", kept, "", stderr=kept * float(errors[1]), **common))
        if rate > 2.0 * errors[1]:
            figures.append(Figure("decay_constant", 1.0 / rate, x_unit, stderr=float(errors[1]) / rate**2, **common))
    elif model == "power_law":
        figures.append(Figure("amplitude", float(params[0]), y_unit, stderr=float(errors[0]), **common))
        figures.append(Figure("exponent", float(params[1]), "", stderr=float(errors[1]), **common))
    else:
        figures.append(Figure("intercept", float(params[0]), y_unit, stderr=float(errors[0]), **common))
        figures.append(Figure("slope", float(params[1]), _ratio_unit(y_unit, x_unit), stderr=float(errors[1]), **common))
    return SeriesFit(tuple(figures), chi_square, int(result.dof), tuple(float(p) for p in params), sigma is not None)
