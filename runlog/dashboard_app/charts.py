"""The dashboard's Altair charts, built from the tables of :mod:`runlog.dashboard_app.common`.

Every layer carries a ``description`` naming what it draws ("daily values", "fit curve", ...)
so that tests and readers of the chart spec can find it. Colours come from the Okabe-Ito
palette, one legend per chart; every axis names its quantity and unit; time axes are in the
lab's wall-clock time on a UTC scale (see ``common``).
"""

from __future__ import annotations

import datetime as dt

import altair as alt
import pandas as pd

from runlog.dashboard_app.common import PALETTE, SERIES_COLOURS, axis_title, label, unit_text
from runlog.times import shift_day

__all__ = ["drift_chart", "fit_chart", "scatter_chart", "site_map_chart"]

# What each kind of mark on a drift chart means, and its colour.
_DRIFT_KEY = {
    "daily value": PALETTE["blue"],
    "out of control": PALETTE["vermillion"],
    "limits of the daily values": PALETTE["black"],
    "EWMA of standardised days": PALETTE["sky blue"],
    "limits of the EWMA": PALETTE["sky blue"],
    "level between changes": PALETTE["orange"],
    "change in level": PALETTE["green"],
    "note": PALETTE["purple"],
}


# Charts stretch to the page's width; ``height`` is the plot's own, whatever the legend and
# axes take (Streamlit's default would fit those into the height too).
_WIDTH_ONLY = alt.AutoSizeParams(type="fit-x", contains="padding")
# Site maps keep square sites: width and height are the plot's own.
_NATURAL = alt.AutoSizeParams(type="pad", contains="padding")


def _key(entries: list[str]) -> alt.Scale:
    return alt.Scale(domain=entries, range=[_DRIFT_KEY[e] for e in entries])


#: Monitors on the drift chart's second axis, one colour each (not used by the first axis).
_MONITOR_COLOURS = [PALETTE["green"], PALETTE["orange"], PALETTE["black"], PALETTE["yellow"]]


def _monitor_layers(x, monitors: list[pd.DataFrame]) -> list[alt.Chart]:
    """Each monitor (frames of ``common.monitor_overlay``) as its period means, a line, and
    the range of each period shaded, on a second axis at the right."""
    layers = []
    for i, frame in enumerate(monitors):
        colour = _MONITOR_COLOURS[i % len(_MONITOR_COLOURS)]
        name = str(frame.attrs.get("monitor", "monitor"))
        title = f"{axis_title(name, str(frame.attrs.get('unit', '')))}, {frame.attrs.get('resolution', '')} mean".replace(" (dimensionless)", "")
        data = pd.DataFrame({"when": frame["when"], "mean": frame["mean"], "low": frame["minimum"], "high": frame["maximum"], "count": frame["count"]})
        y = alt.Y("mean:Q", title=title, scale=alt.Scale(zero=False), axis=alt.Axis(orient="right", titleColor=colour, offset=48 * i))
        layers.append(
            alt.Chart(data, description=f"monitor range {name}")
            .mark_area(color=colour, opacity=0.15)
            .encode(x=x, y=alt.Y("low:Q", scale=alt.Scale(zero=False), axis=None), y2="high:Q")
        )
        layers.append(
            alt.Chart(data, description=f"monitor {name}")
            .mark_line(color=colour, strokeWidth=1)
            .encode(
                x=x,
                y=y,
                tooltip=[alt.Tooltip("when:N", title=f"from ({frame.attrs.get('resolution', '')})"), alt.Tooltip("mean:Q", title=label(name), format=".4g"), alt.Tooltip("low:Q", title="min", format=".4g"), alt.Tooltip("high:Q", title="max", format=".4g"), alt.Tooltip("count:Q", title="values")],
            )
        )
    return layers


def drift_chart(view: dict, domain: tuple[str, str], zone: str, *, height: int = 200, monitors: list[pd.DataFrame] | tuple = ()) -> alt.LayerChart:
    """Daily points with 95 % interval bars, control limits, changes in level and notes.

    ``domain`` is the time axis (first and last lab day, ISO) shared by all panels.
    ``monitors`` (frames of ``common.monitor_overlay``) go on a second axis at the right,
    at the lab's wall-clock time like the notes.
    """
    points: pd.DataFrame = view["points"].copy()
    changes: pd.DataFrame = view["changes"]
    notes: pd.DataFrame = view["notes"]
    title = axis_title(view["quantity"], view["unit"])
    unit = unit_text(view["unit"])
    points["series"] = ["out of control" if o else "daily value" for o in points["outside"]]
    first, last = domain
    x = alt.X(
        "when:T",
        scale=alt.Scale(type="utc", domain=[f"{first}T00:00:00Z", f"{shift_day(dt.date.fromisoformat(str(last)[:10]), 1).isoformat()}T00:00:00Z"]),
        axis=alt.Axis(title=f"lab day ({zone})", format="%d %b", labelAngle=0, tickCount="day"),
    )
    y_scale = alt.Scale(zero=False)
    has_limits = bool(points["lower"].notna().any())
    present = ["daily value"]
    present += ["out of control"] if points["outside"].any() else []
    present += ["limits of the daily values", "EWMA of standardised days", "limits of the EWMA"] if has_limits else []
    present += ["level between changes", "change in level"] if len(changes) else []
    present += ["note"] if len(notes) else []
    colour = alt.Color("series:N", scale=_key(present), legend=alt.Legend(title=None, orient="top", direction="horizontal", columns=3, symbolSize=60))
    tooltip = [
        alt.Tooltip("day:N", title="lab day"),
        alt.Tooltip("value:Q", title=f"{label(view['quantity'])} {unit}".strip(), format=".4g"),
        alt.Tooltip("ci_low:Q", title="95 % low", format=".4g"),
        alt.Tooltip("ci_high:Q", title="95 % high", format=".4g"),
        alt.Tooltip("runs:Q"),
        alt.Tooltip("shots:Q"),
    ]
    layers: list[alt.Chart] = []

    if has_limits:
        # Each statistic is drawn with its own limits: the daily values with theirs
        # (centre +- the day limit of each day's own sigma), the EWMA line inside its
        # narrower band; never the EWMA's limits over the daily values.
        smooth = points.dropna(subset=["ewma"])
        layers.append(
            alt.Chart(smooth.assign(series="limits of the EWMA"), description="ewma limits")
            .mark_area(opacity=0.15, interpolate="step")
            .encode(x=x, y=alt.Y("ewma_lower:Q", title=title, scale=y_scale), y2="ewma_upper:Q", color=colour)
        )
        layers.append(
            alt.Chart(smooth.assign(series="EWMA of standardised days"), description="ewma")
            .mark_line(strokeWidth=1.5)
            .encode(x=x, y=alt.Y("ewma:Q", title=title, scale=y_scale), color=colour, tooltip=[alt.Tooltip("day:N", title="lab day"), alt.Tooltip("ewma:Q", title="EWMA", format=".4g")])
        )
        bounds = points.melt(id_vars=["when", "day"], value_vars=["lower", "upper"], var_name="limit", value_name="bound").assign(series="limits of the daily values")
        layers.append(
            alt.Chart(bounds, description="control limits")
            .mark_line(strokeDash=[5, 3], strokeWidth=1, interpolate="step")
            .encode(x=x, y=alt.Y("bound:Q", title=title, scale=y_scale), detail="limit:N", color=colour, tooltip=[alt.Tooltip("day:N", title="lab day"), alt.Tooltip("limit:N"), alt.Tooltip("bound:Q", format=".4g")])
        )

    if len(changes):
        layers.append(
            alt.Chart(_levels(points, changes), description="levels")
            .mark_rule(strokeWidth=2, opacity=0.8)
            .encode(x=x, x2="end:T", y=alt.Y("level:Q", title=title, scale=y_scale), color=colour, tooltip=[alt.Tooltip("level:Q", format=".4g")])
        )
        layers.append(
            alt.Chart(changes.assign(series="change in level"), description="changes")
            .mark_rule(strokeWidth=2)
            .encode(x=x, color=colour, tooltip=[alt.Tooltip("day:N", title="change on"), alt.Tooltip("before:Q", format=".4g"), alt.Tooltip("after:Q", format=".4g")])
        )

    if len(notes):
        layers.append(
            alt.Chart(notes.assign(series="note"), description="notes")
            .mark_rule(strokeDash=[2, 2], strokeWidth=1.5)
            .encode(x=x, color=colour, tooltip=[alt.Tooltip("local_time:N", title="at"), alt.Tooltip("text:N", title="note"), alt.Tooltip("run:N")])
        )

    layers.append(
        alt.Chart(points, description="95% intervals")
        .mark_rule(strokeWidth=1.5)
        .encode(x=x, y=alt.Y("ci_low:Q", title=title, scale=y_scale), y2="ci_high:Q", color=colour, tooltip=tooltip)
    )
    layers.append(
        alt.Chart(points, description="daily values")
        .mark_circle(size=60, opacity=1)
        .encode(x=x, y=alt.Y("value:Q", title=title, scale=y_scale), color=colour, tooltip=tooltip)
    )
    chart = alt.layer(*layers)
    monitor_layers = _monitor_layers(x, [m for m in monitors if len(m)])
    if monitor_layers:
        # Each monitor's range shares its line's scale; the first axis keeps its own.
        pairs = [alt.layer(*monitor_layers[i : i + 2]) for i in range(0, len(monitor_layers), 2)]
        chart = alt.layer(chart, *pairs).resolve_scale(y="independent")
    return chart.properties(height=height, autosize=_WIDTH_ONLY, title=alt.TitleParams(f"{label(view['quantity'])}: {view['apparatus']}", anchor="start"))


def _levels(points: pd.DataFrame, changes: pd.DataFrame) -> pd.DataFrame:
    """Horizontal segments at the level before each change and after the last one."""
    starts = [points["day"].iloc[0], *changes["day"]]
    ends = [*changes["day"], None]
    levels = [*changes["before"], changes["after"].iloc[-1]]
    last = pd.Timestamp(points["day"].iloc[-1]) + pd.Timedelta(days=1)
    return pd.DataFrame(
        {
            "when": [f"{s}T00:00:00Z" for s in starts],
            "end": [f"{e}T00:00:00Z" if e else f"{last:%Y-%m-%d}T00:00:00Z" for e in ends],
            "level": levels,
            "series": "level between changes",
        }
    )


def fit_chart(curve, *, height: int = 260, points: str = "shot") -> alt.LayerChart:
    """Every shot's (or, ``points="run"``, every run's) ``y`` against ``x`` with the stored fit drawn over them."""
    x_title, y_title = axis_title(curve.x_name, curve.x_unit), axis_title(curve.y_name, curve.y_unit)
    shots = pd.DataFrame({"x": curve.x, "y": curve.y, "series": points})
    model = pd.DataFrame({"x": curve.curve_x, "y": curve.curve_y, "series": "fit"})
    colour = alt.Color("series:N", scale=alt.Scale(domain=[points, "fit"], range=[PALETTE["blue"], PALETTE["vermillion"]]), legend=alt.Legend(title=None, orient="top"))
    points = (
        alt.Chart(shots, description="shots")
        .mark_circle(size=28, opacity=0.55)
        .encode(x=alt.X("x:Q", title=x_title, scale=alt.Scale(nice=False)), y=alt.Y("y:Q", title=y_title), color=colour, tooltip=[alt.Tooltip("x:Q", title=x_title, format=".4g"), alt.Tooltip("y:Q", title=y_title, format=".4g")])
    )
    line = alt.Chart(model, description="fit curve").mark_line(strokeWidth=2).encode(x="x:Q", y="y:Q", color=colour)
    return alt.layer(points, line).properties(height=height, autosize=_WIDTH_ONLY, title=alt.TitleParams(curve.formula, anchor="start", fontSize=12))


def site_map_chart(frame: pd.DataFrame, what: str, *, size: int = 240) -> alt.LayerChart:
    """One square per lattice site, coloured by its fraction (cividis, 0 to 1)."""
    rows = int(frame["row"].max()) + 1 if len(frame) else 1
    columns = int(frame["column"].max()) + 1 if len(frame) else 1
    cell = max(8, min(40, size // max(rows, columns)))
    x = alt.X("column:O", title="site column", axis=alt.Axis(labelAngle=0, values=list(range(0, columns, max(1, columns // 10)))))
    y = alt.Y("row:O", title="site row", axis=alt.Axis(values=list(range(0, rows, max(1, rows // 10)))))
    tooltip = [alt.Tooltip("site:Q"), alt.Tooltip("row:Q"), alt.Tooltip("column:Q"), alt.Tooltip("value:Q", title=what, format=".3f"), alt.Tooltip("successes:Q"), alt.Tooltip("trials:Q")]
    never = alt.Chart(frame[frame["trials"] == 0], description="never loaded").mark_rect(color="#FFFFFF", stroke="#888888", strokeWidth=0.5).encode(x=x, y=y, tooltip=tooltip)
    sites = (
        alt.Chart(frame[frame["trials"] > 0], description="site map")
        .mark_rect()
        .encode(
            x=x,
            y=y,
            color=alt.Color("value:Q", title=f"{what} (dimensionless)", scale=alt.Scale(scheme="cividis", domain=[0, 1]), legend=alt.Legend(orient="bottom", direction="horizontal", gradientLength=max(100, int(cell * columns * 0.8)))),
            tooltip=tooltip,
        )
    )
    return alt.layer(never, sites).properties(width=cell * columns, height=cell * rows, autosize=_NATURAL, title=alt.TitleParams(f"{what} per site", anchor="start"))


def scatter_chart(frame: pd.DataFrame, x: str, y: str, x_title: str, y_title: str, runs: list[str], *, height: int = 360) -> alt.Chart:
    """Shots of several runs, column ``y`` against column ``x``, one colour per run."""
    # Vega-Lite reads a dot in a field name as a nested field: draw from plain names.
    data = pd.DataFrame({"run": frame["run"], "shot": frame["shot"], "x": frame[x], "y": frame[y]})
    colours = alt.Scale(domain=runs, range=SERIES_COLOURS[: len(runs)])
    x_type = "T" if x == "time" else "Q"
    return (
        alt.Chart(data, description="shots")
        .mark_circle(size=30, opacity=0.7)
        .encode(
            x=alt.X(f"x:{x_type}", title=x_title, scale=alt.Scale(zero=False, **({"type": "utc"} if x_type == "T" else {}))),
            y=alt.Y("y:Q", title=y_title, scale=alt.Scale(zero=False)),
            color=alt.Color("run:N", scale=colours, legend=alt.Legend(title="run", orient="right")),
            tooltip=["run:N", "shot:Q", alt.Tooltip(f"x:{x_type}", title=x_title), alt.Tooltip("y:Q", title=y_title, format=".4g")],
        )
        .properties(height=height, autosize=_WIDTH_ONLY)
    )
