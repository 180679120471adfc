"""Two-time correlators and K: hand-computed cases and simulated runs with known truth."""

from __future__ import annotations

import math

import numpy as np
import pytest

from runlog.errors import FitError
from runlog.figures.correlator import (
    MACROREALIST_BOUND,
    QUANTUM_BOUND,
    correlators,
    correlators_from_pairs,
)


def _by_name(figures):
    return {figure.name: figure for figure in figures}


def test_same_shot_case_by_hand():
    # products q1q2 = [1,-1,1,-1], q2q3 = [1,-1,-1,-1], q1q3 = [1,1,-1,1];
    # per-shot K = [1,-3,1,-3]: mean -1, sample std 4/sqrt(3), stderr 2/sqrt(3)
    q1 = [1, 1, -1, -1]
    q2 = [1, -1, -1, 1]
    q3 = [1, 1, 1, -1]
    figures = correlators(q1, q2, q3)
    assert [f.name for f in figures] == ["C12", "C23", "C13", "K"]
    got = _by_name(figures)
    assert got["C12"].value == 0.0 and got["C12"].stderr == pytest.approx(1 / math.sqrt(3))
    assert got["C23"].value == -0.5 and got["C23"].stderr == pytest.approx(0.5)
    assert got["C13"].value == 0.5 and got["C13"].stderr == pytest.approx(0.5)
    assert got["K"].value == -1.0 and got["K"].stderr == pytest.approx(2 / math.sqrt(3))
    assert got["K"].method == "leggett-garg-same-shots"
    assert got["C12"].method == "sample-mean"


def test_pair_case_by_hand():
    # pair 12 products [1,-1]: mean 0, stderr 1; pair 23 [1,-1]: 0, 1; pair 13 [-1,-1]: -1, 0
    # K = 0 + 0 - (-1) = 1, stderr sqrt(1 + 1 + 0)
    a = np.array([1, 1, 1, -1, 1, 1])
    b = np.array([1, -1, 1, 1, -1, -1])
    labels = ["12", "12", "23", "23", "13", "13"]
    got = _by_name(correlators_from_pairs(a, b, labels))
    assert (got["C12"].value, got["C12"].stderr) == pytest.approx((0.0, 1.0))
    assert (got["C23"].value, got["C23"].stderr) == pytest.approx((0.0, 1.0))
    assert (got["C13"].value, got["C13"].stderr) == pytest.approx((-1.0, 0.0))
    assert (got["K"].value, got["K"].stderr) == pytest.approx((1.0, math.sqrt(2)))
    assert got["K"].method == "leggett-garg-disjoint-shots"


def _pair_shots(rng, correlation: float, shots: int) -> tuple[np.ndarray, np.ndarray]:
    """±1 pairs with <a b> = correlation: a is ±1 evenly, b equals a with probability (1 + C)/2."""
    a = rng.choice([-1, 1], size=shots)
    same = rng.random(shots) < (1 + correlation) / 2
    return a, np.where(same, a, -a)


def _simulated_pair_run(rng, theta: float, shots_per_pair: int):
    # Quantum prediction for a precessing two-level system: C(tau) = cos(omega tau), so pairs
    # 12 and 23 (spacing tau) have cos(theta) and pair 13 (spacing 2 tau) has cos(2 theta).
    a_parts, b_parts, labels = [], [], []
    for label, correlation in (("12", math.cos(theta)), ("23", math.cos(theta)), ("13", math.cos(2 * theta))):
        a, b = _pair_shots(rng, correlation, shots_per_pair)
        a_parts.append(a)
        b_parts.append(b)
        labels += [label] * shots_per_pair
    order = rng.permutation(len(labels))  # shots of the three pairs interleaved, as in a run
    return (
        np.concatenate(a_parts)[order],
        np.concatenate(b_parts)[order],
        np.array(labels)[order],
    )


def test_pair_run_reaches_the_quantum_bound_at_pi_over_3():
    # Standard result (Leggett & Garg 1985 and the quantum two-level prediction):
    # K = 2 cos(theta) - cos(2 theta), largest, 3/2, at theta = omega tau = pi/3.
    theta = math.pi / 3
    truth = 2 * math.cos(theta) - math.cos(2 * theta)
    assert truth == pytest.approx(QUANTUM_BOUND)
    rng = np.random.default_rng(1985)
    got = _by_name(correlators_from_pairs(*_simulated_pair_run(rng, theta, 20_000)))
    assert abs(got["C12"].value - math.cos(theta)) < 4 * got["C12"].stderr
    assert abs(got["C13"].value - math.cos(2 * theta)) < 4 * got["C13"].stderr
    assert abs(got["K"].value - truth) < 4 * got["K"].stderr
    # the simulated violation of the macrorealist bound is many stderr wide
    assert (got["K"].value - MACROREALIST_BOUND) / got["K"].stderr > 20


@pytest.mark.parametrize("theta", [0.3, math.pi / 3, 1.4, 2.5])
def test_pair_run_follows_the_cosine_prediction(theta):
    rng = np.random.default_rng(int(theta * 1000))
    truth = 2 * math.cos(theta) - math.cos(2 * theta)
    got = _by_name(correlators_from_pairs(*_simulated_pair_run(rng, theta, 5_000)))
    assert abs(got["K"].value - truth) < 4 * got["K"].stderr


def test_pair_stderr_matches_the_spread_of_repeated_runs():
    # 300 simulated runs: the reported stderr of K should equal the run-to-run standard
    # deviation; with 300 runs that deviation is itself known to about 4 %.
    rng = np.random.default_rng(2)
    values, stderrs = [], []
    for _ in range(300):
        got = _by_name(correlators_from_pairs(*_simulated_pair_run(rng, math.pi / 3, 300)))
        values.append(got["K"].value)
        stderrs.append(got["K"].stderr)
    assert np.std(values, ddof=1) / np.mean(stderrs) == pytest.approx(1.0, abs=0.15)


def _sequential_shots(rng, theta: float, shots: int):
    """Three projective measurements in the same shots of a spin precessing by theta between them.

    Outcome q1 is ±1 evenly; each later outcome keeps the previous one with probability
    (1 + cos theta)/2 because the measurement resets the state to the eigenstate found.
    """
    q1 = rng.choice([-1, 1], size=shots)
    q2 = np.where(rng.random(shots) < (1 + math.cos(theta)) / 2, q1, -q1)
    q3 = np.where(rng.random(shots) < (1 + math.cos(theta)) / 2, q2, -q2)
    return q1, q2, q3


def test_same_shot_run_with_known_truth():
    # Derived for the simulation above: C12 = C23 = cos(theta), and since q1 q3 = (q1 q2)(q2 q3)
    # with independent factors, C13 = cos(theta)**2, so K = 2 cos(theta) - cos(theta)**2 <= 1.
    theta = math.pi / 3
    rng = np.random.default_rng(4)
    got = _by_name(correlators(*_sequential_shots(rng, theta, 40_000)))
    truth = 2 * math.cos(theta) - math.cos(theta) ** 2
    assert abs(got["C13"].value - math.cos(theta) ** 2) < 4 * got["C13"].stderr
    assert abs(got["K"].value - truth) < 4 * got["K"].stderr
    assert got["K"].value <= MACROREALIST_BOUND


def test_same_shot_stderr_accounts_for_covariance():
    # The reported stderr of K must match the run-to-run spread; the independent-sum formula
    # (ignoring the covariance of the three correlators from the same shots) must not.
    rng = np.random.default_rng(8)
    values, stderrs, naive = [], [], []
    for _ in range(300):
        got = _by_name(correlators(*_sequential_shots(rng, math.pi / 3, 300)))
        values.append(got["K"].value)
        stderrs.append(got["K"].stderr)
        naive.append(math.sqrt(sum(got[name].stderr ** 2 for name in ("C12", "C23", "C13"))))
    spread = np.std(values, ddof=1)
    assert spread / np.mean(stderrs) == pytest.approx(1.0, abs=0.15)
    assert spread / np.mean(naive) < 0.8


def test_same_shot_k_never_exceeds_one():
    # q1 q2 + q2 q3 - q1 q3 <= 1 for every choice of ±1 (Leggett & Garg 1985), so the mean too.
    rng = np.random.default_rng(0)
    q = rng.choice([-1, 1], size=(3, 1000))
    assert _by_name(correlators(*q))["K"].value <= MACROREALIST_BOUND


@pytest.mark.parametrize(
    "q2, message",
    [
        ([1, -1, 0, 1], "q2: value 0 at index 2 is not +1 or -1"),
        ([1, -1, 1, 0.5], "q2: value 0.5 at index 3 is not +1 or -1"),
        ([1, float("nan"), 1, 1], "q2: value nan at index 1 is not +1 or -1"),
        ([True, False, True, True], "q2 must hold the numbers +1 and -1, got dtype bool"),
    ],
)
def test_values_other_than_plus_minus_one_are_rejected(q2, message):
    with pytest.raises(ValueError) as caught:
        correlators([1, 1, 1, 1], q2, [1, 1, 1, 1])
    assert str(caught.value) == message


def test_float_plus_minus_one_are_accepted():
    got = _by_name(correlators([1.0, -1.0, 1.0], [1.0, -1.0, -1.0], [1, 1, 1]))
    assert got["C12"].value == pytest.approx(1 / 3)


def test_unknown_pair_label_is_rejected():
    with pytest.raises(ValueError) as caught:
        correlators_from_pairs([1, 1, 1], [1, 1, 1], ["12", "21", "13"])
    assert str(caught.value) == "pair_labels: '21' at index 1 is not one of 12, 23, 13"


def test_length_mismatch_is_rejected():
    with pytest.raises(ValueError, match="q1, q2, q3 must have one outcome per shot each, got 3, 2, 3"):
        correlators([1, 1, 1], [1, 1], [1, 1, 1])


def test_a_pair_with_too_few_shots_is_a_fit_error():
    with pytest.raises(FitError) as caught:
        correlators_from_pairs([1, 1, 1, 1, 1], [1, -1, 1, 1, 1], ["12", "12", "23", "23", "13"])
    assert str(caught.value) == (
        "correlator fit failed: C13 has 1 shot(s); at least 2 are needed for a stderr"
    )
