"""On-demand benchmark of the dashboard in a real browser (not collected by pytest).

Run from the repository root:

    python tests/bench/bench_dashboard.py                     # 24 units x 365 days, 10-min windows
    python tests/bench/bench_dashboard.py --units 8 --days 90 --json

Builds a synthetic lake (tests/report_lake.py: every derived table, written with
Lake.overwrite), starts the dashboard with ``serve_dashboard`` on a free port and drives it
with Playwright and Debian's Chromium. Times, from the click that navigates to the moment the
page's charts are drawn in the browser (Vega canvas/svg present and the script run over):

- fleet_first_s: Fleet page, first render after the server started (cold data cache), by an
  in-app click from the SQL page (the app's JavaScript already loaded);
- unit_first_s: a unit opened from the Fleet page (cold for that unit);
- unit_other_s, fleet_again_s: another unit, Fleet again (partly / fully warm caches);
- full_load_s: a fresh browser tab loading the Unit page's address (JavaScript included).

Targets: Fleet first render <= 2 s, Unit <= 1.5 s (2 cores). Exit 1 above a target.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from dashboard_project import build_project, free_port  # noqa: E402
from fleetwatch.config import load_settings  # noqa: E402
from fleetwatch.dashboard import serve_dashboard  # noqa: E402

CHROMIUM = next((p for p in ("/usr/lib/chromium/chromium", "/usr/bin/chromium")
                 if Path(p).exists()), None)
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
CHART = '[data-testid="stVegaLiteChart"] canvas, [data-testid="stVegaLiteChart"] svg'
IDLE = "() => !document.querySelector('[data-testid=\"stStatusWidget\"]')"


def drawn(page, title: str, charts: int, t0: float, timeout_ms: int = 120000) -> float:
    """Seconds from ``t0`` until the page titled ``title`` shows ``charts`` drawn charts."""
    page.wait_for_selector(f'[data-testid="stMain"] h1:has-text("{title}")', timeout=timeout_ms)
    page.wait_for_function(f"() => document.querySelectorAll('{CHART}').length >= {charts}",
                           timeout=timeout_ms)
    page.wait_for_function(IDLE, timeout=timeout_ms)
    return time.perf_counter() - t0


def open_unit(page, unit: str) -> float:
    box = page.get_by_test_id("stSelectbox").filter(has_text="Open a unit")
    box.click()
    page.get_by_role("option", name=unit, exact=True).click()
    page.wait_for_function(IDLE)
    t0 = time.perf_counter()
    page.get_by_role("button", name="Open unit").click()
    return drawn(page, "Unit", 7, t0)


def to_fleet(page) -> float:
    t0 = time.perf_counter()
    page.get_by_test_id("stSidebarNav").get_by_role("link", name="Fleet").click()
    return drawn(page, "Fleet", 1, t0)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=24)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--window-min", type=int, default=10)
    ap.add_argument("--fleet-target-s", type=float, default=2.0)
    ap.add_argument("--unit-target-s", type=float, default=1.5)
    ap.add_argument("--screenshots", help="folder for screenshots of the timed pages")
    ap.add_argument("--json", action="store_true", help="print the figures as JSON")
    args = ap.parse_args(argv)
    if CHROMIUM is None:
        print("Debian chromium is needed: apt-get install -y chromium", file=sys.stderr)
        return 2
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory(prefix="fw-bench-dash-") as tmp:
        root = Path(tmp)
        t = time.perf_counter()
        truth = build_project(root, units=args.units, days=args.days,
                              window_min=args.window_min)
        lake_s = time.perf_counter() - t
        server = serve_dashboard(load_settings(root, env={}), port=free_port(), block=False)
        try:
            assert server.wait_ready(60), "the dashboard did not start"
            units = sorted(truth.status_end)
            out: dict = {"units": args.units, "days": args.days,
                         "window_min": args.window_min, "lake_build_s": round(lake_s, 1)}
            with sync_playwright() as p:
                browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
                page = browser.new_page(viewport={"width": 1400, "height": 2400})
                page.goto(server.url + "/sql", wait_until="domcontentloaded")
                page.wait_for_selector('button:has-text("Run query")', timeout=120000)
                page.wait_for_function(IDLE)
                out["fleet_first_s"] = to_fleet(page)
                if args.screenshots:
                    Path(args.screenshots).mkdir(parents=True, exist_ok=True)
                    page.screenshot(path=str(Path(args.screenshots) / "bench-fleet.png"))
                out["unit_first_s"] = open_unit(page, units[0])
                if args.screenshots:
                    page.screenshot(path=str(Path(args.screenshots) / "bench-unit.png"))
                out["fleet_again_s"] = to_fleet(page)
                out["unit_other_s"] = open_unit(page, units[1])
                tab = browser.new_page(viewport={"width": 1400, "height": 2400})
                t0 = time.perf_counter()
                tab.goto(f"{server.url}/unit?unit={units[2]}", wait_until="domcontentloaded")
                out["full_load_s"] = drawn(tab, "Unit", 7, t0)
                browser.close()
        finally:
            server.stop()
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
              f"{args.unit_target_s}), another unit {out['unit_other_s']} s; full load of a "
              f"Unit address {out['full_load_s']} s; load avg {out['load_avg_1min']} on "
              f"{out['cpus']} CPUs [lake built in {out['lake_build_s']} s]")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
