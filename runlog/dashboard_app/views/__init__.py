"""The dashboard pages, one Streamlit script each, run by st.navigation and never imported.

The folder is not called ``pages``: Streamlit would list a ``pages/`` folder beside the entry
script as pages of its own before st.navigation runs.
"""
