"""SQL page: read-only console over the lake's views (fleetwatch.query.run_query: one
SELECT per run, time limit, row cap); examples, result table, CSV download."""
from __future__ import annotations

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch.dashboard_app import ui

settings = ui.settings_or_stop()
st.title("SQL")
st.caption("Read only: one SELECT (or WITH / DESCRIBE / EXPLAIN) per run, over the views "
           "below. Files, settings and writes are refused. Timestamps are UTC.")


def _use_example() -> None:
    name = st.session_state.get("sql_example")
    if name:
        st.session_state["sql_text"] = dash.EXAMPLE_QUERIES[name]


st.selectbox("Example queries", list(dash.EXAMPLE_QUERIES), index=None,
             placeholder="Choose an example to load it", key="sql_example",
             on_change=_use_example)
if "sql_text" not in st.session_state:
    st.session_state["sql_text"] = next(iter(dash.EXAMPLE_QUERIES.values()))
sql = st.text_area("Query", key="sql_text", height=160)

l1, l2, l3 = st.columns([1, 1, 2])
row_cap = l1.number_input("Row cap", min_value=1, max_value=int(settings.sql_row_cap),
                          value=min(1000, int(settings.sql_row_cap)), step=100,
                          key="sql_row_cap")
time_limit = l2.number_input("Time limit (s)", min_value=1.0,
                             max_value=float(settings.sql_time_limit_s),
                             value=min(10.0, float(settings.sql_time_limit_s)), step=1.0,
                             key="sql_time_limit")
run = l3.button("Run query", type="primary", key="sql_run")

if run:
    st.session_state["sql_result"] = dash.run_console_query(
        settings, sql, row_cap=int(row_cap), time_limit_s=float(time_limit))

outcome = st.session_state.get("sql_result")
if outcome is not None:
    if outcome.error:
        st.error(outcome.error)
        if outcome.hint:
            st.caption(outcome.hint)
    else:
        res = outcome.result
        note = (f" — cut at the row cap of {res.rows.height:,}; narrow the query or "
                "aggregate" if res.truncated else "")
        st.caption(f"{res.rows.height:,} rows, {len(res.columns)} columns in "
                   f"{res.elapsed_s:.2f} s{note}.")
        if res.truncated:
            st.warning(f"Result truncated at {res.rows.height:,} rows.")
        st.dataframe(dash.display_frame(res.rows), hide_index=True, key="sql_table")
        st.download_button("Download CSV", dash.to_csv_bytes(res.rows),
                           file_name="query.csv", mime="text/csv", key="sql_csv")

with st.expander("Views and columns"):
    st.dataframe(dash.views_reference(), hide_index=True, key="sql_reference")
