"""Spin-echo coherence time and population relaxation time (T1) of a wait scan.

This module owns the two relaxation figures of a qubit held for a wait ``t``.

Spin echo (``fit_echo``): the contrast left after an echo sequence of total wait ``t``
decays as a stretched exponential::

    C(t) = C0 * exp(-(t / T2)^n)

``t2`` is the echo coherence time, ``stretch`` the exponent ``n`` (1 for a Markovian
dephasing, 2 or 3 for slow noise; e.g. de Sousa R. 2009, Top. Appl. Phys. 115:183
[memory]), ``echo_contrast`` C0. Given the contrast per wait (a measurement such as
``contrast``) the offset is zero; given a signal per shot (a population after the final
pulse), the model gets an offset, ``y = a + C0 exp(-(t/T2)^n)``. ``stretch`` may be fixed
(``stretch=2``) instead of fitted.

T1 (``fit_t1``): a population prepared in one state relaxes towards a steady state::

    P(t) = P_inf + (P0 - P_inf) * exp(-t / T1)

A state-selective detection (push the atoms of one state out, image the rest) also counts
every atom lost from the trap during the wait as "not in the state". ``fit_t1`` corrects
for that loss when the run has reference shots that image without the push-out: it fits
both kinds of shot at once, ``y_ref = s0 exp(-g t)`` and ``y = s0 exp(-g t) P(t)``, so the
loss rate ``g`` comes from the survival of the reference shots and T1 from the rest. With
no reference shots the population is fitted as it is.

The T1 fit runs in the rate ``1/T1`` so a scan too short to see a decay is a rate near
zero rather than an infinite time the minimiser cannot reach; the time and its standard
error follow by the delta method. The echo fit runs in ``T2`` itself: the stretch and a
rate ``T2^-n`` are too correlated for the rate's error to say anything about ``T2``. One point per shot (or per wait for a contrast
series): HC3 sandwich covariance for shots, residual covariance for a contrast series.
:func:`fit_relaxation` is the plain exponential approach fit behind ``fit_t1``; with
``P0 = 0`` it is NIST StRD's Misra1a and BoxBOD model ``y = b1 (1 - exp(-b2 x))``.

Refused (``FitError``): fewer than 4 distinct waits (5 with an offset), a fit no better
than a constant, a rate or contrast within two standard errors of zero, a growing decay.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.coherence import _arrays  # the same checks of a wait scan
from runlog.figures.fitting import FitResult, flag_out_of_range, is_fraction, least_squares_fit, with_t_intervals

__all__ = ["echo_model", "fit_echo", "fit_relaxation", "fit_t1", "relaxation_model", "time_from_rate"]

_METHOD = "least-squares"
_METHOD_VERSION = "1"
_MIN_SIGNIFICANCE = 2.0
_STRETCH_BOUNDS = (0.2, 8.0)


def echo_model(t: np.ndarray, offset: float, contrast: float, t2: float, stretch: float) -> np.ndarray:
    """``a + C0 exp(-(t/T2)^n)``."""
    return offset + contrast * np.exp(-((np.abs(t) / t2) ** stretch))


def relaxation_model(t: np.ndarray, initial: float, steady: float, rate: float) -> np.ndarray:
    """``P_inf + (P0 - P_inf) exp(-k t)``."""
    return steady + (initial - steady) * np.exp(-rate * t)


def time_from_rate(rate: float, error: float, kind: str, what: str, power: float = 1.0) -> tuple[float, float]:
    """``T = rate^(-1/power)`` and its standard error by the delta method; refuses an unresolved rate."""
    if rate <= 0:
        raise FitError(kind, f"the {what} does not decay over the scanned waits (rate {rate:.3g} <= 0)")
    if rate < _MIN_SIGNIFICANCE * error:
        raise FitError(kind, f"{what} not resolved: the decay within the scanned waits is within {_MIN_SIGNIFICANCE:g} standard errors of none")
    value = rate ** (-1.0 / power)
    return value, value / power * error / rate


def fit_echo(
    wait: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    wait_unit: str = "us",
    contrast_series: bool = True,
    stretch: float | None = None,
) -> list[Figure]:
    """Fit the stretched-exponential echo decay; returns ``t2``, ``stretch``, ``echo_contrast``.

    ``contrast_series``: ``y`` is a contrast per wait (offset 0, residual covariance);
    otherwise a signal per shot (fitted offset, HC3 covariance). ``stretch``: a fixed
    exponent instead of a fitted one (the figure ``stretch`` is then not reported).
    """
    kind = "echo"
    t, values = _arrays(wait, y, kind)
    waits = np.unique(t)
    free = (0 if contrast_series else 1) + 2 + (1 if stretch is None else 0)
    if waits.size < free + 1:
        raise FitError(kind, f"{waits.size} distinct waits; at least {free + 1} are needed for {free} parameters")
    span = float(waits[-1])
    if not span > 0:
        raise FitError(kind, "every wait is zero")
    if stretch is not None and not (_STRETCH_BOUNDS[0] <= stretch <= _STRETCH_BOUNDS[1]):
        raise ValueError(f"stretch must lie in {_STRETCH_BOUNDS[0]}..{_STRETCH_BOUNDS[1]}, got {stretch}")

    offset0 = 0.0
    if not contrast_series:
        offset0 = float(np.mean(values[t == waits[-1]]))
    top = float(np.mean(values[t == waits[0]])) - offset0
    starts = []
    for n in ((stretch,) if stretch is not None else (1.0, 2.0, 3.0)):
        for factor in (0.3, 1.0, 3.0):
            starts.append([offset0, top, factor * span, n])

    names = ["offset", "contrast_at_zero", "t2", "stretch"]
    keep = [i for i in range(4) if not (i == 0 and contrast_series) and not (i == 3 and stretch is not None)]

    def reduced(times: np.ndarray, *params: float) -> np.ndarray:
        full = [0.0, 0.0, 1.0, stretch if stretch is not None else 1.0]
        for i, value in zip(keep, params):
            full[i] = value
        return echo_model(times, *full)

    # T2 itself is fitted (bounded above zero): the stretch and a rate T2^-n are so
    # correlated that a rate's standard error would say nothing about T2's. Flat data are
    # refused by the engine's test against a constant.
    lower = [-np.inf, -np.inf, 0.0, _STRETCH_BOUNDS[0]]
    upper = [np.inf, np.inf, np.inf, _STRETCH_BOUNDS[1]]
    fit = least_squares_fit(
        reduced,
        t,
        values,
        [starts[0][i] for i in keep],
        names=[names[i] for i in keep],
        bounds=([lower[i] for i in keep], [upper[i] for i in keep]),
        kind=kind,
        restarts=0,
        alternatives=[[s[i] for i in keep] for s in starts[1:]],
        typical=[[1.0, 1.0, span, 1.0][i] for i in keep],
        covariance="residual" if contrast_series else "sandwich",
    )
    c0, c0_err = fit.value("contrast_at_zero"), fit.error("contrast_at_zero")
    t2, t2_err = fit.value("t2"), fit.error("t2")
    if c0 < _MIN_SIGNIFICANCE * c0_err:
        raise FitError(kind, f"contrast at zero wait not resolved: {c0:.3g} ± {c0_err:.2g}")
    if t2 < _MIN_SIGNIFICANCE * t2_err:
        raise FitError(kind, f"echo coherence time not resolved: {t2:.3g} ± {t2_err:.2g} {wait_unit}")
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    figures = [
        Figure("t2", t2, wait_unit, stderr=t2_err, **common),
        Figure("echo_contrast", c0, "", stderr=c0_err, **common),
    ]
    if stretch is None:
        figures.insert(1, Figure("stretch", fit.value("stretch"), "", stderr=fit.error("stretch"), **common))
    return flag_out_of_range(with_t_intervals(figures, fit.dof), ("echo_contrast",), is_fraction(values))


def fit_relaxation(
    wait: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    initial: float | None = None,
    covariance: str = "sandwich",
    kind: str = "t1",
) -> FitResult:
    """Least-squares ``P_inf + (P0 - P_inf) exp(-k t)``; ``initial`` fixes ``P0``.

    Parameters of the result: ``initial`` (unless fixed), ``steady`` and ``rate``.
    """
    t, values = _arrays(wait, y, kind)
    waits = np.unique(t)
    free = 3 if initial is None else 2
    if waits.size < free + 1:
        raise FitError(kind, f"{waits.size} distinct waits; at least {free + 1} are needed for {free} parameters")
    span = float(waits[-1] - waits[0])
    first = float(np.mean(values[t == waits[0]])) if initial is None else initial
    last = float(np.mean(values[t == waits[-1]]))
    starts = [[first, last, factor / span] for factor in (1.0, 0.3, 3.0, 10.0)]
    if initial is None:
        model, names, chosen = relaxation_model, ("initial", "steady", "rate"), starts
    else:
        def model(times: np.ndarray, steady: float, rate: float) -> np.ndarray:
            return relaxation_model(times, initial, steady, rate)

        names, chosen = ("steady", "rate"), [s[1:] for s in starts]
    return least_squares_fit(
        model, t, values, chosen[0], names=names, kind=kind, alternatives=chosen[1:],
        typical=[1.0] * (len(names) - 1) + [1.0 / span], covariance=covariance,
    )


def fit_t1(
    wait: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    reference: np.ndarray | Sequence[bool] | None = None,
    wait_unit: str = "ms",
) -> list[Figure]:
    """T1 from one point per shot; ``reference`` marks shots that image without state selection.

    Returns ``t1`` (in ``wait_unit``) with its standard error; with reference shots also
    ``loss_lifetime``, the atom lifetime the correction used, when the loss is resolved.
    """
    kind = "t1"
    t, values = _arrays(wait, y, kind)
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    if reference is None or not np.any(reference):
        fit = fit_relaxation(t, values, kind=kind)
        t1, t1_err = time_from_rate(fit.value("rate"), fit.error("rate"), kind, "population")
        return with_t_intervals([Figure("t1", t1, wait_unit, stderr=t1_err, **common)], fit.dof)
    flags = np.asarray(reference, dtype=bool).ravel()
    if flags.shape != t.shape:
        raise ValueError("reference and wait differ in length")
    if np.all(flags):
        raise FitError(kind, "every shot is a reference shot; none measured the state")
    if np.unique(t[flags]).size < 2 or np.unique(t[~flags]).size < 4:
        raise FitError(kind, "too few distinct waits: at least 2 with reference shots and 4 with state-selective shots")

    def model(times: np.ndarray, s0: float, loss: float, initial: float, steady: float, rate: float) -> np.ndarray:
        kept = s0 * np.exp(-loss * times)
        return np.where(flags, kept, kept * relaxation_model(times, initial, steady, rate))

    span = float(np.ptp(t))
    ref = float(np.mean(values[flags & (t == t[flags].min())]))
    base = fit_relaxation(t[~flags], values[~flags], kind=kind)
    start = [ref, 0.1 / span, base.value("initial") / max(ref, 1e-3), base.value("steady") / max(ref, 1e-3), base.value("rate")]
    fit = least_squares_fit(
        model, t, values, start, names=("s0", "loss_rate", "initial", "steady", "rate"), kind=kind,
        typical=[1.0, 1.0 / span, 1.0, 1.0, 1.0 / span], covariance="sandwich",
    )
    t1, t1_err = time_from_rate(fit.value("rate"), fit.error("rate"), kind, "population")
    figures = [Figure("t1", t1, wait_unit, stderr=t1_err, method="least-squares/loss-corrected", method_version=_METHOD_VERSION)]
    loss, loss_err = fit.value("loss_rate"), fit.error("loss_rate")
    if loss > _MIN_SIGNIFICANCE * loss_err:
        lifetime, lifetime_err = time_from_rate(loss, loss_err, kind, "atom survival")
        figures.append(Figure("loss_lifetime", lifetime, wait_unit, stderr=lifetime_err, method="least-squares/loss-corrected", method_version=_METHOD_VERSION))
    return with_t_intervals(figures, fit.dof)

