"""Coherence time, contrast and detuning from a Ramsey scan or a contrast-versus-wait series.

This module owns the coherence figures. A Ramsey run scans the wait ``t`` between two
pulses; every shot contributes one point (its wait and its signal ``y``, typically the
bright fraction). The model is::

    y = a * (1 + C0 * E(t) * cos(2 pi delta t + phi))

with the envelope ``E(t) = exp(-(t/T)^2)`` (``"gaussian"``, the usual shape for
dephasing by a static spread of atomic frequencies) or ``E(t) = exp(-t/T)``
(``"exponential"``). ``T`` is the coherence time, ``C0`` the contrast at zero wait,
``delta`` the detuning of the drive from the atoms (a frequency, in cycles per unit of
wait) and ``phi`` a phase. When the contrast has already been extracted per wait,
:func:`fit_envelope` fits ``C(t) = C0 * E(t)`` instead.

The detuning is the awkward parameter: the least-squares surface has a local minimum near
every peak of the data's spectrum. So the Ramsey fit starts from several detunings - the
highest peaks of a Lomb-Scargle periodogram of the mean signal per wait, and a detuning
near zero for a scan shorter than one fringe (a pure decay) - each with offset, contrast,
phase and coherence time from a linear least-squares fit at that detuning. The fit engine
runs all of them and keeps, then judges, the lowest minimum. The Ramsey standard errors come from the
sandwich (heteroscedasticity-consistent) covariance of :mod:`runlog.figures.fitting`: the
binomial shot noise of a bright fraction is small at short waits, where the fringe reaches
near 0 and 1, and largest once the contrast has decayed, so one residual variance for all
shots would overstate the uncertainty of the contrast at zero wait. The envelope fit has a
few points with similar noise each and keeps the residual-variance covariance.

Conventions: a single Ramsey scan cannot tell the sign of the detuning (``delta, phi``
and ``-delta, -phi`` give the same curve), so ``delta >= 0`` is reported; likewise
``C0 >= 0`` (moving ``phi`` by half a turn) and ``phi`` is wrapped to (-pi, pi] rad.

A figure is refused (``FitError``) when the scan cannot determine it: too few distinct
waits, a signal the model explains no better than a constant (no fringe, or no decay, at
all), a coherence time or contrast within twice its standard error of zero (nothing
resolved), or an envelope that grows.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np
from scipy.signal import lombscargle

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import flag_out_of_range, is_fraction, least_squares_fit, scan_points, with_t_intervals

__all__ = ["ENVELOPES", "fit_envelope", "fit_ramsey", "frequency_unit"]

_METHOD = "least-squares"
_METHOD_VERSION = "1"
_MIN_SIGNIFICANCE = 2.0  # a figure must exceed this many standard errors
_PEAKS = 3  # periodogram peaks tried as starting detunings
_OVERSAMPLING = 10  # periodogram points per 1/span
_LIFETIMES = (0.25, 0.5, 1.0, 2.0, 4.0)  # starting coherence times, in units of the scan span

#: The thermal envelope of atoms in a trap whose differential light shift follows their
#: energy: a Boltzmann distribution of energies gives C(t) = C0 [1 + 0.95 (t/T2*)^2]^(-3/2)
#: (S. Kuhr et al., "Analysis of dephasing mechanisms in a standing-wave dipole trap",
#: Phys. Rev. A 72, 023406 (2005), the Ramsey envelope alpha(t) [memory for the equation's
#: number]; 0.95 makes T2* the 1/e time of the envelope).
_THERMAL = 0.95

ENVELOPES: dict[str, Callable[[np.ndarray, float], np.ndarray]] = {
    "gaussian": lambda t, lifetime: np.exp(-((t / lifetime) ** 2)),
    "exponential": lambda t, lifetime: np.exp(-t / lifetime),
    "thermal": lambda t, lifetime: (1.0 + _THERMAL * (t / lifetime) ** 2) ** -1.5,
}

# The reciprocal of a time unit as a frequency unit pint understands by name.
_FREQUENCY_UNITS = {"s": "Hz", "ms": "kHz", "us": "MHz", "µs": "MHz", "ns": "GHz"}


def frequency_unit(wait_unit: str) -> str:
    """The unit of ``1/wait_unit`` as a pint-parsable string (``"us"`` -> ``"MHz"``)."""
    return _FREQUENCY_UNITS.get(wait_unit, f"1/{wait_unit}")


def fit_ramsey(
    wait: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    envelope: str = "gaussian",
    wait_unit: str = "us",
) -> list[Figure]:
    """Fit a Ramsey scan, one point per shot, and return its coherence figures.

    Returns ``t2_star`` (the dephasing time ``T``, in ``wait_unit``), ``ramsey_contrast``
    (``C0``), ``ramsey_frequency`` (``delta``, in :func:`frequency_unit` of ``wait_unit``,
    e.g. MHz for waits in us; >= 0 here, signed by :mod:`runlog.derive` when the run's
    programmed ``detuning`` gives the sign) and ``ramsey_phase`` (``phi``, rad), each with
    its standard error.

    Raises :class:`FitError` when the scan cannot determine them.
    """
    shape = _envelope(envelope)
    t, signal = _arrays(wait, y, "ramsey")
    waits = np.unique(t)
    if waits.size < 6:
        raise FitError(
            "ramsey", f"{waits.size} distinct waits; at least 6 are needed for 5 parameters"
        )
    span = float(waits[-1] - waits[0])

    def model(
        times: np.ndarray, a: float, c0: float, lifetime: float, delta: float, phi: float
    ) -> np.ndarray:
        fringe = np.cos(2.0 * math.pi * delta * times + phi)
        return a * (1.0 + c0 * shape(times, lifetime) * fringe)

    starts = []
    for delta in _starting_detunings(t, signal, waits, span):
        start = _linear_start(t, signal, shape, delta, span)
        if start is not None:
            starts.append(start)
    if not starts:
        raise FitError("ramsey", "the mean signal is not positive at any starting detuning")
    # The best linear fit goes first; the others are the engine's alternatives. The engine
    # keeps the lowest minimum and then judges it, so a lower but degenerate minimum is
    # reported as a failure rather than passed over for a worse one.
    starts.sort(key=lambda pair: pair[0])
    best = least_squares_fit(
        model,
        t,
        signal,
        starts[0][1],
        names=("offset", "contrast_at_zero", "coherence_time", "detuning", "phase"),
        kind="ramsey",
        restarts=0,  # the starting detunings are the restarts
        alternatives=[start for _, start in starts[1:]],
        typical=[abs(starts[0][1][0]), 1.0, span, 1.0 / span, 1.0],
        covariance="sandwich",
    )

    _, c0, lifetime, delta, phi = best.params
    _, c0_err, lifetime_err, delta_err, phi_err = best.stderr
    c0, lifetime, delta, phi = _conventions(envelope, c0, lifetime, delta, phi)
    _require_resolved("ramsey", "coherence time", lifetime, lifetime_err, wait_unit)
    _require_resolved("ramsey", "contrast at zero wait", c0, c0_err, "")

    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    return flag_out_of_range(with_t_intervals([
        Figure("t2_star", lifetime, wait_unit, stderr=lifetime_err, **common),
        Figure("ramsey_contrast", c0, "", stderr=c0_err, **common),
        Figure("ramsey_frequency", delta, frequency_unit(wait_unit), stderr=delta_err, **common),
        Figure("ramsey_phase", _wrap(phi), "rad", stderr=phi_err, **common),
    ], best.dof), ("ramsey_contrast",), is_fraction(signal))


def fit_envelope(
    wait: np.ndarray | Sequence[float],
    contrast: np.ndarray | Sequence[float],
    *,
    envelope: str = "gaussian",
    wait_unit: str = "us",
) -> list[Figure]:
    """Fit ``C(t) = C0 * E(t)`` to contrasts already measured per wait.

    Returns ``envelope_time`` (``T``, in ``wait_unit``) and ``envelope_contrast`` (``C0``),
    each with its standard error: names of their own, since a contrast series may come from
    a Ramsey or an echo sequence (the ``echo`` kind gives ``t2``). Raises :class:`FitError` when they cannot be determined.

    The fit runs in the decay rate ``k`` (``E = exp(-k t)``, or ``exp(-k t^2)`` for the
    Gaussian), so that a flat or growing contrast is a rate at or below zero rather than an
    infinite ``T`` the minimiser cannot cross. ``T = 1/k`` (``1/sqrt(k)``) and its standard
    error follow by the delta method: the same numbers a fit in ``T`` gives at the optimum.
    """
    _envelope(envelope)
    t, c = _arrays(wait, contrast, "coherence")
    waits = np.unique(t)
    if waits.size < 3:
        raise FitError(
            "coherence", f"{waits.size} distinct waits; at least 3 are needed for 2 parameters"
        )
    span = float(waits[-1] - waits[0])
    power = 1 if envelope == "exponential" else 2
    abscissa = t**power

    def model(times: np.ndarray, c0: float, rate: float) -> np.ndarray:
        if envelope == "thermal":  # rate = 1/T^2; a negative rate is clipped, then refused below
            return c0 * (1.0 + _THERMAL * np.maximum(rate, -0.99 / _THERMAL / max(float(times.max()), 1e-300)) * times) ** -1.5
        return c0 * np.exp(-rate * times)

    fit = least_squares_fit(
        model,
        abscissa,
        c,
        _log_linear_start(abscissa, c, span**power),
        names=("contrast_at_zero", "decay_rate"),
        kind="coherence",
        typical=[1.0, 1.0 / span**power],
    )
    c0, rate = fit.params
    c0_err, rate_err = fit.stderr
    if not c0 > 0:
        raise FitError("coherence", f"the contrast at zero wait is not positive ({c0:.3g})")
    if rate <= 0:
        raise FitError(
            "coherence",
            "the contrast grows with wait instead of decaying; no coherence time to report",
        )
    if rate < _MIN_SIGNIFICANCE * rate_err:
        raise FitError(
            "coherence",
            f"coherence time not resolved: the decay within the scanned waits is within "
            f"{_MIN_SIGNIFICANCE:g} standard errors of none",
        )
    _require_resolved("coherence", "contrast at zero wait", c0, c0_err, "")
    lifetime = rate ** (-1.0 / power)
    lifetime_err = lifetime / power * rate_err / rate  # |dT/dk| * err(k)
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    return flag_out_of_range(with_t_intervals([
        Figure("envelope_time", lifetime, wait_unit, stderr=lifetime_err, **common),
        Figure("envelope_contrast", c0, "", stderr=c0_err, **common),
    ], fit.dof), ("envelope_contrast",), is_fraction(c))


def _envelope(name: str) -> Callable[[np.ndarray, float], np.ndarray]:
    try:
        return ENVELOPES[name]
    except KeyError:
        raise ValueError(f"envelope must be one of {', '.join(ENVELOPES)}, got {name!r}") from None


def _arrays(
    wait: np.ndarray | Sequence[float], y: np.ndarray | Sequence[float], kind: str
) -> tuple[np.ndarray, np.ndarray]:
    t, values = scan_points(wait, y, kind=kind, x_name="wait", y_name="signal")
    if np.any(t < 0):
        raise FitError(kind, "negative waits")
    return t, values


def _starting_detunings(
    t: np.ndarray, signal: np.ndarray, waits: np.ndarray, span: float
) -> list[float]:
    """The highest periodogram peaks of the mean signal per wait, then a near-zero detuning."""
    means = np.array([signal[t == w].mean() for w in waits])
    spacing = float(np.median(np.diff(waits)))
    # Up to the Nyquist frequency of the typical wait spacing, with the resolution 1/span
    # oversampled so that a peak is not missed between grid points.
    resolution = 1.0 / (_OVERSAMPLING * span)
    frequencies = resolution * np.arange(1.0, span / (2.0 * spacing) * _OVERSAMPLING + 1.0)
    power = lombscargle(waits, means - means.mean(), 2.0 * math.pi * frequencies)
    inner = (power[1:-1] > power[:-2]) & (power[1:-1] >= power[2:])
    peaks = np.flatnonzero(inner) + 1
    if power.size > 1 and power[0] > power[1]:
        peaks = np.concatenate([[0], peaks])
    # Highest first, and only peaks the scan resolves from a higher one (1/span apart):
    # ripples on the flank of a peak lead back to the same minimum.
    chosen: list[float] = []
    for i in peaks[np.argsort(power[peaks])[::-1]]:
        if all(abs(frequencies[i] - f) >= 1.0 / span for f in chosen):
            chosen.append(float(frequencies[i]))
        if len(chosen) == _PEAKS:
            break
    # A scan shorter than one fringe shows no peak; start that case below one cycle per scan.
    return chosen + [0.25 / span]


def _linear_start(
    t: np.ndarray,
    signal: np.ndarray,
    shape: Callable[[np.ndarray, float], np.ndarray],
    delta: float,
    span: float,
) -> tuple[float, list[float]] | None:
    """Residual sum of squares and start values from a linear fit at detuning ``delta``.

    At fixed ``delta`` and ``T`` the model ``A + E(t) (B cos 2 pi delta t + D sin 2 pi delta t)``
    is linear; the coherence time is chosen on a coarse grid by the lowest residual.
    """
    best: tuple[float, list[float]] | None = None
    angle = 2.0 * math.pi * delta * t
    for factor in _LIFETIMES:
        lifetime = factor * span
        decay = shape(t, lifetime)
        design = np.column_stack([np.ones_like(t), decay * np.cos(angle), decay * np.sin(angle)])
        coefficients, *_ = np.linalg.lstsq(design, signal, rcond=None)
        a, b, d = (float(v) for v in coefficients)
        if not a > 0:
            continue
        rss = float(np.sum((design @ coefficients - signal) ** 2))
        start = [a, math.hypot(b, d) / a, lifetime, delta, math.atan2(-d, b)]
        if best is None or rss < best[0]:
            best = (rss, start)
    return best


def _log_linear_start(abscissa: np.ndarray, contrast: np.ndarray, scale: float) -> list[float]:
    """``C0`` and the decay rate from a line through ``ln C`` against ``t`` (or ``t^2``)."""
    keep = contrast > 0
    if np.count_nonzero(keep) >= 2 and np.ptp(abscissa[keep]) > 0:
        slope, intercept = np.polyfit(abscissa[keep], np.log(contrast[keep]), 1)
        return [math.exp(intercept), -float(slope)]
    return [float(np.max(np.abs(contrast))) or 1.0, 1.0 / scale]


def _conventions(
    envelope: str, c0: float, lifetime: float, delta: float, phi: float
) -> tuple[float, float, float, float]:
    """The reported signs: ``T > 0``, ``delta >= 0``, ``C0 >= 0`` (see the module docstring)."""
    if envelope == "gaussian":
        lifetime = abs(lifetime)  # E depends on T^2 only
    elif lifetime <= 0:
        raise FitError(
            "ramsey",
            f"the exponential envelope grows with wait (T = {lifetime:.4g}); no decay to report",
        )
    if delta < 0:
        delta, phi = -delta, -phi
    if c0 < 0:
        c0, phi = -c0, phi + math.pi
    return c0, lifetime, delta, phi


def _require_resolved(kind: str, what: str, value: float, error: float, unit: str) -> None:
    if value < _MIN_SIGNIFICANCE * error:
        shown = f" {unit}" if unit else ""
        raise FitError(
            kind,
            f"{what} not resolved: {value:.3g} ± {error:.2g}{shown} is within "
            f"{_MIN_SIGNIFICANCE:g} standard errors of zero",
        )


def _wrap(phi: float) -> float:
    """``phi`` wrapped into (-pi, pi]."""
    wrapped = math.remainder(phi, 2 * math.pi)
    return math.pi if wrapped == -math.pi else wrapped
