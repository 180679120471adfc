"""Fringe contrast, phase and offset of a run that scans an interferometer phase.

This module owns the fringe figures. Every shot of the run contributes one point: the
scanned phase ``x`` of that shot and its signal ``y`` (typically the bright fraction of
the atoms in the shot). The model is::

    y = a * (1 + C * cos(x + phi))

fitted by least squares to all shots, not to means per phase, so that the scatter of the
shots themselves sets the uncertainty. The standard errors come from the sandwich
(heteroscedasticity-consistent) covariance of :mod:`runlog.figures.fitting`: the shot noise
of a bright fraction, ``p (1 - p) / N``, is smaller at the top and bottom of the fringe
than on its slopes, and a single residual variance would overstate the contrast's
uncertainty and understate the phase's.

Starting values come from the linear least-squares fit of ``y = A + B cos x + D sin x``,
which is the same model written linearly (``A = a``, ``B = a C cos phi``,
``D = -a C sin phi``); its solution is the least-squares optimum, so the nonlinear fit
only confirms it and supplies the covariance in the parameters we report.

Sign convention: the contrast is reported ``C >= 0`` (a negative ``C`` is the same curve
with the phase moved by half a turn), and the phase is wrapped to (-pi, pi] rad or
(-180, 180] deg.

A fringe figure is refused (``FitError``) when the scan cannot separate contrast from
phase and offset: fewer than 4 distinct phases, distinct phases covering less than a
quarter turn, a mean signal that is not positive, a fringe the fit engine finds no better
than a constant, or a contrast below twice its own standard error (no fringe resolved).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import flag_out_of_range, is_fraction, least_squares_fit, scan_points, with_t_intervals

__all__ = ["fit_fringe"]

_KIND = "fringe"
_METHOD = "least-squares"
_METHOD_VERSION = "1"
_MIN_DISTINCT_PHASES = 4
_MIN_COVERAGE_RAD = math.pi / 2  # a quarter turn
_MIN_SIGNIFICANCE = 2.0  # contrast must exceed this many standard errors


def _fringe(x: np.ndarray, a: float, contrast: float, phi: float) -> np.ndarray:
    return a * (1.0 + contrast * np.cos(x + phi))


def fit_fringe(
    phase: np.ndarray | Sequence[float],
    y: np.ndarray | Sequence[float],
    *,
    phase_unit: str = "rad",
    y_unit: str = "",
) -> list[Figure]:
    """Fit ``y = a (1 + C cos(phase + phi))`` to every shot of a phase scan.

    ``phase`` and ``y`` hold one value per shot; ``phase_unit`` is ``"rad"`` or ``"deg"``
    and sets the unit of the reported phase; ``y_unit`` is the pint unit of the signal
    (``""`` for a fraction). Returns the figures ``contrast`` (dimensionless), ``phase``
    (in ``phase_unit``) and ``offset`` (``a``, in ``y_unit``), each with its standard error.

    Raises :class:`FitError` for a scan that cannot determine the fringe.
    """
    if phase_unit not in ("rad", "deg"):
        raise ValueError(f"phase_unit must be 'rad' or 'deg', got {phase_unit!r}")
    x, signal = scan_points(phase, y, kind=_KIND, x_name="phase", y_name="signal")
    radians = np.deg2rad(x) if phase_unit == "deg" else x

    _check_phase_coverage(radians, phase_unit)

    design = np.column_stack([np.ones_like(radians), np.cos(radians), np.sin(radians)])
    (a0, b0, d0), *_ = np.linalg.lstsq(design, signal, rcond=None)
    if not a0 > 0:
        raise FitError(_KIND, f"the mean signal is not positive ({a0:.4g}); contrast is undefined")
    contrast0 = math.hypot(b0, d0) / a0
    phi0 = math.atan2(-d0, b0)

    # The start is the optimum already (see the module docstring), so perturbed restarts
    # would only cost time; the typical size of a phase is one radian.
    fit = least_squares_fit(
        _fringe,
        radians,
        signal,
        [a0, contrast0, phi0],
        names=("offset", "contrast", "phase"),
        kind=_KIND,
        restarts=0,
        typical=[abs(a0), 1.0, 1.0],
        covariance="sandwich",
    )
    offset, contrast, phi = fit.params
    offset_err, contrast_err, phi_err = fit.stderr
    if contrast < 0:
        contrast, phi = -contrast, phi + math.pi
    if contrast < _MIN_SIGNIFICANCE * contrast_err:
        raise FitError(
            _KIND,
            f"contrast not resolved: {contrast:.3g} ± {contrast_err:.2g} is within "
            f"{_MIN_SIGNIFICANCE:g} standard errors of zero",
        )
    phi = _wrap(phi)
    if phase_unit == "deg":
        phi, phi_err = math.degrees(phi), math.degrees(phi_err)

    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    return flag_out_of_range(with_t_intervals([
        Figure("contrast", contrast, "", stderr=contrast_err, **common),
        Figure("fringe_phase", phi, phase_unit, stderr=phi_err, **common),
        Figure("offset", offset, y_unit, stderr=offset_err, **common),
    ], fit.dof), ("contrast",), is_fraction(signal))


def _check_phase_coverage(radians: np.ndarray, phase_unit: str) -> None:
    distinct = np.unique(np.round(np.mod(radians, 2 * math.pi), 12))
    if distinct.size < _MIN_DISTINCT_PHASES:
        raise FitError(
            _KIND,
            f"{distinct.size} distinct phases; at least {_MIN_DISTINCT_PHASES} are needed "
            "to separate contrast, phase and offset",
        )
    # The covered arc is the full turn minus the largest gap between neighbouring phases
    # on the circle, so a scan from 350 deg to 10 deg counts as 20 deg, not 340 deg.
    gaps = np.diff(np.concatenate([distinct, distinct[:1] + 2 * math.pi]))
    covered = 2 * math.pi - float(gaps.max())
    if covered < _MIN_COVERAGE_RAD:
        shown = f"{math.degrees(covered):.3g} deg" if phase_unit == "deg" else f"{covered:.3g} rad"
        raise FitError(
            _KIND,
            f"phase range too small: the distinct phases cover {shown}, less than a quarter turn",
        )


def _wrap(phi: float) -> float:
    """``phi`` wrapped into (-pi, pi]."""
    wrapped = math.remainder(phi, 2 * math.pi)  # in [-pi, pi]
    return math.pi if wrapped == -math.pi else wrapped
