"""Rabi frequency, pi time, contrast and damping time of a pulse-duration scan.

This module owns the figures of a Rabi oscillation in time. A run scans the duration
``t`` of a resonant (or nearly resonant) drive; every shot contributes one point, its
duration and its signal ``y`` (the population of the driven state, or the bright fraction).
The model is the damped oscillation of a two-level atom that starts in the undriven state::

    y = a + (C / 2) * (1 - exp(-t / tau) * cos(2 pi f t))

``f`` is the cyclic Rabi frequency (cycles per unit of duration: MHz for durations in us),
``C`` the contrast (the population moved at the first maximum, before damping), ``a`` the
signal at zero duration and ``tau`` the damping time. The pi time is ``1 / (2 f)``, the
duration of the first maximum of the undamped oscillation (textbook two-level atom:
P(t) = sin^2(Omega t / 2) on resonance, Omega = 2 pi f, pi time = pi / Omega).

The fit runs in the damping rate ``k = 1/tau``, so an undamped scan is a rate near zero
rather than an infinite ``tau`` the minimiser cannot reach; ``damping_time`` is reported
only when the rate is resolved (more than two standard errors above zero), with its
standard error by the delta method. Starting frequencies are the highest peaks of a
Lomb-Scargle periodogram of the mean signal per duration, each completed by a linear fit
of ``a + C/2`` and ``C/2`` on a grid of damping rates; the fit engine keeps the lowest
minimum. One point per shot with binomial noise that is small at the turning points: the
standard errors come from the HC3 sandwich covariance, as for the fringe and Ramsey fits.

Refused (``FitError``): fewer than 6 distinct durations, a fit no better than a constant,
a Rabi frequency or contrast within two standard errors of zero, and a scan that does not
reach the first maximum (the frequency of less than half a cycle is a decay, not an
oscillation).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.coherence import _starting_detunings, frequency_unit
from runlog.figures.fitting import flag_out_of_range, is_fraction, least_squares_fit, scan_points

__all__ = ["fit_rabi", "rabi_model"]

_KIND = "rabi"
_METHOD = "least-squares"
_METHOD_VERSION = "1"
_MIN_SIGNIFICANCE = 2.0
_MIN_DURATIONS = 6
_RATES = (0.0, 0.5, 1.0, 2.0, 4.0)  # starting damping rates, in units of 1/span


def rabi_model(t: np.ndarray, offset: float, contrast: float, frequency: float, rate: float) -> np.ndarray:
    """``a + (C/2)(1 - exp(-k t) cos(2 pi f t))``, the damped Rabi oscillation."""
    return offset + 0.5 * contrast * (1.0 - np.exp(-rate * t) * np.cos(2.0 * math.pi * frequency * t))


def fit_rabi(
    duration: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    duration_unit: str = "us",
) -> list[Figure]:
    """Fit the damped Rabi oscillation to one point per shot and return its figures.

    Returns ``rabi_frequency`` (cyclic, in :func:`frequency_unit` of ``duration_unit``),
    ``pi_time`` (in ``duration_unit``), ``contrast`` and, when the damping is resolved,
    ``damping_time`` (in ``duration_unit``); each with its standard error.
    """
    t, signal = scan_points(duration, y, kind=_KIND, x_name="duration", y_name="signal")
    if np.any(t < 0):
        raise FitError(_KIND, "negative pulse durations")
    durations = np.unique(t)
    if durations.size < _MIN_DURATIONS:
        raise FitError(_KIND, f"{durations.size} distinct durations; at least {_MIN_DURATIONS} are needed for 4 parameters")
    span = float(durations[-1] - durations[0])

    starts = []
    for frequency in _starting_detunings(t, signal, durations, span):
        for factor in _RATES:
            rate = factor / span
            wave = np.exp(-rate * t) * np.cos(2.0 * math.pi * frequency * t)
            design = np.column_stack([np.ones_like(t), wave])
            (level, half), *_ = np.linalg.lstsq(design, signal, rcond=None)
            rss = float(np.sum((design @ np.array([level, half]) - signal) ** 2))
            # level = a + C/2 and half = -C/2.
            starts.append((rss, [float(level + half), float(-2.0 * half), frequency, rate]))
    starts.sort(key=lambda pair: pair[0])
    fit = least_squares_fit(
        rabi_model,
        t,
        signal,
        starts[0][1],
        names=("offset", "contrast", "rabi_frequency", "damping_rate"),
        kind=_KIND,
        restarts=0,
        alternatives=[start for _, start in starts[1:12]],
        typical=[1.0, 1.0, 1.0 / span, 1.0 / span],
        covariance="sandwich",
    )
    _, contrast, frequency, rate = fit.params
    _, contrast_err, frequency_err, rate_err = fit.stderr
    if frequency < 0:  # cos is even: -f is the same curve
        frequency = -frequency
    if contrast < 0:
        # A negative contrast with the phase fixed is an oscillation that starts at its top:
        # the atom was prepared in the driven state, or the signal counts the other state.
        contrast = -contrast
    if frequency * span < 0.5:
        raise FitError(_KIND, f"the scan covers {frequency * span:.2g} of a Rabi cycle; at least half a cycle (the first maximum) is needed")
    for what, value, error in (("Rabi frequency", frequency, frequency_err), ("contrast", contrast, contrast_err)):
        if value < _MIN_SIGNIFICANCE * error:
            raise FitError(_KIND, f"{what} not resolved: {value:.3g} ± {error:.2g} is within {_MIN_SIGNIFICANCE:g} standard errors of zero")
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    pi_time = 0.5 / frequency
    figures = [
        Figure("rabi_frequency", frequency, frequency_unit(duration_unit), stderr=frequency_err, **common),
        Figure("pi_time", pi_time, duration_unit, stderr=pi_time * frequency_err / frequency, **common),
        Figure("contrast", contrast, "", stderr=contrast_err, **common),
    ]
    if rate > _MIN_SIGNIFICANCE * rate_err:
        tau = 1.0 / rate
        figures.append(Figure("damping_time", tau, duration_unit, stderr=tau * rate_err / rate, **common))
    return flag_out_of_range(figures, ("contrast",), is_fraction(signal))
