"""report.html in a real headless Chromium (Playwright driving Debian's chromium).

The page must load from a file with no network, log no console error, draw every chart,
and print on A4. In CI (CI=true) a missing browser fails the test instead of skipping it.
"""
from __future__ import annotations

import datetime as dt
import os
import re

import pytest

from fleetwatch import report as rp
from fleetwatch.config import load_settings
from report_lake import FrameLake, synthetic_tables

pytestmark = pytest.mark.browser

ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
NOW = dt.datetime(2026, 8, 3, 6, 0, tzinfo=dt.timezone.utc)
IN_CI = os.environ.get("CI", "").lower() in ("1", "true", "yes")


def _chromium() -> str:
    path = rp.find_chromium()
    if path is None:
        msg = "Chromium not found (Debian: apt-get install chromium)"
        if IN_CI:
            pytest.fail(msg + "; CI=true, so this is a failure, not a skip")
        pytest.skip(msg)
    return path


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    tables, truth = synthetic_tables(units=16)
    project = tmp_path_factory.mktemp("browser-project")
    settings = load_settings(project, overrides={"report_units_max": 1}, env={})
    return rp.build_report(settings, lake=FrameLake(tables), now=NOW), truth


def test_report_in_headless_chromium(report, tmp_path):
    exe = _chromium()
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        if IN_CI:
            pytest.fail("playwright is not installed (pip install -e .[test])")
        pytest.skip("playwright is not installed")
    res, truth = report
    console, errors, requests = [], [], []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=exe, args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1000, "height": 1400})
            page.on("console", lambda m: console.append((m.type, m.text)))
            page.on("pageerror", lambda e: errors.append(str(e)))
            page.on("request", lambda r: requests.append(r.url))
            page.goto(res.paths["html"].resolve().as_uri(), wait_until="load")
            shot = tmp_path / "report.png"
            page.screenshot(path=str(shot), full_page=True)
            boxes = page.eval_on_selector_all(
                "svg", "els => els.map(e => [e.getBoundingClientRect().width, "
                       "e.getBoundingClientRect().height])")
            anchor_ok = page.evaluate(
                "() => !!document.getElementById('unit-L1-U01')"
                " && !!document.querySelector('a[href=\"#unit-L1-U01\"]')")
            page.emulate_media(media="print")
            pdf_bytes = page.pdf(format="A4", print_background=True)
        finally:
            browser.close()
    assert not [c for c in console if c[0] == "error"], console
    assert not errors, errors
    assert requests == [res.paths["html"].resolve().as_uri()]      # nothing else fetched
    assert shot.is_file() and shot.stat().st_size > 50_000
    assert len(boxes) == 6 + 3 * 1                     # fleet charts + 1 evidence unit
    assert all(w > 150 and h > 40 for w, h in boxes), boxes
    assert anchor_ok
    assert pdf_bytes.startswith(b"%PDF") and len(pdf_bytes) > 20_000


def test_pdf_printed_by_chromium_is_a4(report, tmp_path):
    exe = _chromium()
    res, _ = report
    pdf = rp.print_pdf(res.paths["html"], tmp_path / "report.pdf", chromium=exe)
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF")
    # A4 is 210 x 297 mm = 595.3 x 841.9 pt (ISO 216); Chromium writes the MediaBox in pt
    boxes = re.findall(rb"/MediaBox\s*\[\s*0 0 ([\d.]+) ([\d.]+)\s*\]", data)
    assert boxes, "no page found in the PDF"
    for w, h in boxes:
        assert abs(float(w) - 595.3) < 2 and abs(float(h) - 841.9) < 2
    assert len(boxes) >= 4                             # nine sections do not fit one page
