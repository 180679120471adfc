"""Figures of a rearrangement (sorting) run: how often and how well the target pattern was filled.

This module owns the figures of runs in which atoms are moved into a target pattern of
sites. Input is ``occupancy``, a boolean array of shape ``(shots, sites)`` taken after
sorting, and ``target``, the target sites as an array of site indices or as a boolean
mask of length ``sites``.

* ``defect_free_probability`` = shots whose target sites are all occupied / shots;
* ``target_fill_fraction`` = occupied target-site observations / (shots x target sites).

The defect-free probability counts one try per shot and carries the binomial stderr
``sqrt(p(1 - p)/n)`` and a 95 % interval, Wilson's score interval by default (Wilson 1927;
see :mod:`runlog.figures.intervals`), which is sound for independent shots. Defects
within one shot are correlated (a short reservoir of atoms leaves several holes at once),
so the target fill fraction carries the shot-level interval of
:mod:`runlog.figures.shot_level` (each shot a cluster of target sites), with the pooled
binomial one beside it as ``binomial_ci_low``/``binomial_ci_high``.
"""

from __future__ import annotations

import numpy as np

from runlog.figures.base import Figure
from runlog.figures.counting import _as_occupancy, _interval_method, counted_figure, proportion_figure
from runlog.figures.shot_level import ShotSums

__all__ = ["defect_free_probability", "sorting_figures", "target_fill_fraction"]


def _target_columns(target: object, sites: int) -> np.ndarray:
    """The target as sorted, distinct site indices, checked against the number of sites."""
    chosen = np.asarray(target)
    if chosen.dtype == np.bool_:
        if chosen.shape != (sites,):
            raise ValueError(
                f"target mask must have one entry per site ({sites}), got shape {chosen.shape}"
            )
        columns = np.flatnonzero(chosen)
    elif np.issubdtype(chosen.dtype, np.integer):
        if chosen.ndim != 1:
            raise ValueError(
                f"target site indices must be one-dimensional, got shape {chosen.shape}"
            )
        outside = (chosen < 0) | (chosen >= sites)
        if outside.any():
            first = int(np.flatnonzero(outside)[0])
            raise ValueError(
                f"target site index {int(chosen[first])} at position {first} "
                f"is outside 0..{sites - 1}"
            )
        columns = np.unique(chosen)
        # A repeated index would count one site twice in the fill fraction.
        if columns.size != chosen.size:
            raise ValueError("target site indices contain duplicates")
    else:
        raise ValueError(
            f"target must be site indices (integers) or a boolean mask, got dtype {chosen.dtype}"
        )
    if columns.size == 0:
        raise ValueError("target contains no sites")
    return columns


def _target_occupancy(occupancy: np.ndarray, target: object) -> np.ndarray:
    sorted_occupancy = _as_occupancy(occupancy, "sorted")
    return sorted_occupancy[:, _target_columns(target, sorted_occupancy.shape[1])]


def _defect_free(on_target: np.ndarray, method: str) -> Figure:
    successes = int(np.count_nonzero(on_target.all(axis=1)))
    return proportion_figure("defect_free_probability", successes, on_target.shape[0], method)


def _target_fill(on_target: np.ndarray, method: str) -> Figure:
    sums = ShotSums.of(np.count_nonzero(on_target, axis=1), np.full(on_target.shape[0], on_target.shape[1]))
    return counted_figure("target_fill_fraction", sums, method)


def defect_free_probability(
    occupancy: np.ndarray, target: np.ndarray, method: str = "wilson"
) -> Figure:
    """Figure ``defect_free_probability``: share of shots with every target site occupied."""
    _interval_method(method)
    return _defect_free(_target_occupancy(occupancy, target), method)


def target_fill_fraction(
    occupancy: np.ndarray, target: np.ndarray, method: str = "wilson"
) -> Figure:
    """Figure ``target_fill_fraction``: occupied share of all target-site observations."""
    _interval_method(method)
    return _target_fill(_target_occupancy(occupancy, target), method)


def sorting_figures(
    occupancy: np.ndarray, target: np.ndarray, method: str = "wilson"
) -> list[Figure]:
    """``[defect_free_probability, target_fill_fraction]`` of a sorting run."""
    _interval_method(method)
    on_target = _target_occupancy(occupancy, target)
    return [_defect_free(on_target, method), _target_fill(on_target, method)]
