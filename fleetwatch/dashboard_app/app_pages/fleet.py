"""Fleet page: counts by status, the unit table (filter by line and status), the fleet's
steady-slip distribution over time; choosing a unit opens the Unit page."""
from __future__ import annotations

from pathlib import Path

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch import views
from fleetwatch.dashboard_app import ui

UNIT_PAGE = Path(__file__).with_name("unit.py")

settings = ui.settings_or_stop()
st.title("Fleet")

overview = ui.load(views.fleet_overview, settings)
if overview.is_empty():
    ui.no_data("units")
    st.stop()

as_of = overview["health_day"].max()
st.caption(f"Latest status per unit (health as of {as_of or 'no health results yet'}).")
counts = views.status_counts(overview).reverse()
cols = st.columns(counts.height)
for col, (status, n) in zip(cols, counts.iter_rows()):
    col.metric(dash.status_label(status), n)

f1, f2, f3 = st.columns([2, 2, 1])
lines = f1.multiselect("Line", dash.lines_of(overview), key="fleet_lines",
                       placeholder="All lines")
statuses = f2.multiselect("Status", counts["status"].to_list(), key="fleet_status",
                          format_func=dash.status_label, placeholder="All statuses")
order = f3.selectbox("Sort by", list(dash.FLEET_SORTS), key="fleet_sort")
shown = dash.filter_fleet(overview, lines=lines, statuses=statuses, sort=order)

st.dataframe(dash.fleet_display(shown), hide_index=True, placeholder="–",
             column_config=dash.fleet_column_config(), key="fleet_table")
st.caption(f"{shown.height} of {overview.height} units shown. Click a column header to sort.")

o1, o2 = st.columns([3, 1], vertical_alignment="bottom")
choice = o1.selectbox("Open a unit", shown["unit_id"].to_list(), key="open_unit",
                      index=None, placeholder="Choose a unit")
# a link, not a button: the browser asks for the Unit page straight away (one script run),
# where a button would rerun this page first only to switch pages from there
o2.page_link(UNIT_PAGE, label="Open unit",
             query_params={"unit": choice} if choice is not None else None,
             disabled=choice is None)

ui.chart(ui.load(dash.fleet_slip_spec, settings, limit=settings.slip_limit),
         empty="No steady slip at rated load yet, so no fleet distribution.")

# the choice says which Unit page comes next: its data is loaded now, in the background,
# while the user reaches for the link (about 0.3-0.4 s of server time off the opening)
ui.prefetch_unit(settings, choice)
