"""The daily report in headless Chromium: loads cleanly, fetches nothing, shows its chart."""
from __future__ import annotations

import datetime as dt
import io
from pathlib import Path

import numpy as np
import pytest

from alerts.reports.render import write_day_report, write_index
from report_samples import sample_report

pytestmark = pytest.mark.browser

PHONE_WIDTH = 375  # px, a common small phone viewport (common practice, no source)
DESKTOP_WIDTH = 1280  # px, a common laptop viewport (common practice, no source)
WIDTHS = [PHONE_WIDTH, DESKTOP_WIDTH]


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


@pytest.mark.parametrize("width", WIDTHS)
@pytest.mark.parametrize("which", ["gap", "empty", "long"])
def test_one_day_chart_is_visible_and_fills_its_column(browser, pages, which, width):
    page, _, _ = _load(browser, pages[which], width=width)
    shown = page.locator("div.chart svg:visible")
    count = shown.count()
    box = shown.first.bounding_box() if count else None
    column = page.evaluate("document.querySelector('main').clientWidth")
    page.close()
    assert count == 1                      # the wide or the narrow layout, not both
    assert box["width"] >= 0.9 * (column - 32) and box["height"] > 250


def test_screenshot_is_not_blank(browser, pages):
    pil = pytest.importorskip("PIL.Image")
    page, _, _ = _load(browser, pages["gap"])
    png = page.locator("div.chart svg:visible").screenshot()
    page.close()
    pixels = np.asarray(pil.open(io.BytesIO(png)).convert("L"), dtype=float)
    # A blank or single-colour capture has no spread; lines, labels and shading do.
    assert pixels.std() > 10
    assert (pixels < 128).mean() > 0.005


# The size a letter is drawn at: its font size times the scale the page gives its drawing
# (the length of the first column of the text's screen transform, so rotated labels count too).
_TEXT_PX = """() => [...document.querySelectorAll('svg text')].filter(t => t.getClientRects().length)
  .map(t => { const m = t.getScreenCTM(); return parseFloat(getComputedStyle(t).fontSize) * Math.hypot(m.a, m.b); })"""


@pytest.mark.parametrize("width", WIDTHS)
def test_chart_text_is_at_least_12_css_px(browser, pages, width):
    page, _, _ = _load(browser, pages["gap"], width=width)
    sizes = page.evaluate(_TEXT_PX)
    page.close()
    assert len(sizes) > 20             # ticks, labels, legend of the charts shown
    assert min(sizes) >= 12.0, sorted(sizes)[:5]


def test_html_in_station_name_shows_as_text(browser, pages):
    page, _, _ = _load(browser, pages["gap"])
    heading = page.locator("h1").inner_text()
    italic = page.locator("h1 i").count()
    note = page.locator(".note").inner_text()
    page.close()
    assert "Skerrin <i>Quay</i>" in heading and italic == 0
    assert note == "<b>staff</b> & gauge"


@pytest.mark.parametrize("width", WIDTHS)
@pytest.mark.parametrize("which", ["gap", "long", "index"])
def test_page_body_never_scrolls_sideways(browser, pages, which, width):
    page, _, _ = _load(browser, pages[which], width=width)
    overflow = page.evaluate("document.documentElement.scrollWidth - window.innerWidth")
    body = page.evaluate("document.body.scrollWidth - document.body.clientWidth")
    page.close()
    assert overflow <= 0 and body <= 0   # wide tables stack or scroll inside their own box


@pytest.mark.parametrize("which", ["gap", "index"])
def test_caution_is_one_line_on_a_phone_with_the_full_text_below(browser, pages, which):
    page, _, _ = _load(browser, pages[which], width=PHONE_WIDTH)
    box = page.locator(".caution").bounding_box()
    line = page.locator(".caution strong").inner_text()
    full = page.locator(".caution details").inner_text()
    page.locator(".caution summary").click()
    opened = page.locator(".caution details p").is_visible()
    page.close()
    assert "unofficial" in line.lower() and "official warnings" in line.lower()
    assert box["height"] < 0.25 * 900       # not half the first screen
    assert "The full caution" in full and opened


# Every cell of a stacking table lies within the phone's width: nothing cut off to the right.
_CELLS_OUTSIDE = """() => [...document.querySelectorAll('table.stack td')]
  .filter(td => td.getClientRects().length && td.getBoundingClientRect().right > window.innerWidth + 0.5)
  .map(td => td.getAttribute('data-label'))"""


@pytest.mark.parametrize("which", ["gap", "index"])
def test_tides_alerts_and_index_tables_stack_on_a_phone(browser, pages, which):
    page, _, _ = _load(browser, pages[which], width=PHONE_WIDTH)
    outside = page.evaluate(_CELLS_OUTSIDE)
    labels = page.evaluate("[...document.querySelectorAll('table.stack td[data-label]')].length")
    texts = page.locator("table.stack").first.inner_text()
    page.close()
    assert labels > 0 and outside == []
    if which == "gap":
        assert "Skew surge" in texts or "Rule" in texts
    else:
        assert "Water alerts" in texts


def test_page_prints(browser, pages):
    page, _, _ = _load(browser, pages["long"])
    page.emulate_media(media="print")
    pdf = page.pdf(format="A4")
    page.close()
    assert pdf.startswith(b"%PDF") and len(pdf) > 20_000
