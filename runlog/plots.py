"""Figures for papers and logbooks: a quantity's drift over days, and one run.

Owns the drawings, made with Altair (Vega-Lite) and rendered offline by vl-convert to
SVG, PNG or PDF (chosen by the file's suffix). The chart functions return Altair charts,
so the dashboard can show the very chart that is printed; the ``plot_*`` functions save.

* :func:`drift_chart` / :func:`plot_drift`: the daily points of a
  :class:`~runlog.drift.series.Drift` with their interval bars, the control limits, and
  the changes in level found (a rule on the day and the level before and after);
* :func:`run_chart` / :func:`plot_run`: a scan (the measurement against the scanned
  parameter, mean and standard error per setting, with the stored fit drawn over it
  when there is one), or for a run without a scan the per-site fill map of its loading
  image. The run's figures are in the subtitle. Units are on the axes.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from runlog.errors import FitError, NotFoundError
from runlog.units import unit_text

if TYPE_CHECKING:
    import altair as alt

    from runlog.drift.series import Drift

__all__ = ["FORMATS", "drift_chart", "run_chart", "save_chart", "plot_drift", "plot_run"]

#: File suffixes a figure can be saved as.
FORMATS = (".svg", ".png", ".pdf")

# One plain palette for every figure: ink for data, grey for limits, red for findings.
INK = "#23395b"
FAINT = "#9aa7b8"
LIMIT = "#7f7f7f"
FINDING = "#b3261e"
EWMA = "#2f6fb3"  # the smoothed line and its band
MONITOR = "#5b8c3a"  # monitors on the second axis
NOTE = "#7b4f9d"  # notes, at their lab time
WIDTH, HEIGHT = 560, 300
# Raw shots are drawn under the means only up to this many (Vega-Lite inlines the data).
MAX_RAW_SHOTS = 5000


def _axis_title(name: str, unit: str) -> str:
    unit = unit_text(unit)
    return f"{name} ({unit})" if unit else name


def _format(value: float) -> str:
    return f"{value:.4g}"


def _with_error(value: float, error: float) -> str:
    """``value ± error`` with the error to two significant digits and the value to the
    same decimal place (common practice, no published source)."""
    if not (math.isfinite(value) and math.isfinite(error)) or error <= 0:
        return f"{_format(value)} ± {_format(error)}"
    decimals = 1 - math.floor(math.log10(error))
    if decimals > 8 or abs(value) >= 1e7:
        return f"{value:.3e} ± {error:.1e}"
    if decimals <= 0:
        step = 10.0 ** (-decimals)
        return f"{round(value / step) * step:.0f} ± {round(error / step) * step:.0f}"
    return f"{value:.{decimals}f} ± {error:.{decimals}f}"


def _figure_text(name: str, figure: dict[str, object]) -> str:
    value, unit = float(figure["value"]), unit_text(str(figure.get("unit") or ""))
    text = f"{name} = {_format(value)}"
    if figure.get("stderr") is not None:
        text = f"{name} = {_with_error(value, float(figure['stderr']))}"
    elif figure.get("ci_low") is not None:
        text += f" [{_format(float(figure['ci_low']))}, {_format(float(figure['ci_high']))}]"
    return text + (f" {unit}" if unit else "")


def _subtitle(figures: dict[str, dict[str, object]], per_line: int = 3) -> list[str]:
    texts = [_figure_text(name, figures[name]) for name in sorted(figures)]
    return ["; ".join(texts[i : i + per_line]) for i in range(0, len(texts), per_line)]


# --- drift -------------------------------------------------------------------------------


def _monitor_layers(x, monitors: Sequence[pd.DataFrame], zone: str) -> list:
    """Monitors (frames of ``Catalogue.monitor_series``) as lines on a second axis, at the
    lab's wall-clock time: the lab-day axis places a day's midnight at the day, so a
    period is placed at its local time on that day."""
    import altair as alt

    layers = []
    for frame in monitors:
        local = pd.to_datetime(frame["start"], utc=True).dt.tz_convert(zone).dt.strftime("%Y-%m-%dT%H:%M:%S")
        data = pd.DataFrame({"day": local, "monitor": frame["mean"], "low": frame["minimum"], "high": frame["maximum"]})
        title = _axis_title(str(frame.attrs.get("monitor", "monitor")), str(frame.attrs.get("unit", "")))
        y = alt.Y("monitor:Q", title=f"{title} ({frame.attrs.get('resolution', '')} mean)", scale=alt.Scale(zero=False), axis=alt.Axis(orient="right"))
        layers.append(alt.Chart(data).mark_area(color=MONITOR, opacity=0.15).encode(x=x, y=alt.Y("low:Q", scale=alt.Scale(zero=False), axis=None), y2="high:Q"))
        layers.append(alt.Chart(data).mark_line(color=MONITOR, strokeWidth=1).encode(x=x, y=y, tooltip=["day:N", alt.Tooltip("monitor:Q", format=".4g")]))
    return layers


def _note_layers(x, annotations: Sequence[dict], zone: str) -> list:
    """Notes (``Drift.annotations``) as dotted rules at their lab wall-clock time, each
    numbered at the top; the numbered texts go in the chart's subtitle (a printed figure
    has no tooltips)."""
    import altair as alt

    if not annotations:
        return []
    local = [pd.Timestamp(a["at"]).tz_convert(zone).strftime("%Y-%m-%dT%H:%M:%S") for a in annotations]
    data = pd.DataFrame({"day": local, "label": [f"n{i + 1}" for i in range(len(annotations))], "text": [str(a["text"]) for a in annotations]})
    rules = alt.Chart(data).mark_rule(color=NOTE, strokeDash=[1, 2], strokeWidth=1.2).encode(x=x, tooltip=["day:N", "text:N"])
    labels = alt.Chart(data).mark_text(color=NOTE, dy=-4, baseline="bottom", fontSize=9).encode(x=x, y=alt.value(0), text="label:N")
    return [rules, labels]


def _note_lines(annotations: Sequence[dict], zone: str, width: int = 70, most: int = 12) -> list[str]:
    lines = []
    for i, note in enumerate(annotations[:most]):
        when = pd.Timestamp(note["at"]).tz_convert(zone).strftime("%Y-%m-%d %H:%M")
        text = " ".join(str(note["text"]).split())
        text = text if len(text) <= width else text[: width - 1] + "…"
        lines.append(f"n{i + 1} {when}: {text}" + (f" (run {note['run']})" if note.get("run") else ""))
    if len(annotations) > most:
        lines.append(f"... and {len(annotations) - most} more notes (runlog notes)")
    return lines


def drift_chart(drift: Drift, *, title: str | None = None, monitors: Sequence[pd.DataFrame] = (), zone: str = "UTC") -> alt.LayerChart:
    """The drift of one quantity as a chart: daily points with interval bars, limits,
    changes. Points outside the control limits are drawn in red. ``monitors`` (frames of
    ``Catalogue.monitor_series``) are drawn on a second axis at lab time (``zone``),
    with their range per period shaded; the notes of the span (``drift.annotations``)
    are dotted rules at their lab time, numbered, their texts under the title."""
    import altair as alt

    if not drift.points:
        raise NotFoundError("daily points of", drift.quantity, f"apparatus '{drift.apparatus}' has none in that range")
    outside = set(drift.out_of_limits)
    points = pd.DataFrame(
        {
            "day": [p.date.isoformat() for p in drift.points],
            "value": [p.value for p in drift.points],
            "low": [p.ci_low for p in drift.points],
            "high": [p.ci_high for p in drift.points],
            "runs": [p.runs for p in drift.points],
            "shots": [p.shots for p in drift.points],
            "outside": [i in outside for i in range(len(drift.points))],
        }
    )
    x = alt.X("day:T", title="lab day", scale=alt.Scale(type="utc"), axis=alt.Axis(format="%Y-%m-%d", labelAngle=-30))
    y_title = _axis_title(drift.quantity, drift.unit)
    base = alt.Chart(points)
    layers = [
        base.mark_rule(color=INK).encode(x=x, y=alt.Y("low:Q", title=y_title, scale=alt.Scale(zero=False)), y2="high:Q"),
        base.mark_circle(size=36, opacity=1).encode(
            x=x,
            y="value:Q",
            color=alt.condition("datum.outside", alt.value(FINDING), alt.value(INK)),
            tooltip=["day:N", alt.Tooltip("value:Q", format=".4g"), "runs:Q", "shots:Q"],
        ),
    ]
    lower, upper = drift.limits.get("lower"), drift.limits.get("upper")
    if isinstance(lower, list) and isinstance(upper, list) and len(lower) == len(points):
        # The limits of the daily points: centre +- the day limit of each day's own sigma.
        limits = pd.DataFrame({"day": list(points["day"]) * 2, "limit": list(lower) + list(upper), "side": ["lower"] * len(lower) + ["upper"] * len(upper)}).dropna()
        layers.append(alt.Chart(limits).mark_line(color=LIMIT, strokeDash=[4, 3], interpolate="step-after").encode(x=x, y="limit:Q", detail="side:N"))
    centre = drift.limits.get("centre")
    if isinstance(centre, list) and len(centre) == len(points):
        line = pd.DataFrame({"day": points["day"], "centre": centre}).dropna()
        layers.append(alt.Chart(line).mark_line(color=LIMIT, strokeWidth=0.8, interpolate="step-after").encode(x=x, y="centre:Q"))
    ewma, ewma_lower, ewma_upper = (drift.limits.get(k) for k in ("ewma", "ewma_lower", "ewma_upper"))
    if all(isinstance(v, list) and len(v) == len(points) for v in (ewma, ewma_lower, ewma_upper)):
        # The EWMA line with its own, narrower limits: never the EWMA's limits over the days.
        smooth = pd.DataFrame({"day": points["day"], "ewma": ewma, "ewma_low": ewma_lower, "ewma_high": ewma_upper}).dropna()
        layers.append(alt.Chart(smooth).mark_area(color=EWMA, opacity=0.12, interpolate="step-after").encode(x=x, y="ewma_low:Q", y2="ewma_high:Q"))
        layers.append(alt.Chart(smooth).mark_line(color=EWMA, strokeWidth=1.2).encode(x=x, y="ewma:Q"))
    if drift.changes:
        days = [p.date for p in drift.points]
        edges = [days[0], *[c.date for c in drift.changes], days[-1]]
        levels = [drift.changes[0].before, *[c.after for c in drift.changes]]
        segments = pd.DataFrame(
            {
                "day": [d.isoformat() for i in range(len(levels)) for d in (edges[i], edges[i + 1])],
                "level": [level for level in levels for _ in (0, 1)],
                "segment": [i for i in range(len(levels)) for _ in (0, 1)],
            }
        )
        layers.append(alt.Chart(segments).mark_line(color=FINDING, strokeWidth=1.5).encode(x=x, y="level:Q", detail="segment:N"))
        rules = pd.DataFrame({"day": [c.date.isoformat() for c in drift.changes]})
        layers.append(alt.Chart(rules).mark_rule(color=FINDING, strokeDash=[2, 2]).encode(x=x))
    heading = title or f"{drift.quantity} on {drift.apparatus}"
    notes = [f"series {drift.series['label']}" if drift.series else (f"sequence {drift.sequence}, all runs pooled" if drift.sequence else "all runs pooled")]
    notes.append(f"{len(drift.points)} lab days; bars: 95 % intervals")
    if drift.limits.get("method"):
        notes.append("dashed: limits of the daily values; shaded: limits of the EWMA line (blue)")
        notes.append(str(drift.limits["method"]))
    if drift.changes:
        notes.append("red: changes in level, " + ", ".join(f"{c.date.isoformat()} {_format(c.before)} → {_format(c.after)}" for c in drift.changes))
    annotations = list(getattr(drift, "annotations", []) or [])
    if annotations:
        layers += _note_layers(x, annotations, zone)
        notes.append(f"dotted purple: notes at their lab time ({zone})")
        notes += _note_lines(annotations, zone)
    chart = alt.layer(*layers)
    if monitors:
        notes.append("right axis: " + ", ".join(str(f.attrs.get("monitor")) for f in monitors) + f" (line: mean, shaded: min to max; lab time {zone})")
        chart = alt.layer(chart, alt.layer(*_monitor_layers(x, monitors, zone))).resolve_scale(y="independent")
    return chart.properties(width=WIDTH, height=HEIGHT, title=alt.TitleParams(heading, subtitle=notes, anchor="start"))


def plot_drift(drift: Drift, out_path: str | Path, *, title: str | None = None, monitors: Sequence[pd.DataFrame] = (), zone: str = "UTC") -> Path:
    """Save :func:`drift_chart` as SVG, PNG or PDF (by the suffix of ``out_path``)."""
    return save_chart(drift_chart(drift, title=title, monitors=monitors, zone=zone), out_path)


# --- one run -------------------------------------------------------------------------------


def _scan_layers(frame: pd.DataFrame, x_name: str, x_unit: str, y_name: str, y_unit: str) -> list:
    import altair as alt

    x = alt.X("x:Q", title=_axis_title(x_name, x_unit), scale=alt.Scale(zero=False))
    y_title = _axis_title(y_name, y_unit)
    grouped = frame.groupby("x")["y"]
    means = pd.DataFrame({"x": grouped.mean().index, "mean": grouped.mean().values, "count": grouped.count().values})
    spread = grouped.std(ddof=1).fillna(0.0).values
    error = np.where(means["count"] > 1, spread / np.sqrt(means["count"].clip(lower=1)), 0.0)
    means["low"], means["high"] = means["mean"] - error, means["mean"] + error
    layers = []
    if len(frame) <= MAX_RAW_SHOTS:
        layers.append(alt.Chart(frame).mark_circle(size=12, color=FAINT, opacity=0.6).encode(x=x, y=alt.Y("y:Q", title=y_title)))
    layers.append(alt.Chart(means).mark_rule(color=INK).encode(x=x, y=alt.Y("low:Q", title=y_title), y2="high:Q"))
    layers.append(alt.Chart(means).mark_circle(size=30, color=INK, opacity=1).encode(x=x, y="mean:Q", tooltip=[alt.Tooltip("x:Q", format=".4g"), alt.Tooltip("mean:Q", format=".4g"), "count:Q"]))
    return layers


def run_chart(catalogue, run: str, *, apparatus: str | None = None, x: str | None = None, y: str | None = None) -> alt.LayerChart:
    """One run as a chart: its scan (with the stored fit when there is one) or, for a run
    without a scanned number parameter, the per-site fill map of its loading image.

    A run with a stored fit is drawn on the signal the fit was made on, with the fit. A run
    without one is drawn on its figure-producing signal (:func:`runlog.derive.fitted_signal`:
    as its sequence's runs were fitted, or its only measurement), without a line; when
    nothing tells which signal that is, :class:`NotFoundError` says so in one line and
    ``x``/``y`` choose.
    """
    import altair as alt

    from runlog.derive import fit_curve, fitted_signal

    info = catalogue.run(run, apparatus=apparatus)
    heading = f"run {info.run} ({info.apparatus}, {info.sequence}, {info.shots} shots)"
    subtitle = _subtitle(info.figures)
    scanned = [name for name, p in info.parameters.items() if p.get("scanned") and "min" in p]
    try:
        curve = fit_curve(catalogue, info.run, apparatus=info.apparatus, x=x, y=y)
    except (FitError, NotFoundError):
        curve = None
    if curve is not None:
        frame = pd.DataFrame({"x": curve.x, "y": curve.y})
        layers = _scan_layers(frame, curve.x_name, curve.x_unit, curve.y_name, curve.y_unit)
        model = pd.DataFrame({"x": curve.curve_x, "fit": curve.curve_y})
        layers.append(alt.Chart(model).mark_line(color=FINDING, strokeWidth=1.5).encode(x="x:Q", y="fit:Q"))
        subtitle = [*subtitle, f"line: stored fit, {curve.formula}"]
    elif scanned and info.measurements:
        signal = fitted_signal(catalogue, info)  # (x, y, why) or None
        if y is None and signal is None:
            raise NotFoundError(
                "fitted signal in run",
                info.run,
                f"no fit is stored for it or for another run of sequence '{info.sequence}' on {info.apparatus}; "
                f"its measurements: {', '.join(info.measurements)}; choose one with --y, or fit the run first (runlog derive)",
            )
        y_name = y or signal[1]
        x_name = x or (signal[0] if signal is not None else scanned[0])
        why = "chosen" if y else signal[2]
        if x_name not in info.parameters:
            raise NotFoundError("parameter", x_name, f"run '{info.run}' scans {', '.join(scanned)}")
        if y_name not in info.measurements:
            raise NotFoundError("measurement", y_name, f"run '{info.run}' has {', '.join(info.measurements)}")
        shots = catalogue.shots(info.run, apparatus=info.apparatus)
        frame = pd.DataFrame({"x": shots[f"p.{x_name}"].astype(float), "y": shots[f"m.{y_name}"].astype(float)}).dropna()
        if frame.empty:
            raise NotFoundError("shots with both", f"{x_name} and {y_name}", f"run '{info.run}'")
        units = shots.attrs.get("units", {})
        layers = _scan_layers(frame, x_name, units.get(f"p.{x_name}", ""), y_name, units.get(f"m.{y_name}", ""))
        subtitle = [*subtitle, f"no fit stored for this run; signal: {y_name} ({why}); points: mean and standard error per setting; grey: single shots"]
    else:
        successes, trials, shape = catalogue.site_counts(info.run, "fill", apparatus=info.apparatus)
        rows, columns = (shape[0], shape[1]) if len(shape) == 2 else (1, int(np.prod(shape)))
        with np.errstate(invalid="ignore", divide="ignore"):
            fill = np.where(trials > 0, successes / np.maximum(trials, 1), np.nan)
        sites = pd.DataFrame({"row": np.repeat(np.arange(rows), columns), "column": np.tile(np.arange(columns), rows), "fill": fill[: rows * columns]})
        layers = [
            alt.Chart(sites)
            .mark_rect()
            .encode(
                x=alt.X("column:O", title="lattice column"),
                y=alt.Y("row:O", title="lattice row"),
                color=alt.Color("fill:Q", title="fill fraction", scale=alt.Scale(domain=[0, 1], scheme="blues")),
                tooltip=["row:O", "column:O", alt.Tooltip("fill:Q", format=".3f")],
            )
        ]
        subtitle = [*subtitle, f"per-site fill fraction of the loading image over {int(trials.max()) if trials.size else 0} shots"]
        size = 18 if max(rows, columns) <= 30 else max(4, math.floor(540 / max(rows, columns)))
        return alt.layer(*layers).properties(width=size * columns, height=size * rows, title=alt.TitleParams(heading, subtitle=subtitle, anchor="start"))
    return alt.layer(*layers).properties(width=WIDTH, height=HEIGHT, title=alt.TitleParams(heading, subtitle=subtitle, anchor="start"))


def plot_run(catalogue, run: str, out_path: str | Path, *, apparatus: str | None = None, x: str | None = None, y: str | None = None) -> Path:
    """Save :func:`run_chart` as SVG, PNG or PDF (by the suffix of ``out_path``)."""
    return save_chart(run_chart(catalogue, run, apparatus=apparatus, x=x, y=y), out_path)


# --- saving ----------------------------------------------------------------------------------


def save_chart(chart: alt.TopLevelMixin, out_path: str | Path, *, scale: float = 2.0) -> Path:
    """Render ``chart`` offline with vl-convert; the suffix picks SVG, PNG or PDF.

    ``scale`` multiplies the pixel size of a PNG (2: sharp in print at the chart's size).
    """
    import vl_convert

    out = Path(out_path)
    suffix = out.suffix.lower()
    if suffix not in FORMATS:
        raise ValueError(f"cannot save a figure as '{suffix or out.name}': use {', '.join(FORMATS)}")
    spec = chart.configure(font="DejaVu Sans", background="white").configure_view(stroke=None).to_dict()
    version = _vegalite_version(spec.get("$schema", ""))
    if suffix == ".svg":
        out.write_text(vl_convert.vegalite_to_svg(spec, vl_version=version), encoding="utf-8")
    elif suffix == ".png":
        out.write_bytes(vl_convert.vegalite_to_png(spec, vl_version=version, scale=scale))
    else:
        out.write_bytes(vl_convert.vegalite_to_pdf(spec, vl_version=version))
    return out


def _vegalite_version(schema: str) -> str:
    """The newest Vega-Lite version vl-convert has that is not newer than Altair's."""
    import vl_convert

    available = vl_convert.get_vegalite_versions()
    try:
        wanted = tuple(int(part) for part in schema.rsplit("/v", 1)[1].removesuffix(".json").split(".")[:2])
    except (IndexError, ValueError):
        return available[-1]
    fitting = [v for v in available if tuple(int(p) for p in v.split(".")) <= wanted]
    return (fitting or available)[-1]
