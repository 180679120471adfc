"""Two-atom interference: the visibility of the coincidence dip (or peak) after a beam splitter.

This module owns the ``visibility`` figure. Two atoms, one in each of two sites, meet a
beam-splitter step (tunnelling for a quarter period, a 50/50 coupler); afterwards the two
atoms are found on different sites (a *coincidence*) or on the same site. For
distinguishable particles at a balanced splitter the coincidence probability is 1/2 whatever
the delay; indistinguishable bosons bunch and never leave by different outputs (the
Hong-Ou-Mandel dip: Hong C.K., Ou Z.Y. & Mandel L. 1987, Phys. Rev. Lett. 59:2044;
for atoms, Kaufman A.M. et al. 2014, Science 345:306 [memory]), fermions antibunch (a peak).
The overlap of the two wave packets is scanned (a delay, a detuning, a spin rotation); the
coincidence probability against it is fitted with a Gaussian dip::

    P_c(x) = B (1 - V exp(-(x - x0)^2 / (2 s^2)))

``B`` is the coincidence probability where the atoms are distinguishable (far from the
overlap), to compare with the distinguishable-particle expectation 1/2 (figure
``coincidence_baseline``); ``V`` the visibility (figure ``visibility``: positive for a dip,
negative for a peak), ``x0`` and ``s`` the centre and width of the overlap. HC3 sandwich
covariance over one point per shot (its coincidence fraction over the loaded pairs).

A run with a single setting (no scan) gives the visibility against the expectation itself,
``V = 1 - P_c / (1/2)``, with the Wilson interval of ``P_c`` mapped through it.

The coincidences come from the occupancy: the image's sites in adjacent pairs (0, 1),
(2, 3), ...; a pair counts when both sites were loaded in the first image, and is a
coincidence when both are occupied in the last image (a parity image shows a doubly
occupied site as empty: same-site outcomes look like loss, which is why only both-occupied
is taken as a coincidence).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit, scan_points
from runlog.figures.intervals import INTERVAL_METHODS

__all__ = ["DISTINGUISHABLE", "coincidences", "dip_model", "fit_visibility", "visibility_at_one_setting"]

_KIND = "two_atom"
_METHOD_VERSION = "1"
_MIN_SIGNIFICANCE = 2.0
#: Coincidence probability of two distinguishable particles at a balanced beam splitter.
DISTINGUISHABLE = 0.5


def dip_model(x: np.ndarray, baseline: float, visibility: float, centre: float, width: float) -> np.ndarray:
    """``B (1 - V exp(-(x - x0)^2 / (2 s^2)))``."""
    return baseline * (1.0 - visibility * np.exp(-((x - centre) ** 2) / (2.0 * width**2)))


def coincidences(loaded: np.ndarray, final: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per shot: ``(coincident pairs, loaded pairs)`` from (shots, sites) occupancies."""
    if loaded.shape != final.shape:
        raise ValueError("the loading and final images differ in shape")
    if loaded.shape[1] % 2:
        raise FitError(_KIND, f"the image has {loaded.shape[1]} sites; two-atom pairs need an even number (sites 0-1, 2-3, ...)")
    both_loaded = loaded[:, 0::2] & loaded[:, 1::2]
    both_found = final[:, 0::2] & final[:, 1::2]
    return np.count_nonzero(both_loaded & both_found, axis=1), np.count_nonzero(both_loaded, axis=1)


def visibility_at_one_setting(coincident: int, pairs: int, *, interval: str = "wilson") -> list[Figure]:
    """``V = 1 - P_c / (1/2)`` at one setting, with the interval of ``P_c`` mapped through it."""
    if pairs == 0:
        raise FitError(_KIND, "no shot loaded both sites of a pair")
    p = coincident / pairs
    low, high = INTERVAL_METHODS[interval](coincident, pairs)
    error = math.sqrt(p * (1 - p) / pairs) / DISTINGUISHABLE
    return [Figure("visibility", 1.0 - p / DISTINGUISHABLE, "", stderr=error, ci_low=1.0 - high / DISTINGUISHABLE, ci_high=1.0 - low / DISTINGUISHABLE, method=f"distinguishable-reference/{interval}", method_version=_METHOD_VERSION)]


def fit_visibility(x: np.ndarray | Sequence[float], coincidence: np.ndarray | Sequence[float], *, x_unit: str = "") -> list[Figure]:
    """Fit the Gaussian dip (or peak) to one coincidence fraction per shot.

    Returns ``visibility``, ``coincidence_baseline``, ``overlap_centre`` and
    ``overlap_width`` (x's unit), each with its standard error.
    """
    xs, ys = scan_points(x, coincidence, kind=_KIND, x_name="x", y_name="coincidence")
    values = np.unique(xs)
    if values.size < 5:
        raise FitError(_KIND, f"{values.size} distinct settings; at least 5 are needed for 4 parameters")
    means = np.array([ys[xs == v].mean() for v in values])
    outer = np.concatenate([means[:2], means[-2:]])
    baseline = float(outer.mean())
    span = float(values[-1] - values[0])
    dip = baseline - means.min() >= means.max() - baseline
    centre = float(values[np.argmin(means)] if dip else values[np.argmax(means)])
    extreme = float(means.min() if dip else means.max())
    start = [baseline, 1.0 - extreme / baseline if baseline > 0 else 0.5, centre, span / 6.0]
    alternatives = [[baseline, start[1], centre, span * f] for f in (0.03, 0.1, 0.3)]
    fit = least_squares_fit(
        dip_model, xs, ys, start, names=("baseline", "visibility", "centre", "width"), kind=_KIND,
        alternatives=alternatives, typical=[1.0, 1.0, span, span], covariance="sandwich",
    )
    baseline, visibility, centre, width = fit.params
    b_err, v_err, c_err, w_err = fit.stderr
    if abs(visibility) < _MIN_SIGNIFICANCE * v_err:
        raise FitError(_KIND, f"visibility not resolved: {visibility:.3g} ± {v_err:.2g} is within {_MIN_SIGNIFICANCE:g} standard errors of zero")
    if not values[0] <= centre <= values[-1]:
        raise FitError(_KIND, f"the fitted overlap centre {centre:.4g} lies outside the scan")
    method = "least-squares/" + ("dip" if visibility > 0 else "peak")
    common = {"method": method, "method_version": _METHOD_VERSION}
    return [
        Figure("visibility", visibility, "", stderr=v_err, **common),
        Figure("coincidence_baseline", baseline, "", stderr=b_err, **common),
        Figure("overlap_centre", centre, x_unit, stderr=c_err, **common),
        Figure("overlap_width", abs(width), x_unit, stderr=w_err, **common),
    ]
