"""Unit page: one drive over a chosen time range: slip with trend and limit, creep versus
load by week, commanded vs actual ratio, input power with efficiency or residual,
temperature, events and maintenance on the time axis, health history, anomaly scores."""
from __future__ import annotations

import html

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch import views
from fleetwatch.dashboard_app import ui

settings = ui.settings_or_stop()
st.title("Unit")

units = ui.load(views.known_units, settings)
if not units:
    ui.no_data("units")
    st.stop()


def _sync_query() -> None:
    st.query_params["unit"] = st.session_state["unit_pick"]


asked = st.query_params.get("unit")
if asked in units and st.session_state.get("unit_pick") != asked:
    st.session_state["unit_pick"] = asked
elif st.session_state.get("unit_pick") not in units:
    st.session_state["unit_pick"] = units[0]

c1, c2, c3, c4 = st.columns([1, 2, 2, 1])
unit = c1.selectbox("Unit", units, key="unit_pick", on_change=_sync_query)
span = ui.load(dash.unit_span, settings, unit_id=unit)
if span is None:
    ui.no_data(f"analysed days for {unit}")
    st.stop()
# a select box, not radio buttons: the Fleet page has loaded its browser code already,
# where radio buttons would fetch two more code chunks on the way to this page's charts
preset = c2.selectbox("Time range", list(dash.RANGE_PRESETS),
                      index=list(dash.RANGE_PRESETS).index(ui.DEFAULT_RANGE),
                      key="unit_range_preset")
start, end = dash.preset_range(preset, *span)
if preset == "Custom":
    rng = c3.date_input("From / to (UTC days)", value=(start, end), min_value=span[0],
                        max_value=span[1], key="unit_range")
    start, end = dash.date_range(rng, start, end)
else:
    c3.caption(f"Showing {start} to {end} (UTC days); data from {span[0]} to {span[1]}.")
week = c4.selectbox("Creep week", dash.weeks_in(start, end), format_func=str,
                    key="unit_creep_week", help="The week the creep chart compares "
                    "against the unit's reference weeks.")

# Everything the page draws is loaded here, before any of it is drawn: the browser then
# gets the page in one burst instead of laying it out again as each piece arrives
# (measured on cold opens: about 0.1 s less browser main-thread CPU, 1.0 s against 1.15 s).
view = ui.load(dash.unit_view, settings, unit_id=unit, start=start, end=end,
               limit=settings.slip_limit, threshold=settings.watch_score)
creep = ui.load(dash.creep_spec, settings, unit_id=unit, week=week,
                timezone=settings.plant_timezone)

overview = ui.load(views.fleet_overview, settings)
now = overview.filter(overview["unit_id"] == unit)
if now.height:
    r = now.row(0, named=True)
    line = (f"{ui.status_badge(r['status'])} since {r['since'] or '–'} · days to slip "
            f"limit: <b>{dash.fmt_days(r['days_to_limit'])}</b> · last data "
            f"{r['last_data']:%Y-%m-%d %H:%M} UTC" if r["last_data"] else
            f"{ui.status_badge(r['status'])}")
    # one element for the status and its reasons (each element costs the browser a
    # render), as plain HTML: no Markdown parser with raw-HTML support to run in the browser
    reasons = "".join(f"<li>{html.escape(x)}</li>"
                      for x in filter(None, (r["reasons"] or "").split(" | ")))
    st.html(f"<div>{line}</div>" + (f'<ul style="margin:0.3rem 0 0">{reasons}</ul>'
                                     if reasons else ""))

# Every chart of the page in one view (wear: slip and creep; operation: ratio, power,
# efficiency, temperature; health: status by day, anomaly scores), each panel with its own
# scales, the time panels on the chosen range: the browser sets up one chart instead of four
# (dash.page_spec). What has no data is left out and said below.
st.subheader("Wear, operation and health")
missing = [text for spec, text in (
    (view.charts["slip"], "No steady slip at rated load in this range."),
    (creep, f"No steady windows with load in {week}.")) if spec is None] + view.missing
ui.chart(dash.page_spec([view.charts["slip"], creep, view.charts["operation"],
                         view.charts["health"]]),
         empty="Nothing to chart in this range.")
if missing:
    st.caption(" ".join(missing))

# short tables as static HTML in one element (an interactive grid costs the browser about
# four times as much); a table too long for that stays a grid
tables = [("Status changes and their reasons", view.health_changes, "status")]
if view.top_scores.height:
    tables.append(("Highest anomaly scores and the features that drove them",
                   view.top_scores, None))
ui.tables(tables, key="unit")

st.subheader("Events and maintenance")
if view.markers.is_empty():
    st.caption("No events or maintenance in this range.")
else:
    ui.tables([(f"{view.markers.height} in this range, newest first", view.markers, None)],
              key="unit_markers")
