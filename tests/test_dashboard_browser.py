"""The dashboard in a real browser: ``fleetwatch dashboard`` in a subprocess, driven by
Playwright with Debian's Chromium. Screenshots go to $FLEETWATCH_SCREENSHOTS (else tmp_path).

Without Chromium or Playwright the test is skipped locally and fails in CI (CI=true).
"""
from __future__ import annotations

import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import pytest

from fleetwatch import dashboard as dash
from dashboard_project import ROOT, expected_status, free_port, simulated_fleet

pytestmark = pytest.mark.browser

CHROMIUM = (Path("/usr/lib/chromium/chromium"), Path("/usr/bin/chromium"))
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
CHART = '[data-testid="stVegaLiteChart"] canvas, [data-testid="stVegaLiteChart"] svg'
IDLE = "() => !document.querySelector('[data-testid=\"stStatusWidget\"]')"
# read at import: conftest clears FLEETWATCH_* variables before each test runs
SCREENSHOTS = os.environ.get("FLEETWATCH_SCREENSHOTS")


def chromium_or_skip() -> Path:
    exe = next((p for p in CHROMIUM if p.exists()), None)
    try:
        import playwright.sync_api  # noqa: F401
        have_pw = True
    except ImportError:
        have_pw = False
    if exe is None or not have_pw:
        why = ("Debian chromium is not installed (apt-get install -y chromium)" if exe is None
               else "playwright is not installed (pip install '.[test]')")
        if os.environ.get("CI") == "true":
            pytest.fail(f"browser test needs a browser in CI: {why}")
        pytest.skip(why)
    return exe


class Server:
    """``python -m fleetwatch --project P dashboard --port N`` and what it printed."""

    def __init__(self, project: Path, port: int):
        self.port = port
        self.lines: list[str] = []
        # the server imports this checkout's fleetwatch, not an installed copy (which may
        # be older): the test is about the code under test
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(
            [str(ROOT)] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "fleetwatch", "--project", str(project), "dashboard",
             "--port", str(port)],
            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, bufsize=1, env=env)
        threading.Thread(target=self._pump, daemon=True).start()

    def _pump(self) -> None:
        for line in self.proc.stdout:
            self.lines.append(line.rstrip())

    def wait_ready(self, timeout_s: float = 60) -> str:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            assert self.proc.poll() is None, "\n".join(self.lines)
            url = next((m.group(0) for ln in self.lines
                        if (m := re.search(r"http://127\.0\.0\.1:\d+", ln))), None)
            if url:
                try:
                    with urllib.request.urlopen(url + "/_stcore/health", timeout=2) as r:
                        if r.read() == b"ok":
                            return url
                except OSError:
                    pass
            time.sleep(0.2)
        raise AssertionError("dashboard did not come up:\n" + "\n".join(self.lines))

    def stop(self) -> int:
        self.proc.send_signal(signal.SIGTERM)
        return self.proc.wait(timeout=20)


@pytest.fixture(scope="module")
def served(tmp_path_factory):
    exe = chromium_or_skip()
    root, key = simulated_fleet(tmp_path_factory)
    server = Server(root, free_port())
    try:
        url = server.wait_ready()
        yield exe, url, (key, expected_status(root)), server
    finally:
        if server.proc.poll() is None:
            server.stop()


@pytest.fixture
def shots(tmp_path) -> Path:
    d = Path(SCREENSHOTS or tmp_path / "screenshots")
    d.mkdir(parents=True, exist_ok=True)
    return d


def settle(page, title: str, charts: int = 0, last: str | None = None,
           timeout_ms: int = 60000) -> None:
    """Wait until the page titled ``title`` is shown with at least ``charts`` charts drawn and
    its ``last`` element (a selector) present, and its script run is over."""
    page.wait_for_selector(f'[data-testid="stMain"] h1:has-text("{title}")', timeout=timeout_ms)
    if last:
        page.wait_for_selector(last, timeout=timeout_ms)
    page.wait_for_function(IDLE, timeout=timeout_ms)
    if charts:
        page.wait_for_function(
            f"() => document.querySelectorAll('{CHART}').length >= {charts}",
            timeout=timeout_ms)
    page.wait_for_function(IDLE, timeout=timeout_ms)


def test_every_page_in_a_real_browser(served, shots):
    from playwright.sync_api import sync_playwright

    exe, url, (key, status), server = served
    # the CLI printed the address, on this machine only
    assert any(f"at {url}" in ln for ln in server.lines), server.lines
    worn = next(u for u, t in key["units"].items() if t["condition"].startswith("wear"))
    counts = {s: list(status.values()).count(s) for s in ("normal", "watch", "alert")}
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(exe), args=ARGS)
        page = browser.new_page(viewport={"width": 1400, "height": 2400})
        errors: list[str] = []
        page.on("pageerror", lambda e: errors.append(str(e)))

        # Fleet: counts with words, the table, the distribution chart
        page.goto(url + "/", wait_until="domcontentloaded")     # Fleet is the home page
        settle(page, "Fleet", charts=1)
        metrics = [m.split() for m in page.get_by_test_id("stMetric").all_inner_texts()]
        shown = {" ".join(m[:-1]): int(m[-1]) for m in metrics}
        assert shown == {dash.status_label(s): n for s, n in counts.items()}, metrics
        # the table can arrive after the metrics on a busy machine: wait for it, then count
        page.get_by_test_id("stDataFrame").first.wait_for(state="visible", timeout=60_000)
        assert page.get_by_test_id("stDataFrame").count() == 1
        assert "qualified people decide" in page.get_by_test_id("stSidebar").inner_text()
        page.screenshot(path=str(shots / "1-fleet.png"))

        # choose a unit: it opens on the Unit page with its charts
        box = page.get_by_test_id("stSelectbox").filter(has_text="Open a unit")
        box.click()
        page.get_by_role("option", name=worn, exact=True).click()
        # the choice reruns the page, which points the "Open unit" link at the unit
        link = page.locator(f'[data-testid="stPageLink-NavLink"][href$="unit={worn}"]')
        link.wait_for(timeout=60000)
        page.wait_for_function(IDLE)
        link.click()
        page.wait_for_url(re.compile(rf"/unit\?unit={worn}$"), timeout=60000)
        settle(page, "Unit", charts=1)   # one view: slip, creep, operation, health
        # st.html's code is fetched on its first use: its elements can follow the charts
        page.locator("table.fw-table").first.wait_for(timeout=60000)
        body = page.get_by_test_id("stMain").inner_text()
        assert dash.status_label(status[worn]) in body and "Wear" in body
        # the short tables are static HTML (kept by st.html's sanitiser, styled): status
        # words in their status colour
        assert "Status changes and their reasons" in body
        assert page.locator("table.fw-table").count() >= 1
        word = page.locator("table.fw-table span").first
        assert word.inner_text() in {dash.status_label(s) for s in counts}
        assert word.evaluate("e => getComputedStyle(e).fontWeight") == "600"
        page.screenshot(path=str(shots / "2-unit.png"))

        # Events
        page.goto(url + "/events", wait_until="domcontentloaded")
        settle(page, "Events", charts=1, last='button:has-text("Download CSV")')
        assert re.search(r"\d+ events from", page.get_by_test_id("stMain").inner_text())
        assert page.get_by_role("button", name="Download CSV").is_enabled()
        page.screenshot(path=str(shots / "3-events.png"))

        # SQL: a query and its result, then a refused write
        page.goto(url + "/sql", wait_until="domcontentloaded")
        settle(page, "SQL", last='button:has-text("Run query")')
        query = page.get_by_label("Query")
        query.fill("SELECT unit_id, status FROM health WHERE day = (SELECT max(day) FROM "
                   "health) ORDER BY unit_id")
        page.get_by_role("button", name="Run query").click()
        page.wait_for_selector("text=rows, 2 columns", timeout=60000)
        settle(page, "SQL")
        main = page.get_by_test_id("stMain").inner_text()
        assert f"{len(status)} rows, 2 columns" in main
        page.screenshot(path=str(shots / "4-sql.png"))
        query.fill("CREATE TABLE t AS SELECT 1")
        page.get_by_role("button", name="Run query").click()
        page.get_by_test_id("stAlertContentError").wait_for(timeout=30000)
        page.screenshot(path=str(shots / "5-sql-refused.png"))

        # Reports
        page.goto(url + "/reports", wait_until="domcontentloaded")
        settle(page, "Reports", last='button:has-text("Build the weekly report")')
        assert "Build the weekly report" in page.get_by_test_id("stMain").inner_text()
        page.screenshot(path=str(shots / "6-reports.png"))
        browser.close()
    assert not errors, errors
    for name in ("1-fleet", "2-unit", "3-events", "4-sql", "5-sql-refused", "6-reports"):
        assert (shots / f"{name}.png").stat().st_size > 10_000

    # stopping the CLI process by its pid stops the server and frees the port
    assert server.stop() == 0
    with socket.socket() as s:
        assert s.connect_ex(("127.0.0.1", server.port)) != 0
