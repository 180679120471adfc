"""Drift: daily values of chosen figures with intervals, control limits, changes and notes.

Everything here comes from the daily rollups through ``catalogue.drift`` (or, with a
parameter filter, from the runs' stored figures): no shot leaves the server for this page.
"""

from __future__ import annotations

import math

import pandas as pd
import streamlit as st

from runlog.dashboard_app import charts, common
from runlog.errors import RunlogError

#: The panels the page opens on, when the apparatus has them.
FIRST_PANELS = ("fill_fraction", "survival", "t2_star")

url = common.catalogue_url()
zone = common.lab_timezone(url)
st.title("Drift")

names = common.apparatus_names(url)
if not names:
    st.info("The catalogue holds no runs yet.")
    st.stop()

top = st.columns([1, 3])
asked = st.query_params.get("apparatus")  # a card on the overview links here
apparatus = top[0].selectbox("apparatus", names, index=names.index(asked) if asked in names else 0, key="drift-apparatus")
stored = common.figure_names(url, apparatus)
quantities = top[1].multiselect(
    "quantities",
    sorted(stored),
    default=[name for name in FIRST_PANELS if name in stored],
    format_func=lambda name: common.axis_title(name, stored[name]).replace(" (dimensionless)", ""),
    key=f"drift-quantities-{apparatus}",
)

days = common.lab_days(url, apparatus)
first_day, last_day = days[-1], days[0]
row = st.columns([2, 2, 1, 3])
chosen_days = row[0].date_input(f"lab days ({zone})", value=(first_day, last_day), min_value=first_day, max_value=last_day, format="YYYY-MM-DD", key=f"drift-days-{apparatus}")
since, until = (tuple(chosen_days) + (last_day,))[:2] if chosen_days else (first_day, last_day)
sequences = common.sequences(url, apparatus)
sequence = row[1].selectbox("sequence", ["all sequences", *sequences], key=f"drift-sequence-{apparatus}")
sequence = None if sequence == "all sequences" else sequence
baseline_days = int(row[2].number_input("baseline days", min_value=7, max_value=90, value=28, key="drift-baseline", help="In-control lab days in the rolling baseline that sets the limits (restarted from an accepted new level)."))

known = common.parameters_table(url, apparatus)
ranged = known[(known["kind"] == "number") & (known["max"] > known["min"])].set_index("name")
filtered_by = row[3].multiselect(
    "only runs with parameters in a range",
    list(ranged.index),
    format_func=lambda name: common.axis_title(name, ranged.at[name, "unit"]).replace(" (dimensionless)", ""),
    key=f"drift-filter-{apparatus}",
)
ranges: list[tuple[str, float, float]] = []
if filtered_by:
    sliders = st.columns(len(filtered_by))
    for column, name in zip(sliders, filtered_by):
        low, high = float(ranged.at[name, "min"]), float(ranged.at[name, "max"])
        step = 10.0 ** math.floor(math.log10((high - low) / 100.0))
        picked = column.slider(common.axis_title(name, ranged.at[name, "unit"]), low, high, (low, high), step=step, key=f"drift-range-{apparatus}-{name}")
        ranges.append((name, float(picked[0]), float(picked[1])))
    st.caption("A run counts when its constant value lies in the range, or its whole scanned range does.")

logged = common.monitor_names(url, apparatus)
overlaid = (
    st.multiselect(
        "monitors on a second axis",
        logged,
        key=f"drift-monitors-{apparatus}",
        help="The monitor's mean per period (minute, hour or lab day: the finest giving at most 2000 points), its range shaded, at the lab's time.",
    )
    if logged
    else []
)
overlays = [common.monitor_overlay(url, name, apparatus, since, until) for name in overlaid]

all_changes: list[tuple[str, str, float, float]] = []


def explain(quantity: str, moments: list[tuple[str, str, float, float]]) -> None:
    """Under the chart: what may explain a change, notes of the day and the day before
    first, then the suspects in plain words, then the verdict. Read only when asked: the
    suspects read six lab days of runs and would hold up the first drawing of the charts."""
    picked = st.selectbox(
        f"what may explain a change of {common.label(quantity)}",
        moments,
        index=None,
        placeholder=f"choose one of {len(moments)} day{'s' if len(moments) > 1 else ''}",
        format_func=lambda c: f"{common.label(c[0])} on {c[1]}" + ("" if math.isnan(c[2]) else f": {c[2]:.4g} → {c[3]:.4g}") + ("" if not math.isnan(c[2]) else ": out of control"),
        key=f"drift-change-{apparatus}-{quantity}",
    )
    if picked is None:
        return
    found = common.suspects(url, quantity, pd.Timestamp(picked[1]).date(), apparatus)
    for note in found["notes"]:
        st.info(f"**{note['kind']}** {note['day']}" + (f" · run {note['run']}" if note.get("run") else "") + f": {note['text']}")
    causes = pd.DataFrame(found["causes"], columns=["name", "kind", "words", "standardised_change", "q_value", "setting_changed"])
    if not causes.empty:
        st.dataframe(
            pd.DataFrame({"what moved": causes["words"], "candidate": [common.label(n) for n in causes["name"]], "standard errors": causes["standardised_change"], "BH q": causes["q_value"]}),
            hide_index=True,
            key=f"drift-suspects-{quantity}",
            column_config={
                "what moved": st.column_config.TextColumn(width="large"),
                "standard errors": st.column_config.NumberColumn(format="%+.1f", width="small"),
                "BH q": st.column_config.NumberColumn(format="%.2g", width="small"),
            },
        )
    st.markdown(f"*{found['verdict']}*")
    st.caption("Notes of the day and the day before first. Then the runs of the three lab days before against the day and the two after: setting changes first, then each candidate by how many of its own standard errors it moved; q: Benjamini & Hochberg (1995) corrected. It points at likely causes, it proves none.")

if True:  # one column: what may explain a change sits under its own chart
    if not quantities:
        st.info("Choose one or more quantities.")
    for quantity in quantities:
        mixed = common.mixed_units(url, apparatus).get(quantity)
        if mixed and sequence is None:
            st.warning(f"{common.label(quantity)} is stored in several units: {'; '.join(mixed)}. Values in different units are not pooled: choose a sequence.")
            continue
        try:
            view = common.drift_view(url, quantity, apparatus, sequence, since, until, tuple(ranges), baseline_days)
        except RunlogError as error:
            common.show_error(error)
            continue
        if view["points"].empty:
            st.info(f"No {common.label(quantity)} on these days with these filters.")
            continue
        st.altair_chart(charts.drift_chart(view, (since.isoformat(), until.isoformat()), zone, monitors=overlays), width="stretch", key=f"drift-chart-{quantity}")
        baseline = view["baseline"]
        detail = f"limits: {view['method']}" + (f", baseline {baseline[0]} to {baseline[1]}" if baseline else "") if view["method"] else view["note"]
        if view["series"]:
            st.caption(f"series {view['series']['label']} (`{view['series']['key']}`)")
            steady = common.stability(url, quantity, apparatus, view["series"]["key"])
            st.caption(f"stability: {steady['words']} (Allan deviation over the series' runs)")
        overlaid_text = ", ".join(f"{o.attrs['monitor']} ({o.attrs['resolution']} means)" for o in overlays)
        st.caption(f"{len(view['points'])} lab days; bars are 95 % intervals; {detail}." + (f" Right axis: {overlaid_text}, at lab time ({zone}) like the notes." if overlays else ""))
        moments = [(quantity, c.day, c.before, c.after) for c in view["changes"].itertuples()]
        moments += [(quantity, e["date"], math.nan, math.nan) for e in view["excursions"] if e["date"] not in {m[1] for m in moments}]
        all_changes += moments
        if moments:
            explain(quantity, sorted(moments, key=lambda m: m[1]))

