"""Detection fidelity from per-site photon counts: the two-component histogram, its optimal
threshold, the false-positive and false-negative probabilities, and figures corrected for them.

This module owns the detection figures. The counts of every site of every shot of one image
form a histogram with two components, the empty sites (dark, background counts) and the
occupied ones (bright):

* ``"poisson"`` (integer counts: photon counting): ``P(k) = (1 - w) Pois(k; d) + w Pois(k; b)``
  with means ``d < b``, the model of fluorescence detection with shot noise only (Poisson
  bright and dark distributions; e.g. Bakr W.S. et al. 2009, Nature 462:74 [memory]);
* ``"gaussian"`` (camera counts with read and excess noise, or background-subtracted
  counts): ``(1 - w) N(d, s_d) + w N(b, s_b)`` (a two-component Gaussian mixture; McLachlan
  G. & Peel D. 2000, Finite Mixture Models, Wiley [memory]).

The parameters are fitted by maximum likelihood (``scipy.optimize.minimize``, BFGS in
unbounded coordinates: the logit of ``w``, the logarithms of the means' gap and spreads) and
their covariance is the inverse of the observed information (the Hessian of the negative
log-likelihood by central differences), mapped to the parameters by the delta method.

A site is called occupied when its counts reach the **threshold** ``t``. The threshold is
the one that minimises the mean error ``(FP + FN) / 2``, with ``FP = P(dark >= t)`` the
false-positive and ``FN = P(bright < t)`` the false-negative probability of the fitted
components (for Poisson counts an integer, from ``scipy.stats.poisson``). The detection
``fidelity`` is ``1 - (FP + FN) / 2``. Each carries a standard error by the delta method
over the fitted parameters, and FP, FN and fidelity a 95 % interval from the normal
interval of their logit (so it stays inside 0..1 and is asymmetric near 0). The threshold's
standard error is that of the point where the two components' densities cross, the
continuous optimum that the integer threshold of Poisson counts rounds up.

A histogram is refused as one component when the fitted components are not separated
(Ashman's D at most 2) or one holds fewer than 5 sites.

Correction (:func:`corrected_fill` and :func:`corrected_survival`): an image with error
probabilities FP, FN shows a site occupied with probability ``f_a = f (1 - FN) + (1 - f)
FP`` when the true fill fraction is ``f``; so ``f = (f_a - FP) / (1 - FP - FN)``. For the
survival between two images (errors FP1, FN1 and FP2, FN2): the probability of "occupied in
both" is ``f (1 - FN1) (s (1 - FN2) + (1 - s) FP2) + (1 - f) FP1 FP2``, solved for ``s``.
Their standard errors combine the binomial (multinomial) variance of the apparent counts
with the variance of FP and FN, independently (the threshold and the occupancy come from
the same counts; the covariance between them is neglected).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize, special, stats

from runlog.errors import FitError
from runlog.figures.base import Figure

__all__ = ["COUNT_MODELS", "CountFit", "corrected_fill", "corrected_survival", "detection_figures", "fit_counts"]

_KIND = "detection"
_METHOD_VERSION = "1"
_Z = float(stats.norm.ppf(0.975))
COUNT_MODELS = ("poisson", "gaussian")
_MIN_SEPARATION = 2.0


@dataclass(frozen=True)
class CountFit:
    """A fitted two-component count histogram and its chosen threshold."""

    model: str
    bright_fraction: float  # w, the fraction of sites in the bright component
    dark_mean: float
    bright_mean: float
    dark_sd: float | None
    bright_sd: float | None
    covariance: np.ndarray = field(repr=False, compare=False)  # of the parameters below
    parameters: tuple[str, ...] = ()
    threshold: float = 0.0
    sites: int = 0

    def values(self) -> np.ndarray:
        return np.array([getattr(self, name) for name in self.parameters], dtype=float)


def _errors(model: str, params: np.ndarray, threshold: float) -> tuple[float, float]:
    """``(FP, FN)`` of the components ``params`` at ``threshold``."""
    if model == "poisson":
        _, d, b = params
        # occupied when k >= t: FP = P(N_d >= t), FN = P(N_b < t) = P(N_b <= t - 1).
        return float(stats.poisson.sf(threshold - 1, d)), float(stats.poisson.cdf(threshold - 1, b))
    _, d, b, sd, sb = params
    return float(stats.norm.sf(threshold, d, sd)), float(stats.norm.cdf(threshold, b, sb))


def _crossing(model: str, params: np.ndarray) -> float:
    """The continuous threshold where the two unit-weight components' densities meet."""
    if model == "poisson":
        _, d, b = params
        return (b - d) / math.log(b / d) if d > 0 else 0.0
    _, d, b, sd, sb = params
    return float(optimize.brentq(lambda x: stats.norm.pdf(x, d, sd) - stats.norm.pdf(x, b, sb), d, b))


def _best_threshold(model: str, params: np.ndarray) -> float:
    if model == "poisson":
        _, d, b = params
        candidates = np.arange(max(int(math.floor(d)), 1), int(math.ceil(b)) + 2)
        totals = stats.poisson.sf(candidates - 1, d) + stats.poisson.cdf(candidates - 1, b)
        return float(candidates[int(np.argmin(totals))])
    return _crossing(model, params)


def fit_counts(counts: np.ndarray | Sequence[float], *, model: str | None = None) -> CountFit:
    """Fit the two-component histogram of ``counts`` (every site of every shot, flattened).

    ``model``: ``"poisson"`` or ``"gaussian"``; by default Poisson for whole non-negative
    counts and Gaussian otherwise. Raises :class:`FitError` when the histogram does not show
    two components (all sites empty, say).
    """
    values = np.asarray(counts, dtype=float).ravel()
    if values.size < 20:
        raise FitError(_KIND, f"{values.size} site counts; at least 20 are needed for a histogram")
    if not np.all(np.isfinite(values)):
        raise FitError(_KIND, "the counts contain non-finite values")
    whole = bool(np.all(values >= 0) and np.all(values == np.round(values)))
    model = model or ("poisson" if whole else "gaussian")
    if model not in COUNT_MODELS:
        raise ValueError(f"model must be one of {', '.join(COUNT_MODELS)}, got {model!r}")
    if model == "poisson" and not whole:
        raise FitError(_KIND, "the Poisson model needs whole, non-negative counts; use the gaussian model")
    # Start: split at the midpoint of the 5th and 95th percentiles, then two k-means steps.
    low, high = np.percentile(values, [5, 95])
    if not high > low:
        raise FitError(_KIND, "the counts do not spread: no second component to separate")
    cut = 0.5 * (low + high)
    for _ in range(5):
        dark, bright = values[values < cut], values[values >= cut]
        if dark.size == 0 or bright.size == 0:
            raise FitError(_KIND, "the counts show one component only: no threshold separates occupied from empty sites")
        cut = 0.5 * (dark.mean() + bright.mean())
    w0 = bright.size / values.size
    if model == "poisson":
        unique, frequency = np.unique(values, return_counts=True)
        d0, b0 = max(dark.mean(), 1e-3), bright.mean()

        def unpack(u: np.ndarray) -> np.ndarray:
            d = math.exp(u[1])
            return np.array([special.expit(u[0]), d, d + math.exp(u[2])])

        def nll(u: np.ndarray) -> float:
            w, d, b = unpack(u)
            logs = np.logaddexp(np.log1p(-w) + stats.poisson.logpmf(unique, d), math.log(w) + stats.poisson.logpmf(unique, b))
            return -float(frequency @ logs)

        start = np.array([special.logit(w0), math.log(d0), math.log(max(b0 - d0, 1e-3))])
        names: tuple[str, ...] = ("bright_fraction", "dark_mean", "bright_mean")
    else:
        d0, b0 = dark.mean(), bright.mean()
        s_d, s_b = max(dark.std(), 1e-6 * (high - low)), max(bright.std(), 1e-6 * (high - low))

        def unpack(u: np.ndarray) -> np.ndarray:
            return np.array([special.expit(u[0]), u[1], u[1] + math.exp(u[2]), math.exp(u[3]), math.exp(u[4])])

        def nll(u: np.ndarray) -> float:
            w, d, b, sd, sb = unpack(u)
            logs = np.logaddexp(np.log1p(-w) + stats.norm.logpdf(values, d, sd), math.log(w) + stats.norm.logpdf(values, b, sb))
            return -float(np.sum(logs))

        start = np.array([special.logit(w0), d0, math.log(b0 - d0), math.log(s_d), math.log(s_b)])
        names = ("bright_fraction", "dark_mean", "bright_mean", "dark_sd", "bright_sd")
    if not (0 < w0 < 1):
        raise FitError(_KIND, "the counts show one component only")
    result = optimize.minimize(nll, start, method="BFGS", options={"gtol": 1e-8, "maxiter": 500})
    if not np.all(np.isfinite(result.x)):
        raise FitError(_KIND, f"the histogram fit did not converge: {result.message}")
    u = result.x
    params = unpack(u)
    hessian = _hessian(nll, u)
    try:
        inverse = np.linalg.inv(hessian)
    except np.linalg.LinAlgError:
        raise FitError(_KIND, "the histogram does not determine both components (singular information)") from None
    jacobian = _jacobian(unpack, u)
    covariance = jacobian @ inverse @ jacobian.T
    if not np.all(np.isfinite(np.diag(covariance))) or np.any(np.diag(covariance) < 0):
        raise FitError(_KIND, "the histogram does not determine both components (no finite covariance)")
    w = params[0]
    if w * values.size < 5 or (1 - w) * values.size < 5:
        raise FitError(_KIND, f"one component holds fewer than 5 sites (bright fraction {w:.3g}): no threshold to set")
    # Two components only when they are separated: Ashman's D = |b - d| / sqrt((s_d^2 + s_b^2)/2)
    # above 2 (Ashman K.M., Bird C.M. & Zepf S.E. 1994, Astron. J. 108:2348 [memory]); one
    # Poisson histogram fitted as two overlapping halves stays below it.
    spreads = (params[1] + params[2]) / 2 if model == "poisson" else (params[3] ** 2 + params[4] ** 2) / 2
    separation = (params[2] - params[1]) / math.sqrt(spreads)
    if not separation > _MIN_SEPARATION:
        raise FitError(_KIND, f"the histogram shows one component: the two fitted components are not separated (Ashman's D = {separation:.2f} <= {_MIN_SEPARATION:g})")
    extra = {"dark_sd": float(params[3]), "bright_sd": float(params[4])} if model == "gaussian" else {"dark_sd": None, "bright_sd": None}
    fit = CountFit(model, float(params[0]), float(params[1]), float(params[2]), covariance=covariance, parameters=names, sites=values.size, **extra)
    return _with_threshold(fit, _best_threshold(model, params))


def _with_threshold(fit: CountFit, threshold: float) -> CountFit:
    from dataclasses import replace

    return replace(fit, threshold=float(threshold))


def _hessian(function, x: np.ndarray) -> np.ndarray:
    n = x.size
    h = 1e-4 * np.maximum(np.abs(x), 1.0)
    out = np.empty((n, n))
    for i in range(n):
        for j in range(i, n):
            def at(di: float, dj: float) -> float:
                y = x.copy()
                y[i] += di
                y[j] += dj
                return function(y)

            value = (at(h[i], h[j]) - at(h[i], -h[j]) - at(-h[i], h[j]) + at(-h[i], -h[j])) / (4 * h[i] * h[j])
            out[i, j] = out[j, i] = value
    return out


def _jacobian(function, x: np.ndarray) -> np.ndarray:
    h = 1e-6 * np.maximum(np.abs(x), 1.0)
    columns = []
    for j in range(x.size):
        up, down = x.copy(), x.copy()
        up[j] += h[j]
        down[j] -= h[j]
        columns.append((function(up) - function(down)) / (2 * h[j]))
    return np.column_stack(columns)


def _gradient(function, params: np.ndarray) -> np.ndarray:
    return _jacobian(lambda p: np.atleast_1d(function(p)), params)[0]


def _logit_interval(p: float, se: float) -> dict[str, float]:
    """95 % interval from the normal interval of logit(p); nothing when p is 0 or 1."""
    if not (0 < p < 1) or se <= 0:
        return {}
    centre, width = special.logit(p), _Z * se / (p * (1 - p))
    return {"ci_low": float(special.expit(centre - width)), "ci_high": float(special.expit(centre + width))}


def _propagated(fit: CountFit, function) -> float:
    gradient = _gradient(function, fit.values())
    return float(math.sqrt(max(gradient @ fit.covariance @ gradient, 0.0)))


def detection_figures(fit: CountFit, threshold: float | None = None) -> list[Figure]:
    """``threshold``, ``fidelity``, ``false_positive``, ``false_negative`` of a fitted histogram.

    ``threshold`` overrides the optimal one (a threshold fixed in runlog.toml, say).
    """
    t = fit.threshold if threshold is None else float(threshold)
    params = fit.values()
    fp, fn = _errors(fit.model, params, t)
    method = f"maximum-likelihood/{fit.model}-mixture"
    common = {"method": method, "method_version": _METHOD_VERSION}
    fp_se = _propagated(fit, lambda p: _errors(fit.model, p, t)[0])
    fn_se = _propagated(fit, lambda p: _errors(fit.model, p, t)[1])
    fidelity = 1.0 - 0.5 * (fp + fn)
    fidelity_se = _propagated(fit, lambda p: 1.0 - 0.5 * sum(_errors(fit.model, p, t)))
    crossing_se = _propagated(fit, lambda p: _crossing(fit.model, p))
    return [
        Figure("threshold", t, "", stderr=crossing_se, **common),
        Figure("fidelity", fidelity, "", stderr=fidelity_se, **_logit_interval(fidelity, fidelity_se), **common),
        Figure("false_positive", fp, "", stderr=fp_se, **_logit_interval(fp, fp_se), **common),
        Figure("false_negative", fn, "", stderr=fn_se, **_logit_interval(fn, fn_se), **common),
    ]


def _error_covariance(fit: CountFit, threshold: float) -> tuple[float, float, np.ndarray]:
    params = fit.values()
    fp, fn = _errors(fit.model, params, threshold)
    jac = _jacobian(lambda p: np.array(_errors(fit.model, p, threshold)), params)
    return fp, fn, jac @ fit.covariance @ jac.T


def corrected_fill(occupied: int, sites: int, fit: CountFit, threshold: float | None = None) -> Figure:
    """The fill fraction corrected for detection errors: ``(f_a - FP) / (1 - FP - FN)``."""
    t = fit.threshold if threshold is None else threshold
    fp, fn, cov = _error_covariance(fit, t)
    if sites == 0:
        raise FitError(_KIND, "no site observations to correct")
    apparent = occupied / sites
    scale = 1.0 - fp - fn
    if not scale > 0:
        raise FitError(_KIND, "false-positive and false-negative probabilities add up to 1 or more: nothing to correct")
    value = (apparent - fp) / scale
    # d/dFP = (value - 1)/scale ... from f = (a - FP)/(1 - FP - FN).
    gradient = np.array([(value - 1.0) / scale, value / scale])
    variance = apparent * (1 - apparent) / sites / scale**2 + gradient @ cov @ gradient
    return Figure("corrected_fill_fraction", float(value), "", stderr=float(math.sqrt(variance)), method="detection-corrected", method_version=_METHOD_VERSION)


def corrected_survival(loaded: int, both: int, shots_sites: int, first: CountFit, second: CountFit | None = None) -> list[Figure]:
    """Survival (and loss) corrected for the errors of both images; ``second`` defaults to ``first``.

    ``loaded``: site observations occupied in the first image; ``both``: occupied in both;
    ``shots_sites``: all site observations of the first image.
    """
    second = second or first
    fp1, fn1, cov1 = _error_covariance(first, first.threshold)
    fp2, fn2, cov2 = _error_covariance(second, second.threshold)
    n = shots_sites
    if n == 0 or loaded == 0:
        raise FitError(_KIND, "no loaded sites to correct the survival of")
    p1, p12 = loaded / n, both / n

    def survival(values: np.ndarray) -> float:
        a1, a12, e1, m1, e2, m2 = values
        f = (a1 - e1) / (1 - e1 - m1)
        return (a12 - f * (1 - m1) * e2 - (1 - f) * e1 * e2) / (f * (1 - m1) * (1 - m2 - e2))

    point = np.array([p1, p12, fp1, fn1, fp2, fn2])
    value = survival(point)
    if not math.isfinite(value):
        raise FitError(_KIND, "the corrected survival is not finite (no atoms detected as loaded)")
    gradient = _gradient(survival, point)
    covariance = np.zeros((6, 6))
    covariance[0, 0] = p1 * (1 - p1) / n
    covariance[1, 1] = p12 * (1 - p12) / n
    covariance[0, 1] = covariance[1, 0] = p12 * (1 - p1) / n  # "both" is a subset of "loaded"
    covariance[2:4, 2:4] = cov1
    if second is first:
        covariance[4:6, 4:6] = cov1
        covariance[2:4, 4:6] = covariance[4:6, 2:4] = cov1
    else:
        covariance[4:6, 4:6] = cov2
    error = float(math.sqrt(max(gradient @ covariance @ gradient, 0.0)))
    common = {"method": "detection-corrected", "method_version": _METHOD_VERSION}
    return [
        Figure("corrected_survival", float(value), "", stderr=error, **common),
        Figure("corrected_loss", float(1.0 - value), "", stderr=error, **common),
    ]
