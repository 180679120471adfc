"""What every dashboard page shares: the catalogue, cached queries, colours and formats.

The catalogue URL comes from the environment variable ``RUNLOG_DB``, set for the server
process by ``runlog dashboard`` (:mod:`runlog.dashboard`). One :class:`~runlog.Catalogue` per
URL lives for the life of the server (``st.cache_resource``). Query results are cached per
URL and arguments for :data:`CACHE_SECONDS` (``st.cache_data``): long enough that moving a
widget does not ask the database again, short enough that a run ingested by ``runlog watch``
shows up within a minute. Writes (notes, acknowledged alarms) clear the cached results.

Every function here is a thin wrapper over the catalogue's Python API or
:mod:`runlog.derive`; reshaping for the charts happens here, never statistics.

Times: runs, notes and ingest entries are stored in UTC and shown in the lab time zone
(``catalogue.lab_timezone``). Charts place them on a time axis in the lab's wall-clock time,
written as ISO text with a ``Z`` and drawn on a UTC scale, so a browser in another time zone
shows the lab's hours and days.
"""

from __future__ import annotations

import datetime as dt
import math
import os
import re
from dataclasses import dataclass
from functools import lru_cache
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import streamlit as st

import runlog
from runlog.dashboard import URL_VARIABLE
from runlog.monitors.overlay import STOPPED_INTERVALS, duration_words, stopped_words
from runlog.errors import RunlogError
from runlog.redaction import scrub
from runlog.units import unit_text  # one spelling of units for every page (in __all__)

__all__ = [
    "CACHE_SECONDS",
    "add_note",
    "acknowledge",
    "HEADLINE",
    "PALETTE",
    "SERIES_COLOURS",
    "URL_VARIABLE",
    "alarms",
    "annotations",
    "apparatus_names",
    "axis_title",
    "catalogue",
    "catalogue_url",
    "clear_cached_results",
    "counts",
    "drift_view",
    "figure_names",
    "figure_units",
    "figures_table",
    "fit_curve",
    "ingest_log",
    "lab_days",
    "lab_timezone",
    "label",
    "mixed_units",
    "monitor_list",
    "monitor_names",
    "monitor_overlay",
    "duration_words",
    "stopped_words",
    "STOPPED_INTERVALS",
    "parameters_table",
    "run_info",
    "runs_table",
    "sequences",
    "shots_table",
    "show_error",
    "site_map",
    "unit_text",
    "wall_clock",
    "what_else_changed",
    "with_uncertainty",
]

CACHE_SECONDS = 60

#: Okabe & Ito (2008), "Color Universal Design": eight colours told apart with every common
#: form of colour blindness.
PALETTE = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}
#: Colours for one series per run, in this order (yellow last: weak on white).
SERIES_COLOURS = [PALETTE[c] for c in ("blue", "orange", "green", "vermillion", "sky blue", "purple", "black", "yellow")]

#: The figures the overview leads with and the drift page opens on.
HEADLINE = ("fill_fraction", "survival", "t2_star", "contrast")


# --- the catalogue -----------------------------------------------------------------------


def catalogue_url() -> str:
    """The URL the server was started for (else runlog's own default, as the CLI does)."""
    from runlog.store.engine import resolve_url

    return resolve_url(os.environ.get(URL_VARIABLE) or None)


@st.cache_resource(show_spinner=False)
def catalogue(url: str) -> runlog.Catalogue:
    """The open catalogue of ``url``, shared by every session of this server."""
    return runlog.open(url, create=False)


@dataclass(frozen=True)
class Writer:
    """Who may write from this session. ``allowed`` is off on a read-only server or while no
    authenticated user is known (``why`` says which); ``fixed``: the server names the author
    (``author``, from ``source``), else the forms ask for a name."""

    allowed: bool
    fixed: bool
    author: str | None = None
    source: str = ""
    why: str | None = None


def request_headers():
    """The headers of this session's request (as the proxy in front passed them on)."""
    return st.context.headers


def writer() -> Writer:
    """Who writes notes and acknowledgements from this session, from the server's settings
    (:mod:`runlog.dashboard`): a trusted proxy's header, Streamlit's login, or anyone."""
    from runlog.dashboard import AUTHOR_HEADER_VARIABLE, LOGIN_VARIABLE, WRITES_VARIABLE

    if os.environ.get(WRITES_VARIABLE, "").lower() == "off":
        return Writer(False, False, why="writing from the dashboard is switched off on this server; add notes with 'runlog note'")
    header = os.environ.get(AUTHOR_HEADER_VARIABLE)
    if header:
        # Only the proxy may set it: the server must be reachable through the proxy alone.
        value = (request_headers().get(header) or "").strip()
        if value and value.isprintable() and len(value) <= 200:
            return Writer(True, True, value, f"the lab login ({header})")
        return Writer(False, True, source=header, why=f"no authenticated user in the {header} header: notes need the lab's login in front of the dashboard")
    if os.environ.get(LOGIN_VARIABLE) == "1":
        if getattr(st.user, "is_logged_in", False):
            name = st.user.get("email") or st.user.get("name")
            if name:
                return Writer(True, True, str(name), "your login")
        return Writer(False, True, source="login", why="log in to add notes")
    return Writer(True, False)


def clear_cached_results() -> None:
    """Forget cached query results (after a write, or when the user asks for fresh data)."""
    st.cache_data.clear()


def add_note(url: str, text: str, *, run: str | None = None, apparatus: str | None = None, at: dt.datetime | None = None, author: str | None = None) -> int:
    """``catalogue.annotate``; the cached results are cleared so every page shows the note."""
    number = catalogue(url).annotate(text, run=run, apparatus=apparatus, at=at, author=author or None)
    clear_cached_results()
    return number


def acknowledge(url: str, alarm: int, note: str, *, author: str | None = None, accept: bool = False) -> int:
    """``catalogue.acknowledge``; returns the annotation holding the note."""
    number = catalogue(url).acknowledge(alarm, note, author=author or None, accept=accept)
    clear_cached_results()
    return number


def show_error(error: Exception) -> None:
    """A runlog error as one line on the page; anything else is a bug and keeps its traceback."""
    if isinstance(error, RunlogError):
        st.error(scrub(str(error)))
    else:
        raise error


# --- names, units, times ---------------------------------------------------------------


def label(name: str) -> str:
    """``fill_fraction`` -> ``fill fraction``."""
    return name.replace("_", " ")


@lru_cache(maxsize=256)
def with_uncertainty(value: float | None, stderr: float | None = None, unit: str | None = None) -> str:
    """``656.9, 72.4, "us"`` -> ``657 ± 72 µs``: the error to two significant digits, the value
    to the same decimal place (common practice, no published source)."""
    if value is None or not math.isfinite(value):
        return "–"
    unit = unit_text(unit)
    suffix = f" {unit}" if unit else ""
    if stderr is None or not math.isfinite(stderr) or stderr <= 0:
        return f"{value:.4g}{suffix}"
    decimals = max(0, 1 - math.floor(math.log10(stderr)))
    if decimals > 9:
        return f"{value:.3e} ± {stderr:.2g}{suffix}"
    return f"{value:.{decimals}f} ± {stderr:.{decimals}f}{suffix}"


def axis_title(name: str, unit: str | None) -> str:
    """An axis title with its unit: ``coherence time [µs]``, ``survival (dimensionless)``."""
    unit = unit_text(unit)
    return f"{label(name)} [{unit}]" if unit else f"{label(name)} (dimensionless)"


def wall_clock(moments: pd.Series, zone: str) -> pd.Series:
    """UTC times as the lab's wall-clock time, ISO text ending in ``Z`` for a UTC-scale axis."""
    local = pd.to_datetime(moments, utc=True).dt.tz_convert(ZoneInfo(zone))
    return local.dt.strftime("%Y-%m-%dT%H:%M:%SZ")


# --- cached queries (all keyed on the URL first) --------------------------------------------

_cached = st.cache_data(ttl=CACHE_SECONDS, show_spinner=False)


@_cached
def lab_timezone(url: str) -> str:
    return catalogue(url).lab_timezone


@_cached
def counts(url: str) -> dict[str, int]:
    return catalogue(url).counts()


@_cached
def runs_table(url: str, apparatus: str | None = None, sequence: str | None = None) -> pd.DataFrame:
    """Runs, newest first, with ``day`` (lab day) and ``local_start`` (lab time) added."""
    frame = catalogue(url).runs(apparatus=apparatus, sequence=sequence)
    zone = ZoneInfo(lab_timezone(url))
    local = pd.to_datetime(frame["started"], utc=True).dt.tz_convert(zone)
    frame["day"] = local.dt.date
    frame["local_start"] = local.dt.strftime("%Y-%m-%d %H:%M")
    return frame


# Pickers ask the catalogue for distinct values only: the runs or figures of a busy
# apparatus take seconds to read, their names and days milliseconds.


@_cached
def apparatus_names(url: str) -> list[str]:
    """The apparatus with runs, sorted."""
    return catalogue(url).apparatus_names()


@_cached
def lab_days(url: str, apparatus: str) -> list[dt.date]:
    """Lab days with runs on ``apparatus``, newest first."""
    return catalogue(url).lab_days(apparatus=apparatus)


@_cached
def sequences(url: str, apparatus: str) -> list[str]:
    """The sequences with runs on ``apparatus``, sorted."""
    return catalogue(url).sequences(apparatus=apparatus)


@_cached
def figure_units(url: str, apparatus: str) -> pd.DataFrame:
    """Every distinct (name, unit, sequence) of the figures stored for ``apparatus``."""
    return catalogue(url).figure_units(apparatus=apparatus)


def _sequences_by_unit(url: str, apparatus: str) -> dict[str, dict[str, list[str]]]:
    """name -> stored unit -> the sequences storing it in that unit."""
    found: dict[str, dict[str, list[str]]] = {}
    for name, unit, sequence in figure_units(url, apparatus).itertuples(index=False):
        found.setdefault(name, {}).setdefault(unit, []).append(sequence)
    return found


def figure_names(url: str, apparatus: str) -> dict[str, str]:
    """Every figure stored for ``apparatus``: name -> stored unit. A name stored in several
    units (see :func:`mixed_units`) maps to all of them as people write them: ``deg, rad``."""
    return {
        name: next(iter(units)) if len(units) == 1 else ", ".join(unit_text(unit) or "no unit" for unit in units)
        for name, units in _sequences_by_unit(url, apparatus).items()
    }


def mixed_units(url: str, apparatus: str) -> dict[str, list[str]]:
    """Figures stored under one name in several units (``phase``: deg from fringes, rad from
    Ramsey fits), with the sequences of each unit."""
    return {
        name: [f"{unit_text(unit) or 'no unit'} ({', '.join(sequences)})" for unit, sequences in units.items()]
        for name, units in _sequences_by_unit(url, apparatus).items()
        if len(units) > 1
    }


@_cached
def figures_table(url: str, apparatus: str | None = None, since: dt.date | None = None, until: dt.date | None = None, runs: tuple[str, ...] | None = None) -> pd.DataFrame:
    return catalogue(url).figures(apparatus=apparatus, since=since, until=until, runs=list(runs) if runs is not None else None)


@_cached
def parameters_table(url: str, apparatus: str | None = None) -> pd.DataFrame:
    return catalogue(url).parameters(apparatus=apparatus)


@_cached
def alarms(url: str, apparatus: str | None = None, status: str | None = "open") -> list[dict[str, object]]:
    return catalogue(url).alarms(status=status, apparatus=apparatus)


@_cached
def annotations(url: str, apparatus: str | None = None) -> pd.DataFrame:
    frame = catalogue(url).annotations(apparatus=apparatus)
    if len(frame):
        frame["local_time"] = pd.to_datetime(frame["at"], utc=True).dt.tz_convert(ZoneInfo(lab_timezone(url))).dt.strftime("%Y-%m-%d %H:%M")
    return frame


@_cached
def ingest_log(url: str, limit: int = 200) -> pd.DataFrame:
    return catalogue(url).ingest_log(limit=limit)


@_cached
def run_info(url: str, run: str, apparatus: str) -> runlog.RunInfo:
    return catalogue(url).run(run, apparatus=apparatus)


@_cached
def series_fits(url: str) -> list[dict]:
    """The series across runs in force (the newest fit of each name)."""
    return catalogue(url).series_fits()


#: How each series model reads, for the chart's title.
SERIES_FORMULAS = {"exponential": "y = A exp(−k x)", "power_law": "y = A x^b", "linear": "y = a + b x"}


def series_curve(made: dict):
    """A series as the run page's fit chart draws a fit: the member runs' values and the
    fitted model over their parameter range (``runlog.figures.across_runs.series_model``)."""
    from types import SimpleNamespace

    from runlog.figures.across_runs import series_model

    x = np.array([m["x"] for m in made["members"]], dtype=float)
    y = np.array([m["y"] for m in made["members"]], dtype=float)
    curve_x = np.linspace(float(x.min()), float(x.max()), 200)
    curve_y = series_model(made["model"])(curve_x, *made["params"])
    return SimpleNamespace(
        x=x, y=y, curve_x=curve_x, curve_y=curve_y, x_name=made["parameter"], x_unit=made["x_unit"], y_name=made["figure"], y_unit=made["y_unit"],
        formula=f"{made['name']}: {SERIES_FORMULAS.get(made['model'], made['model'])}",
    )


@_cached
def versions_and_impact(url: str, run: str, apparatus: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The run's analysis versions (oldest first) and its impact report (what the current
    version moved against the one before, or a figure derived again against its record before)."""
    opened = catalogue(url)
    versions = pd.DataFrame(
        [
            {
                "analysis": v["analysis"] or "(unnamed)",
                "current": bool(v["current"]),
                "withdrawn": bool(v["withdrawn"]),
                "shots": v["shots"],
                "ingested": (v["ingested_at"] or "")[:16].replace("T", " "),
                "files": ", ".join(str(f["file"]).rsplit("/", 1)[-1] for f in v["files"]),
            }
            for v in opened.analyses(run, apparatus=apparatus)
        ],
        columns=["analysis", "current", "withdrawn", "shots", "ingested", "files"],
    )

    def side(value) -> str:
        if value is None:
            return "–"
        return f"{with_uncertainty(value['value'], value.get('stderr'), value.get('unit'))} ({value['analysis'] or 'unnamed'})"

    impact = pd.DataFrame(
        [
            {
                "figure": e["figure"],
                "before": side(e["old"]),
                "now": side(e["new"]),
                "shift [combined stderr]": None if e["sigma"] is None else round(float(e["sigma"]), 2),
                "pins holding the old": ", ".join(e["pins"]),
            }
            for e in opened.impact(run, apparatus=apparatus)
            if e["old"] is not None and e["new"] is not None and e["old"].get("record") != e["new"].get("record")
        ],
        columns=["figure", "before", "now", "shift [combined stderr]", "pins holding the old"],
    )
    return versions, impact


@_cached
def shots_table(url: str, run: str, apparatus: str) -> tuple[pd.DataFrame, dict[str, str]]:
    """The run's shots and the units of their columns."""
    frame = catalogue(url).shots(run, apparatus=apparatus)
    units = dict(frame.attrs.get("units", {}))
    frame.attrs = {}
    return frame, units


@_cached
def site_map(url: str, run: str, apparatus: str, name: str) -> pd.DataFrame:
    """Per-site ``successes / trials`` of a run laid out on its lattice: row, column, site, value.

    Sites are placed row by row (site ``i`` at row ``i // columns``), as numpy's reshape
    does; a site never loaded has no value.
    """
    successes, trials, shape = catalogue(url).site_counts(run, name, apparatus=apparatus)
    columns = shape[-1] if len(shape) > 1 else len(successes)
    site = np.arange(len(successes))
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(trials > 0, successes / np.maximum(trials, 1), np.nan)
    return pd.DataFrame({"site": site, "row": site // columns, "column": site % columns, "value": value, "successes": successes, "trials": trials})


@_cached
def fit_curve(url: str, run: str, apparatus: str, x: str | None, y: str | None, envelope: str | None = None):
    from runlog.derive import fit_curve as curve_of

    return curve_of(catalogue(url), run, apparatus=apparatus, x=x, y=y, envelope=envelope)


@_cached
def what_else_changed(url: str, quantity: str, day: dt.date, apparatus: str) -> pd.DataFrame:
    ranked = catalogue(url).what_else_changed(quantity, day, apparatus=apparatus)
    return pd.DataFrame(ranked, columns=["name", "kind", "words", "standardised_change", "q_value", "setting_changed", "before_mean", "after_mean", "n_before", "n_after"])


@_cached
def suspects(url: str, quantity: str, day: dt.date, apparatus: str) -> dict[str, object]:
    """``catalogue.suspects``: notes first, then ranked suspects, then the verdict."""
    return catalogue(url).suspects(quantity, day, apparatus=apparatus)


@_cached
def standing(url: str, quantity: str, apparatus: str, day: dt.date) -> dict[str, object]:
    """Where ``quantity``'s reference series stands on ``day`` against its baseline
    (:func:`runlog.drift.standing.standing`); read-only."""
    from runlog.drift.standing import standing as standing_of

    opened = catalogue(url)
    return standing_of(opened.drift(quantity, apparatus=apparatus, record_alarms=False), day, opened.alarms(status=None, apparatus=apparatus))


@_cached
def stability(url: str, quantity: str, apparatus: str, series: str) -> dict[str, object]:
    """``catalogue.stability``: the Allan deviation over a series' runs, in plain words."""
    return catalogue(url).stability(quantity, apparatus=apparatus, series=series)


@_cached
def monitor_list(url: str) -> list[dict[str, object]]:
    """``catalogue.monitors()``: each monitor's latest value and whether it stopped reporting."""
    return catalogue(url).monitors()


@_cached
def monitor_names(url: str, apparatus: str) -> list[str]:
    """The monitors an apparatus logs, by name."""
    return sorted(m["name"] for m in catalogue(url).monitors() if m["apparatus"] == apparatus)


@_cached
def monitor_overlay(url: str, name: str, apparatus: str, since: dt.date, until: dt.date) -> pd.DataFrame:
    """One monitor over the lab days [since, until] from its rollups (at most 2000
    periods), with ``when``: each period's start in the lab's wall-clock time, as the
    drift chart's axis places times."""
    from runlog.times import day_start_utc

    zone = lab_timezone(url)
    frame = catalogue(url).monitor_series(name, apparatus=apparatus, since=day_start_utc(since, ZoneInfo(zone)), until=day_start_utc(until, ZoneInfo(zone), 1), max_points=2000)
    frame["when"] = wall_clock(frame["start"], zone) if len(frame) else pd.Series(dtype=str)
    return frame


@_cached
def drift_view(
    url: str,
    quantity: str,
    apparatus: str,
    sequence: str | None = None,
    since: dt.date | None = None,
    until: dt.date | None = None,
    parameters: tuple[tuple[str, float, float], ...] = (),
    baseline_days: int = 28,
    series: str | None = None,
) -> dict[str, object]:
    """The drift of one quantity as tables for a chart: daily points, limits, changes, notes.

    Read-only: alarms are recorded by ``runlog alarms`` and ``runlog watch``, not by looking.
    """
    result = catalogue(url).drift(
        quantity,
        apparatus=apparatus,
        sequence=sequence,
        since=since,
        until=until,
        parameters={name: (low, high) for name, low, high in parameters} or None,
        baseline_days=baseline_days,
        series=series,
        record_alarms=False,
    )
    zone = lab_timezone(url)
    limits = result.limits
    count = len(result.points)

    def per_point(key: str) -> list[float]:
        values = limits.get(key)
        if values is None:
            return [np.nan] * count
        return list(np.broadcast_to(np.asarray(values, dtype=float), (count,)))

    outside = set(result.out_of_limits)
    points = pd.DataFrame(
        {
            "day": [p.date.isoformat() for p in result.points],
            # A day's point sits at its middle, so that notes and changes fall where they belong.
            "when": [f"{p.date.isoformat()}T12:00:00Z" for p in result.points],
            "value": [p.value for p in result.points],
            "ci_low": [p.ci_low for p in result.points],
            "ci_high": [p.ci_high for p in result.points],
            "stderr": [p.stderr for p in result.points],
            "runs": [p.runs for p in result.points],
            "shots": [p.shots for p in result.points],
            "outside": [i in outside for i in range(count)],
            "lower": per_point("lower"),
            "upper": per_point("upper"),
            "ewma": per_point("ewma"),
            "ewma_lower": per_point("ewma_lower"),
            "ewma_upper": per_point("ewma_upper"),
        }
    )
    changes = pd.DataFrame(
        {
            "day": [c.date.isoformat() for c in result.changes],
            "when": [f"{c.date.isoformat()}T00:00:00Z" for c in result.changes],
            "before": [c.before for c in result.changes],
            "after": [c.after for c in result.changes],
            "method": [c.method for c in result.changes],
        }
    )
    notes = pd.DataFrame(result.annotations, columns=["at", "run", "text"])
    notes["when"] = wall_clock(notes["at"], zone) if len(notes) else pd.Series(dtype=str)
    notes["local_time"] = notes["when"].str.replace("T", " ").str[:16]
    return {
        "quantity": result.quantity,
        "apparatus": result.apparatus,
        "unit": result.unit,
        "counting": result.counting,
        "points": points,
        "changes": changes,
        "notes": notes,
        "method": str(limits.get("method", "")),
        "note": str(limits.get("note", "")),
        "center": limits.get("center"),
        "baseline": limits.get("baseline"),
        "series": result.series,
        "other_series": result.other_series,
        "settings": result.settings,
        "excursions": result.excursions,
    }
