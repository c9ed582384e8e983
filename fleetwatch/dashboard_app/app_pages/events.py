"""Events page: fleet events filtered by unit, kind and time, with a CSV download."""
from __future__ import annotations

import datetime as dt

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch import views
from fleetwatch.dashboard_app import ui

settings = ui.settings_or_stop()
st.title("Events")

span = ui.load(dash.events_span, settings)
if span is None:
    ui.no_data("events")
    st.stop()
first, last = span

c1, c2, c3 = st.columns([2, 2, 2])
units = c1.multiselect("Unit", ui.load(views.known_units, settings), key="ev_units",
                       placeholder="All units")
default_start = max(first, last - dt.timedelta(days=29))
rng = c3.date_input("Days (UTC)", value=(default_start, last), min_value=first,
                    max_value=last, key="ev_range")
start, end = dash.date_range(rng, default_start, last)
in_range = ui.load(dash.fleet_events, settings, start=start, end=end)
kinds = c2.multiselect("Kind", sorted(set(in_range["kind"].to_list())), key="ev_kinds",
                       placeholder="All kinds")
events = dash.filter_events(in_range, units=units, kinds=kinds)

st.caption(f"{events.height} events from {start} to {end} (UTC days).")
ui.chart(ui.load(dash.events_spec, settings, start=start, end=end, units=tuple(units),
                 kinds=tuple(kinds)))
st.dataframe(events, hide_index=True, placeholder="–", key="ev_table")
st.download_button("Download CSV", dash.to_csv_bytes(events),
                   file_name=f"events_{start}_{end}.csv", mime="text/csv", key="ev_csv",
                   disabled=events.is_empty())
