"""Overview: per apparatus, each headline figure of its reference series against its baseline on the latest lab day; the open alarms; what ingest did last."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from zoneinfo import ZoneInfo

import pandas as pd
import streamlit as st

from runlog.dashboard_app import common
from runlog.errors import RunlogError
from runlog.times import shift_day

url = common.catalogue_url()
zone = common.lab_timezone(url)
held = common.counts(url)
st.title("Overview")
st.caption(f"{held['apparatus']} apparatus · {held['runs']:,} runs · {held['shots']:,} shots · lab time zone {zone}")

# --- per apparatus: the latest lab day ---------------------------------------------------

latest_anywhere = max((common.lab_days(url, name)[0] for name in common.apparatus_names(url)), default=None)
for apparatus in common.apparatus_names(url):
    day = common.lab_days(url, apparatus)[0]
    stored = common.figure_names(url, apparatus)
    st.subheader(f"{apparatus} · lab day {day:%a %d %b %Y}", anchor=False)
    if latest_anywhere is not None and day < latest_anywhere:
        st.warning(f"{apparatus} sent nothing since {day:%d %b %Y}: its latest data is {(latest_anywhere - day).days} lab day(s) older than the catalogue's latest day ({latest_anywhere:%d %b}).")
    shown = [name for name in common.HEADLINE if name in stored]
    for column, name in zip(st.columns(max(1, len(shown))), shown):
        # Each card: the reference series' point of the day against its baseline, never
        # against the previous day; its state, its size in unit and in standard errors.
        try:
            found = common.standing(url, name, apparatus, day)
        except RunlogError as error:
            column.metric(common.label(name), "–", help=str(error), border=True)
            continue
        chart_link = f"[chart](drift?apparatus={apparatus})"
        if found["state"] == "no data" or found.get("date") != day.isoformat():
            with column.container(border=True):
                st.metric(common.label(name), "–", help=f"no {common.label(name)} of its reference series on this lab day", border=False)
                latest = f"latest {found['date']}" if found.get("date") else "no data yet"
                st.caption(f"{latest} · {chart_link}")
            continue
        unit = common.unit_text(found["unit"])
        value, _, error = common.with_uncertainty(found["value"], found["stderr"]).partition(" ± ")
        with column.container(border=True):
            st.metric(common.label(name), f"{value} {unit}".strip(), help="The reference series' value of the day (pooled counts, or the weighted mean of its runs), judged against its baseline of in-control days.")
            colour = {"in limits": "green", "changed": "red", "drifting": "orange"}.get(found["state"], "gray")
            size = "" if found.get("size") is None else f" · {found['size']:+.3g} {unit} ({found['z']:+.1f} standard errors) from baseline {found['centre']:.4g}".replace("  ", " ")
            st.markdown(f":{colour}[**{found['state']}**]" + (f" since {found['since']}" if found.get("since") else "") + size)
            alarm_link = f" · [alarm #{found['alarm']}](notes)" if found.get("alarm") else ""
            series = found["series"]["label"] if found.get("series") else ""
            st.caption(f"± {error or '–'} · 95 % [{found['ci_low']:.4g}, {found['ci_high']:.4g}] · {chart_link}{alarm_link} · series {series}")

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

# --- monitors ----------------------------------------------------------------------------

monitors = common.monitor_list(url)
if monitors:
    st.subheader("Monitors", anchor=False)
    for m in monitors:
        if m["stopped_reporting"]:
            st.warning(f"{m['apparatus']} · {common.stopped_words(m, ZoneInfo(zone))}")
    st.caption(f"Latest value of each monitor. A monitor stopped reporting when nothing was logged for more than {common.STOPPED_INTERVALS} of its usual intervals (the median gap between its last values), and for more than an hour.")
    st.dataframe(
        pd.DataFrame(
            [
                {
                    "apparatus": m["apparatus"],
                    "monitor": m["name"],
                    "latest": m["latest_value"],
                    "unit": common.unit_text(m["unit"]),
                    f"at ({zone})": "" if m["latest_time"] is None else common.wall_clock(pd.Series([m["latest_time"]]), zone).iloc[0].replace("T", " ")[:19],
                    "usually every": common.duration_words(m["interval_seconds"]),
                    "state": "stopped reporting" if m["stopped_reporting"] else "reporting",
                }
                for m in monitors
            ],
            columns=["apparatus", "monitor", "latest", "unit", f"at ({zone})", "usually every", "state"],
        ),
        hide_index=True,
        key="monitors",
        column_config={"latest": st.column_config.NumberColumn(format="%.6g")},
    )

# --- ingest ------------------------------------------------------------------------------

st.subheader("Ingest", anchor=False)
log = common.ingest_log(url)
if log.empty:
    st.info("Nothing ingested yet.")
else:
    log = log.assign(when=common.wall_clock(log["finished_at"], zone).str.replace("T", " ").str[:16], name=[Path(f).name for f in log["file"]])
    stored_in = log[log["status"] == "ingested"]
    refused = log[log["status"] == "refused"]
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
