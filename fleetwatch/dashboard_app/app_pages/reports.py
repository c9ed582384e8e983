"""Reports page: weekly reports built so far (reports folder), preview and download, and a
button that builds the current week's report."""
from __future__ import annotations

import streamlit as st
import streamlit.components.v1 as components

from fleetwatch import dashboard as dash
from fleetwatch.dashboard_app import ui

settings = ui.settings_or_stop()
st.title("Reports")
st.caption(f"Weekly wear reports in `{settings.reports_path}`.")

weeks, default = ui.load(dash.report_weeks, settings, timezone=settings.plant_timezone)
b1, b2 = st.columns([1, 3], vertical_alignment="bottom")
week = b1.selectbox("Week to build", weeks, index=default, key="rep_build_week",
                    help="Default: the last complete week by the plant's clock, else the "
                         "newest week with data.")
if b2.button("Build the weekly report", key="rep_build", type="primary",
             disabled=not weeks):
    with st.spinner(f"Building the report for {week} ..."):
        built = dash.build_week_report(settings, week=week)
    if built.error:
        st.error(built.error)
        if built.hint:
            st.caption(built.hint)
    else:
        st.success(f"Built {built.week}: {built.path}")

reports = dash.list_reports(settings)
if not reports:
    st.info("No reports yet. Build one with the button above or `fleetwatch report`.")
    st.stop()

st.dataframe(dash.reports_display(reports), hide_index=True, key="rep_table")
week = st.selectbox("Report", [r.week for r in reports], key="rep_week")
rep = next(r for r in reports if r.week == week)

if rep.summary:
    cols = st.columns(4)
    for col, (label, value) in zip(cols, dash.report_headline(rep)):
        col.metric(label, value)

d1, d2, d3 = st.columns(3)
for col, (label, path, mime) in zip((d1, d2, d3), rep.files()):
    col.download_button(f"Download {label}", path.read_bytes() if path.is_file() else b"",
                        file_name=f"{rep.week}_{path.name}", mime=mime,
                        key=f"rep_dl_{label}", disabled=not path.is_file())

if rep.actions is not None and rep.actions.is_file():
    st.markdown("**Actions**")
    st.dataframe(dash.read_actions(rep.actions), hide_index=True, key="rep_actions")

if st.toggle("Preview the HTML report here", key="rep_preview") and rep.html.is_file():
    components.html(rep.html.read_text(encoding="utf-8"), height=900, scrolling=True)
