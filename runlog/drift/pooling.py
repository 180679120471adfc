"""How the runs of one lab day pool into one drift point.

Every path that makes a daily point - the daily rollup table kept at ingest
(:mod:`runlog.store.rollups`) and the points made on the fly from the figures of chosen
runs (:func:`runlog.drift.series.filtered_points`) - goes through this module: each run's
figure becomes a set of additive sums, added over the runs of a group (:func:`grouped_sums`;
a rollup row holds the sums of one sequence, a day adds its rows with :func:`add_sums`),
and the day's point is made from the sums (:func:`day_point`). So the rollups and
the figures give the same point, to rounding.

Counting figures (fill fraction, survival, loss) pool their counts: the day's fraction,
with the shot-level interval of :mod:`runlog.figures.shot_level` over all its shots (the
Wilson interval and binomial standard error when a run lacks the sums over shots).

Fitted figures pool in one of three arithmetics, chosen by the figure's unit:

* **linear** (contrast, frequencies, ...): the inverse-variance weighted mean of the runs
  that have a stderr, its standard error ``1/sqrt(sum w)`` scaled by the Birge ratio
  ``sqrt(chi2 / (k - 1))`` when the ``k`` weighted runs disagree beyond their errors (Birge
  R.T. 1932, Phys. Rev. 40:207). Runs without a stderr do not enter the weighted mean nor
  the Birge ratio's ``k``; a day with no weighted run takes the plain mean and the spread
  between runs over ``sqrt(n)``.
* **circular** (phases, in an angle unit): the weighted mean direction
  ``atan2(sum w sin, sum w cos)`` (Mardia K.V. & Jupp P.E. 2000, Directional Statistics,
  Wiley, section 2.2.1), wrapped to (-half period, half period]; its stderr is
  ``1/sqrt(sum w)`` widened by a Birge ratio whose ``chi2 = sum w 2 (1 - cos(theta - mean))
  = 2 (sum w - |sum w e^(i theta)|)`` (the squared chord between each phase and the mean:
  ``(theta - mean)^2`` for small residuals, and additive, so a rollup row can hold it); the
  spread is the circular standard deviation ``sqrt(-2 ln R)`` (ibid. eq. 2.3.14). A mean
  of 359 deg and 1 deg is 0 deg, not 180 deg. Without stderrs the standard error is the
  circular standard deviation over ``sqrt(n)``.
* **logarithmic** (lifetimes and other times): a time's fitted stderr grows with the time,
  so weights ``1/stderr^2`` of the times themselves favour the short ones and pull the
  mean low. The day pools ``ln T`` instead, whose stderr ``stderr/T`` does not grow with
  ``T``: the weighted mean of ``ln T`` (with the Birge ratio), back-transformed, so the day's
  value is a weighted geometric mean and its interval ``exp(mean ± 1.96 se)`` is
  asymmetric; the reported stderr is ``T * se`` (first order). A day with a time <= 0
  (no logarithm) pools linearly.

Figures flagged ``out_of_range`` (a contrast outside its physical range) never reach
this module: the readers leave them out.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence

import numpy as np

__all__ = ["ARITHMETICS", "COUNTS", "SUMS", "arithmetic_of", "half_period", "grouped_sums", "add_sums", "day_point", "pool"]

Z95 = 1.959963984540054
ARITHMETICS = ("linear", "circular", "logarithmic")

#: The additive sums of a day's (or a rollup group's) runs, by the rollup column that keeps
#: each. Counting sums are None for a fitted figure; the circular sums for a figure that
#: is not an angle, the logarithmic ones for one that is not a time.
SUMS = (
    "runs", "shots", "successes", "trials", "counted_shots", "successes_squares", "trials_squares", "successes_trials",
    "value_count", "value_sum", "value_square_sum", "weighted_count", "weight_sum", "weighted_value_sum", "weighted_square_sum",
    "cosine_sum", "sine_sum", "weighted_cosine_sum", "weighted_sine_sum",
    "positive_count", "log_sum", "log_square_sum", "log_weight_sum", "weighted_log_sum", "weighted_log_square_sum",
)


def _root(unit: str):
    from runlog.units import registry

    try:
        return registry().get_root_units(unit or "dimensionless")
    except Exception:  # pint raises several unrelated types for a unit it does not know
        return None


def arithmetic_of(unit: str) -> str:
    """``circular`` for an angle unit, ``logarithmic`` for a time unit, else ``linear``."""
    if not unit:
        return "linear"
    root = _root(unit)
    if root is None:
        return "linear"
    # pint treats angles as dimensionless: an angle is a unit whose root unit is the radian.
    if str(root[1]) == "radian":
        return "circular"
    if str(root[1]) == "second":
        return "logarithmic"
    return "linear"


def half_period(unit: str) -> float:
    """Half a turn in ``unit`` (180 for deg, pi for rad)."""
    factor = _root(unit)[0]
    return math.pi / factor


COUNTS = ("successes", "trials", "counted_shots", "successes_squares", "trials_squares", "successes_trials")
_INTEGERS = ("runs", "shots", "successes", "trials", "counted_shots", "value_count", "weighted_count", "positive_count")


def grouped_sums(groups: Sequence[object], values: object, stderrs: object, unit: str, *, shots: object = None, counts: Mapping[str, Sequence[object]] | None = None) -> dict[object, dict[str, object]]:
    """The additive sums of :data:`SUMS` of the runs of each group (a day, a figure name),
    in order of first appearance: ``groups``, ``values``, ``stderrs`` (None or NaN where a
    run has none) and ``shots`` hold one entry per run; ``counts`` a counting figure's
    ``successes``, ``trials`` and sums over shots per run (a group with a run lacking one
    has None there). Vectorised: a year of runs is summed in a few numpy passes."""
    index: dict[object, int] = {}
    codes = np.fromiter((index.setdefault(g, len(index)) for g in groups), dtype=np.int64, count=len(groups))
    k = len(index)

    def total(array: np.ndarray) -> np.ndarray:
        return np.bincount(codes, weights=array, minlength=k)

    values = np.asarray(values, dtype=float)
    errors = np.array([np.nan if e is None else e for e in stderrs], dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        weighted = np.isfinite(errors) & (errors > 0)
        weight = np.where(weighted, 1.0 / errors**2, 0.0)
    columns: dict[str, np.ndarray | None] = dict.fromkeys(SUMS)
    columns.update(
        runs=total(np.ones(len(values))), shots=total(np.zeros(len(values)) if shots is None else np.asarray(shots, dtype=float)),
        value_count=total(np.ones(len(values))), value_sum=total(values), value_square_sum=total(values * values),
        weighted_count=total(weighted.astype(float)), weight_sum=total(weight), weighted_value_sum=total(weight * values), weighted_square_sum=total(weight * values * values),
    )
    for name in COUNTS:
        given = (counts or {}).get(name)
        if given is None:
            continue
        array = np.array([np.nan if c is None else c for c in given], dtype=float)
        missing = total(np.isnan(array).astype(float)) > 0
        columns[name] = np.where(missing, np.nan, total(np.nan_to_num(array)))
    arithmetic = arithmetic_of(unit)
    if arithmetic == "circular":
        angles = values * math.pi / half_period(unit)
        cosine, sine = np.cos(angles), np.sin(angles)
        columns.update(cosine_sum=total(cosine), sine_sum=total(sine), weighted_cosine_sum=total(weight * cosine), weighted_sine_sum=total(weight * sine))
    elif arithmetic == "logarithmic":
        positive = values > 0
        logs = np.log(np.where(positive, values, 1.0))
        # The stderr of ln T is stderr / T: its weight (T / stderr)^2.
        with np.errstate(divide="ignore", invalid="ignore"):
            log_weight = np.where(weighted & positive, (values / errors) ** 2, 0.0)
        columns.update(
            positive_count=total(positive.astype(float)), log_sum=total(logs), log_square_sum=total(logs * logs),
            log_weight_sum=total(log_weight), weighted_log_sum=total(log_weight * logs), weighted_log_square_sum=total(log_weight * logs * logs),
        )
    out = {}
    for group, i in index.items():
        sums: dict[str, object] = {}
        for name in SUMS:
            column = columns[name]
            if column is None or np.isnan(column[i]):
                sums[name] = None
            else:
                sums[name] = int(round(column[i])) if name in _INTEGERS else float(column[i])
        out[group] = sums
    return out


def add_sums(parts: Iterable[Mapping[str, object]]) -> dict[str, object] | None:
    """The sums of several runs (or rollup rows). A sum that one part lacks (None) is None:
    a day is shot-level only when all of its runs are, circular only when all are angles."""
    total: dict[str, object] | None = None
    for part in parts:
        if total is None:
            total = {name: part.get(name) for name in SUMS}
            continue
        for name in SUMS:
            a, b = total[name], part.get(name)
            total[name] = None if a is None or b is None else a + b
    return total


def _birge(chi2: float, k: int) -> float:
    if k < 2:
        return 1.0
    return max(1.0, math.sqrt(max(0.0, chi2) / (k - 1)))


def _spread(count: int, total: float, squares: float) -> float | None:
    if count < 2:
        return None
    return math.sqrt(max(0.0, (squares - total * total / count) / (count - 1)))


def _mean_and_error(sums: Mapping[str, object], prefix: str, count_key: str, total_key: str, squares_key: str) -> tuple[float, float]:
    """The weighted mean of one coordinate (the value, or ln T) with its Birge-scaled
    standard error; without weighted runs the plain mean and the spread over sqrt(n)."""
    weight, k = float(sums[f"{prefix}weight_sum"] or 0.0), int(sums["weighted_count"] or 0)
    count = int(sums[count_key])
    if k and weight > 0:
        weighted = float(sums[f"weighted_{prefix or 'value_'}sum"])
        mean = weighted / weight
        chi2 = float(sums[f"weighted_{prefix or ''}square_sum"]) - weighted * weighted / weight
        return mean, _birge(chi2, k) / math.sqrt(weight)
    spread = _spread(count, float(sums[total_key]), float(sums[squares_key]))
    return float(sums[total_key]) / count, spread / math.sqrt(count) if spread is not None else math.nan


def _linear(sums: Mapping[str, object]) -> tuple[float, float, float, float, float | None]:
    spread = _spread(int(sums["value_count"]), float(sums["value_sum"]), float(sums["value_square_sum"]))
    mean, stderr = _mean_and_error(sums, "", "value_count", "value_sum", "value_square_sum")
    return mean, mean - Z95 * stderr, mean + Z95 * stderr, stderr, spread


def _circular(sums: Mapping[str, object], unit: str) -> tuple[float, float, float, float, float | None]:
    half = half_period(unit)
    to_rad = math.pi / half
    count = int(sums["value_count"])
    resultant = min(1.0, math.hypot(float(sums["cosine_sum"]), float(sums["sine_sum"])) / count)
    spread = math.sqrt(-2.0 * math.log(resultant)) / to_rad if count > 1 and resultant > 0 else None
    weight, k = float(sums["weight_sum"] or 0.0) / to_rad**2, int(sums["weighted_count"] or 0)
    if k and weight > 0:
        cosine, sine = float(sums["weighted_cosine_sum"]) / to_rad**2, float(sums["weighted_sine_sum"]) / to_rad**2
        mean = math.atan2(sine, cosine)
        chi2 = 2.0 * (weight - math.hypot(cosine, sine))
        stderr = _birge(chi2, k) / math.sqrt(weight)
    else:
        mean = math.atan2(float(sums["sine_sum"]), float(sums["cosine_sum"]))
        stderr = (spread * to_rad) / math.sqrt(count) if spread is not None else math.nan
    mean, stderr = mean / to_rad, stderr / to_rad
    if mean <= -half:
        mean += 2 * half
    return mean, mean - Z95 * stderr, mean + Z95 * stderr, stderr, spread


def _logarithmic(sums: Mapping[str, object]) -> tuple[float, float, float, float, float | None]:
    count = int(sums["value_count"])
    if int(sums["positive_count"]) < count:
        # ln T needs T > 0; a day with a non-positive fitted time is pooled linearly, as it stands.
        return _linear(sums)
    spread = _spread(count, float(sums["value_sum"]), float(sums["value_square_sum"]))
    mean, error = _mean_and_error(sums, "log_", "value_count", "log_sum", "log_square_sum")
    value = math.exp(mean)
    return value, math.exp(mean - Z95 * error), math.exp(mean + Z95 * error), value * error, spread


def _counting(sums: Mapping[str, object]) -> tuple[float, float, float, float, None]:
    from runlog.figures.intervals import wilson
    from runlog.figures.shot_level import ShotSums, shot_level_interval

    successes, trials = int(sums["successes"]), int(sums["trials"])
    p = successes / trials
    if sums["counted_shots"] is not None and sums["successes_squares"] is not None:
        honest = shot_level_interval(ShotSums(int(sums["counted_shots"]), successes, trials, float(sums["successes_squares"]), float(sums["trials_squares"]), float(sums["successes_trials"])))
        if honest is not None:
            return p, honest.low, honest.high, honest.stderr, None
    low, high = wilson(successes, trials)
    return p, low, high, math.sqrt(p * (1 - p) / trials), None


def day_point(sums: Mapping[str, object] | None, unit: str) -> tuple[float, float, float, float, float | None] | None:
    """A day's ``(value, ci_low, ci_high, stderr, spread)`` from the added sums of its runs:
    counting figures by their counts, fitted ones in the arithmetic of ``unit``. None when
    the day has no value."""
    if sums is None or not sums.get("value_count"):
        return None
    if sums.get("trials"):
        return _counting(sums)
    arithmetic = arithmetic_of(unit)
    if arithmetic == "circular" and sums.get("cosine_sum") is not None:
        return _circular(sums, unit)
    if arithmetic == "logarithmic" and sums.get("positive_count") is not None:
        return _logarithmic(sums)
    return _linear(sums)


def pool(values: object, stderrs: object, unit: str) -> tuple[float, float, float, float, float | None]:
    """One day's ``(value, ci_low, ci_high, stderr, spread)`` from its runs' fitted figures
    (``stderrs`` None or NaN where a run has none), in the arithmetic its unit calls for."""
    values = np.asarray(values, dtype=float)
    if not len(values):
        return None
    return day_point(grouped_sums([0] * len(values), values, list(stderrs), unit)[0], unit)
