"""The Streamlit dashboard, shipped inside the package so that an installed runlog can serve it.

``app.py`` is the entry script (``streamlit run``, started by :mod:`runlog.dashboard`);
``views/`` holds one script per page; ``common.py`` the cached catalogue, the cached queries
and the colours; ``charts.py`` the Altair charts. The pages call only the catalogue's Python
API and :mod:`runlog.derive`; they hold no SQL and no statistics of their own.
"""
