"""Counted figures from site occupancy: fill fraction, survival, loss and their comparison.

This module owns the figures that count atoms. Input is occupancy as boolean arrays of
shape ``(shots, sites)``: ``loading`` from the first image of each shot and, for survival,
``survival`` from the second image of the same shots.

* fill fraction = occupied site observations / all site observations, over all shots;
* survival = sites occupied in both images / sites occupied in the loading image;
* loss = 1 - survival, with the mirrored interval ``(1 - high, 1 - low)``.

A site that is empty in the loading image but occupied in the second image (a false
detection or an atom arriving from elsewhere) does not count towards survival: survival
is conditional on the site having been loaded.

Each figure carries the binomial standard error ``sqrt(p(1 - p)/n)`` and a confidence
interval (95 %) from :mod:`runlog.figures.intervals`; ``method`` names that interval.
Pooling every site observation treats them as independent tries; shot-to-shot
fluctuations of the loading (laser power, trap depth) correlate sites within a shot, so
the interval is then narrower than the true spread between shots.

The ``counts_*`` functions return the raw ``(successes, trials)`` so the store can pool
runs or days and recompute an interval from the summed counts.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from runlog.errors import FitError, NotFoundError
from runlog.figures.base import Figure
from runlog.figures.intervals import INTERVAL_METHODS, newcombe_difference

__all__ = [
    "compare_proportions",
    "counts_fill",
    "counts_survival",
    "fill_fraction",
    "per_site_fill",
    "per_site_fill_counts",
    "per_site_survival",
    "per_site_survival_counts",
    "proportion_figure",
    "survival",
]


def _as_occupancy(array: object, label: str) -> np.ndarray:
    occupancy = np.asarray(array)
    if occupancy.dtype != np.bool_:
        # A 0/1 integer or float array may be a thresholded count or a mix-up of columns;
        # make the caller say which values mean "occupied".
        raise ValueError(f"{label} occupancy must be a boolean array, got dtype {occupancy.dtype}")
    if occupancy.ndim != 2:
        raise ValueError(
            f"{label} occupancy must have shape (shots, sites), got {occupancy.ndim} dimension(s)"
        )
    if occupancy.shape[0] == 0 or occupancy.shape[1] == 0:
        raise ValueError(f"{label} occupancy has no observations (shape {occupancy.shape})")
    return occupancy


def _as_pair(loading: object, survival: object) -> tuple[np.ndarray, np.ndarray]:
    first = _as_occupancy(loading, "loading")
    second = _as_occupancy(survival, "survival")
    if first.shape != second.shape:
        raise ValueError(
            f"loading and survival occupancy differ in shape: {first.shape} vs {second.shape}"
        )
    return first, second


def _interval_method(method: str) -> Callable[[int, int, float], tuple[float, float]]:
    try:
        return INTERVAL_METHODS[method]
    except KeyError:
        raise NotFoundError(
            "interval method", method, "choose from " + ", ".join(sorted(INTERVAL_METHODS))
        ) from None


def proportion_figure(name: str, successes: int, trials: int, method: str = "wilson") -> Figure:
    """A figure ``successes / trials`` with binomial stderr and the ``method`` interval (95 %)."""
    interval = _interval_method(method)
    if trials == 0:
        raise FitError("counting", f"no trials for {name}: the proportion is undefined")
    low, high = interval(successes, trials, 0.95)
    p = successes / trials
    return Figure(
        name=name,
        value=p,
        stderr=math.sqrt(p * (1.0 - p) / trials),
        ci_low=low,
        ci_high=high,
        method=method,
    )


def counts_fill(loading: np.ndarray) -> tuple[int, int]:
    """``(occupied site observations, all site observations)`` over all shots."""
    occupancy = _as_occupancy(loading, "loading")
    return int(np.count_nonzero(occupancy)), int(occupancy.size)


def counts_survival(loading: np.ndarray, survival: np.ndarray) -> tuple[int, int]:
    """``(sites occupied in both images, sites occupied in the loading image)`` over all shots."""
    first, second = _as_pair(loading, survival)
    return int(np.count_nonzero(first & second)), int(np.count_nonzero(first))


def per_site_fill_counts(loading: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per site: ``(shots with the site occupied, shots)`` as integer arrays of length ``sites``."""
    occupancy = _as_occupancy(loading, "loading")
    successes = np.count_nonzero(occupancy, axis=0).astype(np.int64)
    trials = np.full(occupancy.shape[1], occupancy.shape[0], dtype=np.int64)
    return successes, trials


def per_site_survival_counts(
    loading: np.ndarray, survival: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Per site: ``(shots occupied in both images, shots occupied in the loading image)``."""
    first, second = _as_pair(loading, survival)
    successes = np.count_nonzero(first & second, axis=0).astype(np.int64)
    trials = np.count_nonzero(first, axis=0).astype(np.int64)
    return successes, trials


def per_site_fill(loading: np.ndarray) -> np.ndarray:
    """Fill fraction of each site over the shots, length ``sites``."""
    successes, trials = per_site_fill_counts(loading)
    return successes / trials


def per_site_survival(loading: np.ndarray, survival: np.ndarray) -> np.ndarray:
    """Survival of each site over the shots in which it was loaded; NaN for a never-loaded site."""
    successes, trials = per_site_survival_counts(loading, survival)
    out = np.full(successes.shape, np.nan)
    loaded = trials > 0
    out[loaded] = successes[loaded] / trials[loaded]
    return out


def fill_fraction(loading: np.ndarray, method: str = "wilson") -> Figure:
    """Figure ``fill_fraction``: occupied sites / sites over all shots, ``method`` interval."""
    _interval_method(method)  # fail on a bad method name before counting a large array
    successes, trials = counts_fill(loading)
    return proportion_figure("fill_fraction", successes, trials, method)


def survival(loading: np.ndarray, survival: np.ndarray, method: str = "wilson") -> list[Figure]:
    """Figures ``survival`` and ``loss`` (= 1 - survival, mirrored interval) of the loaded sites.

    Raises :class:`FitError` when no site was loaded in any shot: survival is then undefined.
    """
    _interval_method(method)
    successes, trials = counts_survival(loading, survival)
    if trials == 0:
        raise FitError("counting", "no loaded sites in any shot: survival is undefined")
    kept = proportion_figure("survival", successes, trials, method)
    lost = Figure(
        name="loss",
        value=1.0 - kept.value,
        stderr=kept.stderr,
        ci_low=1.0 - kept.ci_high,
        ci_high=1.0 - kept.ci_low,
        method=method,
    )
    return [kept, lost]


def compare_proportions(x1: int, n1: int, x2: int, n2: int) -> Figure:
    """Figure ``difference`` = x1/n1 - x2/n2 with Newcombe's hybrid score interval (95 %).

    The stderr is the binomial one, ``sqrt(p1 q1 / n1 + p2 q2 / n2)``; the interval does not
    use it.
    """
    low, high = newcombe_difference(x1, n1, x2, n2, 0.95)
    p1, p2 = x1 / n1, x2 / n2
    return Figure(
        name="difference",
        value=p1 - p2,
        stderr=math.sqrt(p1 * (1.0 - p1) / n1 + p2 * (1.0 - p2) / n2),
        ci_low=low,
        ci_high=high,
        method="newcombe-hybrid-score",
    )
