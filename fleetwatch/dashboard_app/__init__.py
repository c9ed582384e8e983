"""The Streamlit app served by ``fleetwatch dashboard`` (shipped inside the package).

``app.py`` is the entry script; ``app_pages/`` holds one script per page. Pages call only
``fleetwatch.dashboard`` and the public library; they hold no SQL and no chart code.
"""
