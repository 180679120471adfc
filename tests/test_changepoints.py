"""Level-shift detection: the Nile flow (Cobb 1978), an exhaustive search, and simulated daily series."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from runlog.drift.changepoints import Change, default_penalty, noise_scale, pelt, single_change
from runlog.errors import FitError


@pytest.fixture(scope="module")
def nile() -> np.ndarray:
    datasets = pytest.importorskip("statsmodels.datasets")
    return datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float)


def test_nile_single_change_cobb_1978(nile):
    # Cobb G.W. (1978), Biometrika 65:243; REFERENCES.md section 5: one shift after
    # observation 28 (1898), segment means 1097.75 and 849.972.
    change = single_change(nile)
    assert change.index == 28
    assert change.before == pytest.approx(1097.75, abs=1e-9)
    assert change.after == pytest.approx(849.972, abs=5e-4)
    assert change.size == pytest.approx(849.972 - 1097.75, abs=5e-4)


@pytest.mark.parametrize("penalty", [1e5, 2e5, "3 var ln n"])
def test_nile_pelt_finds_28_alone_for_penalties_in_the_published_range(nile, penalty):
    # REFERENCES.md section 5 (Cobb 1978): penalties between 1e5 and 3 var ln(n) give 28 alone.
    if penalty == "3 var ln n":
        penalty = 3 * nile.var(ddof=1) * math.log(nile.size)
    changes = pelt(nile, penalty=penalty)
    assert [c.index for c in changes] == [28]
    assert changes[0].before == pytest.approx(1097.75, abs=1e-9)
    assert changes[0].after == pytest.approx(849.972, abs=5e-4)


def test_nile_default_penalty_lies_in_the_published_range(nile):
    # REFERENCES.md section 5 range; the default is our own choice, checked to fall inside.
    assert 1e5 <= default_penalty(nile) <= 3 * nile.var(ddof=1) * math.log(nile.size)
    assert [c.index for c in pelt(nile)] == [28]


def _exhaustive(values, weights, penalty, min_size):
    """Best segmentation by trying every set of change positions (our own brute force)."""
    n = len(values)
    best_total, best_changes = math.inf, None
    for count in range(n // min_size):
        for changes in itertools.combinations(range(min_size, n - min_size + 1), count):
            bounds = [0, *changes, n]
            if any(b - a < min_size for a, b in zip(bounds[:-1], bounds[1:])):
                continue
            total = penalty * count
            for a, b in zip(bounds[:-1], bounds[1:]):
                mean = np.average(values[a:b], weights=weights[a:b])
                total += float(np.sum(weights[a:b] * (values[a:b] - mean) ** 2))
            if total < best_total - 1e-9:
                best_total, best_changes = total, list(changes)
    return best_changes


def test_pelt_matches_an_exhaustive_search():
    # PELT is exact (Killick, Fearnhead & Eckley 2012): it must agree with trying every segmentation,
    # also with min_size > 1, where pruning needs care, and with weights.
    rng = np.random.default_rng(2)
    for trial in range(120):
        n = int(rng.integers(4, 12))
        min_size = int(rng.integers(1, 4))
        values = rng.normal(size=n) + 3.0 * (rng.random(n) < 0.3)
        weights = rng.uniform(0.2, 3.0, n) if trial % 2 else np.ones(n)
        penalty = float(rng.uniform(0.0, 5.0))
        got = pelt(values, penalty=penalty, min_size=min_size, weights=weights)
        assert [c.index for c in got] == _exhaustive(values, weights, penalty, min_size), trial


def test_index_convention_is_first_point_of_the_new_segment():
    changes = pelt([0.0, 0.0, 0.0, 1.0, 1.0, 1.0], penalty=0.1)
    assert changes == [Change(index=3, before=0.0, after=1.0)]
    assert changes[0].size == 1.0


def _one_change_near(changes: list[Change], truth: int) -> bool:
    return len(changes) == 1 and abs(changes[0].index - truth) <= 1


def test_one_step_gives_one_change_at_the_step():
    # Two weeks of daily points, noise 1, one 4-sigma rise on day 9 (our own simulated scenario).
    rng = np.random.default_rng(20240601)
    values = rng.normal(0.0, 1.0, 14)
    values[9:] += 4.0
    changes = pelt(values)
    assert len(changes) == 1
    assert abs(changes[0].index - 9) <= 1
    assert changes[0].size == pytest.approx(4.0, abs=1.5)


@pytest.mark.parametrize(("n", "step_at", "step"), [(14, 7, 4.0), (14, 10, 5.0), (30, 15, 4.0), (30, 22, 5.0)])
def test_step_found_once_within_one_point_in_most_seeds(n, step_at, step):
    # Simulation, our own scenario: 200 seeds of unit-noise series with one step of step sigma.
    hits = 0
    for seed in range(200):
        values = np.random.default_rng(seed).normal(0.0, 1.0, n)
        values[step_at:] += step
        hits += _one_change_near(pelt(values), step_at)
    assert hits / 200 >= 0.95


@pytest.mark.parametrize("n", [14, 30])
def test_stable_series_rarely_shows_a_change(n):
    # Simulation: stable unit-noise series must show no change in >= 95 % of seeds with the
    # default penalty (measured when PENALTY_FACTOR was chosen: about 2 % at 14, 0.4 % at 30 points).
    false_alarms = sum(len(pelt(np.random.default_rng(1000 + seed).normal(0.0, 1.0, n))) > 0 for seed in range(400))
    assert false_alarms / 400 <= 0.05


def test_noise_scale_ignores_a_step():
    rng = np.random.default_rng(7)
    values = rng.normal(0.0, 1.0, 60)
    values[30:] += 10.0
    assert noise_scale(values) == pytest.approx(1.0, abs=0.25)
    # The plain standard deviation takes the step for noise.
    assert values.std(ddof=1) > 4.0


def _mixed_precision_day(seed: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    stderr = rng.choice([0.3, 0.3, 0.3, 3.0], size=n)  # a few days with few shots
    return rng.normal(0.0, stderr), stderr


def test_weights_keep_noisy_days_from_raising_false_changes_and_hiding_steps():
    # Simulation, our own scenario: daily points with unequal stderr, weights 1/stderr^2.
    n, step_at, seeds = 30, 15, 200
    false_weighted = false_plain = found_weighted = found_plain = 0
    for seed in range(seeds):
        values, stderr = _mixed_precision_day(seed, n)
        weights = 1.0 / stderr**2
        false_weighted += len(pelt(values, weights=weights)) > 0
        false_plain += len(pelt(values)) > 0
        stepped = values.copy()
        stepped[step_at:] += 1.5  # 5 stderr of a good day, half a bad day's
        found_weighted += _one_change_near(pelt(stepped, weights=weights), step_at)
        found_plain += _one_change_near(pelt(stepped), step_at)
    assert false_weighted / seeds <= 0.05
    assert found_weighted / seeds >= 0.9
    assert false_plain > false_weighted
    assert found_plain < found_weighted


def test_weighted_means_and_scale_invariance():
    values, stderr = _mixed_precision_day(3, 30)
    values[15:] += 1.5
    weights = 1.0 / stderr**2
    changes = pelt(values, weights=weights)
    scaled = pelt(values, weights=7.0 * weights)
    assert [c.index for c in scaled] == [c.index for c in changes] == [15]
    assert scaled[0].size == pytest.approx(changes[0].size, rel=1e-12)
    assert changes[0].before == pytest.approx(np.average(values[: changes[0].index], weights=weights[: changes[0].index]))


def test_constant_and_short_series_have_no_change():
    assert pelt([2.0] * 20) == []
    assert pelt([1.0, 5.0, 2.0]) == []


def test_change_point_errors():
    with pytest.raises(FitError) as error:
        pelt([1.0, 2.0, math.inf, 4.0])
    assert str(error.value) == "change point fit failed: non-finite value at index 2"
    with pytest.raises(FitError) as error:
        pelt([1.0, 2.0, 3.0, 4.0], weights=[1.0, 0.0, 1.0, 1.0])
    assert str(error.value) == "change point fit failed: weights must be positive and finite (index 1)"
    with pytest.raises(FitError) as error:
        single_change([1.0, 2.0, 3.0])
    assert str(error.value) == "change point fit failed: needs at least 4 points for a split, got 3"
    with pytest.raises(ValueError, match="min_size must be at least 1, got 0"):
        pelt([1.0, 2.0], min_size=0)
