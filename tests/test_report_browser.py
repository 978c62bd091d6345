"""The daily report in headless Chromium: loads cleanly, fetches nothing, shows its chart."""
from __future__ import annotations

import datetime as dt
import io
import os
import shutil
from pathlib import Path

import numpy as np
import pytest

from alerts.reports.render import write_day_report, write_index
from report_samples import sample_report

pytestmark = pytest.mark.browser

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", "--no-first-run"]
PHONE_WIDTH = 375  # px, a common small phone viewport (common practice, no source)


def _need_chromium() -> None:
    if Path(CHROMIUM).exists() and shutil.which(CHROMIUM):
        return
    message = f"headless Chromium not found at {CHROMIUM} (Debian package 'chromium')"
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture(scope="module")
def browser():
    _need_chromium()
    sync_api = pytest.importorskip("playwright.sync_api")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield b
        b.close()


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("reports")
    written = {
        "gap": write_day_report(sample_report(dt.date(2024, 3, 12), gap=(9.0, 11.5),
                                              name="Skerrin <i>Quay</i>", note="<b>staff</b> & gauge"), folder),
        "empty": write_day_report(sample_report(dt.date(2024, 3, 31), empty=True), folder),
        "long": write_day_report(sample_report(dt.date(2024, 10, 27)), folder),
    }
    written["index"] = write_index(folder)
    return written


def _load(browser, path: Path, width: int = 1000):
    """Open a page, collecting console errors, page errors and every request made."""
    page = browser.new_page(viewport={"width": width, "height": 900})
    errors: list[str] = []
    requests: list[str] = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.goto(path.as_uri(), wait_until="load")
    return page, errors, requests


def _foreign(requests: list[str], path: Path) -> list[str]:
    return [u for u in requests if u != path.as_uri() and not u.startswith("data:")]


@pytest.mark.parametrize("which", ["gap", "empty", "long", "index"])
def test_page_loads_without_errors_or_network(browser, pages, which):
    page, errors, requests = _load(browser, pages[which])
    page.close()
    assert errors == []
    assert _foreign(requests, pages[which]) == []


@pytest.mark.parametrize("which", ["gap", "empty", "long"])
def test_chart_is_visible_and_decoded(browser, pages, which):
    page, _, _ = _load(browser, pages[which])
    chart = page.locator("img.chart")
    assert chart.is_visible()
    natural = chart.evaluate("img => [img.complete, img.naturalWidth, img.naturalHeight]")
    box = chart.bounding_box()
    page.close()
    assert natural[0] and natural[1] > 500 and natural[2] > 300
    assert box["width"] > 600 and box["height"] > 300


def test_screenshot_is_not_blank(browser, pages):
    pil = pytest.importorskip("PIL.Image")
    page, _, _ = _load(browser, pages["gap"])
    png = page.locator("img.chart").screenshot()
    page.close()
    pixels = np.asarray(pil.open(io.BytesIO(png)).convert("L"), dtype=float)
    # A blank or single-colour capture has no spread; lines, labels and shading do.
    assert pixels.std() > 10
    assert (pixels < 128).mean() > 0.005


def test_html_in_station_name_shows_as_text(browser, pages):
    page, _, _ = _load(browser, pages["gap"])
    heading = page.locator("h1").inner_text()
    italic = page.locator("h1 i").count()
    note = page.locator(".note").inner_text()
    page.close()
    assert "Skerrin <i>Quay</i>" in heading and italic == 0
    assert note == "<b>staff</b> & gauge"


def test_page_fits_a_phone_width(browser, pages):
    page, _, _ = _load(browser, pages["gap"], width=PHONE_WIDTH)
    overflow = page.evaluate("document.documentElement.scrollWidth - window.innerWidth")
    caution_visible = page.locator(".caution").is_visible()
    page.close()
    assert overflow <= 0  # wide tables scroll inside their own box, the page does not
    assert caution_visible


def test_page_prints(browser, pages):
    page, _, _ = _load(browser, pages["long"])
    page.emulate_media(media="print")
    pdf = page.pdf(format="A4")
    page.close()
    assert pdf.startswith(b"%PDF") and len(pdf) > 20_000
