"""The trap lifetime of a hold-time scan: the surviving fraction against the hold time.

This module owns the ``lifetime`` figure. A run scans the hold time ``t`` between the two
images; every shot contributes its surviving fraction (sites occupied in both images /
sites occupied in the first). The model is a single exponential (one-body loss: collisions
with the background gas, which sets the vacuum-limited lifetime)::

    S(t) = S0 * exp(-t / tau)

or, with ``two_body=True``, one- and two-body loss together, the solution of
``dN/dt = -N/tau - beta N^2`` normalised to the initial number::

    S(t) = S0 * exp(-t / tau) / (1 + b (1 - exp(-t / tau)))

with ``b = beta N0 tau`` (dimensionless, reported as ``two_body_fraction``). ``lifetime``
is ``tau``, the 1/e time of the one-body loss, with its standard error and a 95 % interval.

The fit runs in the loss rate ``k = 1/tau`` (a scan too short to see a loss is then a rate
near zero, not an infinite lifetime). The interval is the Wald interval of the rate,
``k ± 1.96 s_k``, inverted: ``[1/(k + 1.96 s_k), 1/(k - 1.96 s_k)]``. It is asymmetric
like the distribution of ``1/k`` itself, and open above (``ci_high`` absent, the interval
not given) when the rate's interval reaches zero. One point per shot: HC3 sandwich
covariance, as for the fringe fits.

Refused (``FitError``): fewer than 3 distinct hold times (4 with the two-body term), a fit
no better than a constant, a loss rate within two standard errors of zero (the scan does
not resolve the lifetime).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy import stats

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit, scan_points
from runlog.figures.relaxation import time_from_rate

__all__ = ["fit_lifetime", "lifetime_model"]

_KIND = "lifetime"
_METHOD = "least-squares"
_METHOD_VERSION = "1"


def lifetime_model(t: np.ndarray, s0: float, rate: float, two_body: float = 0.0) -> np.ndarray:
    """``S0 exp(-k t) / (1 + b (1 - exp(-k t)))``; ``b = 0`` is the single exponential."""
    decay = np.exp(-rate * t)
    return s0 * decay / (1.0 + two_body * (1.0 - decay))


def fit_lifetime(
    hold: np.ndarray | Sequence[float],
    survival: np.ndarray | Sequence[float],
    *,
    hold_unit: str = "s",
    two_body: bool = False,
) -> list[Figure]:
    """Fit the surviving fraction per shot; returns ``lifetime``, ``survival_at_zero`` (and
    ``two_body_fraction`` with ``two_body=True``)."""
    t, values = scan_points(hold, survival, kind=_KIND, x_name="hold time", y_name="survival")
    if np.any(t < 0):
        raise FitError(_KIND, "negative hold times")
    holds = np.unique(t)
    free = 3 if two_body else 2
    if holds.size < free + 1:
        raise FitError(_KIND, f"{holds.size} distinct hold times; at least {free + 1} are needed for {free} parameters")
    span = float(holds[-1] - holds[0])
    first = float(np.mean(values[t == holds[0]]))
    last = float(np.mean(values[t == holds[-1]]))
    rate0 = np.log(first / last) / span if first > 0 and last > 0 and first > last else 1.0 / span
    starts = [[first * np.exp(rate0 * holds[0]), rate0 * factor] for factor in (1.0, 0.3, 3.0)]
    if two_body:
        starts = [s + [b] for s in starts for b in (0.1, 1.0)]

        def model(times: np.ndarray, s0: float, rate: float, b: float) -> np.ndarray:
            return lifetime_model(times, s0, rate, b)

        names: tuple[str, ...] = ("survival_at_zero", "rate", "two_body_fraction")
        bounds = ([-np.inf, -np.inf, -0.99], [np.inf, np.inf, np.inf])
    else:
        def model(times: np.ndarray, s0: float, rate: float) -> np.ndarray:
            return lifetime_model(times, s0, rate)

        names, bounds = ("survival_at_zero", "rate"), None
    fit = least_squares_fit(
        model, t, values, starts[0], names=names, bounds=bounds, kind=_KIND, alternatives=starts[1:],
        typical=[1.0, 1.0 / span, 1.0][: len(names)], covariance="sandwich",
    )
    rate, rate_err = fit.value("rate"), fit.error("rate")
    tau, tau_err = time_from_rate(rate, rate_err, _KIND, "surviving fraction")
    z = float(stats.norm.ppf(0.975))
    interval: dict[str, float] = {}
    if rate - z * rate_err > 0:
        interval = {"ci_low": 1.0 / (rate + z * rate_err), "ci_high": 1.0 / (rate - z * rate_err)}
    method = _METHOD if not two_body else "least-squares/two-body"
    common = {"method": method, "method_version": _METHOD_VERSION}
    figures = [
        Figure("lifetime", tau, hold_unit, stderr=tau_err, **interval, **common),
        Figure("survival_at_zero", fit.value("survival_at_zero"), "", stderr=fit.error("survival_at_zero"), **common),
    ]
    if two_body:
        figures.append(Figure("two_body_fraction", fit.value("two_body_fraction"), "", stderr=fit.error("two_body_fraction"), **common))
    return figures
