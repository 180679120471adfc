"""The false-alarm budget of the drift alarms, by simulation.

Prints two rates of the calibrated thresholds of :mod:`runlog.drift.detect`:

* false alarms per apparatus per month: an apparatus has ``QUANTITIES`` headline
  quantities, each a stable reference series of lab days with 1 to 5 runs a day (so the
  days' standard errors differ), some with day-to-day scatter beyond their errors
  (tau = 0, 0.5 or 1 daily standard error of a three-run day, drawn per series); every
  alarm raised on such a series is false. A month is 30 judged lab days. The rate is
  printed for the mixture and for each scatter.
* detection: the same series with a step of 3 daily standard errors (up or down) from a
  day D after the baseline has filled, on two readings of "within 2 lab days": strict,
  out of control on D or D + 1 (the step's lab day or the next); loose, on D, D + 1 or
  D + 2 (by the second lab day after the step's day).

The peer of each rate is its target, measured in the same run: at most about 1 false
alarm per apparatus-month, at least 90 % detected on the strict reading. Run:
``python benchmarks/alarms.py`` (``--series N`` for more or fewer simulated series; the
default takes 10-20 s). ``--calibrate`` (about a minute at ``--series 600``) repeats both
rates for a range of two-day limits on a calibration seed of its own (never the
benchmark's), which is how the default limit was chosen: the lowest limit whose false-alarm rate on the mixture stays
below the budget, so that the strict detection rate is as high as the budget allows.
``--quantities N`` measures an apparatus of N quantities at the two-day limit
:mod:`runlog.drift.budget` gives it (the budget shared N ways), with the detection that
limit still has.
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import time
from dataclasses import replace

import numpy as np

from runlog.drift.budget import thresholds_for
from runlog.drift.detect import THRESHOLDS, judge

QUANTITIES = 4  # fill fraction, survival, coherence time, contrast (--quantities for more)
SCATTERS = (0.0, 0.5, 1.0)  # day-to-day scatter beyond the errors, in daily standard errors
CALIBRATION_SEED = 77  # the calibration's own seed; the benchmark's is --seed
DAYS = 120
STEP_DAY = 40
START = dt.date(2026, 1, 5)
DATES = [START + dt.timedelta(days=i) for i in range(DAYS)]


def stable_series(rng: np.random.Generator, days: int, tau_in_errors: float) -> tuple[np.ndarray, np.ndarray]:
    """A stable quantity: centre 0.5, a run's error 0.01, 1-5 runs a day, extra scatter tau."""
    runs = rng.integers(1, 6, days)
    errors = 0.01 / np.sqrt(runs)
    values = 0.5 + rng.normal(0.0, errors) + rng.normal(0.0, tau_in_errors * 0.01 / math.sqrt(3), days)
    return values, errors


def false_alarms(rng: np.random.Generator, series: int, thresholds=THRESHOLDS, quantities: int = QUANTITIES) -> dict[float | None, tuple[float, int, int]]:
    """Per scatter (and None: all of them) the false alarms per apparatus-month, the count
    of alarms and of judged stable lab days."""
    counts = {tau: [0, 0] for tau in SCATTERS}
    for _ in range(series):
        tau = float(rng.choice(SCATTERS))
        values, errors = stable_series(rng, DAYS, tau)
        judgement = judge(DATES, values, errors, thresholds=thresholds)
        counts[tau][0] += len(judgement.excursions())
        counts[tau][1] += int((~judgement.learning).sum())
    counts[None] = [sum(c[0] for c in counts.values()), sum(c[1] for c in counts.values())]
    return {tau: (alarms / max(judged, 1) * 30 * quantities, alarms, judged) for tau, (alarms, judged) in counts.items()}


def detection(rng: np.random.Generator, series: int, size: float = 3.0, thresholds=THRESHOLDS) -> tuple[int, int]:
    """(steps flagged on their day or the next, steps flagged by the second lab day after it)."""
    next_day = two_after = 0
    for _ in range(series):
        values, errors = stable_series(rng, STEP_DAY + 10, 0.0)
        values[STEP_DAY:] += size * errors[STEP_DAY:] * rng.choice([-1.0, 1.0])
        judgement = judge(DATES[: STEP_DAY + 10], values, errors, thresholds=thresholds)
        next_day += bool(judgement.out[STEP_DAY : STEP_DAY + 2].any())
        two_after += bool(judgement.out[STEP_DAY : STEP_DAY + 3].any())
    return next_day, two_after


def poisson_interval(alarms: int, judged: int, quantities: int = QUANTITIES) -> tuple[float, float]:
    """95 % interval of a rate per apparatus-month (normal approximation to the count's root)."""
    scale = 30 * quantities / max(judged, 1)
    return max(0.0, math.sqrt(alarms) - 0.98) ** 2 * scale, (math.sqrt(alarms) + 0.98) ** 2 * scale


def wilson(successes: int, trials: int) -> tuple[float, float]:
    z = 1.959963984540054
    p = successes / trials
    centre = (p + z * z / (2 * trials)) / (1 + z * z / trials)
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / (1 + z * z / trials)
    return centre - half, centre + half


def report(rng: np.random.Generator, series: int, thresholds=THRESHOLDS, quantities: int = QUANTITIES) -> tuple[float, float, float]:
    """Print both rates of ``thresholds`` for an apparatus of ``quantities`` quantities;
    return (false alarms, strict, loose detection)."""
    rates = false_alarms(rng, series, thresholds, quantities)
    next_day, two_after = detection(rng, series, thresholds=thresholds)
    rate, alarms, judged = rates[None]
    low, high = poisson_interval(alarms, judged, quantities)
    print(f"false alarms: {rate:.2f} per apparatus-month ({quantities} quantities, two-day limit {thresholds.pair_limit:g}; {alarms} alarms in {judged} judged stable lab days; 95 % [{low:.2f}, {high:.2f}]); target <= about 1")
    for tau in SCATTERS:
        r, a, j = rates[tau]
        print(f"  with day-to-day scatter {tau:g} daily standard errors: {r:.2f} ({a} alarms in {j} days)")
    for words, found in (("on the step's lab day or the next (strict reading)", next_day), ("by the second lab day after the step's day (loose reading)", two_after)):
        d_low, d_high = wilson(found, series)
        print(f"detection of a 3-standard-error step {words}: {100 * found / series:.1f} % ({found} of {series}; 95 % [{100 * d_low:.1f}, {100 * d_high:.1f}] %); target >= 90 %")
    return rate, next_day / series, two_after / series


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=1000, help="simulated series per rate")
    parser.add_argument("--seed", type=int, default=2026)
    parser.add_argument("--calibrate", action="store_true", help="both rates for a range of two-day limits, on the calibration seed")
    parser.add_argument("--quantities", type=int, default=QUANTITIES, help="quantities of the apparatus sharing the budget (runlog.drift.budget raises the two-day limit above 4)")
    options = parser.parse_args()
    tick = time.perf_counter()
    if options.calibrate:
        for limit in (2.9, 2.7, 2.65, 2.6, 2.55, 2.5):
            print(f"-- two-day limit {limit:g}")
            report(np.random.default_rng(CALIBRATION_SEED), options.series, replace(THRESHOLDS, pair_limit=limit))
        print(f"({time.perf_counter() - tick:.1f} s)")
        return
    thresholds = thresholds_for(options.quantities)
    print(f"thresholds: {thresholds.describe()}")
    rate, strict, loose = report(np.random.default_rng(options.seed), options.series, thresholds, options.quantities)
    print(f"ratio to target: false alarms {rate / 1.0:.2f} x budget, detection {strict / 0.9:.3f} x target strict, {loose / 0.9:.3f} x loose ({time.perf_counter() - tick:.1f} s)")


if __name__ == "__main__":
    main()
