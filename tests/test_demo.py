"""The main job end to end: `fleetwatch demo --no-serve` on a small fleet."""
from __future__ import annotations

import csv
import json
import subprocess
import sys

import pytest


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """One small demo project, built through the CLI exactly as a newcomer would."""
    proj = tmp_path_factory.mktemp("demo") / "demo"
    r = subprocess.run([sys.executable, "-m", "fleetwatch", "--project", str(proj), "demo",
                        "--units", "8", "--days", "40", "--seed", "5", "--no-serve"],
                       capture_output=True, text=True, timeout=900)
    assert r.returncode == 0, r.stderr[-3000:]
    return proj, r


@pytest.mark.slow
def test_demo_builds_lake_status_report_and_advice(demo):
    proj, r = demo
    out = r.stdout
    # every stage ran and said what it wrote
    for step in ("[1] Simulating", "[2] Ingesting", "[3] Analyzing", "[4] Fleet status",
                 "[5] Ratio advice", "[6] Weekly wear report"):
        assert step in out, step
    # the accounting line balances
    line = next(l for l in out.splitlines() if "telemetry: read" in l)
    nums = [int(x.replace(",", "")) for x in
            __import__("re").findall(r"[\d,]+\d|\d", line.split("read", 1)[1])]
    assert nums[0] == nums[1] + nums[2] + nums[3]
    # the report lies in the week of the data, and lists exactly the units in watch/alert
    key = json.loads((proj / "demo_fleet" / "answer_key.json").read_text())
    reports = sorted((proj / "reports").iterdir())
    assert len(reports) == 1
    rows = list(csv.DictReader(open(reports[0] / "actions.csv", newline="")))
    summary = json.loads((reports[0] / "summary.json").read_text())
    flagged = {r["unit_id"] for r in rows}
    assert flagged, "a fleet with injected faults should need some action"
    healthy = {u for u, v in key["units"].items() if v["condition"] == "healthy"}
    assert not (flagged & healthy), f"healthy units flagged: {flagged & healthy}"
    assert summary["week"] <= "2026-W28"  # 40 days from 2026-06-01: data ends in July
    # status from the CLI agrees with the health table
    st = subprocess.run([sys.executable, "-m", "fleetwatch", "--project", str(proj), "status",
                         "--json"], capture_output=True, text=True, timeout=300)
    assert st.returncode == 0, st.stderr
    units = json.loads(st.stdout)
    assert {u["unit_id"] for u in units} == set(key["units"])


@pytest.mark.slow
def test_report_energy_section_shows_the_advice_table_totals(demo):
    """The report's ratio-advice figure equals the sum over the `advice` table's 'change'
    rows, read independently through the guarded SQL function."""
    import re

    from fleetwatch.config import load_settings
    from fleetwatch.query import run_query

    proj, _ = demo
    html = next((proj / "reports").glob("*/report.html")).read_text(encoding="utf-8")
    assert "Ratio advice: least input power for the same duty" in html
    res = run_query("SELECT coalesce(sum(saving_kwh_week), 0) AS s, count(*) AS n FROM advice "
                    "WHERE status = 'change'", settings=load_settings(proj))
    total, n = res.rows.row(0)
    if n == 0:
        assert "No ratio advice worth acting on" in html
    else:
        shown = float(re.search(r"would save about <strong>([\d.]+) kWh/week", html).group(1))
        assert shown == pytest.approx(total, abs=0.006)
        assert html.count('<table class="advice">') == 1
