"""The value object every figure kind returns: one named number with its uncertainty and method.

A figure is computed from a run's shots, or the tool says it cannot be (``FitError``);
there is no placeholder value. ``method`` names how the value and its uncertainty were
obtained (for example ``wilson`` or ``least-squares``) and ``method_version`` lets a drift
plot months later compare like with like.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["Figure"]


@dataclass(frozen=True)
class Figure:
    """One named figure of merit of a run.

    ``unit`` is a pint-parsable unit string, ``""`` for dimensionless. Either ``stderr``
    or the interval ``ci_low``/``ci_high`` (95 % unless the method says otherwise) or
    both may be given.
    """

    name: str
    value: float
    unit: str = ""
    stderr: float | None = None
    ci_low: float | None = None
    ci_high: float | None = None
    method: str = ""
    method_version: str = "1"
    #: For counting figures: the counts behind ``value``, kept so days can pool them.
    successes: int | None = None
    trials: int | None = None
    #: For counting figures whose ``ci_low``/``ci_high`` are shot-level
    #: (:mod:`runlog.figures.shot_level`): the pooled binomial interval beside it, its
    #: method, and the sums over shots the shot-level interval came from.
    binomial_ci_low: float | None = None
    binomial_ci_high: float | None = None
    binomial_method: str | None = None
    shot_sums: object | None = None
    #: A fitted value outside its physical range (a contrast of a fraction signal above
    #: 1, :func:`runlog.figures.fitting.flag_out_of_range`): kept as fitted, flagged, and
    #: left out of rollups, drift and alarms.
    out_of_range: bool = False

    def __post_init__(self) -> None:
        if not self.name:
            raise ValueError("a figure needs a name")
        if not math.isfinite(self.value):
            raise ValueError(f"figure '{self.name}' has a non-finite value {self.value!r}")
        if self.stderr is not None and not (math.isfinite(self.stderr) and self.stderr >= 0):
            raise ValueError(f"figure '{self.name}' has an invalid stderr {self.stderr!r}")
        if (self.ci_low is None) != (self.ci_high is None):
            raise ValueError(f"figure '{self.name}' needs both interval ends or neither")
        if self.ci_low is not None and self.ci_high is not None and self.ci_low > self.ci_high:
            raise ValueError(f"figure '{self.name}' has an interval with low > high")

    def as_dict(self) -> dict[str, object]:
        """The JSON shape used by the CLI: value, unit, method and the uncertainty present."""
        out: dict[str, object] = {"value": self.value, "unit": self.unit}
        if self.stderr is not None:
            out["stderr"] = self.stderr
        if self.ci_low is not None:
            out["ci_low"] = self.ci_low
            out["ci_high"] = self.ci_high
        out["method"] = self.method
        if self.binomial_ci_low is not None:
            out["binomial_ci_low"] = self.binomial_ci_low
            out["binomial_ci_high"] = self.binomial_ci_high
            out["binomial_method"] = self.binomial_method
        if self.out_of_range:
            out["out_of_range"] = True
        return out
