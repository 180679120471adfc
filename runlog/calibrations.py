"""The calibration register: the current value of each calibration figure of each apparatus.

A calibration figure (the pi time, the resonance and the field, the detection threshold, the
trap lifetime ...) is current on an apparatus as measured by its latest run: the run that
started last among those of the apparatus that have the figure stored. The register says,
per apparatus and figure, that value with its uncertainty and unit, the run, when it
started, and how many days ago that was, so a sequence or a person can ask "what is the
current pi time of apparatus B". It reads stored figures only (``Catalogue.figures``); it
computes nothing.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runlog.catalogue import Catalogue

__all__ = ["CALIBRATION_FIGURES", "Calibration", "current_calibrations"]

#: The figures the register lists by default: what a lab recalibrates against.
CALIBRATION_FIGURES = (
    "pi_time", "rabi_frequency", "resonance", "linewidth", "field", "threshold", "fidelity",
    "false_positive", "false_negative", "t2", "t1", "t2_star", "envelope_time", "lifetime", "temperature",
    "visibility",
)


@dataclass(frozen=True)
class Calibration:
    """The current value of one calibration figure on one apparatus."""

    apparatus: str
    name: str
    value: float
    unit: str
    stderr: float | None
    ci_low: float | None
    ci_high: float | None
    method: str
    run: str
    started: dt.datetime
    age_days: float

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {"apparatus": self.apparatus, "name": self.name, "value": self.value, "unit": self.unit}
        if self.stderr is not None:
            out["stderr"] = self.stderr
        if self.ci_low is not None:
            out["ci_low"], out["ci_high"] = self.ci_low, self.ci_high
        out |= {"method": self.method, "run": self.run, "started": self.started.isoformat(), "age_days": self.age_days}
        return out


def current_calibrations(
    catalogue: Catalogue,
    *,
    apparatus: str | None = None,
    names: Iterable[str] | None = None,
    now: dt.datetime | None = None,
) -> list[Calibration]:
    """The latest stored value of each calibration figure per apparatus, by apparatus and name.

    ``names`` defaults to :data:`CALIBRATION_FIGURES`; ``now`` (UTC, default the clock) sets
    ``age_days``.
    """
    wanted = list(CALIBRATION_FIGURES if names is None else names)
    frame = catalogue.figures(apparatus=apparatus, names=wanted)
    now = now or dt.datetime.now(dt.timezone.utc)
    found: list[Calibration] = []
    if frame.empty:
        return found
    # figures() is ordered by start time: the last row of each group is the current one.
    latest = frame.groupby(["apparatus", "name"], sort=True).tail(1)
    for row in latest.sort_values(["apparatus", "name"]).itertuples(index=False):
        started = row.started if row.started.tzinfo else row.started.replace(tzinfo=dt.timezone.utc)
        found.append(
            Calibration(
                apparatus=row.apparatus,
                name=row.name,
                value=float(row.value),
                unit=row.unit or "",
                stderr=_number(row.stderr),
                ci_low=_number(row.ci_low),
                ci_high=_number(row.ci_high),
                method=row.method,
                run=row.run,
                started=started,
                age_days=(now - started).total_seconds() / 86400.0,
            )
        )
    return found


def _number(value: object) -> float | None:
    if value is None:
        return None
    number = float(value)
    return None if math.isnan(number) else number
