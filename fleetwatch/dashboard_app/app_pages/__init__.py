"""Dashboard pages: fleet, unit, events, sql, reports (and energy when the advisor exists).

The folder is not called ``pages/``: Streamlit would list such a folder in the menu too.
"""
