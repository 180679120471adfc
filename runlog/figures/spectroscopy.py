"""Resonance, linewidth and amplitude of a frequency scan, and the magnetic field they imply.

This module owns the spectroscopy figures. A run scans the drive frequency ``x`` (or its
detuning from a reference); every shot contributes one point, its frequency and its signal
``y`` (the transferred population, or the surviving fraction of a loss spectrum). Two
lineshapes:

* ``"lorentzian"``: ``y = a + A / (1 + (2 (x - x0) / G)^2)``, a line of full width at half
  maximum ``G`` (the steady-state lineshape of a damped two-level atom, or a lifetime-
  limited line; any textbook of atomic physics, e.g. Foot C.J. 2005, Atomic Physics,
  Oxford, section 7.5 [memory]);
* ``"rabi"``: the lineshape of a square pulse of known duration ``T`` on a two-level atom
  (the Rabi formula, textbook two-level atom)::

      y = a + A * W^2 / (W^2 + D^2) * sin^2(sqrt(W^2 + D^2) T / 2)

  with ``W = 2 pi f_R`` the Rabi frequency and ``D = 2 pi (x - x0)`` the detuning, both
  angular. ``A`` is the amplitude of the formula (the population a pulse moves at most;
  on resonance the peak is ``A sin^2(pi f_R T)``). Its linewidth (FWHM) has no closed
  form and is found numerically from the fitted ``f_R`` and ``T`` (``0.7988 / T`` for a pi
  pulse).

Figures: ``resonance`` x0 (in x's unit), ``linewidth`` (FWHM, x's unit), ``amplitude`` A
(y's unit; negative for a dip), and for the Rabi lineshape ``rabi_frequency`` (cyclic, x's
unit). Method ``least-squares``, HC3 sandwich covariance (one point per shot, binomial
noise). Refused: fewer than 5 distinct frequencies, a fit no better than a constant, an
amplitude or linewidth within two standard errors of zero, a resonance outside the scan.

:func:`field_from_resonance` turns a resonance into the magnetic field at the atoms with
the apparatus' transition sensitivity (``"2.0 kHz/mG"``): ``B = (x0 - f0) / s``, with
``f0`` the zero-field transition frequency (0 when the scan is already the detuning from
it). Its standard error is that of the resonance divided by ``|s|``.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy.optimize import brentq

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit, scan_points

__all__ = ["LINESHAPES", "field_from_resonance", "fit_lineshape", "lorentzian", "rabi_lineshape", "rabi_linewidth"]

_KIND = "spectroscopy"
_METHOD = "least-squares"
_METHOD_VERSION = "1"
_MIN_SIGNIFICANCE = 2.0
_MIN_FREQUENCIES = 5

LINESHAPES = ("lorentzian", "rabi")


def lorentzian(x: np.ndarray, offset: float, amplitude: float, resonance: float, linewidth: float) -> np.ndarray:
    """``a + A / (1 + (2 (x - x0) / G)^2)``."""
    return offset + amplitude / (1.0 + (2.0 * (x - resonance) / linewidth) ** 2)


def rabi_lineshape(x: np.ndarray, offset: float, amplitude: float, resonance: float, rabi_frequency: float, pulse: float) -> np.ndarray:
    """The square-pulse Rabi formula; ``x``, ``resonance`` and ``rabi_frequency`` cyclic, ``pulse`` in 1/x."""
    omega2 = (2.0 * math.pi * rabi_frequency) ** 2
    delta2 = (2.0 * math.pi * (x - resonance)) ** 2
    generalised = np.sqrt(omega2 + delta2)
    return offset + amplitude * omega2 / (omega2 + delta2) * np.sin(0.5 * generalised * pulse) ** 2


def rabi_linewidth(rabi_frequency: float, pulse: float) -> float:
    """Full width at half maximum of the Rabi lineshape (cyclic, in 1/pulse's unit), numerically.

    The half width is the first detuning from the centre where the lineshape falls to half
    its central value. A pulse area of a multiple of 2 pi leaves no central peak: refused.
    """
    def shape(detuning: float) -> float:
        return float(rabi_lineshape(np.asarray(detuning), 0.0, 1.0, 0.0, rabi_frequency, pulse))

    peak = shape(0.0)
    if not peak > 0:
        raise FitError(_KIND, "the Rabi lineshape has no central peak (the pulse area is a multiple of 2 pi)")
    # Walk out in small steps until below half, then bisect: the first crossing is the edge.
    step = 0.02 / pulse
    inner = 0.0
    for _ in range(2000):
        outer = inner + step
        if shape(outer) < 0.5 * peak:
            edge = brentq(lambda d: shape(d) - 0.5 * peak, inner, outer, xtol=1e-14 / pulse)
            return 2.0 * edge
        inner = outer
    raise FitError(_KIND, "the Rabi lineshape does not fall to half its peak")


def fit_lineshape(
    frequency: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    lineshape: str = "lorentzian",
    pulse: float | None = None,
    frequency_unit: str = "kHz",
    y_unit: str = "",
) -> list[Figure]:
    """Fit a lineshape to one point per shot; ``pulse`` (in 1/``frequency_unit``) for ``"rabi"``.

    Returns ``resonance``, ``linewidth``, ``amplitude`` and, for ``"rabi"``,
    ``rabi_frequency``, each with its standard error.
    """
    if lineshape not in LINESHAPES:
        raise ValueError(f"lineshape must be one of {', '.join(LINESHAPES)}, got {lineshape!r}")
    x, signal = scan_points(frequency, y, kind=_KIND, x_name="frequency", y_name="signal")
    values = np.unique(x)
    if values.size < _MIN_FREQUENCIES:
        raise FitError(_KIND, f"{values.size} distinct frequencies; at least {_MIN_FREQUENCIES} are needed")
    span = float(values[-1] - values[0])
    means = np.array([signal[x == v].mean() for v in values])
    level = float(np.median(means))
    # A peak or a dip: whichever departs further from the typical level.
    top, bottom = float(means.max()) - level, level - float(means.min())
    centre = float(values[np.argmax(means)] if top >= bottom else values[np.argmin(means)])
    height = top if top >= bottom else -bottom
    # Width at half the departure, from the points beyond it; at least two frequency steps.
    beyond = values[np.abs(means - level) >= 0.5 * abs(height)]
    spacing = float(np.min(np.diff(values)))
    width = max(float(beyond.max() - beyond.min()), 2.0 * spacing)

    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    if lineshape == "lorentzian":
        starts = [[level, height, centre, width * factor] for factor in (1.0, 0.5, 2.0)]
        fit = least_squares_fit(
            lorentzian, x, signal, starts[0], names=("offset", "amplitude", "resonance", "linewidth"), kind=_KIND,
            alternatives=starts[1:], typical=[1.0, 1.0, span, span], covariance="sandwich",
        )
        _, amplitude, resonance, linewidth = fit.params
        _, amplitude_err, resonance_err, linewidth_err = fit.stderr
        linewidth = abs(linewidth)
        extra: list[Figure] = []
    else:
        if pulse is None or not (math.isfinite(pulse) and pulse > 0):
            raise FitError(_KIND, "the Rabi lineshape needs the pulse duration (a positive time)")

        def model(v: np.ndarray, offset: float, amplitude: float, resonance: float, rabi_frequency: float) -> np.ndarray:
            return rabi_lineshape(v, offset, amplitude, resonance, rabi_frequency, pulse)

        # Start from a pi pulse and from the Rabi frequency the width suggests.
        pi_pulse = 0.5 / pulse
        guesses = [pi_pulse, 0.4 * width, 0.7 * pi_pulse, 1.4 * pi_pulse]
        starts = []
        for guess in guesses:
            peak = float(np.sin(math.pi * guess * pulse) ** 2)
            starts.append([level, height / max(peak, 0.1), centre, guess])
        fit = least_squares_fit(
            model, x, signal, starts[0], names=("offset", "amplitude", "resonance", "rabi_frequency"), kind=_KIND,
            alternatives=starts[1:], typical=[1.0, 1.0, span, 1.0 / pulse], covariance="sandwich",
        )
        _, amplitude, resonance, rabi_frequency = fit.params
        _, amplitude_err, resonance_err, rabi_err = fit.stderr
        rabi_frequency = abs(rabi_frequency)
        linewidth = rabi_linewidth(rabi_frequency, pulse)
        step = 1e-4 * rabi_frequency
        slope = (rabi_linewidth(rabi_frequency + step, pulse) - rabi_linewidth(rabi_frequency - step, pulse)) / (2 * step)
        linewidth_err = abs(slope) * rabi_err
        _require(rabi_frequency, rabi_err, "Rabi frequency")
        extra = [Figure("rabi_frequency", rabi_frequency, frequency_unit, stderr=rabi_err, **common)]
    _require(abs(amplitude), amplitude_err, "amplitude")
    _require(linewidth, linewidth_err, "linewidth")
    if not values[0] <= resonance <= values[-1]:
        raise FitError(_KIND, f"the fitted resonance {resonance:.6g} {frequency_unit} lies outside the scan {values[0]:.6g}..{values[-1]:.6g}")
    return [
        Figure("resonance", resonance, frequency_unit, stderr=resonance_err, **common),
        Figure("linewidth", linewidth, frequency_unit, stderr=linewidth_err, **common),
        Figure("amplitude", amplitude, y_unit, stderr=amplitude_err, **common),
        *extra,
    ]


def field_from_resonance(resonance: Figure, sensitivity: str, zero_field_frequency: str | None = None, *, method: str = "resonance/sensitivity") -> Figure:
    """The magnetic field ``(x0 - f0) / s`` from a ``resonance`` figure, in ``s``'s field unit.

    ``sensitivity`` is a quantity text such as ``"2.0 kHz/mG"`` (frequency per field; the
    field comes out in the unit after the last ``/``, here mG); ``zero_field_frequency`` one
    such as ``"6834.682610904 MHz"``, or ``None`` when the resonance is already the detuning
    from the zero-field transition. Raises ``ValueError`` for a text that is not such a
    quantity.
    """
    from runlog.units import parse_unit, quantity, registry

    ureg = registry()
    # runlog's gauss is the flux density unit, 1 G = 1e-4 T (NIST SP 811; runlog.units).
    field_text = sensitivity.rsplit("/", 1)[-1].strip() if "/" in sensitivity else ""
    try:
        slope = quantity(sensitivity)
        field_unit = parse_unit(field_text)
        if not (_is_field(ureg, field_unit) and _is_field(ureg, ureg.Quantity(1.0, "Hz") / slope)):
            raise ValueError
    except Exception:
        raise ValueError(f"field_sensitivity '{sensitivity}' is not a frequency per magnetic field such as '2.0 kHz/mG'") from None
    if slope.magnitude == 0:
        raise ValueError("field_sensitivity is zero")
    x0 = ureg.Quantity(resonance.value, parse_unit(resonance.unit or "Hz"))
    if zero_field_frequency is not None:
        try:
            x0 = x0 - quantity(zero_field_frequency).to(x0.units)
        except Exception:
            raise ValueError(f"zero_field_frequency '{zero_field_frequency}' is not a frequency") from None
    try:
        field = float((x0 / slope).to(field_unit).magnitude)
        error = None if resonance.stderr is None else abs(float((ureg.Quantity(resonance.stderr, parse_unit(resonance.unit or "Hz")) / slope).to(field_unit).magnitude))
    except Exception:
        raise ValueError(f"the resonance in '{resonance.unit}' divided by '{sensitivity}' is not a magnetic field") from None
    return Figure("field", field, field_text, stderr=error, method=method, method_version=_METHOD_VERSION)


def _is_field(ureg, quantity) -> bool:
    quantity = quantity if isinstance(quantity, ureg.Quantity) else ureg.Quantity(1.0, quantity)
    for unit in ("G", "T"):
        try:
            quantity.to(unit)
            return True
        except Exception:
            continue
    return False


def _require(value: float, error: float, what: str) -> None:
    if value < _MIN_SIGNIFICANCE * error:
        raise FitError(_KIND, f"{what} not resolved: {value:.3g} ± {error:.2g} is within {_MIN_SIGNIFICANCE:g} standard errors of zero")
