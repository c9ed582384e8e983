"""Weekly report: files, content, offline HTML, actions.csv, summary.json, atomic replace.

Most tests run on the synthetic lake of tests/report_lake.py (planted statuses, so the
expected units are known). ``test_report_on_simulated_fleet`` runs the real pipeline
(simulate -> ingest -> analyze) when those modules are present.
"""
from __future__ import annotations

import collections
import contextlib
import csv
import datetime as dt
import io
import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from fleetwatch import report as rp
from fleetwatch._json import json_default
from fleetwatch.config import load_settings
from fleetwatch.errors import LockHeldError, ReportError, UsageError
from report_lake import FrameLake, synthetic_tables

UTC = dt.timezone.utc
NOW = dt.datetime(2026, 8, 3, 6, 0, tzinfo=UTC)       # Monday morning after 2026-W31


@pytest.fixture(scope="module")
def synth():
    return synthetic_tables(units=16)


@pytest.fixture(scope="module")
def built(synth, tmp_path_factory):
    tables, truth = synth
    project = tmp_path_factory.mktemp("project")
    # charts for the 3 most urgent units (report_units_max): enough to check the evidence
    # layout while keeping the suite fast; the simulated-fleet test draws every unit
    settings = load_settings(project, overrides={"report_units_max": 3}, env={})
    lake = FrameLake(tables)
    res = rp.build_report(settings, lake=lake, now=NOW)
    html = res.paths["html"].read_text(encoding="utf-8")
    return res, html, truth, settings, lake


@pytest.fixture
def fast_svg(monkeypatch):
    """Behaviour tests that do not look at charts skip building and rendering them."""
    monkeypatch.setattr(rp, "_render_charts",
                        lambda *a, **k: collections.defaultdict(lambda: "<svg></svg>"))


class _Sections(HTMLParser):
    """Counts <svg> elements inside each <section id=...> and collects element ids."""

    def __init__(self):
        super().__init__()
        self.stack: list[str | None] = []
        self.svgs: dict[str, int] = {}
        self.ids: set[str] = set()
        self.units_with_svgs: dict[str, int] = {}
        self._article: str | None = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "id" in a:
            self.ids.add(a["id"])
        if tag == "section":
            self.stack.append(a.get("id"))
            self.svgs.setdefault(a.get("id"), 0)
        if tag == "article":
            self._article = a.get("id")
            self.units_with_svgs.setdefault(self._article, 0)
        if tag == "svg" and self.stack:
            self.svgs[self.stack[-1]] += 1
            if self._article:
                self.units_with_svgs[self._article] += 1

    def handle_endtag(self, tag):
        if tag == "section" and self.stack:
            self.stack.pop()
        if tag == "article":
            self._article = None


def _parse(html: str) -> _Sections:
    p = _Sections()
    p.feed(html)
    return p


# ----------------------------------------------------------------------------- files
def test_default_week_is_last_complete_week_and_files_exist(built):
    res, html, truth, settings, lake = built
    assert res.week == truth.report_week == "2026-W31"
    assert res.paths["dir"] == Path(settings.reports_path) / "2026-W31"
    assert sorted(p.name for p in res.paths["dir"].iterdir()) == [
        "actions.csv", "report.html", "summary.json"]
    assert lake.lock_requests == ["report"]          # took the writer lock for its snapshot


def test_report_names_faulty_units_and_no_healthy_ones(built):
    res, html, truth, *_ = built
    need = truth.needing_action
    assert need == {"L1-U01", "L1-U02", "L1-U03", "L1-U04", "L1-U06", "L1-U07"}
    with open(res.paths["actions"], newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert {r["unit_id"] for r in rows} == need
    ids = _parse(html).ids
    for u in need:
        assert f'id="unit-{u}"' in html
    healthy = {u for u, c in truth.conditions.items() if c == "healthy"} | {"L1-U05"}
    for u in healthy:
        assert f"unit-{u}" not in ids
        # a normal unit appears in the fleet-wide sections only, never as an action
        assert u not in {r["unit_id"] for r in rows}
    actions_html = html.split('id="actions"')[1].split("</section>")[0]
    assert not any(f">{u}<" in actions_html for u in healthy)


def test_html_is_offline_with_no_http_reference(built):
    _, html, *_ = built
    assert re.search(r"https?:", html, re.I) is None
    assert "<script" not in html.lower() and "<link" not in html.lower()
    assert "@import" not in html and "url(" not in html
    assert re.search(r'\s(src|href)="(?!#)', html) is None     # only in-page anchors
    assert "@page { size: A4" in html and "@media print" in html


def test_every_chart_is_present_per_section(built):
    res, html, truth, settings, _ = built
    p = _parse(html)
    n_evid = min(len(truth.needing_action), settings.report_units_max)
    assert p.svgs == {"summary": 2, "actions": 0, "evidence": 3 * n_evid, "events": 1,
                      "motor": 1, "energy": 1, "data-quality": 1, "method": 0, "safety": 0}
    assert list(p.svgs) == list(rp.SECTIONS)
    # the most urgent units carry slip, creep and events charts; the rest their reasons
    per_unit = [p.units_with_svgs[f"unit-{a['unit_id']}"] for a in
                json.loads(res.paths["summary"].read_text())["units_needing_action"]]
    assert per_unit == [3] * n_evid + [0] * (len(per_unit) - n_evid)
    assert html.count("<svg") == sum(p.svgs.values())


def test_sections_hold_what_the_issue_asks(built):
    _, html, truth, *_ = built
    summary = html.split('id="summary"')[1].split("</section>")[0]
    assert "new (needs action" in summary and "L1-U02, L1-U04" in summary
    assert "cleared" in summary and "L1-U05" in summary
    dq = html.split('id="data-quality"')[1].split("</section>")[0]
    assert "L1-U07" in dq and "not_numeric" in dq and "bad_timestamp" in dq
    method = html.split('id="method"')[1].split("</section>")[0]
    for source in ("ISO 1122-1", "RP-1154", "Theil 1950", "Sen 1968", "ISA-18.2",
                   "Liu, Ting &amp; Zhou", "domain notes"):
        assert source in method
    safety = html.split('id="safety"')[1].split("</section>")[0].lower()
    for must in ("isolate, lock and tag out", "preload springs", "coast-down",
                 "dc-link capacitors", "guards", "qualified persons", "29 cfr 1910.147",
                 "local codes and qualified people decide"):
        assert must in safety
    # status shown with its word, not only a colour
    assert "\u25b2 alert</span>" in html and "\u25c6 watch</span>" in html


def test_actions_csv_columns_order_and_plan_by(built):
    res, html, truth, settings, _ = built
    text = res.paths["actions"].read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(text)))
    assert tuple(rows[0]) == rp.ACTIONS_COLUMNS
    recs = [dict(zip(rows[0], r)) for r in rows[1:]]
    assert [r["status"] for r in recs] == ["alert", "alert", "watch", "watch", "watch",
                                           "watch"]
    by_unit = {r["unit_id"]: r for r in recs}
    report_date = dt.date(2026, 8, 3)
    # event-based alert: due on the report date; wear alert: 8 d to limit - 7 d margin
    assert by_unit["L1-U02"]["plan_by"] == "2026-08-03"
    assert by_unit["L1-U01"]["plan_by"] == max(report_date, dt.date(2026, 8, 2)
                                               + dt.timedelta(days=8 - 7)).isoformat()
    assert by_unit["L1-U03"]["plan_by"] == "2026-08-10"     # watch without forecast: margin
    assert by_unit["L1-U01"]["suggested_action"] == "inspect roller and preload"
    assert by_unit["L1-U07"]["suggested_action"] == "check the logger"
    assert by_unit["L1-U02"]["suggested_action"].startswith("clean contact surfaces")
    for r in recs:
        dt.date.fromisoformat(r["plan_by"])
        dt.date.fromisoformat(r["since"])
        assert r["link"] == f"report.html#unit-{r['unit_id']}"
        assert f'id="{r["link"].split("#")[1]}"' in html
        assert r["reasons"]


def test_json_default_writes_utc_and_plain_numbers():
    import numpy as np
    lisbon_summer = dt.timezone(dt.timedelta(hours=1))
    out = json.loads(json.dumps(
        {"t": dt.datetime(2026, 7, 1, 7, 30, tzinfo=lisbon_summer), "d": dt.date(2026, 7, 1),
         "n": np.float64(0.25), "k": np.int64(3), "p": Path("a/b")}, default=json_default))
    assert out == {"t": "2026-07-01T06:30:00Z", "d": "2026-07-01", "n": 0.25, "k": 3,
                   "p": str(Path("a/b"))}
    with pytest.raises(TypeError, match="set"):
        json.dumps({"s": {1}}, default=json_default)


def test_summary_json(built):
    res, _, truth, *_ = built
    s = json.loads(res.paths["summary"].read_text(encoding="utf-8"))
    assert s == json.loads(json.dumps(res.summary, default=json_default))
    assert s["schema_version"] == rp.SCHEMA_VERSION and s["week"] == "2026-W31"
    assert s["generated_at"] == "2026-08-03T06:00:00Z"
    assert dt.datetime.fromisoformat(s["generated_at"].replace("Z", "+00:00")).tzinfo
    assert s["counts"] == {"normal": 10, "watch": 4, "alert": 2}
    assert sum(s["counts"].values()) == s["units_total"] == 16
    need = s["units_needing_action"]
    assert {u["unit_id"] for u in need} == truth.needing_action
    wear = next(u for u in need if u["unit_id"] == "L1-U01")
    assert wear["status"] == "alert" and wear["since"] == "2026-07-21"
    assert wear["days_to_limit"] == pytest.approx(8.0, abs=1) and wear["reasons"]
    ch = s["changes_since_last_week"]
    assert ch["previous_week"] == "2026-W30" and ch["new"] == ["L1-U02", "L1-U04"]
    assert ch["cleared"] == ["L1-U05"] and "still_open" in ch
    dq = s["data_quality"]
    assert dq["silent_units"] == ["L1-U07"] and dq["quarantined_rows_in_period"] == 3
    assert s["events_in_week"] == {"flatline": 4, "gross_slip": 20, "stall": 6}
    assert s["files"] == {"html": "report.html", "actions": "actions.csv",
                          "summary": "summary.json"}


# ----------------------------------------------------------------------------- behaviour
def test_plan_by_rules():
    d = dt.date(2026, 8, 3)
    assert rp.plan_by("alert", dt.date(2026, 8, 2), 30.0, d, 7) == dt.date(2026, 8, 25)
    assert rp.plan_by("alert", dt.date(2026, 8, 2), 3.0, d, 7) == d        # never in the past
    assert rp.plan_by("alert", None, None, d, 7) == d                     # event-based: now
    assert rp.plan_by("watch", dt.date(2026, 8, 2), None, d, 7) == dt.date(2026, 8, 10)
    assert rp.plan_by("watch", dt.date(2026, 8, 2), float("nan"), d, 7) == dt.date(2026, 8, 10)


def test_unit_anchor_is_a_safe_id():
    assert rp.unit_anchor("L1-U03") == "unit-L1-U03"
    assert rp.unit_anchor("line 2/unit#7") == "unit-line_2_unit_7"


def test_rerun_replaces_the_week_atomically(synth, fast_svg, tmp_path):
    tables, truth = synth
    settings = load_settings(tmp_path, env={})
    lake = FrameLake(tables)
    first = rp.build_report(settings, week="2026-W30", lake=lake, now=NOW)
    old_inode = first.paths["dir"].stat().st_ino
    (first.paths["dir"] / "stale.txt").write_text("from an older run")
    second = rp.build_report(settings, week="2026-W30", lake=lake,
                             now=NOW + dt.timedelta(hours=1))
    assert second.paths["dir"] == first.paths["dir"]
    assert second.paths["dir"].stat().st_ino != old_inode       # a new folder swapped in
    assert not (second.paths["dir"] / "stale.txt").exists()
    s = json.loads(second.paths["summary"].read_text())
    assert s["generated_at"] == "2026-08-03T07:00:00Z" and s["week"] == "2026-W30"
    assert sorted(p.name for p in Path(settings.reports_path).iterdir()) == ["2026-W30"]


def test_failed_run_leaves_the_previous_report_intact(synth, fast_svg, tmp_path,
                                                       monkeypatch):
    tables, _ = synth
    settings = load_settings(tmp_path, env={})
    lake = FrameLake(tables)
    first = rp.build_report(settings, week="2026-W30", lake=lake, now=NOW)
    before = first.paths["html"].read_bytes()

    def broken(*a, **k):
        raise ReportError("printer on fire")

    monkeypatch.setattr(rp, "find_chromium", lambda: "/bin/true")
    monkeypatch.setattr(rp, "print_pdf", broken)
    with pytest.raises(ReportError, match="printer on fire"):
        rp.build_report(settings, week="2026-W30", lake=lake, pdf=True, now=NOW)
    assert first.paths["html"].read_bytes() == before
    assert sorted(p.name for p in Path(settings.reports_path).iterdir()) == ["2026-W30"]


def test_out_dir_and_plant_time_zone_pick_the_week(synth, fast_svg, tmp_path):
    tables, _ = synth
    settings = load_settings(tmp_path, overrides={"plant_timezone": "Europe/Berlin"}, env={})
    # Sunday 23:30 UTC = Monday 01:30 in Berlin: W31 is complete there, not in UTC
    res = rp.build_report(settings, out_dir=tmp_path / "elsewhere", lake=FrameLake(tables),
                          now=dt.datetime(2026, 8, 2, 23, 30, tzinfo=UTC))
    assert res.week == "2026-W31"
    assert res.paths["html"] == tmp_path / "elsewhere" / "2026-W31" / "report.html"
    assert "Europe/Berlin" in res.paths["html"].read_text()


def test_bad_week_is_a_usage_error(synth, fast_svg, tmp_path):
    settings = load_settings(tmp_path, env={})
    with pytest.raises(UsageError) as exc:
        rp.build_report(settings, week="2026-13", lake=FrameLake(synth[0]), now=NOW)
    assert exc.value.exit_code == 2 and "YYYY-Www" in exc.value.hint


def test_week_without_data_is_refused(synth, fast_svg, tmp_path):
    settings = load_settings(tmp_path, env={})
    with pytest.raises(ReportError, match="no health data"):
        rp.build_report(settings, week="2025-W10", lake=FrameLake(synth[0]), now=NOW)
    assert not Path(settings.reports_path, "2025-W10").exists()


def test_busy_lake_is_refused_clearly(synth, fast_svg, tmp_path):
    class BusyLake(FrameLake):
        @contextlib.contextmanager
        def writer(self, purpose):
            raise LockHeldError("lock held by analyze (pid 4242)")
            yield  # pragma: no cover

    settings = load_settings(tmp_path, env={})
    with pytest.raises(ReportError, match="being written") as exc:
        rp.build_report(settings, lake=BusyLake(synth[0]), now=NOW)
    assert "lock_timeout_s" in exc.value.hint and exc.value.exit_code == 1


def test_pdf_without_chromium_says_how_to_install(synth, fast_svg, tmp_path, monkeypatch):
    monkeypatch.setattr(rp, "find_chromium", lambda: None)
    settings = load_settings(tmp_path, env={})
    with pytest.raises(ReportError, match="needs Chromium") as exc:
        rp.build_report(settings, lake=FrameLake(synth[0]), pdf=True, now=NOW)
    assert "apt-get install chromium" in exc.value.hint
    assert not Path(settings.reports_path).exists() or not any(
        Path(settings.reports_path).iterdir())


def test_report_units_max_limits_evidence_charts_not_the_list(synth, fast_svg, tmp_path):
    settings = load_settings(tmp_path, overrides={"report_units_max": 2}, env={})
    res = rp.build_report(settings, lake=FrameLake(synth[0]), now=NOW)
    html = res.paths["html"].read_text()
    p = _parse(html)
    assert p.svgs["evidence"] == 6
    assert len(p.units_with_svgs) == 6                    # every unit keeps its anchor
    assert "the other 4 units are listed" in html


# ----------------------------------------------------------------------------- pipeline
_PIPELINE = ("fleetwatch.lake", "fleetwatch.ingest", "fleetwatch.analyze", "fleetwatch.simulate")


def _have_pipeline() -> bool:
    import importlib.util

    return all(importlib.util.find_spec(m) is not None for m in _PIPELINE)


@pytest.fixture(scope="session")
def fleet(tmp_path_factory):
    from fixtures_fleet import build_fleet

    return build_fleet(tmp_path_factory.mktemp("fleet"))


@pytest.mark.slow
@pytest.mark.skipif(not _have_pipeline(), reason="pipeline modules not built yet")
def test_report_on_simulated_fleet(fleet, tmp_path):
    """simulate -> ingest -> analyze -> report for 2026-W28 (6-12 July): the report lists
    exactly the units that health puts in watch or alert at the week's end; each is a
    faulty unit of the answer key whose fault had started by then; no healthy unit is
    named anywhere as needing action; the wear unit that crosses its limit that week is
    an alert."""
    from fleetwatch import views as vw
    from fleetwatch.lake import Lake

    week_end = dt.date(2026, 7, 12)
    res = rp.build_report(fleet.settings, week="2026-W28", out_dir=tmp_path,
                          now=dt.datetime(2026, 7, 13, 5, 0, tzinfo=UTC))
    units = fleet.key["units"]
    ov = vw.fleet_overview(Lake.from_settings(fleet.settings), week_end)
    flagged = set(ov.filter(ov["status"].is_in(["watch", "alert"]))["unit_id"])
    with open(res.paths["actions"], newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    listed = {r["unit_id"] for r in rows}
    assert listed == flagged and listed
    shown = {u for u, k in units.items() if k["condition"] != "healthy"
             and k["fault_start"] and dt.date.fromisoformat(k["fault_start"]) <= week_end}
    assert listed <= shown
    healthy = set(fleet.units("healthy"))
    assert healthy and not (listed & healthy)
    wear = [u for u in fleet.units("wear")
            if dt.date.fromisoformat(units[u]["limit_crossing_day"]) <= week_end]
    assert wear and {r["unit_id"]: r["status"] for r in rows}[wear[0]] == "alert"
    html = res.paths["html"].read_text(encoding="utf-8")
    assert re.search(r"https?:", html) is None
    p = _parse(html)
    assert {a.removeprefix("unit-") for a in p.units_with_svgs} == listed
    assert p.svgs["evidence"] == 3 * len(listed)
    for u in healthy:
        assert f'id="unit-{u}"' not in html
    summary = json.loads(res.paths["summary"].read_text(encoding="utf-8"))
    assert summary["lake_versions"] and summary["counts"]["alert"] >= 1


# ----------------------------------------------------------------------------- CLI
def _cli(capsys, *args):
    """Run the CLI in-process (same code path as the console script, no re-import)."""
    from fleetwatch.cli import main

    try:
        main(list(args))
        code = 0
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_bad_week_exits_2_with_error_line(tmp_path, capsys):
    code, out, err = _cli(capsys, "--project", str(tmp_path), "report", "--week", "2026-13")
    assert code == 2
    assert err.splitlines()[0] == "Error: week '2026-13' is not an ISO 8601 week"
    assert err.splitlines()[1] == "Hint: Write it as YYYY-Www, for example 2026-W23."
    assert out == ""


@pytest.mark.skipif(not _have_pipeline(), reason="fleetwatch.lake not built yet")
def test_cli_report_json_on_a_delta_lake(tmp_path, capsys, monkeypatch):
    from report_lake import write_lake

    tables, truth = synthetic_tables(units=8, window_min=240)
    settings = load_settings(tmp_path, env={})
    write_lake(settings.lake_path, tables)
    monkeypatch.setenv("FLEETWATCH_REPORT_UNITS_MAX", "1")
    code, out, err = _cli(capsys, "--project", str(tmp_path), "report", "--week", "2026-W31",
                          "--json")
    assert code == 0, err
    doc = json.loads(out)                           # only JSON on stdout
    assert doc["week"] == "2026-W31"
    assert Path(doc["paths"]["html"]).is_file()
    assert {u["unit_id"] for u in doc["summary"]["units_needing_action"]} == \
        truth.needing_action
    assert doc["summary"]["lake_versions"]["health"] >= 0
