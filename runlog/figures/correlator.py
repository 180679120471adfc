"""Two-time correlators of a two-valued observable and the Leggett-Garg combination K.

This module owns the figures of runs that measure a two-valued observable ``Q = ±1`` of an
atom (for example which of two sites or hyperfine states it is found in) at times
``t1 < t2 < t3``. From per-shot outcomes it gives

* ``C12``, ``C23``, ``C13``: the correlator ``Cij = <Qi Qj>``, the mean of the per-shot
  products, with stderr = sample standard deviation of the products / sqrt(shots);
* ``K = C12 + C23 - C13``.

Two data layouts are accepted:

* :func:`correlators`: ``q1``, ``q2``, ``q3`` all measured in the same shots. ``K`` is then
  the mean of the per-shot value ``q1 q2 + q2 q3 - q1 q3``, and its stderr is that value's
  sample standard deviation / sqrt(shots). This equals propagating the full covariance
  matrix of the three correlators, so the covariance between them is accounted for.
* :func:`correlators_from_pairs`: each shot measures one pair only, named by a label in
  ``{"12", "23", "13"}``. The three correlators come from disjoint shots, are independent,
  and ``stderr(K) = sqrt(s12^2 + s23^2 + s13^2)``.

Standard result (Leggett A.J. & Garg A. 1985, "Quantum mechanics versus macroscopic
realism: is the flux there when nobody looks?", Phys. Rev. Lett. 54:857 [memory for the
journal reference]): if the system is at every moment in one of the two states
(macrorealism) and a measurement does not disturb the later evolution (non-invasive
measurability), then ``K <= 1`` (:data:`MACROREALIST_BOUND`); for any ±1 outcomes
``q1 q2 + q2 q3 - q1 q3 <= 1`` shot by shot. Quantum mechanics allows a two-level system
up to ``K = 3/2`` (:data:`QUANTUM_BOUND`), reached for ``C(tau) = cos(omega tau)`` with
equal spacing at ``omega tau = pi/3``: ``K = 2 cos(omega tau) - cos(2 omega tau)``.

Note that measuring all three times in the same shots disturbs the atom at ``t2``; for
projective measurements of a spin precessing about an axis at right angles to the measured
one that makes ``C13 = C12 C23`` and ``K = 1 - (1 - C12)(1 - C23) <= 1``. A test of
macrorealism therefore uses the pair layout (or weak / ideal negative measurements); this
module computes the figures for either layout and leaves the interpretation to the run.
"""

from __future__ import annotations

import math

import numpy as np

from runlog.errors import FitError
from runlog.figures.base import Figure

__all__ = [
    "MACROREALIST_BOUND",
    "PAIR_LABELS",
    "QUANTUM_BOUND",
    "correlators",
    "correlators_from_pairs",
]

MACROREALIST_BOUND = 1.0
"""Largest K allowed by macrorealism with non-invasive measurement (Leggett & Garg 1985)."""

QUANTUM_BOUND = 1.5
"""Largest K quantum mechanics allows for a two-level system (standard result)."""

PAIR_LABELS = ("12", "23", "13")


def _as_outcomes(values: object, label: str) -> np.ndarray:
    outcomes = np.asarray(values)
    if outcomes.ndim != 1:
        raise ValueError(
            f"{label} must be one-dimensional (one outcome per shot), got shape {outcomes.shape}"
        )
    if outcomes.dtype == np.bool_ or not np.issubdtype(outcomes.dtype, np.number):
        raise ValueError(f"{label} must hold the numbers +1 and -1, got dtype {outcomes.dtype}")
    bad = (outcomes != 1) & (outcomes != -1)  # NaN is caught here too
    if bad.any():
        index = int(np.flatnonzero(bad)[0])
        value = outcomes[index].item()
        raise ValueError(f"{label}: value {value!r} at index {index} is not +1 or -1")
    return outcomes.astype(np.float64)


def _mean_and_stderr(values: np.ndarray, name: str) -> tuple[float, float]:
    if values.size < 2:
        raise FitError(
            "correlator", f"{name} has {values.size} shot(s); at least 2 are needed for a stderr"
        )
    return float(values.mean()), float(values.std(ddof=1) / math.sqrt(values.size))


def _figure(name: str, value: float, stderr: float, method: str) -> Figure:
    return Figure(name=name, value=value, stderr=stderr, method=method)


def correlators(q1: np.ndarray, q2: np.ndarray, q3: np.ndarray) -> list[Figure]:
    """Figures ``C12``, ``C23``, ``C13`` and ``K`` from ±1 outcomes at three times, same shots."""
    first = _as_outcomes(q1, "q1")
    second = _as_outcomes(q2, "q2")
    third = _as_outcomes(q3, "q3")
    if not first.size == second.size == third.size:
        raise ValueError(
            "q1, q2, q3 must have one outcome per shot each, got "
            f"{first.size}, {second.size}, {third.size}"
        )
    products = {"C12": first * second, "C23": second * third, "C13": first * third}
    out = [_figure(name, *_mean_and_stderr(p, name), "sample-mean") for name, p in products.items()]
    per_shot_k = products["C12"] + products["C23"] - products["C13"]
    out.append(_figure("K", *_mean_and_stderr(per_shot_k, "K"), "leggett-garg-same-shots"))
    return out


def correlators_from_pairs(
    values_a: np.ndarray, values_b: np.ndarray, pair_labels: np.ndarray
) -> list[Figure]:
    """Figures ``C12``, ``C23``, ``C13`` and ``K`` from shots that each measured one pair.

    Shot ``i`` measured the pair ``pair_labels[i]`` (``"12"``, ``"23"`` or ``"13"``) with
    outcomes ``values_a[i]`` at the earlier and ``values_b[i]`` at the later time.
    """
    earlier = _as_outcomes(values_a, "values_a")
    later = _as_outcomes(values_b, "values_b")
    labels = np.asarray(pair_labels).astype(str)
    if labels.ndim != 1 or not earlier.size == later.size == labels.size:
        raise ValueError(
            "values_a, values_b and pair_labels must have one entry per shot each, got "
            f"{earlier.size}, {later.size}, {labels.size}"
        )
    unknown = ~np.isin(labels, PAIR_LABELS)
    if unknown.any():
        index = int(np.flatnonzero(unknown)[0])
        raise ValueError(
            f"pair_labels: {str(labels[index])!r} at index {index} "
            f"is not one of {', '.join(PAIR_LABELS)}"
        )
    products = earlier * later
    out: list[Figure] = []
    for pair in PAIR_LABELS:
        name = "C" + pair
        out.append(_figure(name, *_mean_and_stderr(products[labels == pair], name), "sample-mean"))
    c12, c23, c13 = out
    k_value = c12.value + c23.value - c13.value
    k_stderr = math.sqrt(c12.stderr**2 + c23.stderr**2 + c13.stderr**2)
    out.append(_figure("K", k_value, k_stderr, "leggett-garg-disjoint-shots"))
    return out
