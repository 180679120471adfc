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

Each figure's ``ci_low``/``ci_high`` (95 %) and ``stderr`` are shot-level
(:mod:`runlog.figures.shot_level`: a ratio estimate over shots with the variance from the
spread between shots, Cochran 1977 section 6.3), ``method`` ``shot-ratio``: they
hold when the loading varies from shot to shot, as it always does. The pooled binomial
interval, which treats every site observation as an independent try and is far too narrow
then, stays beside it as ``binomial_ci_low``/``binomial_ci_high`` with its method
(``binomial_method``, from :mod:`runlog.figures.intervals`).

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
from runlog.figures.shot_level import SHOT_LEVEL_METHOD, ShotSums, shot_level_interval

__all__ = [
    "compare_proportions",
    "counted_figure",
    "counts_fill",
    "counts_survival",
    "fill_fraction",
    "per_site_fill",
    "per_site_fill_counts",
    "per_site_survival",
    "per_site_survival_counts",
    "proportion_figure",
    "shot_sums_fill",
    "shot_sums_survival",
    "survival",
    "survival_figures",
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


def counted_figure(name: str, sums: ShotSums, method: str = "wilson") -> Figure:
    """A figure ``sums.successes / sums.trials`` with the shot-level interval and stderr,
    and the pooled ``method`` interval as ``binomial_ci_low``/``binomial_ci_high``.

    With a single shot the spread between shots is unknown: the figure then has no
    interval and no stderr rather than the binomial one passed off as honest.
    """
    pooled = proportion_figure(name, sums.successes, sums.trials, method)
    shot_level = shot_level_interval(sums)
    return Figure(
        name=name,
        value=pooled.value,
        stderr=None if shot_level is None else shot_level.stderr,
        ci_low=None if shot_level is None else shot_level.low,
        ci_high=None if shot_level is None else shot_level.high,
        method=SHOT_LEVEL_METHOD,
        method_version="2",
        successes=sums.successes,
        trials=sums.trials,
        binomial_ci_low=pooled.ci_low,
        binomial_ci_high=pooled.ci_high,
        binomial_method=method,
        shot_sums=sums,
    )


def shot_sums_fill(loading: np.ndarray) -> ShotSums:
    """The per-shot sums of occupied sites out of sites."""
    occupancy = _as_occupancy(loading, "loading")
    return ShotSums.of(np.count_nonzero(occupancy, axis=1), np.full(occupancy.shape[0], occupancy.shape[1]))


def shot_sums_survival(loading: np.ndarray, survival: np.ndarray) -> ShotSums:
    """The per-shot sums of sites occupied in both images out of sites loaded."""
    first, second = _as_pair(loading, survival)
    return ShotSums.of(np.count_nonzero(first & second, axis=1), np.count_nonzero(first, axis=1))


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
    """Figure ``fill_fraction``: occupied sites / sites over all shots, shot-level interval
    (and the pooled ``method`` one beside it)."""
    _interval_method(method)  # fail on a bad method name before counting a large array
    return counted_figure("fill_fraction", shot_sums_fill(loading), method)


def survival(loading: np.ndarray, survival: np.ndarray, method: str = "wilson") -> list[Figure]:
    """Figures ``survival`` and ``loss`` (= 1 - survival, mirrored interval) of the loaded sites.

    Raises :class:`FitError` when no site was loaded in any shot: survival is then undefined.
    """
    _interval_method(method)
    sums = shot_sums_survival(loading, survival)
    if sums.trials == 0:
        raise FitError("counting", "no loaded sites in any shot: survival is undefined")
    return survival_figures(sums, method)


def survival_figures(sums: ShotSums, method: str = "wilson") -> list[Figure]:
    """``[survival, loss]`` from the per-shot sums of atoms kept out of atoms loaded; loss
    is counted as the failures, so its intervals are the mirror images of survival's."""
    return [counted_figure("survival", sums, method), counted_figure("loss", sums.complement(), method)]


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
