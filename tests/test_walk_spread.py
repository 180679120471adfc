"""The walk's spread from each atom's displacement from its start site, shots at the
lattice edge left out, and an exponent that reads exact coherent-walk data as ballistic.

Exact Hadamard-walk widths are computed here from the walk's unitary (coin
H = [[1, 1], [1, -1]]/sqrt 2, then coin 0 one site left and coin 1 one site right, start
(|0> + i|1>)/sqrt 2 on one site); check values sigma_10 = 5.4729, sigma_20 = 10.8441
(docs: REFERENCES section 7, recomputed from the unitary).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from runlog.errors import FitError
from runlog.figures.spreading import fit_spreading, start_sites, walk_spread


def _hadamard_widths(steps: int) -> np.ndarray:
    amplitude = np.zeros((2 * steps + 1, 2), dtype=complex)
    amplitude[steps] = [1 / math.sqrt(2), 1j / math.sqrt(2)]
    coin = np.array([[1, 1], [1, -1]]) / math.sqrt(2)
    x = np.arange(-steps, steps + 1, dtype=float)
    widths = []
    for _ in range(steps):
        amplitude = amplitude @ coin.T
        moved = np.zeros_like(amplitude)
        moved[:-1, 0] = amplitude[1:, 0]
        moved[1:, 1] = amplitude[:-1, 1]
        amplitude = moved
        p = (np.abs(amplitude) ** 2).sum(axis=1)
        widths.append(math.sqrt(p @ x**2 - (p @ x) ** 2))
    return np.array(widths)


def by_name(figures):
    return {f.name: f for f in figures}


def test_exact_hadamard_widths_match_the_published_values():
    widths = _hadamard_widths(50)
    assert widths[[0, 1, 2, 4, 9, 19, 29, 49]] == pytest.approx([1.0, 1.4142, 1.7321, 2.8284, 5.4729, 10.8441, 16.2545, 27.0707], abs=5e-5)


def test_exact_coherent_walk_reads_as_ballistic():
    # Steps 1-20, no noise at all: a bare power law says 0.968 +- 0.012 (2.7 sigma below 1).
    steps = np.arange(1, 21)
    alpha = by_name(fit_spreading(steps, _hadamard_widths(20)))["spreading_exponent"]
    assert abs(alpha.value - 1.0) <= 2 * alpha.stderr, (alpha.value, alpha.stderr)
    print(f"\nexact Hadamard walk, steps 1-20: alpha = {alpha.value:.4f} ± {alpha.stderr:.4f}")


def test_classical_random_walk_reads_as_diffusive():
    # Sampled +-1 walks, one atom per shot, displacement from the known start site.
    rng = np.random.default_rng(8)
    sites, start, per_step = 81, 40, 400
    steps = np.arange(1, 21)
    widths = []
    for n in steps:
        position = start + 2 * rng.binomial(n, 0.5, per_step) - n
        occupancy = np.zeros((per_step, sites), dtype=bool)
        occupancy[np.arange(per_step), position] = True
        widths.append(walk_spread(occupancy, start)[0])
    alpha = by_name(fit_spreading(steps, widths))["spreading_exponent"]
    assert abs(alpha.value - 0.5) <= 2 * alpha.stderr, (alpha.value, alpha.stderr)


def test_displacement_is_from_each_shots_start_and_edge_shots_are_left_out():
    # Shot 0 starts at 2 and ends at 4 (displacement 2); shot 1 starts at 5 and ends at 4
    # (displacement -1); shot 2 ends on the edge (site 0) and is left out.
    after = np.zeros((3, 8), dtype=bool)
    after[0, 4] = after[1, 4] = after[2, 0] = True
    before = np.zeros((3, 8), dtype=bool)
    before[0, 2] = before[1, 5] = before[2, 3] = True
    spread, used = walk_spread(after, start_sites(before))
    assert used == 2 and spread == pytest.approx(math.sqrt((4 + 1) / 2))
    # Absolute positions would give 0 (both atoms at site 4): the start matters.
    with pytest.raises(FitError, match="no shot with atoms"):
        walk_spread(after[2:], 3.0)


def test_derive_uses_the_start_image(catalogue, make_file):
    from test_derive import scan_table

    rng = np.random.default_rng(9)
    sites, per_step = 61, 120
    steps = np.repeat(np.arange(1, 11), per_step)
    start = rng.integers(25, 36, steps.size)  # atoms start on different sites
    end = start + 2 * rng.binomial(steps, 0.5) - steps
    before = np.zeros((steps.size, sites), dtype=bool)
    before[np.arange(steps.size), start] = True
    after = np.zeros((steps.size, sites), dtype=bool)
    after[np.arange(steps.size), end] = True
    table = scan_table("walk2", "walk", {"steps": steps.astype(float)}, {}, {"before": before, "after": after})
    catalogue.ingest(make_file(table=table), config=_loading("before"))
    figures = by_name(catalogue.derive("walk2", "spreading", x="steps", image="after").figures)
    alpha = figures["spreading_exponent"]
    # Sampled data: over 30 seeds 90 % of the pulls lie within 2 sigma and all within 3.1.
    assert abs(alpha.value - 0.5) <= 3 * alpha.stderr


def _loading(name: str):
    from runlog.config import Mapping

    return Mapping(loading=name)
