"""The dashboard's entry script: page setup, the sidebar and the navigation between pages.

Started by ``runlog dashboard`` as ``streamlit run .../runlog/dashboard_app/app.py`` with the
catalogue URL in ``RUNLOG_DB``. Streamlit runs this script on every interaction, then the
selected page's script.
"""

from __future__ import annotations

from pathlib import Path

import streamlit as st

from runlog.dashboard_app import common
from runlog.redaction import remember, scrub

__all__ = ["PAGES", "main"]

_HERE = Path(__file__).resolve().parent

#: (script, title, icon) of every page, in the order of the navigation.
PAGES = (
    ("overview.py", "Overview", ":material/dashboard:"),
    ("drift.py", "Drift", ":material/timeline:"),
    ("run_detail.py", "Run detail", ":material/science:"),
    ("shots.py", "Shots explorer", ":material/scatter_plot:"),
    ("series.py", "Series across runs", ":material/stacked_line_chart:"),
    ("notes.py", "Notes and alarms", ":material/edit_note:"),
)


def main() -> None:
    st.set_page_config(page_title="runlog", page_icon=":material/grid_on:", layout="wide")
    # Less empty space above each page's title than Streamlit's default.
    st.html("<style>[data-testid='stMainBlockContainer'] {padding-top: 2.5rem;}</style>")
    url = common.catalogue_url()
    remember(url)  # its password is scrubbed from whatever a page shows, parsed or not
    pages = [st.Page(_HERE / "views" / script, title=title, icon=icon, default=index == 0) for index, (script, title, icon) in enumerate(PAGES)]
    # Navigation along the top leaves the full width to the charts.
    page = st.navigation(pages, position="top")
    try:
        catalogue = common.catalogue(url)
        zone = common.lab_timezone(url)
    except Exception as error:  # the server starts even when the catalogue cannot be opened
        st.error(scrub(f"cannot open the catalogue: {str(error).splitlines()[0] if str(error) else type(error).__name__}"))
        st.stop()
    page.run()
    st.divider()
    about, refresh = st.columns([5, 1], vertical_alignment="center")
    about.caption(
        f"runlog · catalogue `{catalogue.url}` · lab time zone {zone} · "
        "advisory only: figures, drift and alarms do not replace the lab's interlocks or rules."
    )
    if refresh.button("Refresh data", icon=":material/refresh:", help=f"Results are kept for {common.CACHE_SECONDS} s; this asks the catalogue again."):
        common.clear_cached_results()
        st.rerun()


if __name__ == "__main__":
    main()
