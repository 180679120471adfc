"""How fast a quantum walk spreads: the width of the atom distribution against step number.

This module owns the spreading figures. For one step number, :func:`walk_spread` turns
the site occupancy of every shot into the root-mean-square displacement of the atoms from
their start site (each shot's start from a start image, or one known start site), leaving
out shots in which an atom reached the edge of the lattice: there the walk was cut off or
reflected, and its width no longer that of the free walk. (:func:`position_spread`, the
standard deviation of absolute positions, stays for a walk whose start is unknown.) Over
a run that scans the step number ``n``, :func:`fit_spreading` fits::

    sigma^2 = A^2 n^(2 alpha) + c

The exponent tells the kind of transport: ``alpha ≈ 1`` is ballistic spreading (a
coherent quantum walk, whose width grows linearly with the number of steps),
``alpha ≈ 0.5`` is diffusive spreading (a classical random walk, or a quantum walk whose
coherence is lost), and ``alpha ≈ 0`` is no spreading (localisation).

The offset ``c`` is the finite-time correction of a coherent walk: the variance of a
discrete-time coherent walk is ``v^2 n^2`` plus a term that stays bounded as ``n`` grows
(for the Hadamard walk ``v^2 = 1 - 1/sqrt(2)``, Nayak A. & Vishwanath A. 2000,
quant-ph/0010117 [memory]). A bare power law ``A n^alpha`` absorbs that term into the
exponent and reads exact coherent-walk data over steps 1-20 as ``alpha = 0.968 ± 0.012``,
"sub-ballistic" with no noise at all; with the offset the same data give
``1.007 ± 0.004``. For a classical walk ``sigma^2 = n`` exactly and ``c`` is 0.

The fit starts from a straight line through ``ln sigma`` against ``ln n`` and then fits the
model to ``sigma`` itself by least squares, so that the widths, not their logarithms,
carry the equal weights. Steps ``n <= 0`` are left out: the power law is pinned to zero
there and its logarithm is undefined. With only three distinct steps the offset cannot be
told apart and the bare power law is fitted.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure
from runlog.figures.fitting import least_squares_fit

__all__ = ["fit_spreading", "position_spread", "walk_spread"]

_KIND = "spreading"
_METHOD = "least-squares"
_METHOD_VERSION = "2"


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


def walk_spread(occupancy: np.ndarray, start: np.ndarray | float) -> tuple[float, int]:
    """Root-mean-square displacement of the atoms from their start site, in sites, and the
    number of shots it used.

    ``occupancy`` is ``[shots, sites]`` (one line of sites) after the walk; ``start`` the
    start site of each shot (an array, NaN where a shot's start is unknown) or one site for
    all. Shots with an atom on the first or last site of the line are left out (the walk
    reached the edge), as are shots without an atom or a start. Raises :class:`FitError`
    when no shot is left.
    """
    occupied = np.asarray(occupancy)
    if occupied.dtype != np.bool_ or occupied.ndim != 2:
        raise ValueError("occupancy must be a boolean array of shape [shots, sites]")
    shots, sites = occupied.shape
    origin = np.broadcast_to(np.asarray(start, dtype=float), (shots,))
    edge = occupied[:, 0] | occupied[:, -1]
    atoms = occupied.sum(axis=1)
    keep = ~edge & (atoms > 0) & np.isfinite(origin)
    if not keep.any():
        raise FitError(_KIND, "no shot with atoms, a start site and no atom at the lattice edge")
    positions = np.arange(sites, dtype=float)
    squares = occupied[keep] @ positions**2 - 2 * origin[keep] * (occupied[keep] @ positions) + atoms[keep] * origin[keep] ** 2
    return math.sqrt(float(squares.sum()) / float(atoms[keep].sum())), int(keep.sum())


def start_sites(occupancy: np.ndarray) -> np.ndarray:
    """Each shot's start site from a start image: the one occupied site, NaN for a shot with
    none or several (its atoms cannot be told apart)."""
    occupied = np.asarray(occupancy, dtype=bool)
    single = occupied.sum(axis=1) == 1
    out = np.full(occupied.shape[0], np.nan)
    out[single] = np.argmax(occupied[single], axis=1)
    return out


def _power_law(steps: np.ndarray, prefactor: float, exponent: float) -> np.ndarray:
    return prefactor * steps**exponent


def _with_offset(steps: np.ndarray, prefactor: float, exponent: float, offset: float) -> np.ndarray:
    return np.sqrt(np.maximum(prefactor * prefactor * steps ** (2 * exponent) + offset, 0.0))


def fit_spreading(
    steps: np.ndarray | Sequence[float],
    sigma: np.ndarray | Sequence[float],
    *,
    sigma_unit: str = "",
) -> list[Figure]:
    """Fit ``sigma^2 = A^2 n^(2 alpha) + c`` (module docstring) to spreads against step number.

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

    if np.unique(n).size >= 4:
        fit = least_squares_fit(
            _with_offset,
            n,
            width,
            start + [0.0],
            names=("spreading_prefactor", "spreading_exponent", "spreading_offset"),
            kind=_KIND,
            typical=[abs(start[0]), 1.0, max(float(np.min(width)) ** 2, 1e-12)],
        )
    else:
        fit = least_squares_fit(
            _power_law,
            n,
            width,
            start,
            names=("spreading_prefactor", "spreading_exponent"),
            kind=_KIND,
            typical=[abs(start[0]), 1.0],
        )
    prefactor, exponent = fit.params[:2]
    prefactor_err, exponent_err = fit.stderr[:2]
    common = {"method": _METHOD, "method_version": _METHOD_VERSION}
    return [
        Figure("spreading_exponent", exponent, "", stderr=exponent_err, **common),
        Figure("spreading_prefactor", prefactor, sigma_unit, stderr=prefactor_err, **common),
    ]
