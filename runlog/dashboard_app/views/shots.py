"""Shots explorer: any measurement or parameter against any other, over a few runs."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from runlog.dashboard_app import charts, common

#: At most this many runs at once: one Okabe-Ito colour each, and a bounded page.
MAX_RUNS = len(common.SERIES_COLOURS)

url = common.catalogue_url()
zone = common.lab_timezone(url)
st.title("Shots explorer")

names = common.apparatus_names(url)
if not names:
    st.info("The catalogue holds no runs yet.")
    st.stop()

pick = st.columns([1, 1, 3])
apparatus = pick[0].selectbox("apparatus", names, key="shots-apparatus")
runs = common.runs_table(url, apparatus)
sequence = pick[1].selectbox("sequence", ["all sequences", *sorted(runs["sequence"].unique())], key=f"shots-sequence-{apparatus}")
if sequence != "all sequences":
    runs = runs[runs["sequence"] == sequence]
labels = {r.run: f"{r.run} · {r.sequence} · {r.local_start}" for r in runs.itertuples()}
chosen = pick[2].multiselect(
    f"runs (up to {MAX_RUNS}, newest first)",
    list(labels),
    default=list(labels)[:3],
    format_func=labels.get,
    max_selections=MAX_RUNS,
    key=f"shots-runs-{apparatus}-{sequence}",
)
if not chosen:
    st.info("Choose one or more runs.")
    st.stop()

frames, units = [], {}
for run in chosen:
    frame, run_units = common.shots_table(url, run, apparatus)
    frames.append(frame)
    units.update(run_units)
shots = pd.concat(frames, ignore_index=True)
numeric = [c for c in shots.columns if c[:2] in ("p.", "m.") and pd.api.types.is_numeric_dtype(shots[c])]
measured = [c for c in numeric if c.startswith("m.")]
settings = [c for c in numeric if c.startswith("p.")]
first = common.run_info(url, chosen[0], apparatus)
scanned = [f"p.{n}" for n, e in first.parameters.items() if e["scanned"] and f"p.{n}" in settings]


def title(column: str) -> str:
    """An axis title: the name without its p./m. prefix, with its unit."""
    if column == "time":
        return f"time ({zone})"
    if column == "shot":
        return "shot (index in run)"
    return common.axis_title(column[2:], units.get(column))


def option(column: str) -> str:
    kind = {"p.": "parameter", "m.": "measurement"}.get(column[:2], "")
    return f"{kind} {title(column)}".strip()


axes = st.columns(2)
x_options = [*settings, "shot", "time", *measured]
x = axes[0].selectbox("x", x_options, index=x_options.index(scanned[0]) if scanned else x_options.index("shot"), format_func=option, key="shots-x")
y_options = [*measured, *settings] or ["shot"]
y = axes[1].selectbox("y", y_options, format_func=option, key="shots-y")

plotted = shots[["run", "shot", *dict.fromkeys(c for c in (x, y) if c != "shot")]].copy()
if x == "time":
    plotted["time"] = common.wall_clock(plotted["time"], zone)
plotted = plotted.dropna(subset=[x, y])
st.altair_chart(charts.scatter_chart(plotted, x, y, title(x), title(y), chosen), width="stretch", key="shots-chart")
st.caption(f"{len(plotted):,} shots of {len(chosen)} runs with both values.")

export = shots.rename(columns={c: f"{c} [{u}]" for c, u in units.items() if u})
export["time"] = pd.to_datetime(shots["time"], utc=True).dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")
st.download_button(
    "Download these runs' shots (CSV)",
    export.to_csv(index=False).encode("utf-8"),
    file_name=f"shots-{apparatus}-{'-'.join(chosen) if len(chosen) <= 3 else f'{len(chosen)}-runs'}.csv",
    mime="text/csv",
    icon=":material/download:",
    key="shots-download",
)
st.caption("The file holds every shot of the chosen runs, all parameters and measurements, times in UTC.")
