"""Daily report rendering, with no store: DayReport in, HTML / email / index out."""
from __future__ import annotations

import datetime as dt
import re
import email
import email.policy

import numpy as np
import pandas as pd
import pytest

from alerts.reports.model import (

    CAUTION, ReportSettings, day_bounds, day_figures, infer_interval, report_settings_from, zone_label,

)

from alerts.reports.render import (

    prune_reports, read_summary, render_day_email, render_day_html, write_day_report, write_index,

)
from alerts.mail.message import build_email
from report_samples import TZ, sample_report
from units import mm, minute, hour


# Daylight saving in the sample zone follows the European rule: clocks change at 01:00 UTC on
# the last Sunday of March (forward) and of October (back). Source: EU Directive 2000/84/EC
# (from memory), as encoded in the IANA tz database shipped with Python (tzdata).
SPRING = dt.date(2024, 3, 31)
AUTUMN = dt.date(2024, 10, 27)
PLAIN = dt.date(2024, 3, 12)

HOSTILE_NAME = 'Quay <script>alert("x")</script> & <b>Co</b>'
HOSTILE_NOTE = '<img src="http://example.invalid/x.png" onerror="alert(1)">staff moved'


@pytest.fixture(scope="module")
def plain_html() -> str:
    return render_day_html(sample_report(PLAIN))


@pytest.fixture(scope="module")
def hostile_html() -> str:
    return render_day_html(sample_report(PLAIN, name=HOSTILE_NAME, note=HOSTILE_NOTE))


@pytest.fixture(scope="module")
def mail():
    return render_day_email(sample_report(PLAIN))


# --- local days and zones -------------------------------------------------------------


@pytest.mark.parametrize("day, hours", [(PLAIN, 24), (SPRING, 23), (AUTUMN, 25)])
def test_local_day_has_its_true_length(day, hours):
    start, end = day_bounds(day, TZ)
    assert (end - start).total_seconds() == pytest.approx(hours * hour)


def test_zone_label_names_zone_and_offset_on_a_plain_day():
    # Faroe winter time is UTC+00:00 (IANA tz database, from memory).
    assert zone_label(TZ, *day_bounds(PLAIN, TZ)) == "Atlantic/Faroe, UTC+00:00"


def test_zone_label_says_when_clocks_go_back():
    # 01:00 UTC on 27 Oct 2024 is 02:00 summer time (UTC+01:00), which becomes 01:00 (UTC+00:00).
    label = zone_label(TZ, *day_bounds(AUTUMN, TZ))
    assert label == ("Atlantic/Faroe, UTC+01:00 until 02:00, then UTC+00:00 from 01:00 "
                     "(clocks back: a 25-hour day)")


def test_zone_label_says_when_clocks_go_forward():
    label = zone_label(TZ, *day_bounds(SPRING, TZ))
    assert label == ("Atlantic/Faroe, UTC+00:00 until 01:00, then UTC+01:00 from 02:00 "
                     "(clocks forward: a 23-hour day)")


# --- the day's figures ------------------------------------------------------------------


@pytest.mark.parametrize("day, expected", [(SPRING, 230), (AUTUMN, 250)])
def test_full_record_on_a_clock_change_day_is_complete(day, expected):
    figures = day_figures(sample_report(day))  # 6-minute samples through the whole local day
    assert figures.expected == expected
    assert figures.received == expected
    assert figures.completeness == pytest.approx(1.0)
    assert figures.gaps == ()


def test_failed_spike_never_sets_the_highest_level():
    report = sample_report(PLAIN)
    figures = day_figures(report)
    assert report.samples["observed"].max() == pytest.approx(9.87)  # the spike, flagged 4
    assert figures.highest_level < 4.0
    assert figures.failed == 1 and figures.suspect == 2


def test_highest_residual_and_its_time():
    figures = day_figures(sample_report(PLAIN))
    # The invented surge is 0.42 m at 15:00 local plus a 1 cm ripple.
    assert figures.highest_residual == pytest.approx(0.42, abs=15 * mm)
    local = figures.highest_residual_at.tz_convert(TZ)
    assert abs((local - pd.Timestamp("2024-03-12 15:00", tz=TZ)).total_seconds()) <= 45 * minute


def test_gap_is_found_with_its_bounds():
    figures = day_figures(sample_report(PLAIN, gap=(9.0, 11.5)))
    assert len(figures.gaps) == 1
    gap = figures.gaps[0]
    assert gap.start == pd.Timestamp("2024-03-12 09:00", tz=TZ)
    assert gap.end == pd.Timestamp("2024-03-12 11:30", tz=TZ)
    assert figures.received == 240 - 25


def test_interval_is_inferred_from_a_second_resolution_index():
    # The store hands back indexes in whole seconds; pandas 3 keeps that resolution.
    index = pd.to_datetime(np.arange(0, 3600, 360), unit="s", utc=True)
    assert infer_interval(index) == pytest.approx(6 * minute)


def test_day_with_no_data_is_one_gap_and_zero_complete():
    figures = day_figures(sample_report(PLAIN, empty=True))
    assert figures.received == 0
    assert figures.completeness == 0.0
    assert figures.highest_level is None
    assert [(g.start, g.end) for g in figures.gaps] == [day_bounds(PLAIN, TZ)]


# --- the page -----------------------------------------------------------------------------


def test_caution_comes_before_everything_else(plain_html):
    body = plain_html[plain_html.index("<body>"):]
    assert body.index(CAUTION) < body.index("<h1>")
    for phrase in ("automated and unofficial", "Official warnings and the local emergency authorities come first",
                   "local codes", "licensed practice"):
        assert phrase in CAUTION


def test_page_is_self_contained(plain_html):
    urls = re.findall(r'(?:src|href)="([^"]*)"', plain_html)
    assert "<svg" in plain_html, "expected the charts inline"
    # data: URIs, and references inside the page's own SVG (#id)
    assert all(u.startswith(("data:", "#")) for u in urls), urls
    assert "<link rel=\"stylesheet\"" not in plain_html and "@import" not in plain_html
    assert '<meta name="viewport"' in plain_html and "@media print" in plain_html


def test_charts_are_inline_svg_in_two_layouts_with_text_as_text(plain_html):
    wide = re.search(r'<div class="chart wide"[^>]*><svg[^>]*viewBox="0 0 ([0-9.]+) ', plain_html)
    narrow = re.search(r'<div class="chart narrow"[^>]*><svg[^>]*viewBox="0 0 ([0-9.]+) ', plain_html)
    assert wide and narrow and float(narrow.group(1)) < float(wide.group(1))
    assert "<text" in plain_html and 'width="691' not in plain_html   # scales: no fixed size


def test_station_name_with_html_is_shown_as_text(hostile_html):
    assert "<script>" not in hostile_html and "<b>Co</b>" not in hostile_html
    assert "Quay &lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt; &amp; &lt;b&gt;Co&lt;/b&gt;" in hostile_html


def test_note_with_html_is_shown_as_text(hostile_html):
    assert "<img src=\"http" not in hostile_html and "onerror=\"" not in hostile_html
    assert "&lt;img src=&#34;http://example.invalid/x.png&#34;" in hostile_html


def test_summary_survives_a_hostile_name(tmp_path, hostile_html):
    path = tmp_path / "page.html"
    path.write_text(hostile_html, encoding="utf-8")
    assert read_summary(path)["name"] == HOSTILE_NAME


def test_times_on_the_long_day_carry_their_offset():
    html = render_day_html(sample_report(AUTUMN))
    assert "then UTC+00:00 from 01:00" in html
    # Every high/low water row names its offset, since 01:xx happens twice on this day.
    tide_rows = re.findall(r'<td data-label="(?:Predicted|Observed)">(\d\d:\d\d \(UTC[+\u2212]\d\d:\d\d\))</td>', html)
    assert len(tide_rows) >= 8


def test_day_with_no_data_says_so():
    html = render_day_html(sample_report(PLAIN, empty=True))
    assert "No observations were received for this day." in html
    assert "No alert episode was open during this day." in html
    assert 'class="chart wide"' in html and "No usable observations" in html


def test_day_with_a_gap_lists_it():
    html = render_day_html(sample_report(PLAIN, gap=(9.0, 11.5)))
    assert "09:00 to 11:30 (2 h 30 min)" in html


def test_delivery_trouble_is_shown(plain_html):
    assert "not sent" in plain_html and "451 try later" in plain_html


# --- email ----------------------------------------------------------------------------------


def test_email_html_refers_to_its_images_by_content_id(mail):
    cids = set(re.findall(r'src="cid:([^"]+)"', mail.html))
    assert cids and cids == set(mail.images)
    assert "data:image" not in mail.html
    assert all(png.startswith(b"\x89PNG") for png in mail.images.values())


def test_email_builds_as_a_related_mime_message(mail):
    # Reference parser: the standard library email package (RFC 2046 alternative, RFC 2387 related).
    msg = build_email("g@port.invalid", "h@port.invalid", mail.subject, mail.text, mail.html, "<1@x>",
                      attachments=mail.attachments())
    parsed = email.message_from_bytes(msg.as_bytes(), policy=email.policy.default)
    related = parsed.get_payload()[1]
    assert parsed.get_content_type() == "multipart/alternative" and related.get_content_type() == "multipart/related"
    ids = {p["Content-ID"].strip("<>") for p in related.iter_parts() if p.get_content_type() == "image/png"}
    assert ids == set(mail.images) == set(re.findall(r'src="cid:([^"]+)"', related.get_payload()[0].get_content()))


def test_email_text_part_has_caution_and_figures(mail):
    assert mail.text.startswith("CAUTION: " + CAUTION)
    assert "Highest residual  +0.42 m" in mail.text
    assert "NOT SENT: mail server refused: 451 try later" in mail.text
    assert "unofficial" in mail.subject


# --- index, pruning, settings ------------------------------------------------------------------


def test_index_lists_days_newest_first_with_links(tmp_path):
    for day in (dt.date(2024, 3, 10), dt.date(2024, 3, 12)):
        write_day_report(sample_report(day, empty=day.day != 12), tmp_path)
    html = write_index(tmp_path).read_text()
    assert re.findall(r'href="(skq/[^"]+)"', html) == ["skq/2024-03-12.html", "skq/2024-03-10.html"]
    assert CAUTION in html


def test_prune_removes_only_old_reports(tmp_path):
    for day in (dt.date(2024, 1, 1), dt.date(2024, 3, 1)):
        path = tmp_path / "skq" / f"{day.isoformat()}.html"
        path.parent.mkdir(exist_ok=True)
        path.write_text("x")
    removed = prune_reports(tmp_path, keep_days=30, today=dt.date(2024, 3, 12))
    assert [p.name for p in removed] == ["2024-01-01.html"]
    assert (tmp_path / "skq" / "2024-03-01.html").exists()


def test_settings_default_when_absent():
    assert report_settings_from(None, "report") == (ReportSettings(), [])


def test_settings_read_every_key():
    settings, errors = report_settings_from(
        {"folder": "out/reports", "write_at": "05:45", "recipients": ["harbour@port.invalid"],
         "keep_days": 90, "trend_weeks": 6, "email": False}, "report")
    assert errors == []
    assert settings.write_at == dt.time(5, 45) and settings.recipients == ("harbour@port.invalid",)
    assert (settings.keep_days, settings.trend_weeks, settings.email) == (90, 6, False)


def test_settings_errors_name_their_key():
    _, errors = report_settings_from(
        {"write_at": "25:00", "recipients": ["not-an-address"], "keep_days": -1, "colour": "red"}, "report")
    assert sorted(e.split(":")[0] for e in errors) == [
        "report.colour", "report.keep_days", "report.recipients[0]", "report.write_at"]


# --- next high water, air pressure, tide staff -------------------------------------------------------


def _section(html: str, name: str) -> str:
    return html.split(f'<section id="{name}">', 1)[1].split("</section>", 1)[0]


def test_next_high_water_comes_before_the_chart(plain_html):
    assert plain_html.index('id="glance"') < plain_html.index('id="next-hw"') < plain_html.index('id="chart"')


def test_next_high_water_shows_forecast_time_and_range(plain_html):
    # sample_forecast: predicted 3.45 m + 0.12 m, range predicted + 0.02 to + 0.27 m (invented).
    part = _section(plain_html, "next-hw")
    assert "3.57 m" in part and "13 Mar 10:53" in part
    assert "3.47 m to 3.72 m" in part and "90 %" in part


def test_next_high_water_range_reaching_an_operator_level_is_marked(plain_html):
    part = _section(plain_html, "next-hw")
    assert 'class="bad">Quay apron wet (3.60 m): forecast 0.03 m below it, within the range' in part


def test_forecast_without_range_says_so():
    import dataclasses

    report = sample_report(PLAIN)
    report.forecast = dataclasses.replace(report.forecast, lower=None, upper=None, coverage=None)
    assert "No uncertainty range" in _section(render_day_html(report), "next-hw")


def test_barometer_section_gives_mean_part_and_variance_explained(plain_html):
    part = _section(plain_html, "barometer")
    assert "+0.12 m" in part and "62.0 %" in part


def test_staff_check_lists_offset_scale_timing_with_uncertainties(plain_html):
    part = _section(plain_html, "qc")
    assert "14 mm</td><td class=\"n\">1 mm" in part
    assert "+0.40 %</td><td class=\"n\">0.15 %" in part
    assert "150 s</td><td class=\"n\">20 s" in part


def test_staff_diagram_is_inline(plain_html):
    assert re.search(r'<div class="staff"[^>]*><svg', plain_html)


def test_day_without_extras_says_what_is_missing():
    html = render_day_html(sample_report(PLAIN, extras=False))
    assert "No high water forecast was issued on this day" in html
    assert "No barometer data for this day" in html
    assert "No tide-staff session in the recent weeks" in html


def test_email_carries_staff_diagram_by_content_id(mail):
    assert any(cid.endswith("-staff.png@quaywatch.invalid") for cid in mail.images)
    assert "Next high water forecast, as last issued on this day\n  3.57 m at 13 Mar 10:53" in mail.text


# --- labels: each rule's value in its own unit; water alerts told from gauge faults ---------------

def _with_fault_episode(day=PLAIN):
    import dataclasses

    from alerts.reports.model import AlertEpisodeRow

    r = sample_report(day)
    start = r.alerts[0].started
    fault = AlertEpisodeRow(rule="gauge", level="equipment fault", started=start, cleared=None, peak=2.0,
                            unit="", kind="gauge")
    silent = AlertEpisodeRow(rule="silent", level="feed quiet", started=start, cleared=start, peak=2700.0,
                             unit="s", kind="gauge")
    return dataclasses.replace(r, alerts=[*r.alerts, fault, silent])


def _alert_rows(html):
    section = html[html.index('id="alerts"'):]
    section = section[:section.index("</table>")]
    return [re.sub(r"<[^>]+>", " ", row) for row in section.split("<tr>")[2:]]


def test_equipment_fault_peak_is_a_count_not_metres():
    rows = _alert_rows(render_day_html(_with_fault_episode()))
    gauge = next(r for r in rows if "gauge" in r.split())
    assert "2 faults" in gauge and " m " not in gauge + " " and "m above" not in gauge


def test_feed_silent_peak_is_a_duration():
    rows = _alert_rows(render_day_html(_with_fault_episode()))
    silent = next(r for r in rows if "silent" in r.split())
    assert "45 min" in silent and "m above" not in silent


def test_index_tells_water_alerts_from_gauge_faults(tmp_path):
    write_day_report(_with_fault_episode(), tmp_path)
    html = write_index(tmp_path).read_text()
    assert "Water alerts" in html and "Gauge faults" in html
    row = html[html.index('href="skq/2024-03-12.html"'):]
    row = row[:row.index("</tr>")]
    cells = re.findall(r'<td class="([^"]*)"[^>]*>\s*([^<\s]+)', row)
    assert ("n bad", "1") in cells          # the surge episode: a water alert, in red
    assert ("n fault", "2") in cells        # the two gauge episodes, not red
    assert sum(1 for cls, _ in cells if "bad" in cls) == 1


def _with_weak_constituents(day=PLAIN):
    import dataclasses

    from alerts.reports.model import ConstituentRow

    r = sample_report(day)
    weak = (ConstituentRow("M4", 0.004, 77.7, 0.006, 0.4), ConstituentRow("MS4", 0.002, 310.0, 0.006, 0.1))
    big = ConstituentRow("M2", 1.35, 118.2, 0.004, 1018984.4)
    consts = dataclasses.replace(r.constants, constituents=(big, *r.constants.constituents[1:], *weak))
    return dataclasses.replace(r, constants=consts)


def _constants_section(html):
    sec = html[html.index('id="constants"'):]
    return sec[:sec.index("</section>")]


def test_constants_table_shows_resolved_ones_and_folds_the_rest():
    sec = _constants_section(render_day_html(_with_weak_constituents()))
    shown, folded = sec.split("<details>", 1)
    for name in ("M2", "S2", "K1"):
        assert f">{name}<" in shown
    assert ">M4<" in folded and ">MS4<" in folded and ">M4<" not in shown
    assert "2 more constituents, too weak to tell from noise" in folded


def test_constants_table_rounds_its_numbers():
    sec = _constants_section(render_day_html(_with_weak_constituents()))
    text = re.sub(r"<[^>]+>", " ", sec)
    assert "1018984" not in text and "SNR" not in text
    assert "1.350 \u00b1 0.004 m" in html_unescape(text) and "118\u00b0" in html_unescape(text)


def html_unescape(text):
    import html as html_lib

    return html_lib.unescape(text)
