"""Suspects of a change: what else moved across it, each judged by its own uncertainty.

A *candidate* is anything read on both sides of a change day: a constant parameter of the
runs, a per-shot measurement (one mean per run), another stored figure of the runs, or a
monitored time series (laser power, temperature, ...). Sources of candidates are kept in
a registry (:func:`register_source`), so a new kind joins the ranking without touching it:
a source is a function ``(connection, apparatus_id, window, quantity) -> list[Candidate]``.

Each candidate's move is standardised by its own uncertainty,

    z = (mean_after - mean_before) / sqrt(se_before^2 + se_after^2),

where a side's mean and standard error are the inverse-variance weighted mean of readings
that carry errors (the error scaled up by the Birge ratio when readings disagree beyond
them), or the plain mean and s/sqrt(n) of readings that do not. A figure that moved within
its own error bars therefore gets a small |z| and cannot outrank one that moved far outside
them. The two-sided p-value of z (normal; Student t with Welch-Satterthwaite degrees of
freedom for readings without errors) is corrected for the number of candidates with the
Benjamini-Hochberg step-up procedure (Benjamini & Hochberg 1995, J. R. Stat. Soc. B 57:289),
which keeps the expected share of false suspects among those called significant at
``alpha``. Readings within a day are correlated in time, so the p-values stay optimistic.

A constant parameter whose value differs between the sides has no scatter to judge by: it
is a deliberate *setting change*, listed apart from the ranking (``kind`` ``"parameter"``,
``setting_changed`` true) rather than given an infinite score.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import stats
from sqlalchemy.engine import Connection

from runlog.times import shift_day
from runlog.units import unit_text

__all__ = [
    "KINDS",
    "Candidate",
    "Window",
    "Suspect",
    "CandidateSource",
    "register_source",
    "sources",
    "standardised_change",
    "benjamini_hochberg",
    "rank",
]

#: The kinds of candidate a source may produce.
KINDS = ("parameter", "measurement", "figure", "monitor")


@dataclass(frozen=True)
class Window:
    """The lab days compared: ``before`` = [before_first, day - 1], ``after`` = [day, after_last]."""

    day: dt.date
    before_first: dt.date
    after_last: dt.date

    @classmethod
    def around(cls, day: dt.date, days: int = 3) -> "Window":
        return cls(day, shift_day(day, -days), shift_day(day, days - 1))


@dataclass(frozen=True)
class Candidate:
    """Readings of one candidate on each side of a change.

    ``errors_before`` / ``errors_after`` hold one standard error per reading (or are None
    when the readings carry none; their scatter is used instead). ``lag`` is how much
    earlier than the quantity the candidate is thought to act (a monitored series read
    ahead of the runs), in seconds; 0 for readings of the runs themselves.
    """

    name: str
    kind: str
    before: tuple[float, ...]
    after: tuple[float, ...]
    errors_before: tuple[float, ...] | None = None
    errors_after: tuple[float, ...] | None = None
    unit: str = ""
    lag: float = 0.0
    #: How many tests chose these readings (e.g. the lags a monitor was tried at); its
    #: p-value is multiplied by it (Bonferroni) before the Benjamini-Hochberg step.
    tests: int = 1

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"candidate kind must be one of {', '.join(KINDS)}, got {self.kind!r}")
        for side, values, errors in (("before", self.before, self.errors_before), ("after", self.after, self.errors_after)):
            if errors is not None and len(errors) != len(values):
                raise ValueError(f"candidate '{self.name}': {len(values)} readings {side} but {len(errors)} errors")


@dataclass(frozen=True)
class Suspect:
    """One ranked candidate: its standardised change and corrected significance."""

    name: str
    kind: str
    unit: str
    lag: float
    before_mean: float
    after_mean: float
    before_stderr: float
    after_stderr: float
    n_before: int
    n_after: int
    standardised_change: float
    p_value: float
    q_value: float = math.nan  # Benjamini-Hochberg adjusted p
    significant: bool = False
    setting_changed: bool = False
    words: str = field(default="")

    def as_dict(self) -> dict[str, object]:
        return {
            "name": self.name,
            "kind": self.kind,
            "unit": self.unit,
            "lag": self.lag,
            **({"lag_hours": self.lag / 3600.0} if self.kind == "monitor" else {}),
            "before_mean": self.before_mean,
            "after_mean": self.after_mean,
            "before_stderr": _finite(self.before_stderr),
            "after_stderr": _finite(self.after_stderr),
            "n_before": self.n_before,
            "n_after": self.n_after,
            "standardised_change": _finite(self.standardised_change),
            "p_value": _finite(self.p_value),
            "q_value": _finite(self.q_value),
            "significant": self.significant,
            "setting_changed": self.setting_changed,
            "words": self.words,
        }


def _finite(value: float) -> float | None:
    return float(value) if value is not None and math.isfinite(value) else None


CandidateSource = Callable[[Connection, int, Window, str], list[Candidate]]
_SOURCES: dict[str, CandidateSource] = {}


def register_source(name: str, source: CandidateSource) -> None:
    """Add (or replace) a named source of candidates; :func:`sources` lists them in order."""
    _SOURCES[name] = source


def sources() -> dict[str, CandidateSource]:
    return dict(_SOURCES)


def _side(values: Sequence[float], errors: Sequence[float] | None) -> tuple[float, float, float]:
    """Mean, standard error and degrees of freedom (inf when the errors are trusted)."""
    x = np.asarray(values, dtype=float)
    if errors is not None:
        e = np.asarray(errors, dtype=float)
        if np.all(np.isfinite(e)) and np.all(e > 0):
            w = 1.0 / e**2
            mean = float(np.sum(w * x) / np.sum(w))
            se = 1.0 / math.sqrt(float(np.sum(w)))
            if x.size > 1:
                birge = math.sqrt(float(np.sum(w * (x - mean) ** 2)) / (x.size - 1))
                se *= max(1.0, birge)
            return mean, se, math.inf
    mean = float(x.mean())
    if x.size < 2:
        return mean, math.nan, 0.0
    return mean, float(x.std(ddof=1)) / math.sqrt(x.size), float(x.size - 1)


def standardised_change(candidate: Candidate) -> tuple[float, float, float, float, float, float]:
    """(before mean, after mean, before se, after se, z, two-sided p) of one candidate."""
    mb, sb, db = _side(candidate.before, candidate.errors_before)
    ma, sa, da = _side(candidate.after, candidate.errors_after)
    # One reading on a side without errors: borrow the other side's scatter (a run's
    # reading is as noisy on one day as on the next) so a single run still counts.
    if math.isnan(sb) and not math.isnan(sa) and da != math.inf:
        sb, db = sa * math.sqrt(len(candidate.after)), da
    elif math.isnan(sa) and not math.isnan(sb) and db != math.inf:
        sa, da = sb * math.sqrt(len(candidate.before)), db
    difference = ma - mb
    if math.isnan(sa) or math.isnan(sb):
        return mb, ma, sb, sa, math.nan, math.nan
    se = math.hypot(sa, sb)
    if se == 0.0:
        z = 0.0 if difference == 0.0 else math.copysign(math.inf, difference)
        return mb, ma, sb, sa, z, (1.0 if difference == 0.0 else 0.0)
    z = difference / se
    if db == math.inf and da == math.inf:
        p = 2.0 * stats.norm.sf(abs(z))
    else:
        # Welch-Satterthwaite degrees of freedom of the combined error.
        terms = [(s**4 / d) for s, d in ((sa, da), (sb, db)) if d not in (0.0, math.inf)]
        df = se**4 / sum(terms) if terms else math.inf
        p = 2.0 * (stats.t.sf(abs(z), df) if math.isfinite(df) else stats.norm.sf(abs(z)))
    return mb, ma, sb, sa, z, float(p)


def benjamini_hochberg(p_values: Sequence[float]) -> np.ndarray:
    """Adjusted p-values (q) of the Benjamini-Hochberg step-up procedure; NaN stays NaN.

    q_(i) = min_{j >= i} m p_(j) / j over the m finite p-values sorted ascending
    (Benjamini & Hochberg 1995, J. R. Stat. Soc. B 57:289).
    """
    p = np.asarray(p_values, dtype=float)
    q = np.full(p.shape, np.nan)
    finite = np.flatnonzero(np.isfinite(p))
    m = finite.size
    if m == 0:
        return q
    order = finite[np.argsort(p[finite], kind="stable")]
    scaled = p[order] * m / np.arange(1, m + 1)
    q[order] = np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])
    return q


def _words(s: Suspect) -> str:
    unit = f" {unit_text(s.unit)}" if s.unit else ""  # words for people: µK, µs
    if s.setting_changed:
        return f"setting {s.name} changed from {s.before_mean:.4g} to {s.after_mean:.4g}{unit}"
    if not math.isfinite(s.standardised_change):
        return f"{s.kind} {s.name}: too few readings to judge ({s.n_before} before, {s.n_after} after)"
    how = "moved beyond its errors" if s.significant else "moved within its errors"
    return f"{s.kind} {s.name} {how}: {s.before_mean:.4g} -> {s.after_mean:.4g}{unit} ({s.standardised_change:+.1f} standard errors)"


def rank(candidates: Sequence[Candidate], *, alpha: float = 0.05) -> list[Suspect]:
    """Setting changes first, then candidates by |standardised change|, largest first.

    Candidates whose value is identical and constant on both sides are dropped (nothing
    moved). ``significant`` marks a Benjamini-Hochberg q below ``alpha``.
    """
    suspects: list[Suspect] = []
    for c in candidates:
        if not len(c.before) or not len(c.after):
            continue
        mb, ma, sb, sa, z, p = standardised_change(c)
        if c.tests > 1 and np.isfinite(p):
            p = min(1.0, p * c.tests)
        constant = c.kind == "parameter" and np.ptp(c.before) == 0 and np.ptp(c.after) == 0
        if constant and mb == ma:
            continue
        suspects.append(Suspect(c.name, c.kind, c.unit, c.lag, mb, ma, sb, sa, len(c.before), len(c.after), z, p, setting_changed=bool(constant)))
    ranked = [s for s in suspects if not s.setting_changed]
    q = benjamini_hochberg([s.p_value for s in ranked])
    out = [_with(s, q=math.nan, significant=True) for s in suspects if s.setting_changed]
    out.sort(key=lambda s: s.name)
    judged = [_with(s, q=float(qi), significant=bool(np.isfinite(qi) and qi < alpha)) for s, qi in zip(ranked, q)]
    judged.sort(key=lambda s: (not math.isfinite(s.standardised_change), -abs(s.standardised_change) if math.isfinite(s.standardised_change) else 0.0, s.name))
    return out + judged


def _with(s: Suspect, *, q: float, significant: bool) -> Suspect:
    from dataclasses import replace

    done = replace(s, q_value=q, significant=significant)
    return replace(done, words=_words(done))
