"""Series across runs: a figure of many runs against the parameter they differ in, with its fit."""

from __future__ import annotations

import pandas as pd
import streamlit as st

from runlog.dashboard_app import charts, common

url = common.catalogue_url()
st.title("Series across runs")

fits = common.series_fits(url)
if not fits:
    st.info("No series yet: `runlog derive --series NAME --y FIGURE --x PARAMETER --model exponential` fits one.")
    st.stop()

names = [f["name"] for f in fits]
name = st.selectbox("series", names, key="series-name")
made = fits[names.index(name)]
st.caption(
    f"{made['figure']} of {made['points']} runs against {made['parameter']}, model {made['model']}, fitted {made['computed_at'][:16].replace('T', ' ')} UTC"
    + (f" · χ²/dof {made['chi_square']:.3g}/{made['degrees_of_freedom']}" if made["chi_square"] is not None else "")
    + (f" · runs chosen by: {made['where']}" if made["where"] else "")
)
left, right = st.columns([3, 2], gap="large")
with left:
    st.altair_chart(charts.fit_chart(common.series_curve(made), points="run"), width="stretch", key="series-chart")
with right:
    st.markdown("**Fitted**")
    st.dataframe(
        pd.DataFrame(
            [{"figure": n, "value": common.with_uncertainty(v["value"], v.get("stderr"), v.get("unit")), "method": v["method"]} for n, v in made["values"].items()],
            columns=["figure", "value", "method"],
        ),
        hide_index=True,
        key="series-values",
    )
st.markdown("**Member runs**")
members = pd.DataFrame(
    [
        {"run": m["run"], "apparatus": m["apparatus"], "analysis": m["analysis"] or "(unnamed)", made["parameter"]: m["x"], made["figure"]: m["y"], "stderr": m["stderr"]}
        for m in made["members"]
    ]
)
st.dataframe(members, hide_index=True, key="series-members")
if made["left_out"]:
    st.caption("Left out: " + "; ".join(f"{l['run']} ({l['why']})" for l in made["left_out"]))
