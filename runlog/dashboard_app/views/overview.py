"""Overview: per apparatus, its latest lab day; the open alarms; what ingest did last."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import pandas as pd
import streamlit as st

from runlog.dashboard_app import common
from runlog.times import shift_day

url = common.catalogue_url()
zone = common.lab_timezone(url)
held = common.counts(url)
st.title("Overview")
st.caption(f"{held['apparatus']} apparatus · {held['runs']:,} runs · {held['shots']:,} shots · lab time zone {zone}")

# --- per apparatus: the latest lab day ---------------------------------------------------

for apparatus in common.apparatus_names(url):
    day = common.lab_days(url, apparatus)[0]
    stored = common.figure_names(url, apparatus)
    st.subheader(f"{apparatus} · lab day {day:%a %d %b %Y}", anchor=False)
    shown = [name for name in common.HEADLINE if name in stored]
    for column, name in zip(st.columns(max(1, len(shown))), shown):
        # The day's value is the drift page's daily point: pooled counts or weighted mean.
        view = common.drift_view(url, name, apparatus, since=shift_day(day, -14), until=day)
        points = view["points"]
        today = points[points["day"] == day.isoformat()]
        if today.empty:
            column.metric(common.label(name), "–", help=f"no {common.label(name)} on this lab day", border=True)
            continue
        row = today.iloc[-1]
        earlier = points[points["day"] < day.isoformat()]
        unit = common.unit_text(view["unit"])
        value, _, error = common.with_uncertainty(row["value"], row["stderr"]).partition(" ± ")
        decimals = len(value.partition(".")[2])  # the change to the value's own decimal place
        delta = None if earlier.empty else f"{row['value'] - earlier.iloc[-1]['value']:+.{decimals}f} {unit} since {earlier.iloc[-1]['day'][5:]}".replace("  ", " ")
        with column.container(border=True):
            st.metric(common.label(name), f"{value} {unit}".strip(), delta=delta, delta_color="off", help="The day's value as on the drift page: pooled counts, or the weighted mean of the runs. The change is against the previous lab day with data.")
            st.caption(f"± {error or '–'} · 95 % [{row['ci_low']:.4g}, {row['ci_high']:.4g}] · {int(row['runs'])} run{'s' if int(row['runs']) != 1 else ''}")

    runs = common.runs_table(url, apparatus)
    runs = runs[runs["day"] == day].sort_values("started")
    figures = common.figures_table(url, apparatus, since=day, until=day)
    table = pd.DataFrame(
        {
            "run": [f"run_detail?apparatus={apparatus}&run={key}" for key in runs["run"]],
            "sequence": runs["sequence"],
            f"started ({zone})": runs["local_start"].str[11:],
            "shots": runs["shots"],
            "operator": runs["operator"],
        }
    )
    keys = list(runs["run"])
    for name in shown:
        rows = figures[figures["name"] == name].set_index("run")
        header = common.axis_title(name, stored[name]).replace(" (dimensionless)", "")
        table[header] = [common.with_uncertainty(rows.at[key, "value"], rows.at[key, "stderr"]) if key in rows.index else "" for key in keys]
    st.dataframe(
        table,
        hide_index=True,
        key=f"runs-{apparatus}",
        column_config={
            "run": st.column_config.LinkColumn("run", display_text=r"run=(.*)$", help="Open the run's detail page"),
            "sequence": st.column_config.TextColumn(width="small"),
            f"started ({zone})": st.column_config.TextColumn(width="small"),
            "shots": st.column_config.NumberColumn(width="small"),
        },
    )

# --- alarms ------------------------------------------------------------------------------

st.subheader("Open alarms", anchor=False)
open_alarms = pd.DataFrame(common.alarms(url), columns=["id", "apparatus", "quantity", "sequence", "date", "reason", "value", "size", "method", "status"])
if open_alarms.empty:
    st.success("No open alarms.")
else:
    st.caption("Drift findings nobody has looked at yet; acknowledge them on the Notes and alarms page.")
    st.dataframe(
        open_alarms.rename(columns={"date": "lab day"}).drop(columns=["status", "sequence"]),
        hide_index=True,
        key="alarms",
        column_config={"value": st.column_config.NumberColumn(format="%.4g"), "size": st.column_config.NumberColumn(format="%+.3g")},
    )

# --- ingest ------------------------------------------------------------------------------

st.subheader("Ingest", anchor=False)
log = common.ingest_log(url)
if log.empty:
    st.info("Nothing ingested yet.")
else:
    log = log.assign(when=common.wall_clock(log["finished_at"], zone).str.replace("T", " ").str[:16], name=[Path(f).name for f in log["file"]])
    stored_in = log[log["status"] == "ingested"]
    refused = log[log["status"] == "rejected"]
    left, right = st.columns([3, 1])
    with left.container(border=True):
        if stored_in.empty:
            st.markdown("**last file in**: none yet")
        else:
            last = stored_in.iloc[0]
            runs_in = len(str(last["runs"]).split(",")) if last["runs"] else 0
            st.markdown(f"**last file in**: `{last['name']}`")
            st.caption(f"stored {last['when']} ({zone}) · {runs_in} runs, {int(last['shots']):,} shots · {last['file']}")
    right.metric(f"refused (last {len(log)} attempts)", len(refused), border=True)
    if not refused.empty:
        st.dataframe(refused[["name", "when", "reason"]].rename(columns={"name": "file", "when": f"when ({zone})"}), hide_index=True, key="refused")
