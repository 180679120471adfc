"""Position spread of a quantum walk and the power law of its growth with step number.

Checks against outside facts:
* a classical (unbiased, +-1 per step) random walk has the binomial position distribution,
  whose standard deviation after n steps is exactly sqrt(n) (textbook binomial variance
  n p (1 - p) times the step length 2 squared, p = 1/2): exponent 0.5, prefactor 1;
* the discrete-time Hadamard walk started in the symmetric coin state spreads
  ballistically, sigma / n -> sqrt(1 - 1/sqrt(2)) = 0.5412 (Konno N. 2002, Quantum Inf.
  Process. 1:345; Nayak A. & Vishwanath A. 2000, arXiv:quant-ph/0010117) [memory].
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from runlog.errors import FitError
from runlog.figures.spreading import fit_spreading, position_spread


def by_name(figures):
    return {f.name: f for f in figures}


# --- position_spread ---------------------------------------------------------------------


def test_spread_of_a_hand_counted_occupancy():
    # Atoms at sites 0 and 2 (shot 1) and at site 1 (shot 2): positions 0, 2, 1, mean 1,
    # variance (1 + 1 + 0) / 3.
    occupancy = np.array([[True, False, True], [False, True, False]])
    assert position_spread(occupancy) == pytest.approx(math.sqrt(2.0 / 3.0), rel=1e-15)


def test_spread_in_given_positions():
    occupancy = np.array([[True, False, True], [False, True, False]])
    spacing_um = 0.532
    positions = spacing_um * np.arange(3) + 7.0  # an offset must not matter
    assert position_spread(occupancy, positions) == pytest.approx(spacing_um * math.sqrt(2.0 / 3.0), rel=1e-12)


def test_spread_matches_numpy_weighted_standard_deviation():
    # Reference: numpy's weighted standard deviation of the same pooled positions.
    rng = np.random.default_rng(1)
    occupancy = rng.random((50, 41)) < 0.2
    sites, counts = np.arange(41), occupancy.sum(axis=0)
    mean = np.average(sites, weights=counts)
    expected = math.sqrt(np.average((sites - mean) ** 2, weights=counts))
    assert position_spread(occupancy) == pytest.approx(expected, rel=1e-12)


def test_no_atoms():
    with pytest.raises(FitError) as caught:
        position_spread(np.zeros((3, 5), dtype=bool))
    assert str(caught.value) == "spreading fit failed: no atom in any shot: the position spread is undefined"


def test_occupancy_must_be_boolean_and_two_dimensional():
    with pytest.raises(ValueError, match="boolean"):
        position_spread(np.ones((2, 3)))
    with pytest.raises(ValueError, match=r"shape \[shots, sites\]"):
        position_spread(np.ones(3, dtype=bool))
    with pytest.raises(ValueError, match="2 site positions for 3 sites"):
        position_spread(np.ones((2, 3), dtype=bool), [0.0, 1.0])


# --- fit_spreading -----------------------------------------------------------------------


def test_classical_walk_exact_widths_give_exponent_one_half():
    # Exact binomial widths sigma = sqrt(n) (plus a tiny wobble so the fit has residuals).
    steps = np.arange(1, 21)
    widths = np.sqrt(steps) * (1.0 + 1e-6 * np.cos(steps))
    figures = by_name(fit_spreading(steps, widths))
    assert figures["spreading_exponent"].value == pytest.approx(0.5, abs=1e-5)
    assert figures["spreading_prefactor"].value == pytest.approx(1.0, abs=1e-5)
    assert figures["spreading_exponent"].method == "least-squares"


def _sampled_spread(rng, probabilities, positions, shots):
    occupancy = np.zeros((shots, positions.size), dtype=bool)
    occupancy[np.arange(shots), rng.choice(positions.size, size=shots, p=probabilities)] = True
    return position_spread(occupancy, positions)


def test_classical_walk_sampled_is_diffusive():
    # One walker per shot on the binomial distribution of a +-1 random walk.
    rng = np.random.default_rng(2)
    positions = np.arange(-60, 61, dtype=float)
    steps = np.arange(4, 61, 4)
    widths = []
    for n in steps:
        k = np.arange(n + 1)
        p = np.zeros(positions.size)
        p[(2 * k - n) + 60] = stats.binom.pmf(k, n, 0.5)
        widths.append(_sampled_spread(rng, p, positions, shots=300))
    figures = by_name(fit_spreading(steps, widths))
    alpha = figures["spreading_exponent"]
    assert abs(alpha.value - 0.5) <= 3 * alpha.stderr
    assert alpha.stderr < 0.05


def _hadamard_walk(steps: int, half_width: int) -> list[np.ndarray]:
    """Position probabilities of the Hadamard walk from the coin state (|L> + i|R>)/sqrt 2."""
    amplitude = np.zeros((2 * half_width + 1, 2), dtype=complex)
    amplitude[half_width] = [1 / math.sqrt(2), 1j / math.sqrt(2)]
    hadamard = np.array([[1, 1], [1, -1]]) / math.sqrt(2)
    out = []
    for _ in range(steps):
        amplitude = amplitude @ hadamard.T
        moved = np.zeros_like(amplitude)
        moved[:-1, 0] = amplitude[1:, 0]  # coin 0 steps left
        moved[1:, 1] = amplitude[:-1, 1]  # coin 1 steps right
        amplitude = moved
        out.append((np.abs(amplitude) ** 2).sum(axis=1))
    return out


def test_hadamard_walk_is_ballistic():
    rng = np.random.default_rng(3)
    half_width = 45
    positions = np.arange(-half_width, half_width + 1, dtype=float)
    distributions = _hadamard_walk(40, half_width)
    steps = np.arange(4, 41, 4)
    widths = [_sampled_spread(rng, distributions[n - 1] / distributions[n - 1].sum(), positions, 400) for n in steps]
    figures = by_name(fit_spreading(steps, widths))
    alpha, prefactor = figures["spreading_exponent"], figures["spreading_prefactor"]
    assert abs(alpha.value - 1.0) <= 3 * alpha.stderr
    # Konno (2002) [memory]: sigma / n -> sqrt(1 - 1/sqrt 2) for large n.
    assert abs(prefactor.value - math.sqrt(1 - 1 / math.sqrt(2))) <= max(3 * prefactor.stderr, 0.05)


def test_exact_hadamard_widths_approach_the_asymptote():
    # The exact distributions (no sampling): sigma_n / n at n = 40 is within 1 % of 0.5412.
    positions = np.arange(-45, 46, dtype=float)
    p = _hadamard_walk(40, 45)[-1]
    mean = p @ positions
    assert math.sqrt(p @ (positions - mean) ** 2) / 40 == pytest.approx(math.sqrt(1 - 1 / math.sqrt(2)), rel=0.01)


def test_sigma_unit_is_passed_through():
    steps = np.arange(1, 9)
    figures = by_name(fit_spreading(steps, 0.532 * steps**0.9 * (1 + 0.01 * np.cos(steps)), sigma_unit="um"))
    assert figures["spreading_prefactor"].unit == "um"
    assert figures["spreading_exponent"].unit == ""


def test_step_zero_is_left_out():
    steps = np.arange(0, 11)
    widths = np.sqrt(steps) * (1.0 + 1e-6 * np.cos(steps))
    figures = by_name(fit_spreading(steps, widths))
    assert figures["spreading_exponent"].value == pytest.approx(0.5, abs=1e-5)


def test_too_few_step_numbers():
    with pytest.raises(FitError) as caught:
        fit_spreading([0, 1, 2, 1, 2], [0.0, 1.0, 1.4, 1.0, 1.4])
    assert str(caught.value) == "spreading fit failed: 2 distinct step numbers above zero; at least 3 are needed"


def test_no_spread_at_all():
    with pytest.raises(FitError) as caught:
        fit_spreading([1, 2, 3, 4], [0.0, 0.0, 0.0, 0.0])
    assert str(caught.value) == "spreading fit failed: fewer than 2 step numbers with a spread above zero"
