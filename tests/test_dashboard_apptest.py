"""Dashboard pages under Streamlit's AppTest, on a small lake with known statuses.

Each test runs the packaged app (``fleetwatch/dashboard_app/app.py``, what
``fleetwatch dashboard`` serves) in-process and checks what the pages show.
"""
from __future__ import annotations

import datetime as dt
import json
import threading
import time
from html.parser import HTMLParser
from pathlib import Path

import polars as pl
import pyarrow as pa
import pytest
from streamlit.testing.v1 import AppTest

from dashboard_project import (PACKAGED_APP, ROOT, THIN_APP, build_project, expected_status,
                               simulated_fleet)
from fleetwatch import dashboard as dash
from fleetwatch.config import load_settings
from fleetwatch.errors import UsageError

UNIT_PAGE = "app_pages/unit.py"


@pytest.fixture(scope="module")
def project(tmp_path_factory):
    root = tmp_path_factory.mktemp("dash_project")
    truth = build_project(root)
    return root, truth


@pytest.fixture
def app(project, monkeypatch):
    root, _ = project
    monkeypatch.setenv("FLEETWATCH_PROJECT", str(root))

    def make(script: Path = PACKAGED_APP) -> AppTest:
        return AppTest.from_file(str(script), default_timeout=60)
    return make


def _ok(at: AppTest) -> AppTest:
    assert not at.exception, [e.message for e in at.exception]
    return at


def _specs(at: AppTest) -> list[dict]:
    """Vega-Lite specs of the page's charts, each with its datasets' rows as ``_rows``."""
    out = []
    for c in at.get("vega_lite_chart"):
        spec = json.loads(c.proto.spec)
        spec["_rows"] = {d.name: pl.from_arrow(pa.ipc.open_stream(d.data.data).read_all())
                                 .to_dicts() for d in c.proto.datasets}
        out.append(spec)
    return out


def _text(spec: dict) -> str:
    return json.dumps(spec, default=str)


def _titles(spec: dict) -> list[str]:
    """Every chart title in a spec (top level, layers and stacks)."""
    out = []

    def walk(node):
        if isinstance(node, dict):
            t = node.get("title")
            if isinstance(t, dict):
                t = t.get("text")
            if isinstance(t, str):
                out.append(t)
            for k in ("layer", "vconcat", "hconcat"):
                for child in node.get(k, []):
                    walk(child)
    walk(spec)
    return out


def _page_hash(url_path: str) -> str:
    """The script hash Streamlit gives the app page served at ``/url_path`` (st.Page)."""
    from streamlit.util import calc_hash

    return calc_hash(url_path)


class _Tables(HTMLParser):
    """Titled static tables of an st.html element: [(title, [row dicts])]."""

    def __init__(self):
        super().__init__()
        self.tables: list = []
        self._cell = self._title = None
        self._title_text = ""
        self._row: list = []
        self._head: list = []

    def handle_starttag(self, tag, attrs):
        if tag == "p":
            self._title = ""
        elif tag == "table":
            self.tables.append([self._title_text, []])
            self._head = []
        elif tag in ("td", "th"):
            self._cell = ""
        elif tag == "tr":
            self._row = []

    def handle_endtag(self, tag):
        if tag == "p" and self._title is not None:
            self._title_text, self._title = self._title, None
        elif tag in ("td", "th"):
            (self._head if tag == "th" else self._row).append(self._cell)
            self._cell = None
        elif tag == "tr" and self._row:
            self.tables[-1][1].append(dict(zip(self._head, self._row)))

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data
        elif self._title is not None:
            self._title += data


def _html_tables(at: AppTest) -> list[tuple[str, list[dict]]]:
    """(title, rows) of every static HTML table on the page."""
    out = []
    for h in at.get("html"):
        parser = _Tables()
        parser.feed(h.proto.body)
        out += [(t, rows) for t, rows in parser.tables]
    return out


def _table(at: AppTest, column: str) -> list[dict]:
    """Rows of the page's table (static HTML or grid) that has ``column``."""
    for _, rows in _html_tables(at):
        if rows and column in rows[0]:
            return rows
    for d in at.dataframe:
        if column in d.value.columns:
            return d.value.astype(object).where(d.value.notna(), None).to_dict("records")
    raise AssertionError(f"no table with a {column!r} column")


def _open_unit(app, unit: str) -> AppTest:
    """The Unit page opened by its address (``/unit?unit=...``)."""
    at = _ok(app().run())
    at.query_params["unit"] = unit
    at.switch_page(UNIT_PAGE).run()
    _ok(at)
    assert at.selectbox(key="unit_pick").value == unit
    return at


# ------------------------------------------------------------------ fleet
def test_fleet_page_counts_statuses_with_words(app, project):
    _, truth = project
    at = _ok(app().run())
    assert at.title[0].value == "Fleet"
    metrics = {m.label: int(m.value) for m in at.metric}
    want = {s: list(truth.status_end.values()).count(s) for s in ("alert", "watch", "normal")}
    assert metrics == {dash.status_label(s): n for s, n in want.items()}
    # every status colour comes with its symbol and word: the status column shows each
    # unit's word as a label, coloured by the column's options
    table = at.dataframe[0].value
    assert len(table) == len(truth.status_end)
    words = [list(v) for v in table["status"]]
    assert all(len(w) == 1 for w in words)
    assert {w[0] for w in words} <= {dash.status_label(s) for s in want}
    first = table.iloc[0]
    assert list(first["status"]) == [dash.status_label("alert")]      # most urgent first
    assert first["main_reason"]
    status_col = json.loads(at.dataframe[0].proto.columns)["status"]["type_config"]
    options = {o["value"]: o["color"] for o in status_col["options"]}
    assert options == {dash.status_label(s): dash.status_text_colour(s)
                       for s in ("alert", "watch", "normal", None)}
    # the safety caption is on every page (sidebar)
    assert any("lock" in c.value and "qualified people decide" in c.value
               for c in at.sidebar.caption)


def test_fleet_table_filters_by_line_and_status(app, project):
    _, truth = project
    at = _ok(app().run())
    at.multiselect(key="fleet_lines").set_value(["L2"]).run()
    table = _ok(at).dataframe[0].value
    assert len(table) == sum(u.startswith("L2-") for u in truth.status_end)
    assert all(u.startswith("L2-") for u in table["unit_id"])
    at.multiselect(key="fleet_lines").set_value([]).run()
    at.multiselect(key="fleet_status").set_value(["watch"]).run()
    table = _ok(at).dataframe[0].value
    assert sorted(table["unit_id"]) == sorted(u for u, s in truth.status_end.items()
                                              if s == "watch")
    at.selectbox(key="fleet_sort").set_value("Unit").run()
    table = _ok(at).dataframe[0].value
    assert list(table["unit_id"]) == sorted(table["unit_id"])


def test_fleet_slip_distribution_chart_shows_the_limit(app):
    at = _ok(app().run())
    specs = _specs(at)
    assert len(specs) == 1
    text = _text(specs[0])
    assert "p10" in text and "p90" in text and "p50" in text
    assert "wear limit 5.0%" in text          # slip_limit default 0.05


def test_choosing_a_unit_opens_it(app, project):
    _, truth = project
    wear_unit = next(u for u, c in truth.conditions.items() if c == "wear")
    at = _ok(app().run())
    link = at.get("page_link")[0].proto
    assert link.label == "Open unit" and link.disabled          # nothing chosen yet
    at.selectbox(key="open_unit").set_value(wear_unit).run()
    link = _ok(at).get("page_link")[0].proto
    assert not link.disabled and link.query_string == f"unit={wear_unit}"
    assert link.page_script_hash == _page_hash("unit")
    # the browser follows the link: the Unit page runs with the unit in the address
    at.query_params["unit"] = wear_unit
    at.switch_page(UNIT_PAGE).run()
    _ok(at)
    assert at.title[0].value == "Unit"
    assert at.selectbox(key="unit_pick").value == wear_unit
    assert at.query_params.get("unit") in (wear_unit, [wear_unit])
    # its status, with the word in its colour, and its reasons are shown
    html = " ".join(h.proto.body for h in at.get("html"))
    status = truth.status_end[wear_unit]
    assert (f'<span style="color:{dash.status_text_colour(status)};font-weight:600">'
            f'{dash.status_label(status)}</span>') in html
    assert "<li>steady slip at load" in html


def test_unit_page_draws_every_section(app, project):
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "wear")
    at = _open_unit(app, unit)
    titles = [t for s in _specs(at) for t in _titles(s)]
    joined = " | ".join(titles)
    for want in ("steady slip at load", "creep vs load", "Commanded against actual ratio",
                 "Input power", "Temperature", "Status by day", "Anomaly score"):
        assert want in joined, f"missing chart {want!r} in {titles}"
    slip = next(s for s in _specs(at) if "steady slip at load" in " ".join(_titles(s)))
    assert "wear limit 5.0%" in _text(slip)
    # health changes carry the reasons; anomaly table names the driving features; both
    # short, so static HTML tables side by side in one element, not grids
    titled = dict(_html_tables(at))
    changes = titled["Status changes and their reasons"]
    assert [r["status"] for r in changes][:2] == [dash.status_label("alert"),
                                                  dash.status_label("watch")]  # newest first
    assert all("steady slip at load" in r["reasons"] for r in changes[:2])
    assert [r["status"] for r in changes][2:] == [dash.status_label("normal")]
    top = titled["Highest anomaly scores and the features that drove them"]
    assert top[0]["top_features"].startswith("slip_at_load z=")
    assert not any("reasons" in d.value.columns or "top_features" in d.value.columns
                   for d in at.dataframe)
    # status colours in the table come with their words
    body = next(h.proto.body for h in at.get("html") if "Status changes" in h.proto.body)
    assert (f'color:{dash.status_text_colour("alert")};font-weight:600">'
            f'{dash.status_label("alert")}<') in body


def test_unit_tables_longer_than_the_html_limit_stay_grids(app, project, monkeypatch):
    """A table of more than HTML_TABLE_ROWS rows is an interactive grid (sort, scroll),
    with its title; shorter ones stay static HTML."""
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "wear")
    monkeypatch.setattr(dash, "HTML_TABLE_ROWS", 2)
    at = _open_unit(app, unit)
    changes = next(d for d in at.dataframe if "reasons" in d.value.columns)
    assert len(changes.value) == 3
    assert any(m.value == "**Status changes and their reasons**" for m in at.markdown)
    assert "Status changes" not in " ".join(t for t, _ in _html_tables(at))
    assert any("top_features" in d.value.columns for d in at.dataframe)


def test_choosing_a_unit_prefetches_its_unit_page(app, project, monkeypatch):
    """Choosing a unit on the Fleet page loads its Unit page's data in the background;
    opening it then reads the cache (unit_view is not computed again)."""
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "stall")
    calls: list = []
    real = dash.unit_view

    def counted(source, **kw):
        calls.append(kw["unit_id"])
        return real(source, **kw)
    counted.__module__, counted.__qualname__ = real.__module__, real.__qualname__
    monkeypatch.setattr(dash, "unit_view", counted)
    import streamlit as st
    st.cache_data.clear()                     # the cache is the process's: start cold
    at = _ok(app().run())
    assert not [t for t in threading.enumerate() if t.name.endswith(f"-prefetch-{unit}")]
    at.selectbox(key="open_unit").set_value(unit).run()
    for t in threading.enumerate():
        if t.name == f"fleetwatch-prefetch-{unit}":
            t.join(60)
    assert calls == [unit]
    at.query_params["unit"] = unit
    at.switch_page(UNIT_PAGE).run()
    _ok(at)
    assert calls == [unit]                        # served from the prefetched cache
    assert len(at.get("vega_lite_chart")) == 1


def test_creep_week_control_picks_the_creep_chart_week(app, project):
    """The creep week is chosen in the page's control row, with the time range; the creep
    chart follows it."""
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "wear")
    at = _open_unit(app, unit)
    box = at.selectbox(key="unit_creep_week")
    newest, older = box.options[0], box.options[1]
    assert box.value == dash.weeks_in(*_shown_range(at))[0]

    def creep_title() -> str:
        return next(t for s in _specs(_ok(at)) for t in _titles(s) if "creep vs load" in t)
    assert newest in creep_title()
    box.set_value(dash.weeks_in(*_shown_range(at))[1]).run()
    assert older in creep_title() and newest not in creep_title()


def _shown_range(at: AppTest) -> tuple[dt.date, dt.date]:
    """The Unit page's (start, end) from its 'Showing A to B' caption."""
    import re

    cap = next(c.value for c in at.caption if c.value.startswith("Showing "))
    a, b = re.match(r"Showing (\S+) to (\S+) ", cap).groups()
    return dt.date.fromisoformat(a), dt.date.fromisoformat(b)


def _x_axes(panel: dict) -> list:
    """The x axis settings of a stacked panel and its layers."""
    out = [panel["encoding"]["x"].get("axis")] if "x" in panel.get("encoding", {}) else []
    return out + [a for sub in panel.get("layer", []) for a in _x_axes(sub)]


def _x_scales(panel: dict) -> list:
    """The x scale settings of a panel and its layers (None: no x encoding)."""
    out = [panel["encoding"]["x"].get("scale")] if "x" in panel.get("encoding", {}) else []
    return out + [a for sub in panel.get("layer", []) for a in _x_scales(sub)]


def test_unit_charts_are_one_light_canvas_with_a_text_alternative(app, project):
    """The browser's share of the Unit page: one view for every chart (one Vega setup),
    on a canvas, no per-mark ARIA descriptions; each panel with its own scales and legends
    (status colours stay with their words), the time panels on the chosen range, their
    time labels only under the bottom panel of each section; screen readers get the chart
    titles through Streamlit's alt."""
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "wear")
    at = _open_unit(app, unit)
    charts = at.get("vega_lite_chart")
    assert len(charts) == 1
    spec = json.loads(charts[0].proto.spec)
    assert spec["usermeta"]["embedOptions"]["renderer"] == "canvas"
    assert spec["config"]["aria"] is False
    assert charts[0].proto.alt and charts[0].proto.alt == dash.chart_alt(spec)
    assert all(t in charts[0].proto.alt for t in _titles(spec))
    for channel in ("x", "y", "color", "shape", "strokeDash"):
        assert spec["resolve"]["scale"][channel] == "independent"
    panels = spec["vconcat"]
    titles = [" ".join(_titles(p)) for p in panels]
    assert "steady slip at load" in titles[0] and "creep vs load" in titles[1]
    assert all("vconcat" not in p and "hconcat" not in p for p in panels)  # all page-wide
    start, end = _shown_range(at)
    domain = dash.time_domain(start, end)
    assert domain[0] == {"year": start.year, "month": start.month, "date": start.day,
                         "utc": True}
    sections = [panels[2:7], panels[7:]]   # operation (5 panels), health (2)
    for section in sections:
        *upper, bottom = section
        for panel in section:
            scales = [sc for sc in _x_scales(panel) if sc is not None]
            assert scales and all(sc["domain"] == domain for sc in scales)
        for panel in upper:
            axes = _x_axes(panel)
            assert axes and all(a["labels"] is False and a["title"] is None for a in axes)
        assert all(not a or a.get("labels", True) for a in _x_axes(bottom))
    assert "time (UTC)" in _text(sections[0][-1])
    assert "Temperature" in titles[6] and "Anomaly score" in titles[-1]


def test_page_spec_keeps_panels_apart_and_skips_missing_charts():
    """page_spec: stacks are lifted into one stack of page-wide panels, their datasets
    kept; nothing to draw gives None."""
    panel = {"mark": "line", "data": {"name": "a"}, "encoding": {}, "config": {"aria": False},
             "usermeta": {"embedOptions": {"renderer": "canvas"}}, "datasets": {"a": [1]}}
    stack = {"config": {"aria": False}, "vconcat": [{"mark": "point"}, {"mark": "tick"}],
             "resolve": {"scale": {"x": "shared"}}, "datasets": {"b": [2]}}
    out = dash.page_spec([panel, None, stack])
    assert [p["mark"] for p in out["vconcat"]] == ["line", "point", "tick"]
    assert out["datasets"] == {"a": [1], "b": [2]}
    assert out["usermeta"]["embedOptions"]["renderer"] == "canvas"
    assert out["resolve"]["scale"]["x"] == "independent"
    # page-wide panels fit the page, their axes included
    assert out["autosize"] == {"type": "fit-x", "contains": "padding"}
    assert "datasets" not in out["vconcat"][0] and "config" not in out["vconcat"][0]
    assert dash.page_spec([None, None]) is None
    # a single layered chart keeps its own resolve (with_markers keeps the markers' colour
    # scale apart from the chart's); a lifted stack's shared x does not reach the panels
    marked = dash.with_markers({"mark": "point", "data": {"name": "a"}, "encoding": {}},
                               {"mark": "rule", "encoding": {}})
    out = dash.page_spec([stack, marked])
    assert out["vconcat"][2]["resolve"]["scale"]["color"] == "independent"
    assert all("resolve" not in p for p in out["vconcat"][:2])


def test_unit_time_range_changes_what_is_drawn(app, project):
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "stall")
    at = _open_unit(app, unit)
    at.selectbox(key="unit_range_preset").set_value("All").run()
    health_all = _table(_ok(at), "reasons")
    # the stall alert (days 45-57) and its clearing are both in the full range
    assert any("alert" in r["status"] for r in health_all)
    at.selectbox(key="unit_range_preset").set_value("Custom").run()
    at.date_input(key="unit_range").set_value(
        (truth.start, truth.start + dt.timedelta(days=20))).run()
    health_early = _table(_ok(at), "reasons")
    assert health_early and not any("alert" in r["status"] for r in health_early)


def test_unit_markers_include_events_and_maintenance(app, project):
    _, truth = project
    unit = next(u for u, c in truth.conditions.items() if c == "healthy")  # wear reset day 10
    at = _open_unit(app, unit)
    at.selectbox(key="unit_range_preset").set_value("All").run()
    markers = _table(_ok(at), "source")
    assert "maintenance" in {r["source"] for r in markers}
    assert any("wear reset" in (r["detail"] or "") for r in markers)


# ------------------------------------------------------------------ events
def test_events_page_filters_by_unit_kind_and_time(app, project):
    _, truth = project
    at = _ok(app().run())
    at.switch_page("app_pages/events.py").run()
    _ok(at)
    assert at.title[0].value == "Events"
    table = at.dataframe[0].value
    assert len(table) > 0
    at.multiselect(key="ev_kinds").set_value(["gross_slip"]).run()
    table = _ok(at).dataframe[0].value
    assert set(table["kind"]) == {"gross_slip"}
    contaminated = next(u for u, c in truth.conditions.items() if c == "contamination")
    assert set(table["unit_id"]) == {contaminated}
    sensor = next(u for u, c in truth.conditions.items() if c == "sensor")
    at.multiselect(key="ev_units").set_value([sensor]).run()
    assert _ok(at).dataframe[0].value.empty     # the sensor unit has no gross slip
    # time filter: the stall episode (days 45-57) lies outside the last 4 days
    at.multiselect(key="ev_units").set_value([]).run()
    at.multiselect(key="ev_kinds").set_value([]).run()
    last = truth.start + dt.timedelta(days=truth.days - 1)
    first = last - dt.timedelta(days=3)
    at.date_input(key="ev_range").set_value((first, last)).run()
    table = _ok(at).dataframe[0].value
    assert "stall" not in set(table["kind"])
    assert all(first <= t.date() <= last for t in table["start_ts"])


def test_events_csv_has_the_filtered_rows(project):
    root, _ = project
    from fleetwatch.lake import Lake

    ev = dash.filter_events(dash.fleet_events(Lake(root / "lake")), kinds=["stall"])
    csv = dash.to_csv_bytes(ev).decode()
    header, *rows = csv.strip().splitlines()
    assert header.startswith("unit_id,")
    assert len(rows) == ev.height > 0 and all(",stall," in r for r in rows)


# ------------------------------------------------------------------ sql
def _sql(app, text: str) -> AppTest:
    at = _ok(app().run())
    at.switch_page("app_pages/sql.py").run()
    at.text_area(key="sql_text").set_value(text).run()
    at.button(key="sql_run").click().run()
    return at


def test_sql_page_runs_a_query(app, project):
    _, truth = project
    at = _ok(_sql(app, "SELECT unit_id, count(*) AS days FROM health GROUP BY unit_id "
                       "ORDER BY unit_id"))
    assert not at.error
    res = at.dataframe[0].value
    assert list(res.columns) == ["unit_id", "days"]
    assert len(res) == len(truth.status_end)
    assert set(res["days"]) == {truth.days}


def test_sql_page_example_queries_run(app):
    at = _ok(app().run())
    at.switch_page("app_pages/sql.py").run()
    for name in dash.EXAMPLE_QUERIES:
        at.selectbox(key="sql_example").set_value(name).run()
        assert at.text_area(key="sql_text").value == dash.EXAMPLE_QUERIES[name]
        at.button(key="sql_run").click().run()
        _ok(at)
        assert not at.error, (name, [e.value for e in at.error])


def test_sql_page_shows_an_error_inline(app):
    at = _ok(_sql(app, "SELECT no_such_column FROM health"))
    assert len(at.error) == 1
    assert "no_such_column" in at.error[0].value


@pytest.mark.parametrize("stmt", [
    "COPY health TO '{out}/leak.csv'",
    "CREATE TABLE t AS SELECT 1",
    "SELECT * FROM read_csv('/etc/passwd')",
])
def test_sql_page_refuses_writes_and_file_access(app, tmp_path, stmt):
    at = _ok(_sql(app, stmt.format(out=tmp_path)))
    assert len(at.error) == 1
    # no result table: the only frame is the views reference in the expander
    assert all("meaning" in d.value.columns for d in at.dataframe)
    assert not (tmp_path / "leak.csv").exists()


def test_sql_row_cap_truncates(app):
    at = _ok(app().run())
    at.switch_page("app_pages/sql.py").run()
    at.number_input(key="sql_row_cap").set_value(7).run()
    at.text_area(key="sql_text").set_value("SELECT * FROM windows").run()
    at.button(key="sql_run").click().run()
    _ok(at)
    assert len(at.dataframe[0].value) == 7
    assert any("truncated" in w.value for w in at.warning)


# ------------------------------------------------------------------ reports
def _write_report(folder: Path, week: str, units: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "report.html").write_text(f"<html><body><h1>Week {week}</h1></body></html>")
    (folder / "actions.csv").write_text("unit_id,status,suggested_action\r\n"
                                        "L1-U01,alert,inspect roller and preload\r\n")
    (folder / "summary.json").write_text(json.dumps(
        {"week": week, "units_total": units, "counts": {"normal": 10, "watch": 4, "alert": 2}}))


def test_reports_page_lists_previews_and_builds(app, project, monkeypatch):
    import fleetwatch.report

    root, truth = project
    _write_report(root / "reports" / "2026-W30", "2026-W30", len(truth.status_end))
    calls = []

    def fake_build_report(settings, week=None, **kw):
        # the real build takes ~15 s of chart rendering; its own tests cover it
        calls.append(week)
        folder = settings.reports_path / week
        _write_report(folder, week, 16)
        return fleetwatch.report.ReportResult(
            paths={"dir": folder, "html": folder / "report.html"}, week=week, summary={})

    monkeypatch.setattr(fleetwatch.report, "build_report", fake_build_report)
    at = _ok(app().run())
    at.switch_page("app_pages/reports.py").run()
    _ok(at)
    assert at.selectbox(key="rep_week").options == ["2026-W30"]
    metrics = {m.label: m.value for m in at.metric}
    assert metrics[dash.status_label("alert")] == "2"
    actions = at.dataframe[-1].value
    assert list(actions["unit_id"]) == ["L1-U01"]
    assert not at.get("iframe")
    at.toggle(key="rep_preview").set_value(True).run()
    assert "Week 2026-W30" in _ok(at).get("iframe")[0].proto.srcdoc
    # build: the default week is the newest with data (the fleet's clock is in the past)
    assert at.selectbox(key="rep_build_week").value == truth.report_week
    at.button(key="rep_build").click().run()
    _ok(at)
    assert calls == [truth.report_week]
    assert truth.report_week in at.success[0].value
    assert at.selectbox(key="rep_week").options == [truth.report_week, "2026-W30"]


# ------------------------------------------------------------------ the real pipeline
def test_every_page_on_a_simulated_fleet(tmp_path_factory, monkeypatch):
    """simulate -> ingest -> analyze, then every page renders what the lake holds."""
    root, key = simulated_fleet(tmp_path_factory)
    status = expected_status(root)
    monkeypatch.setenv("FLEETWATCH_PROJECT", str(root))
    at = _ok(AppTest.from_file(str(PACKAGED_APP), default_timeout=120).run())
    metrics = {m.label: int(m.value) for m in at.metric}
    assert metrics == {dash.status_label(s): list(status.values()).count(s)
                       for s in ("alert", "watch", "normal")}
    table = at.dataframe[0].value
    assert set(table["unit_id"]) == set(key["units"])
    assert table["last_data"].notna().all()        # from telemetry
    slippy = next(u for u, t in key["units"].items() if t["events"]["gross_slip_samples"])
    at.query_params["unit"] = slippy
    at.switch_page(UNIT_PAGE).run()
    _ok(at)
    at.selectbox(key="unit_range_preset").set_value("All").run()
    _ok(at)
    titles = " | ".join(t for s in _specs(at) for t in _titles(s))
    for want in ("steady slip at load", "creep vs load", "Commanded against actual ratio",
                 "Input power", "Status by day", "Anomaly score"):
        assert want in titles, f"missing chart {want!r} in {titles}"
    markers = _table(at, "source")
    assert "gross_slip" in {r["kind"] for r in markers}
    pages = [("events", "Events"), ("reports", "Reports"), ("sql", "SQL")]
    if dash.advisor_available():
        pages.insert(0, ("energy", "Energy"))
    for page, title in pages:
        at.switch_page(f"app_pages/{page}.py").run()
        assert _ok(at).title[0].value == title
    at.text_area(key="sql_text").set_value("SELECT count(DISTINCT unit_id) AS n FROM telemetry")
    at.button(key="sql_run").click().run()
    assert _ok(at).dataframe[0].value["n"].iloc[0] == len(key["units"])


# ------------------------------------------------------------------ plumbing
def test_thin_entry_runs_the_packaged_app(app):
    at = _ok(app(THIN_APP).run())
    assert at.title[0].value == "Fleet"
    at.switch_page("../fleetwatch/dashboard_app/app_pages/sql.py").run()
    assert _ok(at).title[0].value == "SQL"


def test_pages_refresh_when_tables_change_and_ignore_the_writer_lock(app, project):
    root, truth = project
    from fleetwatch.lake import Lake

    lake = Lake(root / "lake")
    at = _ok(app().run())
    before = {m.label: int(m.value) for m in at.metric}
    health = lake.read("health")
    try:
        with lake.writer("test: analyze running"):
            # a writer holds the lock: the dashboard still reads (its last snapshot)
            _ok(at.run())
            lake.overwrite("health", health.with_columns(status=pl.lit("alert")))
            time.sleep(2.2)                      # versions are re-read every 2 s
            at.run()
        after = {m.label: int(m.value) for m in _ok(at).metric}
        assert after[dash.status_label("alert")] == len(truth.status_end) != \
            before[dash.status_label("alert")]
    finally:
        with lake.writer("test: restore"):
            lake.overwrite("health", health)


def test_snapshot_reads_window_tables_natively_with_the_same_rows(project):
    """The snapshot re-points windows/efficiency at DuckDB's Parquet reader (fast one-unit
    reads); they must hold exactly the rows of the lake's own Arrow views."""
    root, truth = project
    from fleetwatch.lake import Lake

    lake = Lake(root / "lake")
    snap = dash.LakeSnapshot(lake, lake.versions())
    try:
        unit = sorted(truth.status_end)[1]
        with snap.connect() as con, lake.connect() as ref:
            sql = {r[0]: r[1] for r in con.sql(
                "SELECT view_name, sql FROM duckdb_views() WHERE NOT internal").fetchall()}
            for name in dash.NATIVE_SCAN_TABLES:
                assert "read_parquet" in sql[name], sql[name]
                q = f"SELECT * FROM {name} WHERE unit_id = $u ORDER BY ALL"
                got = con.sql(q, params={"u": unit}).pl()
                want = ref.sql(q, params={"u": unit}).pl()
                assert got.height > 0 and got.equals(want)
            # a table outside the list keeps the lake's view
            assert "read_parquet" not in sql.get("health", "")
    finally:
        snap.close()


def test_native_scan_leaves_missing_tables_alone_and_reads_partitions_back(project, tmp_path):
    root, _ = project
    from fleetwatch.lake import Lake

    lake = Lake(root / "lake")
    con = lake.connect()
    try:
        assert dash._scan_natively(con, lake, {}) == []          # no versions: nothing
        assert sorted(dash._scan_natively(con, lake, lake.versions())) == \
            sorted(dash.NATIVE_SCAN_TABLES)
    finally:
        con.close()
    # a table partitioned by day: Delta keeps the partition value in the path, not in the
    # files; the native view must read it back with the same type and rows
    part = Lake(tmp_path / "lake")
    src = lake.read("windows")
    days = src["day"].unique().sort()[:3]
    sample = src.filter(src["day"].is_in(days.implode()))
    with part.writer("test"):
        part.overwrite("windows", sample, partition_by=["day"])
    con, ref = part.connect(), part.connect()
    try:
        assert dash._scan_natively(con, part, part.versions()) == ["windows"]
        q = "SELECT * FROM windows ORDER BY unit_id, window_start"
        got, want = con.sql(q).pl(), ref.sql(q).pl()
        assert got.height == sample.height > 0 and got.equals(want)
        assert con.sql("SELECT count(*) FROM windows WHERE day = $d",
                       params={"d": days[1]}).fetchall()[0][0] == \
            sample.filter(sample["day"] == days[1]).height
    finally:
        con.close()
        ref.close()


def test_empty_project_says_what_to_do(tmp_path, monkeypatch):
    monkeypatch.setenv("FLEETWATCH_PROJECT", str(tmp_path))
    at = _ok(AppTest.from_file(str(PACKAGED_APP), default_timeout=60).run())
    assert any("fleetwatch ingest" in i.value for i in at.info)


def test_serve_refuses_a_busy_port(project):
    import socket

    root, _ = project
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        with pytest.raises(UsageError, match=f"127.0.0.1:{port}"):
            dash.serve_dashboard(load_settings(root), port=port, block=False)


def test_cli_dashboard_on_a_busy_port_says_so(project):
    import socket
    import subprocess
    import sys

    root, _ = project
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen()
        port = s.getsockname()[1]
        r = subprocess.run([sys.executable, "-m", "fleetwatch", "--project", str(root),
                            "dashboard", "--port", str(port)],
                           capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert r.stderr.splitlines()[0] == (f"Error: cannot listen on 127.0.0.1:{port}: the "
                                        "address is in use or not available on this machine")
    assert r.stderr.splitlines()[1].startswith("Hint: Pick another one with --port")


def test_server_command_is_local_headless_and_quiet(project):
    root, _ = project
    s = load_settings(root)
    cmd = dash.dashboard_command(s.dashboard_host, s.dashboard_port)
    opts = dict(zip(cmd[5::2], cmd[6::2]))
    assert cmd[3:5] == ["run", str(dash.app_path())]
    assert opts["--server.address"] == "127.0.0.1"
    assert opts["--server.port"] == "8501"
    assert opts["--server.headless"] == "true"
    assert opts["--browser.gatherUsageStats"] == "false"
    # no full garbage collection between script runs (it sat between the Fleet and Unit
    # pages' runs); Python's own collector still runs
    assert opts["--runner.postScriptGC"] == "false"


def test_a_plain_install_ships_the_app():
    """``pip install .`` (non-editable) installs the packages that setuptools finds with the
    pyproject's [tool.setuptools.packages.find]; every file of the app must be in one."""
    import tomllib

    from setuptools import find_packages

    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    find = cfg["tool"]["setuptools"]["packages"]["find"]
    packages = set(find_packages(where=str(ROOT), include=find.get("include", ["*"]),
                                 exclude=find.get("exclude", ())))
    app_dir = dash.app_path().parent
    files = sorted(app_dir.rglob("*.py"))
    assert {"app.py", "ui.py", "fleet.py", "unit.py", "events.py", "sql.py",
            "reports.py"} <= {f.name for f in files}
    assert not (app_dir / "pages").exists()   # Streamlit would list a pages/ folder too
    for f in files:
        pkg = ".".join(f.parent.relative_to(ROOT).parts)
        assert pkg in packages, f"{f} is not in an installed package"


# ------------------------------------------------------------------ helpers without a page
def test_html_table_escapes_and_pairs_status_colours_with_words():
    df = pl.DataFrame({"day": ["2026-01-02", None], "status": [dash.status_label("watch"),
                                                               dash.status_label("alert")],
                       "score": [0.5, 1.25], "note": ["<b>x</b> & y", "ok"]})
    out = dash.html_table(df, status_col="status")
    assert "<b>x</b>" not in out and "&lt;b&gt;x&lt;/b&gt; &amp; y" in out
    assert "<td>–</td>" in out                                   # null
    assert '<td class="num">1.25</td>' in out                    # numbers right-aligned
    for s in ("watch", "alert"):
        assert (f'<span style="color:{dash.status_text_colour(s)};font-weight:600">'
                f'{dash.status_label(s)}</span>') in out
    assert out.count("<tr>") == 3                                # header + 2 rows
    both = dash.html_tables([("A <title>", out), ("B", dash.html_table(df.head(1)))])
    assert both.count('<table class="fw-table">') == 2 and "A &lt;title&gt;" in both
    assert both.startswith("<style>")


def test_bench_lake_can_be_laid_out_as_analyze_writes_it(tmp_path):
    """report_lake.write_lake(layout="analyze"): windows stored month by month (files by
    month, then unit), the same rows as the key-sorted layout."""
    from report_lake import synthetic_tables, write_lake

    from fleetwatch.lake import Lake

    tables, _ = synthetic_tables(units=3, days=40, window_min=60)
    tables = {k: tables[k] for k in ("windows", "efficiency", "unit_days")}
    a = write_lake(tmp_path / "a", tables, layout="analyze")
    b = write_lake(tmp_path / "b", tables)
    for name in tables:
        assert a.read(name).sort(a.read(name).columns).equals(
            b.read(name).sort(b.read(name).columns))
    con = Lake(tmp_path / "a").connect()
    stored = con.sql("SELECT day, unit_id FROM windows").pl()   # file order
    months = stored["day"].dt.month_start()
    assert months.is_sorted()                                     # month first ...
    assert not stored["unit_id"].is_sorted()                      # ... then unit
    with pytest.raises(ValueError):
        write_lake(tmp_path / "c", tables, layout="sideways")
