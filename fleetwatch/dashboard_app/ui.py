"""Small Streamlit helpers shared by the pages (settings, errors, status words)."""
from __future__ import annotations

import html
import threading
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


def tables(parts: list[tuple[str, Any, str | None]], key: str) -> None:
    """Titled tables ``(title, polars frame, status column or None)``: those of at most
    :data:`fleetwatch.dashboard.HTML_TABLE_ROWS` rows as static HTML, side by side, in one
    element (much lighter in the browser than grids); longer ones as interactive grids
    (keys ``{key}_table_{i}``), below."""
    short = [(t, dash.html_table(df, status_col=s)) for t, df, s in parts
             if df.height <= dash.HTML_TABLE_ROWS]
    if short:
        st.html(dash.html_tables(short))
    for i, (title, df, _) in enumerate(parts):
        if df.height > dash.HTML_TABLE_ROWS:
            st.markdown(f"**{title}**")
            st.dataframe(df, hide_index=True, placeholder="–", key=f"{key}_table_{i}")


#: The Unit page's time range when it opens (its select box's default).
DEFAULT_RANGE = list(dash.RANGE_PRESETS)[1]


def unit_defaults(span) -> tuple:
    """(start, end, creep week) the Unit page opens with for a unit's analysed ``span``."""
    start, end = dash.preset_range(DEFAULT_RANGE, *span)
    weeks = dash.weeks_in(start, end)
    return start, end, (weeks[0] if weeks else None)


def _warm_unit(settings, unit: str) -> None:
    """Run the Unit page's data calls for ``unit`` at its default range and week, into the
    shared cache (same keys as the page's own calls). Errors are left for the page."""
    try:
        span = dash.cached(dash.unit_span, settings, unit_id=unit)
        if span is None:
            return
        start, end, week = unit_defaults(span)
        dash.cached(dash.unit_view, settings, unit_id=unit, start=start, end=end,
                    limit=settings.slip_limit, threshold=settings.watch_score)
        dash.cached(dash.creep_spec, settings, unit_id=unit, week=week,
                    timezone=settings.plant_timezone)
        # the page's first call (its unit picker's list), last: the charts' data matter
        # more when the click comes early
        from fleetwatch import views

        dash.cached(views.known_units, settings)
    except Exception:  # noqa: BLE001 - only a head start; the page reports its errors
        pass


def prefetch_unit(settings, unit: str | None) -> threading.Thread | None:
    """Warm the cache for the Unit page of ``unit`` in a background thread (once per session
    and unit), so that opening it does not wait for the lake. Streamlit's cache holds a
    lock per key: a page that asks while the thread still computes waits for that result
    instead of computing it a second time. Returns the thread (None: nothing started)."""
    if unit is None:
        return None
    done = st.session_state.setdefault("_fw_prefetched", set())
    if unit in done:
        return None
    done.add(unit)
    from streamlit.runtime.scriptrunner import add_script_run_ctx, get_script_run_ctx

    thread = threading.Thread(target=_warm_unit, args=(settings, unit), daemon=True,
                              name=f"fleetwatch-prefetch-{unit}")
    ctx = get_script_run_ctx(suppress_warning=True)
    if ctx is not None:
        add_script_run_ctx(thread, ctx)
    thread.start()
    return thread
