"""The least-squares fit engine behind every fitted figure kind.

This module owns one job: fit a model ``f(x, *params)`` to data by least squares, give the
covariance of the fitted parameters, and decide whether the fit can be trusted. A fit that
cannot be trusted raises :class:`~runlog.errors.FitError`; there is no best-effort result.

How a fit is made
-----------------
The minimiser is ``scipy.optimize.least_squares`` (MINPACK Levenberg-Marquardt without
bounds, the trust-region reflective method with bounds). Forward differences steer it; a
few Gauss-Newton steps with central differences then settle the last digits, and the
covariance is built from a central-difference Jacobian as well (relative error ~1e-10
instead of the ~1e-8 of forward differences).

A least-squares surface can hold local minima that are not the answer (NIST BoxBOD from its
first start is the textbook case: Levenberg-Marquardt with MINPACK's scaling runs the rate
constant to infinity and stops on the constant model, residual sum of squares 9771.5 instead
of 1168.0). So the engine fits from the caller's start, then from any ``alternatives`` the
caller knows of, then from a few perturbed copies of the start (each parameter multiplied by
a factor between 1/10 and 10 drawn from a fixed-seed generator, so the result is
reproducible), and keeps the lowest residual sum of squares. The other starts run on a short
budget and are continued only when they are clearly lower. When another start beats the
caller's, ``FitResult.message`` says so. For BoxBOD start 1 the restarts reach the certified
minimum and the engine reports the certified values; with ``restarts=0`` the false minimum
is refused by the first check below. Restarts are a safety net, not a global search: a
false minimum that explains the data well and lies far from every start is beyond any local
method, which is why each fitted kind computes its own starting values.

What is refused
---------------
The optimum that is kept must still pass every check below, otherwise ``FitError``:

* too few points (degrees of freedom ``n - p <= 0``), non-finite data or start values;
* the minimiser did not converge from any start;
* the model explains no more of the variation than a constant (the weighted mean) would by
  chance: the F-test of its improvement over the constant has a p-value above
  ``SIGNIFICANCE`` (5 %). A fit stuck on a degenerate limit lands here (BoxBOD's false
  minimum *is* the constant, residual sum of squares 9771.5 = that of the mean), so do flat
  data and many other false minima - e.g. ``a sin(b x)`` fitted to ``sin 3x`` from
  ``b = 0.1`` stops on a nearly straight line that explains 0.1 % of the variation;
* a parameter the data do not determine: its Jacobian column is zero at the level of
  rounding (changing it does not change the model), or the Jacobian with unit-free columns
  is so ill-conditioned (condition number above ``MAX_CONDITION``) that the covariance is
  numerical noise;
* a non-finite or negative variance of any parameter;
* a parameter that ends on one of its bounds: the minimum is then not a stationary point in
  that direction, so the curvature-based standard error means nothing, and for the bounds
  our fitted kinds use (a time constant > 0, say) it means the parameter is degenerate.

Uncertainties
-------------
``J`` is the Jacobian of the weighted residuals at the optimum. Two estimators:

* ``"residual"`` (the default): ``(J^T J)^-1``, multiplied by the residual variance
  ``RSS / dof`` when no ``sigma`` is given (the NIST StRD convention and
  ``curve_fit(absolute_sigma=False)``); with ``sigma`` the weights are taken as absolute
  standard deviations and the covariance is not rescaled. Right when every point has the
  same noise (or ``sigma`` says how it differs).
* ``"sandwich"``: the heteroscedasticity-consistent estimator HC3 (MacKinnon J.G. & White
  H. 1985, J. Econometrics 29:305-325 [memory]),
  ``(J^T J)^-1 J^T diag(r_i^2 / (1 - h_i)^2) J (J^T J)^-1`` with ``r_i`` the residuals
  and ``h_i`` the leverages. Right when the noise changes from point to point in a way
  nobody wrote down - the shot noise of a bright fraction, ``p (1 - p) / N``, is smallest
  at the top and bottom of a fringe and largest on its slopes - provided there are many
  more points than parameters (one point per shot).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import stats
from scipy.optimize import least_squares

from runlog.errors import FitError

__all__ = [
    "COVARIANCES",
    "DEFAULT_RESTARTS",
    "MAX_CONDITION",
    "SIGNIFICANCE",
    "FitResult",
    "flag_out_of_range",
    "is_fraction",
    "least_squares_fit",
    "scan_points",
    "t_interval",
    "with_t_intervals",
]

#: The covariance estimators ``least_squares_fit`` offers.
COVARIANCES = ("residual", "sandwich")

#: Perturbed restarts tried besides the caller's start.
DEFAULT_RESTARTS = 6

#: A fit must beat a constant model at this F-test level, or it explains nothing.
SIGNIFICANCE = 0.05

#: Largest condition number of the column-normalised Jacobian we accept. Above it the
#: smallest singular direction is lost in the rounding of a double-precision
#: central-difference Jacobian (relative error ~1e-10), so the covariance is noise.
MAX_CONDITION = 1e8

_EPS = float(np.finfo(float).eps)
# Relative steps that balance truncation and rounding in a central / forward difference.
_STEP = _EPS ** (1.0 / 3.0)
_FORWARD_STEP = _EPS**0.5
_TOLERANCE = 1e-14  # ftol, xtol and gtol of the minimiser: tight, NIST asks for ~10 digits
_SEED = 20_011_989  # any fixed value: the restarts must be the same every run
# A restart "beats" the start only when it is lower by more than rounding can explain.
_IMPROVEMENT = 1e-9


def scan_points(x, y, *, kind: str, x_name: str, y_name: str) -> tuple[np.ndarray, np.ndarray]:
    """A scan's settings and signal as flat float arrays of one length, all finite.

    Every fitted figure family checks its input this way; ``x_name`` and ``y_name`` name
    the two in the messages.
    """
    xs = np.asarray(x, dtype=float).ravel()
    ys = np.asarray(y, dtype=float).ravel()
    if xs.shape != ys.shape:
        raise ValueError(f"{x_name} and {y_name} differ in length ({xs.size} and {ys.size})")
    if not (np.all(np.isfinite(xs)) and np.all(np.isfinite(ys))):
        raise FitError(kind, f"{x_name} or {y_name} contains non-finite values")
    return xs, ys


@dataclass(frozen=True)
class FitResult:
    """A trusted least-squares fit: best parameters, their uncertainties and the residuals."""

    params: tuple[float, ...]
    stderr: tuple[float, ...]
    covariance: np.ndarray = field(repr=False, compare=False)
    residual_sum_of_squares: float
    dof: int
    residual_sd: float
    converged: bool
    message: str
    names: tuple[str, ...]

    def value(self, name: str) -> float:
        """The fitted value of the parameter called ``name``."""
        return self.params[self._index(name)]

    def error(self, name: str) -> float:
        """The standard error of the parameter called ``name``."""
        return self.stderr[self._index(name)]

    def interval(self, name: str, level: float = 0.95) -> tuple[float, float]:
        """The ``level`` interval of ``name``: value ± t quantile of ``dof`` × stderr."""
        return t_interval(self.value(name), self.error(name), self.dof, level)

    def _index(self, name: str) -> int:
        try:
            return self.names.index(name)
        except ValueError:
            have = ", ".join(self.names)
            raise KeyError(f"no parameter '{name}' in this fit (have {have})") from None


def t_interval(value: float, stderr: float, dof: int, level: float = 0.95) -> tuple[float, float]:
    """``value ± t(1 - (1 - level)/2, dof) × stderr``.

    The standard error of a least-squares fit is estimated from its residuals with ``dof =
    n - p`` degrees of freedom, so the interval uses Student's t quantile rather than the
    normal one: with 4 waits and 2 parameters (dof 2) the 95 % factor is 4.30, not 1.96;
    with many points the two agree (common practice; e.g. NIST/SEMATECH e-Handbook of
    Statistical Methods, section 4.4.5 [memory]).
    """
    factor = float(stats.t.ppf(0.5 + level / 2.0, max(int(dof), 1)))
    return value - factor * stderr, value + factor * stderr


def is_fraction(signal: np.ndarray) -> bool:
    """True for a fraction signal: every value within [0, 1] (a bright fraction, a
    survival probability, a contrast measured per wait)."""
    values = np.asarray(signal, dtype=float)
    return bool(values.size) and bool(np.all((values >= 0.0) & (values <= 1.0)))


def flag_out_of_range(figures: list, names: Sequence[str], fraction: bool, low: float = 0.0, high: float = 1.0) -> list:
    """``figures`` with ``out_of_range`` set on those of ``names`` whose value lies outside
    ``[low, high]``, when the signal is a fraction (:func:`is_fraction`).

    A contrast of a fraction signal cannot exceed 1 (``a (1 + C) <= 1`` and ``a (1 - C) >= 0``
    with ``a`` the mean). The fit is not bounded: a fit that wants ``C > 1`` says the model
    or the data are off, and a value clipped to 1 would hide that and carry a stderr that
    means nothing. So the figure keeps its fitted value and uncertainty, is flagged, and
    stays out of rollups, drift and alarms (docs/figures.md).
    """
    from dataclasses import replace

    if not fraction:
        return list(figures)
    return [replace(f, out_of_range=True) if f.name in names and not (low <= f.value <= high) else f for f in figures]


def with_t_intervals(figures: list, dof: int, level: float = 0.95) -> list:
    """``figures`` with ``ci_low``/``ci_high`` from :func:`t_interval` where they have a
    standard error and no interval of their own."""
    from dataclasses import replace

    out = []
    for figure in figures:
        if figure.stderr is not None and figure.ci_low is None and figure.ci_high is None:
            low, high = t_interval(figure.value, figure.stderr, dof, level)
            figure = replace(figure, ci_low=low, ci_high=high)
        out.append(figure)
    return out


@dataclass(frozen=True)
class _Attempt:
    params: np.ndarray
    rss: float
    status: int
    message: str
    active: np.ndarray

    @property
    def converged(self) -> bool:
        finite = bool(np.isfinite(self.rss)) and bool(np.all(np.isfinite(self.params)))
        return self.status > 0 and finite


def least_squares_fit(
    model: Callable[..., np.ndarray],
    x: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    start: Sequence[float] | np.ndarray,
    *,
    bounds: tuple[Sequence[float], Sequence[float]] | None = None,
    names: Sequence[str] | None = None,
    sigma: np.ndarray | Sequence[float] | None = None,
    kind: str = "least-squares",
    restarts: int = DEFAULT_RESTARTS,
    typical: Sequence[float] | None = None,
    covariance: str = "residual",
    alternatives: Sequence[Sequence[float]] = (),
) -> FitResult:
    """Fit ``y ≈ model(x, *params)`` by least squares and return a trusted :class:`FitResult`.

    * ``bounds``: ``(lower, upper)``, one entry per parameter (``±inf`` for none).
    * ``names``: one name per parameter (default ``b1, b2, ...``).
    * ``sigma``: absolute standard deviations of ``y`` (weights ``1/sigma^2``).
    * ``kind``: the figure kind named in a :class:`FitError`.
    * ``restarts``: perturbed starts tried besides ``start`` (0: none).
    * ``typical``: a typical magnitude per parameter (say 1 for a phase in radians).
      Derivative steps are relative to ``max(|value|, typical)``, so a parameter whose value
      happens to sit near zero still gets a usable step. Default ``1e-3 * |start|``.
    * ``covariance``: the estimator, ``"residual"`` or ``"sandwich"`` (module docstring).
    * ``alternatives``: further starts the caller knows of (several starting frequencies,
      say), tried after ``start`` and before the perturbed restarts.

    Raises :class:`FitError` when the fit fails or is degenerate (see the module docstring).
    """
    xs = np.asarray(x, dtype=float)
    ys = np.asarray(y, dtype=float).ravel()
    p0 = np.atleast_1d(np.asarray(start, dtype=float)).ravel()
    n_points, n_params = ys.size, p0.size
    labels = tuple(names) if names is not None else tuple(f"b{i + 1}" for i in range(n_params))
    if len(labels) != n_params:
        raise ValueError(f"{len(labels)} names for {n_params} parameters")
    if n_params == 0:
        raise ValueError("a fit needs at least one parameter")
    if restarts < 0:
        raise ValueError("restarts must be >= 0")
    if covariance not in COVARIANCES:
        raise ValueError(f"covariance must be one of {', '.join(COVARIANCES)}, got {covariance!r}")

    if not np.all(np.isfinite(ys)) or not np.all(np.isfinite(xs)):
        raise FitError(kind, "the data contain non-finite values")
    if not np.all(np.isfinite(p0)):
        raise FitError(kind, "the start values are not finite")
    if n_points <= n_params:
        raise FitError(
            kind,
            f"too few points: {n_points} points for {n_params} parameters "
            "leave no degrees of freedom",
        )
    if sigma is None:
        weights = np.ones(n_points)
    else:
        sig = np.broadcast_to(np.asarray(sigma, dtype=float), ys.shape)
        if not np.all(np.isfinite(sig)) or np.any(sig <= 0):
            raise FitError(kind, "sigma must be finite and positive for every point")
        weights = 1.0 / sig

    if typical is None:
        floor = 1e-3 * np.abs(p0)
    else:
        floor = np.abs(np.broadcast_to(np.asarray(typical, dtype=float), (n_params,)))
    lower, upper = _bounds(bounds, n_params)
    if np.any(p0 < lower) or np.any(p0 > upper):
        outside = [labels[i] for i in np.flatnonzero((p0 < lower) | (p0 > upper))]
        raise FitError(kind, f"start value of {_quoted(outside)} is outside its bounds")

    def model_values(params: np.ndarray) -> np.ndarray:
        with np.errstate(all="ignore"):
            out = np.asarray(model(xs, *params), dtype=float)
        return out if out.shape == ys.shape else np.broadcast_to(out, ys.shape)

    def residuals(params: np.ndarray) -> np.ndarray:
        return (model_values(params) - ys) * weights

    try:
        first = residuals(p0)
    except ValueError as exc:  # shape mismatch between the model and the data
        raise FitError(kind, f"the model cannot be evaluated on the data: {exc}") from None
    if not np.all(np.isfinite(first)):
        raise FitError(kind, "the model is not finite at the start values")

    bounded = bool(np.any(np.isfinite(lower)) or np.any(np.isfinite(upper)))
    full_budget = 200 * (n_params + 1)
    short_budget = 10 * (n_params + 1)
    def minimise(start_values: np.ndarray, budget: int) -> _Attempt:
        return _minimise(residuals, start_values, lower, upper, bounded, floor, budget)

    primary = minimise(p0, full_budget)
    best = primary if primary.converged else None
    others = [np.asarray(a, dtype=float).ravel() for a in alternatives]
    for other in others:
        if other.shape != p0.shape or not np.all(np.isfinite(other)):
            raise ValueError("every alternative start needs one finite value per parameter")
    others = [np.clip(other, lower, upper) for other in others]
    # Other starts run on a short budget, so a start near a spurious minimum costs little;
    # one that is clearly lower when its budget runs out is continued, not dropped.
    for candidate in others + _perturbed_starts(p0, lower, upper, restarts):
        attempt = minimise(candidate, short_budget)
        if best is not None and not attempt.rss < best.rss * (1 - _IMPROVEMENT):
            # Not clearly lower: Lanczos3's three decays can swap labels at an equal
            # minimum, and rounding must not pick the swapped copy.
            continue
        if not attempt.converged:
            attempt = minimise(attempt.params, full_budget)
        if attempt.converged and (best is None or attempt.rss < best.rss * (1 - _IMPROVEMENT)):
            best = attempt
    if best is None:
        raise FitError(kind, f"did not converge: {primary.message}")
    message = best.message
    if best is not primary and primary.converged:
        message = (
            f"the start values led to a local minimum (residual sum of squares {primary.rss:.6g}); "
            f"another start found {best.rss:.6g}"
        )
    elif best is not primary:
        message = (
            f"the fit from the start values did not converge; another start found {best.rss:.6g}"
        )

    params, rss = best.params, best.rss
    dof = n_points - n_params

    # A fit that explains no more than a constant would by chance says nothing about its
    # parameters: a degenerate limit lands here (BoxBOD's false minimum is the constant
    # itself), and so do flat data and many other false minima.
    mean = np.sum(ys * weights**2) / np.sum(weights**2)
    total = float(np.sum(((ys - mean) * weights) ** 2))
    chance = _chance_of_improvement(total, rss, n_params, dof)
    if not chance <= SIGNIFICANCE:
        raise FitError(
            kind,
            f"the model explains no more than a constant would by chance (residual sum of squares "
            f"{rss:.6g} against {total:.6g} for a constant, F-test p = {chance:.2g})",
        )

    at_bound = (best.active != 0) | _touching(params, lower, upper)
    if np.any(at_bound):
        stuck = [labels[i] for i in np.flatnonzero(at_bound)]
        raise FitError(kind, f"parameter {_quoted(stuck)} ended on its bound")

    matrix = _covariance(
        residuals, model_values, params, weights, lower, upper, floor, labels, kind, covariance
    )
    if sigma is None and covariance == "residual":
        matrix = matrix * (rss / dof)
    variances = np.diag(matrix)
    # Zero is possible, for data the model passes through exactly; negative or infinite is not.
    if not np.all(np.isfinite(variances)) or np.any(variances < 0):
        bad = [labels[i] for i in np.flatnonzero(~(np.isfinite(variances) & (variances >= 0)))]
        raise FitError(kind, f"the standard error of {_quoted(bad)} is not finite")
    matrix.setflags(write=False)

    return FitResult(
        params=tuple(float(v) for v in params),
        stderr=tuple(float(v) for v in np.sqrt(variances)),
        covariance=matrix,
        residual_sum_of_squares=float(rss),
        dof=int(dof),
        residual_sd=float(np.sqrt(rss / dof)),
        converged=True,
        message=message,
        names=labels,
    )


def _chance_of_improvement(total: float, rss: float, n_params: int, dof: int) -> float:
    """F-test p-value of the fit's improvement over a constant (1 when there is none)."""
    if not (np.isfinite(total) and np.isfinite(rss)) or rss >= total:
        return 1.0
    if rss <= 0:
        return 0.0
    extra = max(n_params - 1, 1)  # a one-parameter model is tested against the constant alone
    statistic = ((total - rss) / extra) / (rss / dof)
    return float(stats.f.sf(statistic, extra, dof))


def _bounds(
    bounds: tuple[Sequence[float], Sequence[float]] | None, n_params: int
) -> tuple[np.ndarray, np.ndarray]:
    if bounds is None:
        return np.full(n_params, -np.inf), np.full(n_params, np.inf)
    lower = np.broadcast_to(np.asarray(bounds[0], dtype=float), (n_params,)).copy()
    upper = np.broadcast_to(np.asarray(bounds[1], dtype=float), (n_params,)).copy()
    if np.any(lower >= upper):
        raise ValueError("every lower bound must be below its upper bound")
    return lower, upper


def _steps(params: np.ndarray, floor: np.ndarray) -> np.ndarray:
    # Relative steps: NIST parameters range from 5e-4 to 5e2 in one model (Misra1a), so an
    # absolute step would be 1 % of one parameter and 1e-8 of another.
    size = np.maximum(np.abs(params), floor)
    return _STEP * np.where(size > 0, size, 1.0)


def _central_jacobian(
    function: Callable[[np.ndarray], np.ndarray],
    params: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    steps: np.ndarray,
) -> np.ndarray:
    columns = []
    for j, h in enumerate(steps):
        up, down = params.copy(), params.copy()
        # Near a bound step one-sided so the model is never evaluated outside its domain.
        forward = params[j] + h if params[j] + h <= upper[j] else params[j]
        backward = params[j] - h if params[j] - h >= lower[j] else params[j]
        up[j], down[j] = forward, backward
        columns.append((function(up) - function(down)) / (forward - backward))
    return np.column_stack(columns)


def _forward_jacobian(
    function: Callable[[np.ndarray], np.ndarray],
    params: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    steps: np.ndarray,
) -> np.ndarray:
    here = function(params)
    columns = []
    for j, h in enumerate(steps):
        moved = params.copy()
        moved[j] = params[j] + h if params[j] + h <= upper[j] else params[j] - h
        columns.append((function(moved) - here) / (moved[j] - params[j]))
    return np.column_stack(columns)


def _minimise(
    residuals: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    bounded: bool,
    floor: np.ndarray,
    budget: int,
) -> _Attempt:
    def jacobian(params: np.ndarray) -> np.ndarray:
        return _central_jacobian(residuals, params, lower, upper, _steps(params, floor))

    def rough_jacobian(params: np.ndarray) -> np.ndarray:
        steps = _FORWARD_STEP / _STEP * _steps(params, floor)
        return _forward_jacobian(residuals, params, lower, upper, steps)

    # Forward differences (half the model evaluations) steer the minimiser; the central
    # differences of the polishing steps and of the covariance supply the last digits.
    options = dict(
        jac=rough_jacobian,
        x_scale="jac",
        ftol=_TOLERANCE,
        xtol=_TOLERANCE,
        gtol=_TOLERANCE,
        max_nfev=budget,
    )
    try:
        if bounded:
            result = least_squares(residuals, start, bounds=(lower, upper), method="trf", **options)
        else:
            result = least_squares(residuals, start, method="lm", **options)
    except (ValueError, np.linalg.LinAlgError, FloatingPointError) as exc:
        nan = np.full_like(start, np.nan)
        no_bounds = np.zeros(start.size, dtype=int)
        return _Attempt(nan, np.inf, -1, f"the minimiser stopped: {exc}", no_bounds)
    active = np.asarray(getattr(result, "active_mask", np.zeros(start.size)), dtype=int)
    params = np.asarray(result.x, dtype=float)
    if result.status > 0 and not np.any(active):
        params = _polish(residuals, jacobian, params, lower, upper)
    rss = float(np.sum(residuals(params) ** 2))
    return _Attempt(params, rss, int(result.status), str(result.message), active)


def _polish(
    residuals: Callable[[np.ndarray], np.ndarray],
    jacobian: Callable[[np.ndarray], np.ndarray],
    params: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
) -> np.ndarray:
    """A few Gauss-Newton steps from the minimiser's answer.

    The minimiser stops on the relative change of the residual sum of squares, which for a
    weakly determined parameter (ENSO's b8 = 0.21 ± 0.51) is flat long before the parameter
    has settled to 1e-6; Gauss-Newton steps with the central-difference Jacobian settle it.
    A step is kept only when it does not raise the residual sum of squares.
    """
    current = residuals(params)
    rss = float(current @ current)
    for _ in range(8):
        jac = jacobian(params)
        if not np.all(np.isfinite(jac)):
            break
        step = np.linalg.lstsq(jac, -current, rcond=None)[0]
        trial = params + step
        if np.any(trial < lower) or np.any(trial > upper):
            break
        trial_residuals = residuals(trial)
        trial_rss = float(trial_residuals @ trial_residuals)
        if not np.isfinite(trial_rss) or trial_rss > rss:
            break
        settled = np.all(np.abs(step) <= 1e-15 * np.abs(trial))
        params, current, rss = trial, trial_residuals, trial_rss
        if settled:
            break
    return params


def _perturbed_starts(
    start: np.ndarray, lower: np.ndarray, upper: np.ndarray, count: int
) -> list[np.ndarray]:
    rng = np.random.default_rng(_SEED)
    starts = []
    for _ in range(count):
        factors = 10.0 ** rng.uniform(-1.0, 1.0, start.size)
        # A zero start has no scale to multiply; give it one of order one instead.
        candidate = np.where(start != 0, start * factors, rng.uniform(-1.0, 1.0, start.size))
        # Keep strictly inside the bounds so the bounded minimiser starts feasible.
        span = np.where(np.isfinite(upper - lower), upper - lower, 1.0)
        candidate = np.clip(candidate, lower + 1e-6 * span, upper - 1e-6 * span)
        starts.append(candidate)
    return starts


def _touching(params: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    tolerance = 1e-10 * np.maximum(np.abs(params), 1.0)
    on_lower = np.isfinite(lower) & (params - lower <= tolerance)
    on_upper = np.isfinite(upper) & (upper - params <= tolerance)
    return on_lower | on_upper


def _covariance(
    residuals: Callable[[np.ndarray], np.ndarray],
    model_values: Callable[[np.ndarray], np.ndarray],
    params: np.ndarray,
    weights: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    floor: np.ndarray,
    labels: tuple[str, ...],
    kind: str,
    estimator: str,
) -> np.ndarray:
    """The unscaled covariance at the optimum; FitError when ``J`` leaves a parameter free.

    ``"residual"``: ``(J^T J)^-1``. ``"sandwich"``: ``(J^T J)^-1 J^T diag(r_i^2 / (1 - h_i)^2) J
    (J^T J)^-1`` with ``h_i`` the leverage of point ``i``.
    """
    steps = _steps(params, floor)
    jac = _central_jacobian(residuals, params, lower, upper, steps)
    if not np.all(np.isfinite(jac)):
        raise FitError(kind, "the model's derivatives are not finite at the optimum")

    # A column whose central difference is at the rounding level of the model values: the
    # model does not change when that parameter changes, so the data cannot fix it.
    size = np.linalg.norm(model_values(params) * weights)
    norms = np.linalg.norm(jac, axis=0)
    flat = norms * steps <= 64 * _EPS * max(size, np.finfo(float).tiny)
    if np.any(flat):
        names = [labels[i] for i in np.flatnonzero(flat)]
        raise FitError(
            kind, f"the data do not determine {_quoted(names)} (the model does not change with it)"
        )

    # Unit-free columns, so the condition number measures collinearity, not units.
    normalised = jac / norms
    u, singular, vt = np.linalg.svd(normalised, full_matrices=False)
    condition = singular[0] / singular[-1] if singular[-1] > 0 else np.inf
    if not condition <= MAX_CONDITION:
        weakest = np.abs(vt[-1])
        names = [labels[i] for i in np.flatnonzero(weakest >= 0.5 * weakest.max())]
        raise FitError(
            kind,
            f"the data do not determine {_quoted(names)} separately "
            f"(Jacobian condition number {condition:.3g} > {MAX_CONDITION:.0e})",
        )
    root = vt.T / singular  # (J^T J)^-1 = root @ root.T in the unit-free columns
    if estimator == "residual":
        return (root @ root.T) / np.outer(norms, norms)
    # With J = U S V^T: (J^T J)^-1 J^T = V S^-1 U^T, so the sandwich is root (A^T A) root^T
    # with A = U scaled row by row by r_i / (1 - h_i), and h_i = |U_i|^2.
    leverage = np.sum(u**2, axis=1)
    if np.any(leverage > 1.0 - 1e-9):
        raise FitError(
            kind,
            "a point has leverage 1 (the fit passes through it); "
            "the sandwich covariance is undefined",
        )
    scaled = u * (residuals(params) / (1.0 - leverage))[:, None]
    middle = scaled.T @ scaled
    return (root @ middle @ root.T) / np.outer(norms, norms)


def _quoted(names: Sequence[str]) -> str:
    return ", ".join(f"'{name}'" for name in names)
