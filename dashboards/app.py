"""Entry script for ``streamlit run dashboards/app.py`` in a source checkout.

The dashboard itself ships inside the package (``runlog/dashboard_app``) so that an installed
runlog can serve it; ``runlog dashboard`` is the usual way to start it. Set ``RUNLOG_DB`` to
the catalogue URL first.
"""

from runlog.dashboard_app.app import main

main()
