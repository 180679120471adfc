"""How fast a quantum walk spreads: the width of the atom distribution against step number.

This module owns the spreading figures. For one step number, :func:`position_spread`
turns the site occupancy of every shot into the standard deviation of atom position (all
atoms of all shots pooled, each atom weighted equally). Over a run that scans the step
number ``n``, :func:`fit_spreading` fits::

    sigma = A * n ** alpha

The exponent tells the kind of transport: ``alpha ≈ 1`` is ballistic spreading (a
coherent quantum walk, whose width grows linearly with the number of steps),
``alpha ≈ 0.5`` is diffusive spreading (a classical random walk, or a quantum walk whose
coherence is lost), and ``alpha ≈ 0`` is no spreading (localisation).

The fit starts from a straight line through ``ln sigma`` against ``ln n`` and then fits the
power law to ``sigma`` itself by least squares, so that the widths, not their logarithms,
carry the equal weights. Steps ``n <= 0`` are left out: the power law is pinned to zero
there and its logarithm is undefined.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit

__all__ = ["fit_spreading", "position_spread"]

_KIND = "spreading"
_METHOD = "least-squares"
_METHOD_VERSION = "1"


def position_spread(
    occupancy: np.ndarray,
    site_positions: np.ndarray | Sequence[float] | None = None,
) -> float:
    """Occupancy-weighted standard deviation of atom position.

    ``occupancy`` is a boolean array ``[shots, sites]``; ``site_positions`` gives the
    position of each site (default: the site index ``0, 1, 2, ...``, so the spread is in
    lattice sites). Every atom found counts once; the standard deviation is that of the
    pooled positions (divided by the atom number, not by one less: the width of the
    distribution, as the walk's theory defines it).

    Raises :class:`FitError` when no site is occupied in any shot.
    """
    occupied = np.asarray(occupancy)
    if occupied.dtype != np.bool_:
        raise ValueError(f"occupancy must be a boolean array, got dtype {occupied.dtype}")
    if occupied.ndim != 2:
        raise ValueError(f"occupancy must have shape [shots, sites], got {occupied.shape}")
    sites = occupied.shape[1]
    if site_positions is None:
        positions = np.arange(sites, dtype=float)
    else:
        positions = np.asarray(site_positions, dtype=float).ravel()
        if positions.size != sites:
            raise ValueError(f"{positions.size} site positions for {sites} sites")
        if not np.all(np.isfinite(positions)):
            raise ValueError("site positions must be finite")
    atoms_per_site = occupied.sum(axis=0).astype(float)
    atoms = float(atoms_per_site.sum())
    if atoms == 0:
        raise FitError(_KIND, "no atom in any shot: the position spread is undefined")
    mean = float(atoms_per_site @ positions) / atoms
    variance = float(atoms_per_site @ (positions - mean) ** 2) / atoms
    return math.sqrt(variance)


def _power_law(steps: np.ndarray, prefactor: float, exponent: float) -> np.ndarray:
    return prefactor * steps**exponent


def fit_spreading(
    steps: np.ndarray | Sequence[float],
    sigma: np.ndarray | Sequence[float],
    *,
    sigma_unit: str = "",
) -> list[Figure]:
    """Fit ``sigma = A * n ** alpha`` to position spreads against step number.

    Returns ``spreading_exponent`` (``alpha``, dimensionless) and ``spreading_prefactor``
    (``A``, the spread after one step, in ``sigma_unit``; ``""`` for lattice sites), each
    with its standard error. Raises :class:`FitError` when they cannot be determined.
    """
    n = np.asarray(steps, dtype=float).ravel()
    width = np.asarray(sigma, dtype=float).ravel()
    if n.shape != width.shape:
        raise ValueError(f"steps and sigma differ in length ({n.size} and {width.size})")
    if not (np.all(np.isfinite(n)) and np.all(np.isfinite(width))):
        raise FitError(_KIND, "steps or spreads contain non-finite values")
    keep = n > 0
    n, width = n[keep], width[keep]
    if np.unique(n).size < 3:
        distinct = np.unique(n).size
        raise FitError(
            _KIND, f"{distinct} distinct step numbers above zero; at least 3 are needed"
        )

    positive = width > 0
    if np.unique(n[positive]).size >= 2:
        exponent0, log_prefactor0 = np.polyfit(np.log(n[positive]), np.log(width[positive]), 1)
        start = [math.exp(log_prefactor0), float(exponent0)]
    else:
        raise FitError(_KIND, "fewer than 2 step numbers with a spread above zero")

    fit = least_squares_fit(
        _power_law,
        n,
        width,
        start,
        names=("spreading_prefactor", "spreading_exponent"),
        kind=_KIND,
        typical=[abs(start[0]), 1.0],
    )
    prefactor, exponent = fit.params
    prefactor_err, exponent_err = fit.stderr
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    return [
        Figure("spreading_exponent", exponent, "", stderr=exponent_err, **common),
        Figure("spreading_prefactor", prefactor, sigma_unit, stderr=prefactor_err, **common),
    ]
