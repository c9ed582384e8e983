"""Development entry of the fleetwatch dashboard: ``streamlit run dashboards/app.py``.

The app itself ships inside the package (``fleetwatch/dashboard_app/``) so that
``fleetwatch dashboard`` finds it after a plain ``pip install .``; this file only runs it.
Set ``FLEETWATCH_PROJECT`` (or start in the project folder) to choose the project.
"""
from fleetwatch.dashboard_app.app import main

main()
