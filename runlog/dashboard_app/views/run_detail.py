"""Run detail: one run's parameters, figures, fit over its shots, site maps and shot table."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from runlog.dashboard_app import charts, common
from runlog.errors import RunlogError, one_line

url = common.catalogue_url()
zone = common.lab_timezone(url)
st.title("Run detail")

names = common.apparatus_names(url)
if not names:
    st.info("The catalogue holds no runs yet.")
    st.stop()

# A link such as run_detail?apparatus=lattice-east&run=20260921-07 (the overview's run
# column) opens that run; the pickers then start from it.
asked_apparatus, asked_run = st.query_params.get("apparatus"), st.query_params.get("run")
pick = st.columns([1, 1, 2])
apparatus = pick[0].selectbox("apparatus", names, index=names.index(asked_apparatus) if asked_apparatus in names else 0, key="run-apparatus")
every_run = common.runs_table(url, apparatus)
asked = every_run[every_run["run"] == asked_run]
days = common.lab_days(url, apparatus)
day = pick[1].selectbox(
    f"lab day ({zone})", days, index=days.index(asked["day"].iloc[0]) if len(asked) else 0, format_func=lambda d: f"{d:%a %d %b %Y}", key=f"run-day-{apparatus}"
)
if asked_apparatus is not None and asked_apparatus not in names:
    st.warning(f"No apparatus '{one_line(asked_apparatus)}' in this catalogue: showing {apparatus} instead.")
elif asked_run is not None and not len(asked):
    # A link to a run that is not there (mistyped, withdrawn, another catalogue) says so
    # instead of quietly opening some other run.
    st.warning(f"No run '{one_line(asked_run)}' on {apparatus}: showing a run of {day:%d %b %Y} instead.")
runs = every_run[every_run["day"] == day].sort_values("started")
labels = {r.run: f"{r.run} · {r.sequence} · {r.local_start[11:]} · {r.shots} shots" for r in runs.itertuples()}
keys = list(labels)
run = pick[2].selectbox("run", keys, index=keys.index(asked_run) if asked_run in keys else 0, format_func=labels.get, key=f"run-run-{apparatus}-{day}")
st.query_params.update({"apparatus": apparatus, "run": run})

try:
    info = common.run_info(url, run, apparatus)
except RunlogError as error:
    common.show_error(error)
    st.stop()

span = common.wall_clock(pd.Series([info.started, info.finished]), zone).str.replace("T", " ").str[:19]
st.subheader(f"{info.run} · {info.sequence} on {info.apparatus}", anchor=False)
st.caption(
    f"{info.shots} shots, {span[0]} to {span[1][11:]} ({zone})"
    + (f" · {info.excluded_shots} left out of the figures by their status" if info.excluded_shots else "")
    + (f" · operator {info.operator}" if info.operator else "")
    + (f" · tags: {', '.join(info.tags)}" if info.tags else "")
)
if info.notes:
    st.info(info.notes, icon=":material/sticky_note_2:")
notes = common.annotations(url, info.apparatus)
for note in notes[notes["run"] == info.run].itertuples() if len(notes) else ():
    st.info(f"{note.text} ({note.local_time}, {note.author or 'unknown'})", icon=":material/edit_note:")

left, right = st.columns(2, gap="large")
with left:
    st.markdown("**Parameters**")
    rows = []
    for name, entry in info.parameters.items():
        if entry["scanned"]:
            value = f"{entry['min']:g} … {entry['max']:g}" if "min" in entry else "varies"
        else:
            value = entry["value"]
            value = f"{value:g}" if isinstance(value, float) else str(value)
        rows.append({"parameter": name, "value": value, "unit": common.unit_text(entry["unit"]), "scanned": bool(entry["scanned"])})
    st.dataframe(pd.DataFrame(rows, columns=["parameter", "value", "unit", "scanned"]), hide_index=True, key="run-parameters", column_config={"scanned": st.column_config.CheckboxColumn("scanned")})

with right:
    st.markdown("**Figures**")
    figures = pd.DataFrame(
        [
            {
                "figure": name,
                "value": common.with_uncertainty(f["value"], f.get("stderr"), f.get("unit")),
                "95 % interval": f"[{f['ci_low']:.4g}, {f['ci_high']:.4g}]" if "ci_low" in f else "",
                "method": f["method"],
                "out of range": "outside its physical range; not in drift" if f.get("out_of_range") else "",
            }
            for name, f in info.figures.items()
        ],
        columns=["figure", "value", "95 % interval", "method", "out of range"],
    )
    if figures.empty:
        st.caption("No figures stored for this run.")
    else:
        for optional in ("95 % interval", "out of range"):
            if not figures[optional].any():
                figures = figures.drop(columns=[optional])
        st.dataframe(figures, hide_index=True, key="run-figures")

if info.monitors:
    st.markdown("**Monitors over the run**")
    st.caption("Values logged from the run's first to its last shot; 'at start' is the last value at or before the first shot, at most 600 s before.")
    st.dataframe(
        pd.DataFrame(
            [
                {
                    "monitor": m["name"],
                    "mean": m["mean"],
                    "min": m["minimum"],
                    "max": m["maximum"],
                    "values": m["count"],
                    "at start": m["at_start"],
                    "unit": common.unit_text(m["unit"]),
                }
                for m in info.monitors
            ],
            columns=["monitor", "mean", "min", "max", "values", "at start", "unit"],
        ),
        hide_index=True,
        key="run-monitors",
        column_config={name: st.column_config.NumberColumn(name, format="%.5g") for name in ("mean", "min", "max", "at start")},
    )

# A stored fit to draw: fringe, Ramsey, or one of the health kinds (marked by one figure each).
if {"contrast", "offset"} <= set(info.figures) or {"t2_star", "ramsey_frequency"} <= set(info.figures) or set(info.figures) & {"pi_time", "linewidth", "t2", "t1", "lifetime", "fidelity", "temperature", "overlap_width"}:
    st.markdown("**Fit over the shots**")
    scanned = [n for n, e in info.parameters.items() if e["scanned"] and "min" in e]
    slots = iter(st.columns(3))
    x = next(slots).selectbox("x (scanned parameter)", scanned, key="run-fit-x") if len(scanned) > 1 else (scanned[0] if scanned else None)
    measured = info.measurements
    # The signal a fringe is fitted to is a fraction; offer that one first.
    preferred = next((i for i, n in enumerate(measured) if "fraction" in n), 0)
    y = next(slots).selectbox("y (measurement)", measured, index=preferred, key="run-fit-y")
    envelope = None
    if "t2_star" in info.figures:
        chosen = next(slots).selectbox("envelope", ["as fitted", "gaussian", "exponential", "thermal"], key="run-fit-envelope", help="The envelope the stored fit was made with, or another one to compare.")
        envelope = None if chosen == "as fitted" else chosen
    try:
        curve = common.fit_curve(url, info.run, info.apparatus, x, y, envelope)
    except RunlogError as error:
        common.show_error(error)
    else:
        st.altair_chart(charts.fit_chart(curve), width="stretch", key="run-fit-chart")
        if curve.kind == "coherence" and curve.offset_estimated:
            st.caption(f"The offset a = {curve.offset:.4g} is not stored with Ramsey figures; it is the least-squares value for the stored C0, T, δ and φ.")
        elif curve.kind == "detection":
            st.caption("Fraction of the loading image's site observations per count; the two-component model refitted to them.")
        elif curve.offset_estimated:
            st.caption("Levels and amplitudes of the curve are the least-squares values over the shots for the stored times, rates and frequencies.")

versions, moved = common.versions_and_impact(url, info.run, info.apparatus)
if len(versions) > 1 or len(moved):
    st.markdown("**Analysis versions**")
    st.dataframe(versions, hide_index=True, key="run-versions", column_config={"current": st.column_config.CheckboxColumn("current"), "withdrawn": st.column_config.CheckboxColumn("withdrawn")})
    if len(moved):
        st.markdown("**What the current analysis moved**")
        st.dataframe(moved, hide_index=True, key="run-impact")
        st.caption(
            "Before: the version before the current one (or, with one version, the figure's record before). "
            "Shift: (now − before) / √(stderr² + stderr²); the two share shots, so it is a yardstick of size, not a test."
        )

if any(image["role"] == "loading" for image in info.images.values()):
    st.markdown("**Per site**")
    maps = st.columns(2)
    for column, (name, what) in zip(maps, (("fill", "fill fraction"), ("survival", "survival"))):
        try:
            frame = common.site_map(url, info.run, info.apparatus, name)
        except RunlogError:
            continue  # a run without a survival image has no survival map
        column.altair_chart(charts.site_map_chart(frame, what), width="content", key=f"run-map-{name}")
    st.caption("Fill: shots with the site loaded / shots. Survival: shots with the loaded site kept / shots with it loaded. White: never loaded. Site i sits at row i // columns, column i % columns.")

st.markdown("**Shots**")
shots, units = common.shots_table(url, info.run, info.apparatus)
shots = shots.assign(time=common.wall_clock(shots["time"], zone).str.replace("T", " ").str.rstrip("Z"))
shots = shots.rename(columns={column: f"{column} [{common.unit_text(unit)}]" for column, unit in units.items() if unit} | {"time": f"time ({zone})"})
st.dataframe(shots.drop(columns=["run"]), hide_index=True, key="run-shots", height=320)
