"""fleetwatch dashboard: entry script (``streamlit run``; see fleetwatch.dashboard).

Reads the project folder from ``FLEETWATCH_PROJECT`` (else the current folder) and builds the
page menu. Read only: it never writes the lake.
"""
from __future__ import annotations

from pathlib import Path

import streamlit as st

# Imports every data page needs, paid once by the session's first page whichever it is:
# Altair (~1 s), and the lake's readers (deltalake, pyarrow.dataset: 0.5-1.3 s) that the
# first data call of the Fleet or Unit page would otherwise pay in the middle of its run.
import fleetwatch.charts  # noqa: F401
import fleetwatch.lake  # noqa: F401
import fleetwatch.views  # noqa: F401
from fleetwatch import dashboard as dash

PAGES_DIR = Path(__file__).resolve().parent / "app_pages"


def main() -> None:
    st.set_page_config(page_title="fleetwatch", page_icon="⚙️", layout="wide")
    pages = [
        st.Page(PAGES_DIR / "fleet.py", title="Fleet", url_path="fleet", default=True),
        st.Page(PAGES_DIR / "unit.py", title="Unit", url_path="unit"),
        st.Page(PAGES_DIR / "events.py", title="Events", url_path="events"),
        st.Page(PAGES_DIR / "sql.py", title="SQL", url_path="sql"),
        st.Page(PAGES_DIR / "reports.py", title="Reports", url_path="reports"),
    ]
    if dash.advisor_available():
        pages.append(st.Page(PAGES_DIR / "energy.py", title="Energy", url_path="energy"))
    nav = st.navigation(pages)
    settings = dash.app_settings()
    with st.sidebar:
        st.markdown("**fleetwatch**")
        if settings is not None:
            st.caption(f"Project: `{settings.project}`")
        st.caption(dash.SAFETY_CAPTION)
    nav.run()


if __name__ == "__main__":
    main()
