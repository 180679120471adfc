"""Notes and alarms: add a note to a lab day or a run; acknowledge an alarm with a note."""

from __future__ import annotations

import datetime as dt
from zoneinfo import ZoneInfo

import pandas as pd
import streamlit as st
from sqlalchemy.exc import SQLAlchemyError

from runlog.dashboard_app import common
from runlog.errors import RunlogError
from runlog.redaction import scrub
from runlog.store.failures import describe

url = common.catalogue_url()
zone = common.lab_timezone(url)
st.title("Notes and alarms")
who = common.writer()
if who.fixed and who.author:
    st.caption(f"Notes appear on the drift charts at their time. You write as **{who.author}** ({who.source}).")
else:
    st.caption("Notes appear on the drift charts at their time. The author defaults to the login name of the account running the dashboard.")

names = common.apparatus_names(url)
if not names:
    st.info("The catalogue holds no runs yet.")
    st.stop()


def written(action) -> None:
    """Run a write; on success rerun the page so every list shows it, and say so on top."""
    try:
        message = action()
    except (RunlogError, ValueError) as error:
        st.error(scrub(str(error)))
    except (SQLAlchemyError, OSError) as error:
        # A catalogue this server cannot write (a read-only role or file): one line naming
        # the cause, never the SQL and its parameters.
        st.error(describe(error, doing="saving this").message)
    else:
        st.session_state["note-done"] = message
        st.rerun()


def latest_notes() -> None:
    st.markdown("#### Latest notes")
    notes = common.annotations(url)
    if notes.empty:
        st.caption("No notes yet.")
        return
    latest = notes.sort_values("at", ascending=False).head(50)
    st.dataframe(
        pd.DataFrame({f"at ({zone})": latest["local_time"], "apparatus": latest["apparatus"], "run": latest["run"], "note": latest["text"], "author": latest["author"]}),
        hide_index=True,
        key="notes",
    )


def author_field(key: str) -> str | None:
    """The author: the authenticated user when the server names one, else what is typed."""
    if who.fixed:
        return who.author
    return st.text_input("author (optional)", key=key)


if "note-done" in st.session_state:
    st.success(st.session_state.pop("note-done"))

if not who.allowed:
    # No forms at all: nothing can be written under a name that was not authenticated.
    st.info(who.why)
    if who.source == "login":
        st.button("Log in", key="note-login", on_click=st.login)
    latest_notes()
    st.stop()


day_column, run_column, alarm_column = st.columns(3, gap="large")

with day_column:
    st.markdown("#### Note on a lab day")
    with st.form("note-day", clear_on_submit=True):
        apparatus = st.selectbox("apparatus", names, key="note-day-apparatus")
        latest = max(common.lab_days(url, name)[0] for name in names)
        day = st.date_input(f"lab day ({zone})", value=latest, format="YYYY-MM-DD", key="note-day-day")
        time = st.time_input(f"time ({zone})", value=dt.time(9, 0), key="note-day-time")
        text = st.text_area("note", key="note-day-text", placeholder="e.g. realigned the lattice beam")
        author = author_field("note-day-author")
        if st.form_submit_button("Add note", type="primary", key="note-day-submit"):
            at = dt.datetime.combine(day, time, tzinfo=ZoneInfo(zone))
            written(lambda: f"note {common.add_note(url, text, apparatus=apparatus, at=at, author=author)} added to {apparatus} on {day:%d %b %Y}")

with run_column:
    st.markdown("#### Note on a run")
    apparatus = st.selectbox("apparatus", names, key="note-run-apparatus")
    runs = common.runs_table(url, apparatus)
    labels = {r.run: f"{r.run} · {r.sequence} · {r.local_start}" for r in runs.head(200).itertuples()}
    with st.form("note-run", clear_on_submit=True):
        run = st.selectbox("run (newest first)", list(labels), format_func=labels.get, key="note-run-run")
        text = st.text_area("note", key="note-run-text", placeholder="e.g. camera saturated in the last shots")
        author = author_field("note-run-author")
        if st.form_submit_button("Add note", type="primary", key="note-run-submit"):
            written(lambda: f"note {common.add_note(url, text, run=run, apparatus=apparatus, author=author)} added to run {run}")

with alarm_column:
    st.markdown("#### Acknowledge an alarm")
    open_alarms = common.alarms(url)
    if not open_alarms:
        st.success("No open alarms.")
    else:
        by_id = {a["id"]: a for a in open_alarms}
        with st.form("acknowledge", clear_on_submit=True):
            alarm = st.selectbox(
                "open alarm",
                list(by_id),
                format_func=lambda i: f"#{i} {by_id[i]['date']} {by_id[i]['apparatus']} {common.label(str(by_id[i]['quantity']))}: {by_id[i]['reason']}",
                key="acknowledge-alarm",
            )
            note = st.text_area("what it was", key="acknowledge-note", help="Becomes a note on the alarm's lab day.")
            author = author_field("acknowledge-author")
            accept = st.checkbox("accept the new level", key="acknowledge-accept", help="The level since the alarm's day becomes the reference: the baseline starts again from that day. Recorded as a note.")
            if st.form_submit_button("Acknowledge", type="primary", key="acknowledge-submit"):
                written(lambda: f"alarm {alarm} {'acknowledged, new level accepted' if accept else 'acknowledged'} (note {common.acknowledge(url, alarm, note, author=author, accept=accept)})")

latest_notes()
