"""The plausible time window of lab records, and dates that stay safe at the calendar's edges.

A shot (or any other record of the lab: a monitor reading, a note) stamped before the lab
could have taken it or far in the future comes from a clock that was unset or a
corrupted page, not from an experiment. Such times also break what comes after the store:
Python's ``datetime`` ends at 9999-12-31, pandas' nanosecond times at 2262-04-11, and a
lab day one time zone east of UTC on 9999-12-31 is already past the end. So records are
refused outside a window (``[time_window]`` in runlog.toml, default 2000-01-01 to
2100-01-01, UTC), and the window itself must lie within 1900-01-01 to 2262-01-01.

For catalogues written before the window existed, :func:`shift_day` and :func:`clamp_day`
move dates without ever raising ``OverflowError``.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np

__all__ = ["TimeWindow", "DEFAULT_TIME_WINDOW", "WINDOW_LIMITS", "shift_day", "clamp_day", "day_start_utc"]

_UTC = dt.timezone.utc
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=_UTC)

#: The widest window that may be configured: inside pandas' nanosecond range and far from
#: the end of Python's calendar, so every lab day of an accepted time can be computed.
WINDOW_LIMITS = (dt.datetime(1900, 1, 1, tzinfo=_UTC), dt.datetime(2262, 1, 1, tzinfo=_UTC))


def _as_utc(value: dt.date | dt.datetime | str, what: str) -> dt.datetime:
    if isinstance(value, str):
        try:
            value = dt.datetime.fromisoformat(value)
        except ValueError:
            raise ValueError(f"{what} {value!r} is not an ISO date or time such as 2000-01-01") from None
    if isinstance(value, dt.datetime):
        return value.replace(tzinfo=_UTC) if value.tzinfo is None else value.astimezone(_UTC)
    if isinstance(value, dt.date):
        return dt.datetime.combine(value, dt.time(), _UTC)
    raise ValueError(f"{what} must be a date or a date and time, not {type(value).__name__}")


def _micros(moment: dt.datetime) -> int:
    delta = moment - _EPOCH
    return (delta.days * 86_400 + delta.seconds) * 1_000_000 + delta.microseconds


@dataclass(frozen=True)
class TimeWindow:
    """Times ``earliest <= t < latest`` (UTC) are plausible; others are refused.

    Dates or naive times are taken as UTC. Raises ``ValueError`` for an empty window or
    one outside :data:`WINDOW_LIMITS`.
    """

    earliest: dt.datetime
    latest: dt.datetime

    def __post_init__(self) -> None:
        earliest = _as_utc(self.earliest, "earliest")
        latest = _as_utc(self.latest, "latest")
        if not earliest < latest:
            raise ValueError(f"the time window is empty: earliest {earliest.date()} is not before latest {latest.date()}")
        low, high = WINDOW_LIMITS
        if earliest < low or latest > high:
            raise ValueError(f"the time window must lie within {low.date()} and {high.date()}")
        object.__setattr__(self, "earliest", earliest)
        object.__setattr__(self, "latest", latest)

    @property
    def earliest_us(self) -> int:
        """``earliest`` as integer microseconds since 1970-01-01 UTC."""
        return _micros(self.earliest)

    @property
    def latest_us(self) -> int:
        return _micros(self.latest)

    def outside(self, time_us: np.ndarray) -> np.ndarray:
        """Mask of the integer-microsecond UTC times that lie outside the window."""
        import numpy as np

        time_us = np.asarray(time_us, dtype=np.int64)
        return (time_us < self.earliest_us) | (time_us >= self.latest_us)

    def contains(self, moment: dt.datetime) -> bool:
        """Whether an aware ``datetime`` lies in the window (a naive one is taken as UTC)."""
        moment = moment.replace(tzinfo=_UTC) if moment.tzinfo is None else moment
        return self.earliest <= moment < self.latest

    def describe(self) -> str:
        """The window in words, for refusals: ``2000-01-01 to 2100-01-01 UTC``."""

        def text(moment: dt.datetime) -> str:
            return moment.date().isoformat() if moment.time() == dt.time() else moment.isoformat()

        return f"{text(self.earliest)} to {text(self.latest)} UTC"

    def why_outside(self, time_us: int) -> str:
        """The refusal text for one integer-microsecond time outside the window."""
        try:
            shown = (_EPOCH + dt.timedelta(microseconds=int(time_us))).isoformat()
        except OverflowError:
            years = int(time_us) / 1e6 / 86_400 / 365.2425 + 1970
            shown = f"around the year {years:.0f}"
        return f"time {shown} is outside the plausible window {self.describe()} (set [time_window] in runlog.toml if it is right)"


DEFAULT_TIME_WINDOW = TimeWindow(dt.datetime(2000, 1, 1, tzinfo=_UTC), dt.datetime(2100, 1, 1, tzinfo=_UTC))


def shift_day(day: dt.date, days: int) -> dt.date:
    """``day`` moved by ``days``, stopping at the first and last date Python knows."""
    try:
        return day + dt.timedelta(days=days)
    except OverflowError:
        return dt.date.max if days > 0 else dt.date.min


def clamp_day(day: dt.date, low: dt.date = dt.date.min, high: dt.date = dt.date.max) -> dt.date:
    """``day`` within ``low`` and ``high``."""
    return min(max(day, low), high)


def day_start_utc(day: dt.date, zone: dt.tzinfo = _UTC, days: int = 0) -> dt.datetime:
    """The UTC moment the lab day ``day + days`` starts in ``zone``. Past the calendar's
    ends it is the first or last moment Python can hold, so an interval ending "the day
    after 9999-12-31" still contains that day."""
    try:
        return dt.datetime.combine(day + dt.timedelta(days=days), dt.time(), zone).astimezone(_UTC)
    except OverflowError:
        late = day.year > 1 or days > 0
        return (dt.datetime.max if late else dt.datetime.min).replace(tzinfo=_UTC)
