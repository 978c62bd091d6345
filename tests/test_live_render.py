"""Live pages, pure parts: the snapshot's numbers, the headline's words, the HTML and JSON.

Expected values are worked by hand (or with ``math`` on the invented tide's own formula in
tests/live_samples.py), never with the code under test."""
from __future__ import annotations

import json
import math
import re

import numpy as np
import pytest

from alerts.live.headline import headline, local_time
from alerts.live.render import render_overview, render_station, write_overview, write_station
from alerts.live.snapshot import (age_words, build_snapshot, mark_at_high_water, mark_now, rate_per_hour,
                                  trend_words)
from alerts.live.chart import NARROW, WIDE, svg_chart
from alerts.live import render as live_render
from alerts.live.render import caution_line
from predictor.caution import LIVE as CAUTION
from live_samples import M2_PERIOD, NOW, sample_snapshot
from units import hour, minute, mm


# --------------------------------------------------------------------------- numbers

def test_rate_of_a_straight_rise_is_its_slope():
    t = np.arange(0, 1800 + 1, 60.0)
    v = 2.0 + 0.01 * t / 60  # 1 cm a minute = 0.60 m/h
    assert rate_per_hour(t, v, end=1800.0) == pytest.approx(0.60, abs=1e-9)


def test_rate_window_is_open_at_its_start():
    t = np.array([0.0, 900.0, 1800.0])
    assert rate_per_hour(t, t * 0, end=1800.0) is None  # the sample at 0 s is outside (0, 1800]


def test_rate_ignores_missing_values_and_needs_three():
    t = np.array([0.0, 600.0, 1200.0, 1800.0])
    v = np.array([1.0, np.nan, 1.1, 1.15])  # 1.0 at 0 s, 1.1 at 1200 s, 1.15 at 1800 s
    # least squares through (0, 1.0), (1/3 h, 1.1), (1/2 h, 1.15): slope = Sxy / Sxx by hand
    x = np.array([0.0, 1 / 3, 0.5])
    y = np.array([1.0, 1.1, 1.15])
    by_hand = np.sum((x - x.mean()) * (y - y.mean())) / np.sum((x - x.mean()) ** 2)
    assert rate_per_hour(t, v, end=1800.0, window=3600.0) == pytest.approx(by_hand, abs=1e-9)
    assert rate_per_hour(t[:2], v[:2], end=1800.0, window=3600.0) is None


def test_steady_rising_and_falling_in_words():
    assert trend_words(0.015) == "steady"
    assert trend_words(0.31) == "rising 0.31 m/h"
    assert trend_words(-0.05) == "falling 0.05 m/h"
    assert trend_words(None) == "trend unknown"


def test_age_in_words():
    assert age_words(45) == "45 s"
    assert age_words(31 * minute) == "31 min"
    assert age_words(2 * hour + 5 * minute) == "2 h 05 min"
    assert age_words(3 * 86400 + 4 * hour) == "3 days 4 h"


def test_local_time_names_the_zone():
    # 2025-10-22 22:30Z is 23:30 in Dublin on summer time (IST, UTC+1, until 26 October 2025)
    assert local_time(NOW, "Europe/Dublin", NOW) == "23:30 IST"
    # after the clock change (2025-10-26 01:00Z) Dublin is on GMT
    assert local_time(1_761_500_000, "Europe/Dublin", NOW).endswith("GMT")
    assert local_time(NOW - 86400, "Europe/Dublin", NOW) == "Tue 21 Oct 23:30 IST"


# --------------------------------------------------------------------------- marks

def test_mark_above_below_and_past():
    m = mark_now(3.38, 4.25, "quay top", "above")
    assert m.margin == pytest.approx(0.87) and m.state == "clear" and m.words == "0.87 m below quay top"
    m = mark_now(4.31, 4.25, "quay top", "above")
    assert m.state == "past" and m.words == "0.06 m OVER quay top"


def test_mark_the_water_should_stay_above():
    m = mark_now(3.38, -0.90, "lock sill", "below")
    assert m.margin == pytest.approx(4.28) and m.words == "4.28 m above lock sill"
    m = mark_now(-1.00, -0.90, "lock sill", "below")
    assert m.state == "past" and m.words == "0.10 m UNDER lock sill"


@pytest.mark.parametrize("mark, state, words", [
    (4.25, "clear", "stays below quay top by 0.34 m or more"),     # 4.25 - 3.91
    (3.60, "could", "COULD REACH quay top: the range's top is 0.31 m over it"),  # 3.91 - 3.60
    (3.40, "forecast", "FORECAST OVER quay top by 0.07 m"),        # 3.47 - 3.40
    (3.00, "certain", "OVER quay top across the whole range, by 0.03 m or more"),  # 3.03 - 3.00
])
def test_high_water_range_against_a_mark_from_both_sides(mark, state, words):
    m = mark_at_high_water(3.47, 3.03, 3.91, mark, "quay top", "above")
    assert (m.state, m.words) == (state, words)


def test_high_water_range_against_a_sill():
    m = mark_at_high_water(3.47, 3.03, 3.91, -0.90, "lock sill", "below")
    assert m.state == "clear" and m.margin == pytest.approx(3.93)


# --------------------------------------------------------------------------- the snapshot

def test_levels_are_moved_to_the_display_datum():
    snap = sample_snapshot(age=60.0)
    # the invented tide at the last sample (60 s before NOW, so 3660 s before its high water),
    # 0.6 m of surge, on chart datum (the gauge zero's 1.0 m taken off)
    by_hand = 2.2 + 1.6 * math.cos(2 * math.pi * 3660 / M2_PERIOD) + 0.6
    assert snap.level["value"] == pytest.approx(by_hand, abs=0.1 * mm)
    assert snap.marks[0] == {"name": "quay top", "level": pytest.approx(4.25), "side": "above"}
    assert snap.marks_now[0]["margin"] == pytest.approx(4.25 - by_hand, abs=0.1 * mm)
    assert snap.residual["value"] == pytest.approx(0.6)


def test_forecast_marks_from_the_sample():
    snap = sample_snapshot()
    # forecast 4.40 m (range 4.10 to 4.70) on chart datum
    states = {m["name"]: (m["state"], round(m["margin"], 2)) for m in snap.marks_hw}
    assert states == {"quay top": ("forecast", -0.45), "boards out": ("certain", -0.70), "lock sill": ("clear", 5.00)}


@pytest.mark.parametrize("age, stale", [(29 * minute, False), (30 * minute, False), (31 * minute, True)])
def test_stale_only_past_the_limit(age, stale):
    snap = sample_snapshot(age=age)
    assert snap.stale is stale
    first = headline(snap)[0]
    assert (first.key == "stale") is stale
    if stale:
        assert first.text.startswith("STALE: the last usable sample is 31 min old") and "30 min" in first.text


def test_no_sample_at_all_is_stale():
    snap = build_snapshot(station={"id": "x", "name": "x", "tz": "UTC", "datum": "chart datum"}, marks=(),
                          display_offset=0.0, now=NOW, written_at=NOW, stale_after=1800, refresh=60,
                          last_sample_t=None, samples=None)
    assert snap.stale and headline(snap)[0].text.startswith("STALE: no usable sample")


def test_headline_order_and_alarms():
    snap = sample_snapshot(age=31 * minute, episodes=[{"rule": "quay", "step_now": "boards out",
                                                       "opened_at": NOW - hour, "messages": []}])
    keys = [ln.key for ln in headline(snap)]
    assert keys == ["stale", "level", "residual", "forecast", "alerts", "gauge"]
    alarms = {ln.key: ln.alarm for ln in headline(snap)}
    assert alarms["stale"] and alarms["forecast"] and alarms["alerts"]


def test_open_alerts_read_rule_then_step():
    # "gauge at equipment fault since ..." read as if the gauge stood at a place
    snap = sample_snapshot(episodes=[{"rule": "gauge", "step_now": "equipment fault", "opened_at": NOW - hour,
                                      "messages": []}])
    text = {ln.key: ln.text for ln in headline(snap)}["alerts"]
    assert text.startswith("Alerts open (1): gauge: equipment fault since ")
    assert " at equipment fault" not in text


def test_compact_headline_names_only_marks_at_risk():
    snap = sample_snapshot()
    full = {ln.key: ln.text for ln in headline(snap)}
    short = {ln.key: ln.text for ln in headline(snap, compact=True)}
    assert "lock sill" in full["forecast"] and "lock sill" not in short["forecast"]
    assert "FORECAST OVER quay top by 0.15 m" in short["forecast"]  # 4.40 - 4.25
    assert "OVER boards out across the whole range, by 0.10 m or more" in short["forecast"]  # 4.10 - 4.00


# --------------------------------------------------------------------------- HTML and JSON

def test_page_escapes_names_and_carries_the_caution_one_tap_away():
    html = render_station(sample_snapshot())
    assert "Skerrin &lt;b&gt;Quay&lt;/b&gt;" in html and "<b>Quay</b>" not in html
    details = re.search(r'<details class="caution".*?</details>', html, re.S).group(0)
    assert "<summary><strong>Automated and unofficial.</strong>" in details
    assert "Official warnings and the local emergency authorities come first." in details


def test_live_pages_take_the_page_wording_of_the_one_caution_home():
    assert live_render.CAUTION == CAUTION and CAUTION.startswith("This page is automated and unofficial.")


def test_caution_line_is_a_sentence_of_the_one_caution_text():
    line = caution_line(CAUTION)
    assert line in CAUTION and "come first" in line


def test_stale_banner_only_when_stale():
    assert 'id="stale"' not in render_station(sample_snapshot(age=60))
    html = render_station(sample_snapshot(age=2 * hour + 5 * minute))
    banner = re.search(r'<p class="stale" id="stale"[^>]*>(.*?)</p>', html, re.S).group(1)
    assert banner.startswith("STALE: the last usable sample is 2 h 05 min old")


def test_page_sections_in_the_order_asked():
    html = render_station(sample_snapshot(age=31 * minute))
    order = [html.index(k) for k in ('id="stale"', 'id="level"', 'id="residual"', 'id="forecast"',
                                     'id="alerts"', 'id="health"', 'id="chart"')]
    assert order == sorted(order)
    assert html.index('class="caution"') < order[0]


def test_page_says_when_it_was_written_and_reloads_itself():
    html = render_station(sample_snapshot(written_at=NOW + 5))
    assert "Written by quaywatch at 23:30 IST" in html
    assert f'data-written="{int(NOW + 5)}"' in html and "location.reload()" in html
    assert 'http-equiv="refresh" content="60"' in html  # without scripts too


def test_page_fetches_nothing_from_outside():
    html = render_station(sample_snapshot())
    assert not re.search(r'(src|href)="(https?:)?//', html)
    assert "<link" not in html and "@import" not in html


def test_chart_draws_every_series_and_mark_in_both_layouts():
    snap = sample_snapshot()
    for layout in (NARROW, WIDE):
        svg = svg_chart(snap, layout)
        assert svg.count('class="mark"') == 3 and 'class="observed"' in svg and 'class="range"' in svg
        assert f'font-size="{layout[2]}"' in svg
        for name in ("quay top 4.25", "boards out 4.00", "lock sill -0.90"):
            assert name in svg


def test_chart_font_scaled_into_its_box_stays_at_12_px_or_more():
    # narrow layout in a 375 px viewport: body padding 0.75 rem = 12 px each side, the section's
    # own 0.75 rem and 1 px border: box = 375 - 2 * (12 + 12 + 1) = 325 px at the least
    width, _, font = NARROW
    assert font * 325 / width >= 12
    # wide layout from 700 px: its box is at least 640 px (min-width in the page's CSS)
    width, _, font = WIDE
    assert font * 640 / width >= 12


def test_json_snapshot_round_trips_without_nan(tmp_path):
    snap = sample_snapshot()
    snap.chart["observed"][5] = float("nan")
    page = write_station(snap, tmp_path)
    doc = json.loads((tmp_path / "skerrin.json").read_text())
    assert page == tmp_path / "skerrin.html" and page.is_file()
    assert doc["chart"]["observed"][5] is None and doc["stale"] is False
    assert doc["level"]["value"] == pytest.approx(snap.level["value"], abs=0.1 * mm)
    assert not list(tmp_path.glob(".*"))  # no temporary file left behind


def test_overview_lists_each_station_with_its_state(tmp_path):
    fresh, old = sample_snapshot(), sample_snapshot(age=3 * hour)
    old.station = dict(old.station, id="north", name="North Pier")
    write_overview([fresh, old], tmp_path, NOW, 60)
    html = (tmp_path / "index.html").read_text()
    assert 'href="skerrin.html"' in html and 'href="north.html"' in html
    row = re.search(r"North Pier.*?</tr>", html, re.S).group(0)
    assert "STALE" in row and "3 h 00 min ago" in row
    assert "Official warnings" in html


def test_overview_of_a_calm_station_says_ok():
    snap = sample_snapshot(surge=-0.5)  # forecast 3.30 m (3.00 to 3.60): clear of every mark
    html = render_overview([snap], NOW, 60)
    assert re.search(r"<td class=\"\">OK</td>", html)
