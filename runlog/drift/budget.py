"""The false-alarm budget of an apparatus, shared by the quantities it judges.

The alarm thresholds (:data:`runlog.drift.detect.THRESHOLDS`) are calibrated by simulation
(``benchmarks/alarms.py --calibrate``, docs/drift.md) for an apparatus that judges
:data:`CALIBRATED_QUANTITIES` quantities: about one false alarm per apparatus-month across
them. An apparatus whose runs yield more quantities (every fit adds its parameters: an
offset, a phase, a frequency ...) would spend the budget once per quantity, so its
quantities share it instead: the two-day limit, which carries nearly all the false alarms,
is raised until its tail probability is the calibrated one split ``count / 4`` ways
(Bonferroni's split of one error rate among several tests; Dunn 1961, JASA 56:52):

    limit(count) = Phi^-1(1 - (1 - Phi(limit_4)) * 4 / count)     for count > 4.

A false alarm is an excursion's first day, and the rate of those follows the tail of the
two-day statistic closely (the calibration table: 2.9 against 2.55 gives 0.34 of the
alarms, the tail ratio is 0.35); ``benchmarks/alarms.py --quantities N`` measures the
apparatus' rate and the detection rate at the raised limit. Fewer quantities keep the
calibrated limit (the budget is an upper bound, not a target). The price is stated, not
hidden: a 3-standard-error step is flagged less often on an apparatus with many quantities.

A quantity that mirrors another of the same shots exactly (``loss`` is 1 - ``survival``)
raises no alarm of its own and takes no share: its excursions are the other's.
Quantities judged are those with more lab days than the baseline's warm-up (before that
none can raise an alarm).
"""

from __future__ import annotations

from dataclasses import replace
from statistics import NormalDist

from sqlalchemy import func, select
from sqlalchemy.engine import Connection

from runlog.drift.detect import THRESHOLDS, Thresholds
from runlog.store import schema as s

__all__ = ["CALIBRATED_QUANTITIES", "MIRRORED", "judged_quantities", "thresholds_for"]

#: How many quantities of one apparatus the calibrated thresholds share the budget among.
CALIBRATED_QUANTITIES = 4

#: Quantities that mirror another of the same shots exactly (value = 1 - other): the
#: other's alarms are theirs.
MIRRORED = {"loss": "survival"}


def thresholds_for(count: int, thresholds: Thresholds = THRESHOLDS) -> Thresholds:
    """``thresholds`` with the two-day limit raised so that ``count`` quantities share the
    budget calibrated for :data:`CALIBRATED_QUANTITIES`."""
    if count <= CALIBRATED_QUANTITIES:
        return thresholds
    normal = NormalDist()
    tail = (1.0 - normal.cdf(thresholds.pair_limit)) * CALIBRATED_QUANTITIES / count
    return replace(thresholds, pair_limit=round(normal.inv_cdf(1.0 - tail), 3))


def judged_quantities(connection: Connection, apparatus_id: int, thresholds: Thresholds = THRESHOLDS) -> list[str]:
    """The quantities of an apparatus that share its budget: stored in its daily rollups
    on more lab days than the warm-up, mirrored ones left out."""
    days = func.count(func.distinct(s.DailyRollup.day))
    query = (
        select(s.DailyRollup.name)
        .where(s.DailyRollup.apparatus_id == apparatus_id)
        .group_by(s.DailyRollup.name)
        .having(days > thresholds.warmup)
    )
    return sorted(name for name in connection.execute(query).scalars() if name not in MIRRORED)
