"""On-demand benchmark of the dashboard in a real browser (not collected by pytest).

Run from the repository root:

    python tests/bench/bench_dashboard.py                     # 24 units x 365 days, 10-min windows
    python tests/bench/bench_dashboard.py --units 8 --days 90 --json

Builds a synthetic lake (tests/report_lake.py: every derived table; windows and efficiency
stored as ``fleetwatch analyze`` stores them, streamed month by month, the others with
Lake.overwrite; ``--layout overwrite`` sorts every table by key as before), starts the
dashboard with ``serve_dashboard`` on a free port and drives it
with Playwright and Debian's Chromium. Times, from the click that navigates to the moment the
page's charts are drawn in the browser (Vega canvas/svg present, the script run over and, on
the Unit page, its status line shown: READY_TEXT):

- fleet_first_s: Fleet page, first render after the server started (cold data cache), by an
  in-app click from the SQL page (the app's JavaScript already loaded);
- unit_first_s: a unit opened from the Fleet page. Choosing the unit on the Fleet page starts
  loading its Unit page's data in the background (fleet.py: ui.prefetch_unit), and the
  clock starts once that choice's rerun is over, so this figure includes the head start the
  prefetch gives (the click comes right after the rerun, often before the prefetch ends);
  ``server_unit_cold_s`` is the truly cold server figure;
- unit_other_s, fleet_again_s: another unit, Fleet again (partly / fully warm caches);
- unit_again_s: the first unit opened again (server cache warm: this is about the browser's
  share of unit_first_s, plus a 0.1-0.2 s warm rerun);
- full_load_s: a fresh browser tab loading the Unit page's address (JavaScript included).

Server and browser are timed apart: ``server_*`` figures run the same pages under
Streamlit's AppTest in a fresh process (no browser; cold data cache, then a warm rerun),
so ``unit_first_s - server_unit_cold_s`` is the browser's share (drawing the charts).
Each figure comes with the 1-minute load average when it was taken (shared machines).

Targets: Fleet first render <= 2 s, Unit <= 1.5 s (2 cores). Exit 1 above a target.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

# the server (a `streamlit run` subprocess) must import this checkout's fleetwatch too, not
# an installed copy that may be older
os.environ["PYTHONPATH"] = os.pathsep.join(
    [str(ROOT)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p])

from dashboard_project import build_project, free_port  # noqa: E402
from fleetwatch.config import load_settings  # noqa: E402
from fleetwatch.dashboard import serve_dashboard  # noqa: E402

CHROMIUM = next((p for p in ("/usr/lib/chromium/chromium", "/usr/bin/chromium")
                 if Path(p).exists()), None)
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
CHART = '[data-testid="stVegaLiteChart"] canvas, [data-testid="stVegaLiteChart"] svg'
IDLE = "() => !document.querySelector('[data-testid=\"stStatusWidget\"]')"
#: Charts a Unit page draws (one view holding every panel: dashboard.page_spec);
#: --unit-charts sets it for older builds (4: slip, creep and two stacks; 7: one chart per
#: panel).
UNIT_CHARTS = 1


#: Text that a page shows once its last lazily loaded element is drawn: the charts and the
#: run being over are not enough, since Streamlit fetches some element types' code on their
#: first use (st.html, for the Unit page's status line and tables: ~0.1 s after the charts).
READY_TEXT = {"Unit": "days to slip limit"}


def drawn(page, title: str, charts: int, t0: float, timeout_ms: int = 120000) -> float:
    """Seconds from ``t0`` until the page titled ``title`` shows ``charts`` drawn charts
    (and its READY_TEXT)."""
    page.wait_for_selector(f'[data-testid="stMain"] h1:has-text("{title}")', timeout=timeout_ms)
    page.wait_for_function(f"() => document.querySelectorAll('{CHART}').length >= {charts}",
                           timeout=timeout_ms)
    page.wait_for_function(IDLE, timeout=timeout_ms)
    if title in READY_TEXT:
        page.wait_for_function(
            "([t]) => document.querySelector('[data-testid=\"stMain\"]').innerText.includes(t)",
            arg=[READY_TEXT[title]], timeout=timeout_ms)
    return time.perf_counter() - t0


_CDP: dict[int, object] = {}


def renderer_cpu_s(page) -> float | None:
    """CPU seconds of the page's renderer main thread so far (Chromium's ThreadTime metric,
    CDP; one session per page, kept): less sensitive to other processes on the machine
    than wall time."""
    try:
        cdp = _CDP.get(id(page))
        if cdp is None:
            cdp = _CDP[id(page)] = page.context.new_cdp_session(page)
            cdp.send("Performance.enable")
        metrics = {m["name"]: m["value"] for m in cdp.send("Performance.getMetrics")["metrics"]}
        return metrics.get("ThreadTime")
    except Exception:  # noqa: BLE001 - a metric we can do without
        return None


def open_unit(page, unit: str, cpu: dict | None = None) -> float:
    """Choose ``unit`` on the Fleet page, then time its "Open unit" link (a button in
    older builds) until the Unit page is drawn. The clock starts once the Fleet page's
    rerun for the choice is over (the link points at the unit): that rerun is the
    choice's, not the opening's (the status widget shows only after a delay, so waiting
    for IDLE alone could start the clock while it still ran)."""
    box = page.get_by_test_id("stSelectbox").filter(has_text="Open a unit")
    box.click()
    page.get_by_role("option", name=unit, exact=True).click()
    link = page.locator(f'[data-testid="stPageLink-NavLink"][href$="unit={unit}"]')
    button = page.get_by_role("button", name="Open unit")
    page.wait_for_function(
        "([u]) => !!document.querySelector(`[data-testid=\"stPageLink-NavLink\"]"
        "[href$=\"unit=${u}\"]`) || [...document.querySelectorAll('button')].some("
        "b => b.innerText.trim() === 'Open unit' && !b.disabled)", arg=[unit])
    page.wait_for_function(IDLE)
    target = link if link.count() else button
    c0 = renderer_cpu_s(page) if cpu is not None else None
    t0 = time.perf_counter()
    target.click()
    took = drawn(page, "Unit", UNIT_CHARTS, t0)
    if c0 is not None:
        c1 = renderer_cpu_s(page)
        cpu["s"] = None if c1 is None else c1 - c0
    return took


def to_fleet(page) -> float:
    t0 = time.perf_counter()
    page.get_by_test_id("stSidebarNav").get_by_role("link", name="Fleet").click()
    return drawn(page, "Fleet", 1, t0)


SERVER_SCRIPT = r"""
import json, os, sys, time
sys.path.insert(0, sys.argv[2])
os.environ["FLEETWATCH_PROJECT"] = sys.argv[1]
from streamlit.testing.v1 import AppTest
import fleetwatch.charts, fleetwatch.views  # noqa: F401 (imported by the app at start too)
app = sys.argv[3]
units = json.loads(sys.argv[4])
out = {"fleet": [], "unit_cold": [], "unit_warm": [], "unit_cold_cpu": [], "load": []}
t = time.perf_counter()
at = AppTest.from_file(app, default_timeout=120).run()
out["fleet"].append(time.perf_counter() - t)
assert not at.exception, [e.message for e in at.exception]
for u in units:
    at.query_params["unit"] = u
    out["load"].append(os.getloadavg()[0])
    t, c = time.perf_counter(), time.process_time()
    at.switch_page("app_pages/unit.py").run()
    out["unit_cold"].append(time.perf_counter() - t)
    out["unit_cold_cpu"].append(time.process_time() - c)
    assert not at.exception, [e.message for e in at.exception]
    t = time.perf_counter()
    at.run()
    out["unit_warm"].append(time.perf_counter() - t)
print("RESULT " + json.dumps(out))
"""


def server_times(root: Path, units: list[str]) -> dict:
    """Server-side seconds of the Fleet page and of Unit pages (cold, then warm), under
    AppTest in a fresh process (deltalake: no fork)."""
    app = str(ROOT / "fleetwatch" / "dashboard_app" / "app.py")
    res = subprocess.run([sys.executable, "-c", SERVER_SCRIPT, str(root), str(ROOT), app,
                          json.dumps(units)], capture_output=True, text=True, timeout=600)
    line = next((ln for ln in res.stdout.splitlines() if ln.startswith("RESULT ")), None)
    if line is None:
        raise RuntimeError("server timing failed:\n" + res.stdout + res.stderr)
    got = json.loads(line[7:])
    return {"server_start_and_fleet_s": got["fleet"][0],
            "server_unit_cold_s": statistics.median(got["unit_cold"]),
            "server_unit_cold_max_s": max(got["unit_cold"]),
            "server_unit_cold_cpu_s": statistics.median(got["unit_cold_cpu"]),
            "server_unit_warm_s": statistics.median(got["unit_warm"]),
            "server_load_avg": statistics.mean(got["load"])}


def load_avg() -> float:
    return round(os.getloadavg()[0], 2)


def main(argv: list[str] | None = None) -> int:
    global UNIT_CHARTS
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=24)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--window-min", type=int, default=10)
    ap.add_argument("--fleet-target-s", type=float, default=2.0)
    ap.add_argument("--unit-target-s", type=float, default=1.5)
    ap.add_argument("--screenshots", help="folder for screenshots of the timed pages")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    ap.add_argument("--unit-charts", type=int, default=1,
                    help="charts that mark a Unit page as drawn (4 for builds before the "
                         "one-view page, 7 before the stacked charts)")
    ap.add_argument("--project", type=Path,
                    help="keep the benchmark project in this folder and reuse it when it is "
                         "already there (saves the lake build between runs)")
    ap.add_argument("--layout", choices=("analyze", "overwrite"), default="analyze",
                    help="how windows and efficiency are stored: as analyze writes them "
                         "(default) or sorted by key (Lake.overwrite)")
    ap.add_argument("--no-server", action="store_true",
                    help="skip the server-side (AppTest) timings")
    args = ap.parse_args(argv)
    UNIT_CHARTS = args.unit_charts
    if CHROMIUM is None:
        print("Debian chromium is needed: apt-get install -y chromium", file=sys.stderr)
        return 2
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="fw-bench-dash-") as tmp:
        root = args.project.resolve() if args.project else Path(tmp)
        t = time.perf_counter()
        built = root / "bench-built.json"
        if args.project and built.is_file():
            units = json.loads(built.read_text(encoding="utf-8"))
        else:
            truth = build_project(root, units=args.units, days=args.days,
                                  window_min=args.window_min, layout=args.layout)
            units = sorted(truth.status_end)
            if args.project:
                built.write_text(json.dumps(units), encoding="utf-8")
        lake_s = time.perf_counter() - t
        server = serve_dashboard(load_settings(root, env={}), port=free_port(), block=False)
        try:
            assert server.wait_ready(60), "the dashboard did not start"
            out: dict = {"units": args.units, "days": args.days, "layout": args.layout,
                         "window_min": args.window_min, "lake_build_s": round(lake_s, 1)}
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
                page = browser.new_page(viewport={"width": 1400, "height": 2400})
                page.goto(server.url + "/sql", wait_until="domcontentloaded")
                page.wait_for_selector('button:has-text("Run query")', timeout=120000)
                page.wait_for_function(IDLE)
                out["load_fleet_first"] = load_avg()
                out["fleet_first_s"] = to_fleet(page)
                if args.screenshots:
                    Path(args.screenshots).mkdir(parents=True, exist_ok=True)
                    page.screenshot(path=str(Path(args.screenshots) / "bench-fleet.png"))
                out["load_unit_first"] = load_avg()
                cpu: dict = {}
                out["unit_first_s"] = open_unit(page, units[0], cpu)
                out["unit_first_browser_cpu_s"] = cpu.get("s")
                if args.screenshots:
                    page.screenshot(path=str(Path(args.screenshots) / "bench-unit.png"))
                out["fleet_again_s"] = to_fleet(page)
                out["unit_other_s"] = open_unit(page, units[1])
                to_fleet(page)
                out["load_unit_again"] = load_avg()
                out["unit_again_s"] = open_unit(page, units[0], cpu)
                out["unit_again_browser_cpu_s"] = cpu.get("s")
                tab = browser.new_page(viewport={"width": 1400, "height": 2400})
                t0 = time.perf_counter()
                tab.goto(f"{server.url}/unit?unit={units[2]}", wait_until="domcontentloaded")
                out["full_load_s"] = drawn(tab, "Unit", UNIT_CHARTS, t0)
                browser.close()
        finally:
            server.stop()
        if not args.no_server:
            out.update(server_times(root, units[3:6]))
    out = {k: round(v, 2) if isinstance(v, float) else v for k, v in out.items()}
    out.update(load_avg_1min=round(os.getloadavg()[0], 2), cpus=os.cpu_count(),
               fleet_target_s=args.fleet_target_s, unit_target_s=args.unit_target_s)
    ok = (out["fleet_first_s"] <= args.fleet_target_s
          and out["unit_first_s"] <= args.unit_target_s)
    if args.json:
        print(json.dumps(out, indent=2))
    else:
        print(f"dashboard, {args.units} units x {args.days} d: Fleet first render "
              f"{out['fleet_first_s']} s (target {args.fleet_target_s}), again "
              f"{out['fleet_again_s']} s; Unit {out['unit_first_s']} s (target "
              f"{args.unit_target_s}), another unit {out['unit_other_s']} s, same unit again "
              f"(server warm) {out['unit_again_s']} s; browser main-thread CPU for the Unit "
              f"page {out['unit_first_browser_cpu_s']} s; full load of a Unit address "
              f"{out['full_load_s']} s; load avg {out['load_unit_first']} at the Unit page, "
              f"{out['load_avg_1min']} at the end, on {out['cpus']} CPUs "
              f"[lake built in {out['lake_build_s']} s]")
        if "server_unit_cold_s" in out:
            print(f"server side (AppTest, no browser): start and Fleet "
                  f"{out['server_start_and_fleet_s']} s; Unit cold {out['server_unit_cold_s']} "
                  f"s, CPU {out['server_unit_cold_cpu_s']} s (max "
                  f"{out['server_unit_cold_max_s']}), warm rerun {out['server_unit_warm_s']} "
                  f"s; load avg {out['server_load_avg']}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
