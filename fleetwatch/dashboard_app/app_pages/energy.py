"""Energy page (shown when the advisor is part of the build): input energy per unit and the
advisor's ratio advice per duty, as written by ``fleetwatch advise``."""
from __future__ import annotations

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch.dashboard_app import ui

settings = ui.settings_or_stop()
st.title("Energy")

spec = ui.load(dash.energy_spec, settings)
if spec is None:
    ui.no_data("energy figures")
    st.stop()
ui.chart(spec)

st.subheader("Ratio advice")
advice = ui.load(dash.advice_table, settings)
if advice.is_empty():
    st.info("No ratio advice yet: run `fleetwatch advise` for this project.")
else:
    st.caption("Advice per unit and duty (output speed and torque bin); 'change' rows first, "
               "largest expected saving first. Check limits on site before changing a ratio.")
    st.dataframe(advice, hide_index=True, key="energy_advice")
