"""Sorting-run figures: hand-counted cases and a simulated run with known truth."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.proportion import proportion_confint

from runlog.figures.sorting import defect_free_probability, sorting_figures, target_fill_fraction

# 4 shots x 5 sites, target sites 1, 2, 3; counted by hand:
#   shot 0 target 1,1,1 -> defect-free      shot 1 target 1,0,1 -> one hole
#   shot 2 target 1,1,1 -> defect-free      shot 3 target 0,0,1 -> two holes
#   defect-free 2 of 4 shots; target fill 9 of 12 observations
OCCUPANCY = np.array(
    [
        [0, 1, 1, 1, 0],
        [1, 1, 0, 1, 1],
        [0, 1, 1, 1, 1],
        [1, 0, 0, 1, 0],
    ],
    dtype=bool,
)
TARGET_INDICES = np.array([1, 2, 3])
TARGET_MASK = np.array([False, True, True, True, False])


@pytest.mark.parametrize("target", [TARGET_INDICES, TARGET_MASK, [3, 1, 2]], ids=["indices", "mask", "list"])
def test_hand_counted_case(target):
    defect_free, target_fill = sorting_figures(OCCUPANCY, target)
    assert defect_free.name == "defect_free_probability"
    assert defect_free.value == 0.5
    assert target_fill.name == "target_fill_fraction"
    assert target_fill.value == 0.75
    # reference: statsmodels proportion_confint, Wilson score
    assert (defect_free.ci_low, defect_free.ci_high) == pytest.approx(
        proportion_confint(2, 4, alpha=0.05, method="wilson"), abs=1e-12
    )
    # The target fill fraction's pooled interval is Wilson's; its own is shot-level
    # (tests/test_shot_level.py checks its coverage).
    assert (target_fill.binomial_ci_low, target_fill.binomial_ci_high) == pytest.approx(
        proportion_confint(9, 12, alpha=0.05, method="wilson"), abs=1e-12
    )
    assert defect_free.stderr == pytest.approx(np.sqrt(0.25 / 4))
    assert target_fill.stderr >= np.sqrt(0.75 * 0.25 / 12) - 1e-15
    assert defect_free.method == target_fill.binomial_method == "wilson"
    assert target_fill.method == "shot-ratio"


def test_single_figure_functions_agree_with_the_list():
    both = sorting_figures(OCCUPANCY, TARGET_INDICES, method="clopper-pearson")
    assert defect_free_probability(OCCUPANCY, TARGET_INDICES, method="clopper-pearson") == both[0]
    assert target_fill_fraction(OCCUPANCY, TARGET_INDICES, method="clopper-pearson") == both[1]
    # reference: statsmodels proportion_confint, method "beta" (Clopper-Pearson)
    assert (both[0].ci_low, both[0].ci_high) == pytest.approx(
        proportion_confint(2, 4, alpha=0.05, method="beta"), abs=1e-12
    )


def test_all_shots_defect_free_gives_exact_upper_end():
    figure = defect_free_probability(np.ones((10, 4), dtype=bool), [0, 1])
    assert figure.value == 1.0 and figure.ci_high == 1.0 and figure.ci_low < 1.0


def test_simulated_sorting_run_with_known_truth():
    # Each target site filled independently with probability 0.9, 10 target sites of 16:
    # defect-free probability is 0.9**10 = 0.3487 and target fill fraction 0.9 exactly.
    rng = np.random.default_rng(11)
    occupancy = rng.random((20_000, 16)) < 0.9
    target = np.arange(3, 13)
    defect_free, target_fill = sorting_figures(occupancy, target)
    assert abs(defect_free.value - 0.9**10) < 4 * defect_free.stderr
    assert abs(target_fill.value - 0.9) < 4 * target_fill.stderr


def test_defect_free_interval_covers_the_truth_about_95_percent_of_runs():
    # 1000 simulated runs of 200 shots, same truth 0.9**10 as above; the Wilson interval
    # should hold it in about 95 % of runs (Wilson 1927; its coverage for n = 200 is close to
    # nominal). 4 binomial standard errors of 1000 runs is 0.028.
    rng = np.random.default_rng(5)
    truth = 0.9**10
    runs = 1000
    covered = 0
    for _ in range(runs):
        figure = defect_free_probability(rng.random((200, 10)) < 0.9, np.arange(10))
        covered += figure.ci_low <= truth <= figure.ci_high
    assert abs(covered / runs - 0.95) < 4 * np.sqrt(0.95 * 0.05 / runs)


@pytest.mark.parametrize(
    "target, message",
    [
        ([1, 5], "target site index 5 at position 1 is outside 0..4"),
        ([-1], "target site index -1 at position 0 is outside 0..4"),
        ([1, 1], "target site indices contain duplicates"),
        (np.array([], dtype=int), "target contains no sites"),
        (np.zeros(5, dtype=bool), "target contains no sites"),
        (np.ones(4, dtype=bool), "target mask must have one entry per site (5), got shape (4,)"),
        ([0.5, 1.0], "target must be site indices (integers) or a boolean mask, got dtype float64"),
    ],
)
def test_bad_target_is_rejected(target, message):
    with pytest.raises(ValueError) as caught:
        sorting_figures(OCCUPANCY, target)
    assert str(caught.value) == message


def test_non_boolean_occupancy_is_rejected():
    with pytest.raises(ValueError, match="sorted occupancy must be a boolean array, got dtype int64"):
        sorting_figures(OCCUPANCY.astype(np.int64), TARGET_INDICES)
