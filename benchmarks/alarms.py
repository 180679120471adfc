"""The false-alarm budget of the drift alarms, by simulation.

Prints two rates of the calibrated thresholds of :mod:`runlog.drift.detect`:

* false alarms per apparatus per month: an apparatus has ``QUANTITIES`` headline
  quantities, each a stable reference series of lab days with 1 to 5 runs a day (so the
  days' standard errors differ), some with day-to-day scatter beyond their errors
  (tau = 0, 0.5 or 1 daily standard error, drawn per series); every alarm raised on such a
  series is false. A month is 30 judged lab days.
* detection within 2 lab days: the same series with a step of 3 daily standard errors
  (up or down) from a day D after the baseline has filled; detected when the series is
  out of control on D, D + 1 or D + 2 (flagged by the second lab day after the step's
  day). The stricter rate, flagged on D or D + 1, is printed too.

The peer of each rate is its target, measured in the same run: at most about 1 false
alarm per apparatus-month, at least 90 % detected. Run: ``python benchmarks/alarms.py``
(``--series N`` for more or fewer simulated series; the default takes about a minute).
"""

from __future__ import annotations

import argparse
import datetime as dt
import math
import time

import numpy as np

from runlog.drift.detect import THRESHOLDS, judge

QUANTITIES = 4  # fill fraction, survival, coherence time, contrast
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


def false_alarms(rng: np.random.Generator, series: int, thresholds=THRESHOLDS) -> tuple[float, int, int]:
    alarms = judged = 0
    for _ in range(series):
        values, errors = stable_series(rng, DAYS, float(rng.choice([0.0, 0.5, 1.0])))
        judgement = judge(DATES, values, errors, thresholds=thresholds)
        alarms += len(judgement.excursions())
        judged += int((~judgement.learning).sum())
    per_quantity_month = alarms / judged * 30
    return per_quantity_month * QUANTITIES, alarms, judged


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


def wilson(successes: int, trials: int) -> tuple[float, float]:
    z = 1.959963984540054
    p = successes / trials
    centre = (p + z * z / (2 * trials)) / (1 + z * z / trials)
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / (1 + z * z / trials)
    return centre - half, centre + half


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=1000, help="simulated series per rate")
    parser.add_argument("--seed", type=int, default=2026)
    options = parser.parse_args()
    rng = np.random.default_rng(options.seed)
    tick = time.perf_counter()
    rate, alarms, judged = false_alarms(rng, options.series)
    # Poisson interval on the count of false alarms (normal approximation to its root).
    low = max(0.0, math.sqrt(alarms) - 0.98) ** 2 / judged * 30 * QUANTITIES
    high = (math.sqrt(alarms) + 0.98) ** 2 / judged * 30 * QUANTITIES
    next_day, two_after = detection(rng, options.series)
    print(f"thresholds: {THRESHOLDS.describe()}")
    print(f"false alarms: {rate:.2f} per apparatus-month ({QUANTITIES} quantities; {alarms} alarms in {judged} judged stable lab days; 95 % [{low:.2f}, {high:.2f}]); target <= about 1")
    for words, found in (("within 2 lab days (by the second lab day after the step's day)", two_after), ("on the step's day or the next", next_day)):
        d_low, d_high = wilson(found, options.series)
        print(f"detection of a 3-standard-error step {words}: {100 * found / options.series:.1f} % ({found} of {options.series}; 95 % [{100 * d_low:.1f}, {100 * d_high:.1f}] %); target >= 90 %")
    print(f"ratio to target: false alarms {rate / 1.0:.2f} x budget, detection {two_after / options.series / 0.9:.3f} x target ({time.perf_counter() - tick:.1f} s)")


if __name__ == "__main__":
    main()
