"""The live page in headless Chromium: phone and desk widths, chart text size, no console
errors or outside requests; with a real daemon, the STALE banner appears when the feed stops
and goes when it resumes, and the page changes while a replay plays.

Waits are on events (a file appearing, an element appearing or going, a text changing), each
with a generous timeout; never a fixed sleep."""
from __future__ import annotations

import datetime as dt
import os
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from alerts.live.render import write_overview, write_station
from live_samples import NOW, sample_snapshot

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parent.parent
PHONE = {"width": 375, "height": 667}   # a common small phone viewport (common practice, no source)
DESK = {"width": 1280, "height": 800}
MIN_TEXT_PX = 12
WAIT_MS = 120_000                       # generous: two cores shared with other work


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("live")
    now = time.time()  # written now, so the page's own "not rewritten" check stays quiet
    fresh = sample_snapshot(written_at=now)
    stale = sample_snapshot(age=3 * 3600, written_at=now)
    stale.station = dict(stale.station, id="north", name="North Pier")
    # the worst night: silent for two hours, an alert open, the gauge in doubt
    storm = sample_snapshot(
        age=2 * 3600 + 300, written_at=now,
        episodes=[{"rule": "quay", "step_now": "boards out", "opened_at": NOW - 3 * 3600, "messages": [
            {"recipient": "harbour-office@skerrin.example", "subject": "[quaywatch] boards out", "status": "sent",
             "sent_at": NOW - 3 * 3600}]}],
        health={"sensors": [{"role": "primary", "label": "pressure sensor", "kind": "file", "last_t": NOW - 7500},
                            {"role": "backup", "label": "logger", "kind": "serial", "last_t": NOW - 7500}],
                "qc": {"hours": 6, "fail": 2, "suspect": 1, "total": 240},
                "faults": ["sensor drift on primary-backup"]})
    storm.station = dict(storm.station, id="storm")
    return {"fresh": write_station(fresh, folder), "stale": write_station(stale, folder),
            "storm": write_station(storm, folder), "index": write_overview([fresh, stale, storm], folder, now, 60)}


def _open(browser, path: Path, viewport: dict):
    page = browser.new_page(viewport=viewport)
    errors: list[str] = []
    requests: list[str] = []
    page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: errors.append(str(e)))
    page.on("request", lambda r: requests.append(r.url))
    page.goto(path.as_uri(), wait_until="load")
    return page, errors, requests


CHART_TEXT_PX = """() => {
  const sizes = [];
  for (const svg of document.querySelectorAll('svg')) {
    if (!svg.getBoundingClientRect().width) continue;          // the layout not shown
    const scale = svg.getScreenCTM().a;                        // viewBox units -> CSS px
    for (const t of svg.querySelectorAll('text')) sizes.push(parseFloat(getComputedStyle(t).fontSize) * scale);
  }
  return sizes;
}"""


@pytest.mark.parametrize("viewport", [PHONE, DESK], ids=["375px", "1280px"])
@pytest.mark.parametrize("which", ["fresh", "stale", "storm", "index"])
def test_no_horizontal_scroll_no_errors_no_outside_requests(browser, pages, which, viewport):
    page, errors, requests = _open(browser, pages[which], viewport)
    overflow = page.evaluate("document.documentElement.scrollWidth - window.innerWidth")
    page.close()
    assert overflow <= 0
    assert errors == []
    assert [u for u in requests if u != pages[which].as_uri()] == []


@pytest.mark.parametrize("viewport", [PHONE, DESK], ids=["375px", "1280px"])
def test_chart_text_is_12_css_px_or_more(browser, pages, viewport):
    page, _, _ = _open(browser, pages["fresh"], viewport)
    sizes = page.evaluate(CHART_TEXT_PX)
    page.close()
    assert len(sizes) > 10  # axis labels, marks, "now": one layout shown and measured
    assert min(sizes) >= MIN_TEXT_PX


@pytest.mark.parametrize("which", ["fresh", "storm"])
def test_phone_sees_the_high_water_and_the_gauge_without_scrolling(browser, pages, which):
    page, _, _ = _open(browser, pages[which], PHONE)
    bottoms = {key: page.locator(f"ul.headline li.{key}").bounding_box() for key in ("forecast", "gauge")}
    caution = page.locator("details.caution summary").bounding_box()
    page.close()
    assert caution["y"] < 40  # the first thing on the page
    for key, box in bottoms.items():
        assert box["y"] + box["height"] <= PHONE["height"], key


def test_full_caution_is_one_tap_away(browser, pages):
    page, _, _ = _open(browser, pages["fresh"], PHONE)
    full = page.locator("details.caution p")
    hidden = full.is_visible()
    page.locator("details.caution summary").click()
    shown = full.is_visible()
    page.close()
    assert not hidden and shown


def test_stale_page_shows_the_banner_in_words(browser, pages):
    page, _, _ = _open(browser, pages["stale"], PHONE)
    text = page.locator("#stale").inner_text()
    box = page.locator("#stale").bounding_box()
    page.close()
    assert text.startswith("STALE: the last usable sample is 3 h 00 min old")
    assert box["y"] < PHONE["height"] / 2


# --------------------------------------------------------------------------- with a real daemon

def _config(tmp: Path, feed: str, stale_after: str = "5s") -> Path:
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[daemon]
poll_seconds = 0.1
process_seconds = 0.3
idle_polls = 3
[live]
folder = "live"
stale_after = "{stale_after}"
refresh = "1s"
[[stations]]
id = "testport"
name = "Test Port (invented)"
latitude = 50.0
longitude = -4.0
tz = "Europe/Dublin"
constants = "history"
fit_min_days = 365
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {feed}
[[stations.marks]]
name = "quay top"
level = 4.0
""")
    return cfg


def _start(cfg: Path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg)], cwd=cfg.parent, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _stop(proc: subprocess.Popen) -> str:
    proc.terminate()
    try:
        _, err = proc.communicate(timeout=60)
    except subprocess.TimeoutExpired:
        proc.kill()
        _, err = proc.communicate()
    return err


def _wait_for_file(path: Path, proc: subprocess.Popen, timeout: float = WAIT_MS / 1000) -> None:
    """Poll for a file the daemon writes (a generous timeout; fails at once if the daemon dies)."""
    end = time.monotonic() + timeout
    while not path.exists():
        if proc.poll() is not None:
            pytest.fail(f"daemon exited with {proc.returncode}: {proc.stderr.read()[-2000:]}")
        if time.monotonic() > end:
            pytest.fail(f"{path} not written within {timeout:.0f} s")
        threading.Event().wait(0.1)  # polling interval, not a wait for the event itself


class Gauge(threading.Thread):
    """An invented gauge writing one line stamped with the wall clock each half second while on."""

    def __init__(self, path: Path):
        super().__init__(daemon=True)
        self.path, self.on, self.halt, self.n = path, threading.Event(), threading.Event(), 0

    def run(self) -> None:
        while not self.halt.is_set():
            if self.on.is_set():
                t = dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
                with open(self.path, "a") as fh:
                    fh.write(f"{t},{2.0 + 0.001 * (self.n % 200):.3f}\n")
                self.n += 1
            self.halt.wait(0.5)  # the gauge's own pace


def test_stale_banner_appears_when_the_feed_stops_and_goes_when_it_resumes(browser, tmp_path):
    feed = tmp_path / "gauge.csv"
    feed.write_text("time,level\n")
    gauge = Gauge(feed)
    gauge.on.set()
    gauge.start()
    proc = _start(_config(tmp_path, '{ kind = "file", path = "gauge.csv" }'))
    page = None
    try:
        _wait_for_file(tmp_path / "live" / "testport.html", proc)
        page, errors, requests = _open(browser, tmp_path / "live" / "testport.html", PHONE)
        page.locator("ul.headline li.level").wait_for(state="attached", timeout=WAIT_MS)
        page.locator("#stale").wait_for(state="detached", timeout=WAIT_MS)  # live: no banner
        gauge.on.clear()                                                      # the feed stops
        page.locator("#stale").wait_for(state="visible", timeout=WAIT_MS)
        text = page.locator("#stale").inner_text()
        gauge.on.set()                                                        # ... and resumes
        page.locator("#stale").wait_for(state="detached", timeout=WAIT_MS)
        assert text.startswith("STALE: the last usable sample is ") and "limit 5 s" in text
        assert errors == []
        assert {u for u in requests} == {(tmp_path / "live" / "testport.html").as_uri()}
        assert (tmp_path / "live" / "index.html").exists()
    finally:
        if page is not None:
            page.close()
        gauge.halt.set()
        err = _stop(proc)
    assert "Traceback" not in err, err[-3000:]


def test_page_changes_while_a_replay_plays(browser, tmp_path):
    sync_api = pytest.importorskip("playwright.sync_api")
    feed = tmp_path / "gauge.csv"
    t0 = 1_760_000_040  # invented record, 2025-10-09, one-minute steps
    with open(feed, "w") as fh:
        fh.write("time,level\n")
        for i in range(600):
            t = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t0 + 60 * i))
            fh.write(f"{t},{2.0 + 1.5 * ((i % 745) / 745.0):.3f}\n")
    proc = _start(_config(tmp_path, '{ kind = "replay", path = "gauge.csv", speedup = 120, time_column = 1 }',
                          stale_after="30min"))
    page = None
    try:
        _wait_for_file(tmp_path / "live" / "testport.html", proc)
        page, errors, _ = _open(browser, tmp_path / "live" / "testport.html", DESK)
        level = page.locator("ul.headline li.level")
        level.wait_for(state="attached", timeout=WAIT_MS)
        first = level.inner_text()
        sync_api.expect(level).not_to_have_text(first, timeout=WAIT_MS)  # the page reloads itself
        second = level.inner_text()
        stale = page.locator("#stale").count()
        assert errors == []
    finally:
        if page is not None:
            page.close()
        err = _stop(proc)
    assert first.startswith("Level ") and second.startswith("Level ") and first != second
    assert stale == 0  # on the replayed clock the replayed samples are fresh
    assert "Traceback" not in err, err[-3000:]
