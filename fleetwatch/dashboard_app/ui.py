"""Small Streamlit helpers shared by the pages (settings, errors, status words)."""
from __future__ import annotations

import html
from typing import Any, Callable

import streamlit as st

from fleetwatch import dashboard as dash
from fleetwatch.errors import FleetwatchError


def settings_or_stop():
    """The project's settings; shows the error and stops the page when they are invalid."""
    try:
        settings = dash.app_settings(strict=True)
    except FleetwatchError as exc:
        st.error(f"Settings: {exc.message}")
        if exc.hint:
            st.caption(exc.hint)
        st.stop()
    return settings


def load(fn: Callable[..., Any], settings, /, **kwargs: Any) -> Any:
    """A cached data call; a fleetwatch error is shown on the page instead of a traceback."""
    try:
        return dash.cached(fn, settings, **kwargs)
    except FleetwatchError as exc:
        st.error(exc.message)
        if exc.hint:
            st.caption(exc.hint)
        st.stop()


def no_data(what: str) -> None:
    st.info(f"No {what} yet. Run `fleetwatch ingest` and `fleetwatch analyze` for this "
            "project; the page refreshes when the tables change.")


def status_badge(status: str | None) -> str:
    """HTML: the status word with its glyph, in our status colour (use unsafe_allow_html)."""
    colour = dash.status_colour(status)
    return (f'<span style="color:{colour};font-weight:600">'
            f'{html.escape(dash.status_label(status))}</span>')


def chart(spec: dict | None, empty: str | None = None) -> None:
    """Draw a chart from its cached Vega-Lite spec (fleetwatch.dashboard.*_spec / unit_view)
    at container width; ``empty`` is said instead when there is nothing to draw."""
    if spec is None:
        if empty:
            st.info(empty)
        return
    st.vega_lite_chart(spec=spec, width="stretch", theme=None, alt=dash.chart_alt(spec))
