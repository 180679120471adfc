"""Shot-to-shot stability of a monitored quantity: Allan deviation and modified Allan deviation.

A monitored quantity (a laser power, a lattice depth, an atom number) read once per
shot at ``rate`` shots per second is treated as the "fractional frequency" series y of
NIST Special Publication 1065 (Riley 2008, Handbook of Frequency Stability Analysis).
The Allan deviation at averaging time tau says how much two neighbouring tau-long
averages differ: it falls as 1/sqrt(tau) for white shot-to-shot noise, flattens at a
flicker floor and rises again once slow drift dominates, which tells how many shots
are worth averaging before a reference measurement must be repeated.

All three estimators go through the phase (time-integrated) series x, with x_0 = 0 and
x_(i+1) = x_i + y_i / rate, and the second difference
D_i(m) = x_(i+2m) - 2 x_(i+m) + x_i at m = tau * rate samples (SP 1065):

- Allan variance: the mean of D_i^2 / (2 tau^2) over i = 0, m, 2m, ... (non-overlapping)
  or over every i (overlapping, the better-confidence estimator of the same quantity);
- modified Allan variance: the mean of (sum over m consecutive D_i)^2 / (2 m^2 tau^2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from runlog.errors import FitError

__all__ = ["StabilityCurve", "allan_deviation", "modified_allan_deviation", "octave_taus"]


@dataclass(frozen=True, eq=False)
class StabilityCurve:
    """Deviation per averaging time; ``terms`` is how many squared differences each value averages.

    ``terms`` sets the confidence of each point: a value resting on a handful of terms is
    a rough guide only.
    """

    taus: NDArray[np.float64]
    deviation: NDArray[np.float64]
    terms: NDArray[np.int64]


def _phase(y: ArrayLike, rate: float, estimator: str) -> NDArray[np.float64]:
    if not (np.isfinite(rate) and rate > 0):
        raise ValueError(f"rate must be positive and finite, got {rate}")
    values = np.asarray(y, dtype=float)
    if values.ndim != 1:
        raise FitError(estimator, f"expected a one-dimensional series, got shape {values.shape}")
    if not np.all(np.isfinite(values)):
        raise FitError(estimator, f"non-finite value at index {int(np.flatnonzero(~np.isfinite(values))[0])}")
    return np.concatenate(([0.0], np.cumsum(values) / rate))


def _sample_counts(taus: ArrayLike, rate: float, estimator: str) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    tau = np.atleast_1d(np.asarray(taus, dtype=float))
    m = np.rint(tau * rate).astype(np.int64)
    bad = (m < 1) | ~np.isclose(m, tau * rate, rtol=1e-9, atol=1e-9)
    if np.any(bad):
        raise FitError(estimator, f"tau {tau[bad][0]} is not a positive whole number of samples at rate {rate}")
    return m / rate, m


def _second_differences(x: NDArray[np.float64], m: int) -> NDArray[np.float64]:
    return x[2 * m :] - 2.0 * x[m:-m] + x[: -2 * m]


def allan_deviation(y: ArrayLike, taus: ArrayLike, rate: float = 1.0, overlapping: bool = False) -> StabilityCurve:
    """Allan deviation of the series ``y`` sampled at ``rate`` per second, at each tau (seconds).

    Each tau must be a whole number m of samples with 2 m <= len(y).
    """
    name = "overlapping allan deviation" if overlapping else "allan deviation"
    x = _phase(y, rate, name)
    tau, counts = _sample_counts(taus, rate, name)
    deviation = np.empty(tau.size)
    terms = np.empty(tau.size, dtype=np.int64)
    for j, (t, m) in enumerate(zip(tau, counts)):
        if 2 * m > x.size - 1:
            raise FitError(name, f"tau {t} needs at least {2 * m} samples, got {x.size - 1}")
        d = _second_differences(x, int(m))
        if not overlapping:
            d = d[::m]
        deviation[j] = np.sqrt(np.mean(d**2) / (2.0 * t**2))
        terms[j] = d.size
    return StabilityCurve(taus=tau, deviation=deviation, terms=terms)


def modified_allan_deviation(y: ArrayLike, taus: ArrayLike, rate: float = 1.0) -> StabilityCurve:
    """Modified Allan deviation, which separates white from flicker noise of the phase series; needs 3 m - 1 <= len(y)."""
    name = "modified allan deviation"
    x = _phase(y, rate, name)
    tau, counts = _sample_counts(taus, rate, name)
    deviation = np.empty(tau.size)
    terms = np.empty(tau.size, dtype=np.int64)
    for j, (t, m) in enumerate(zip(tau, counts)):
        if 3 * m > x.size:
            raise FitError(name, f"tau {t} needs at least {3 * m - 1} samples, got {x.size - 1}")
        d = _second_differences(x, int(m))
        running = np.concatenate(([0.0], np.cumsum(d)))
        sums = running[m:] - running[:-m]
        deviation[j] = np.sqrt(np.mean(sums**2) / (2.0 * m**2 * t**2))
        terms[j] = sums.size
    return StabilityCurve(taus=tau, deviation=deviation, terms=terms)


def octave_taus(samples: int, rate: float = 1.0, *, modified: bool = False) -> NDArray[np.float64]:
    """Averaging times 1, 2, 4, ... samples (in seconds), up to the longest the estimator allows."""
    longest = (samples + 1) // 3 if modified else samples // 2
    if longest < 1:
        raise FitError("allan deviation", f"needs at least {3 - 1 if modified else 2} samples, got {samples}")
    return 2.0 ** np.arange(int(np.log2(longest)) + 1) / rate
