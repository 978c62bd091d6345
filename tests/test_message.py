"""Email composition (alerts/mail/message.py): content, caution, MIME structure, injection."""
from __future__ import annotations

import email
from email import policy

from alerts.mail.message import CAUTION, build_email, clean_header, compose_alert, compose_test
from alerts.rules import Event, Rule, Step, StationView

STATION = StationView(id="dunmerrow", name="Port Dunmerrow", tz="Europe/Dublin",
                      datums={"chart_datum": 1.0}, display_datum="chart_datum")
RULE = Rule(id="surge", watch="residual_above", hold=600, settle=600, band=0.05,
            notify=("duty@port.example",), steps=(Step("raised", 0.3), Step("high", 0.6)))
T = 1761220800  # 2025-10-23 12:00 UTC = 13:00 IST (Irish summer time, UTC+1)
FACTS = {"observed": 4.71, "predicted": 4.05, "residual": 0.66, "trend": 0.12,
         "next_high_water": {"time": T + 6 * 3600, "level": 5.1, "uncertainty": 0.15}}


def opened(value=0.66, level=1):
    return compose_alert(STATION, RULE, Event("opened", level, T, value), FACTS)


def test_subject_names_station_step_and_value():
    subject, _, _ = opened()
    assert "Port Dunmerrow" in subject and "high" in subject and "+0.66 m" in subject


def test_text_gives_local_time_with_zone_and_utc():
    # Europe/Dublin keeps IST = UTC+1 in summer until 26 Oct 2025 (tz database).
    _, text, _ = opened()
    assert "2025-10-23 13:00 IST" in text
    assert "2025-10-23 12:00 UTC" in text


def test_text_shows_observed_predicted_residual_and_trend():
    _, text, _ = opened()
    assert "Observed level" in text and "3.71 m" in text   # on chart datum, 1.0 m above the station datum
    assert "Predicted tide" in text and "3.05 m" in text
    assert "+0.66 m" in text
    assert "+0.12 m" in text


def test_text_shows_next_high_water_with_its_uncertainty():
    _, text, _ = opened()
    line = next(ln for ln in text.splitlines() if "Next high water forecast" in ln)
    assert "4.10 m above chart datum at 2025-10-23 19:00 IST" in line and "\u00b1 0.15 m" in line


def test_caution_is_in_both_bodies():
    _, text, html = opened()
    assert CAUTION in text
    assert "official warnings" in html.lower() and "unofficial" in html.lower()


def test_level_rule_reports_on_its_datum():
    rule = Rule(id="quay", watch="level_above", datum="chart_datum", datum_offset=1.0,
                notify=("a@port.example",), steps=(Step("boards out", 4.0),))
    subject, text, _ = compose_alert(STATION, rule, Event("opened", 0, T, 4.1), FACTS)
    assert "4.10 m above chart datum" in subject
    assert "3.71 m above chart datum" in text  # observed 4.71 m on station datum, CD 1.0 m above


def test_surge_rule_email_shows_every_level_on_the_display_datum():
    # The surge rule watches a datum-free residual; its email still shows the levels, and they
    # must be on the same datum as the quay rule's (chart datum 1.0 m above the station datum).
    _, text, html = opened()
    assert "3.71 m above chart datum" in text      # observed 4.71 m on the station datum
    assert "3.05 m above chart datum" in text      # predicted 4.05 m
    assert "4.10 m above chart datum" in text      # forecast 5.10 m
    assert "station datum" not in text and "station datum" not in html
    assert "Levels:       metres above chart datum" in text


def test_residual_keeps_its_sign_and_no_datum():
    _, text, _ = opened()
    line = next(ln for ln in text.splitlines() if "Residual (surge)" in ln)
    assert "+0.66 m (observed minus predicted tide)" in line and "datum" not in line


def test_level_rule_on_its_own_datum_is_shown_on_the_display_datum_too():
    # An operator's datum "quay" stands 5.25 m above the station datum (quay top); a step at
    # -0.25 m on it is 4.00 m above chart datum (5.00 - 1.00), shown with the rule's own figure.
    station = StationView(id="d", name="Port", tz="UTC", datums={"chart": 1.0, "quay": 5.25})
    rule = Rule(id="quay-hw", watch="level_above", datum="quay", datum_offset=5.25,
                notify=("a@port.example",), steps=(Step("boards out", -0.25),))
    subject, text, _ = compose_alert(station, rule, Event("opened", 0, T, -0.20), {"observed": 5.05})
    assert "water level 4.05 m above chart datum" in subject
    assert "at 4.00 m above chart datum (-0.25 m on quay datum)" in text
    assert "4.05 m above chart datum" in text


def test_station_without_chart_datum_says_its_levels_are_on_the_station_datum():
    station = StationView(id="d", name="Port", tz="UTC", datums={},
                          datum_note="no chart datum offset is configured for this station")
    _, text, _ = compose_alert(station, RULE, Event("opened", 0, T, 0.4), {"observed": 4.71})
    assert "4.71 m above station datum" in text
    assert "no chart datum offset is configured" in text


def test_escalation_and_all_clear_read_differently():
    s_up, _, _ = compose_alert(STATION, RULE, Event("escalated", 1, T, 0.7), FACTS)
    s_clear, t_clear, _ = compose_alert(STATION, RULE, Event("cleared", 1, T, 0.1), FACTS)
    assert "up to high" in s_up
    assert "all clear" in s_clear and "all clear" in t_clear


def test_clean_header_removes_line_breaks():
    assert clean_header("Port\r\nBcc: x@evil.example") == "Port Bcc: x@evil.example"


def test_header_injection_in_station_name_adds_no_header():
    evil = StationView(id="x", name="Quay\r\nBcc: victim@evil.example\r\n\r\n<b>body</b>", tz="UTC")
    subject, text, html = compose_alert(evil, RULE, Event("opened", 0, T, 0.4), {})
    raw = build_email("gauge@port.example", "duty@port.example", subject, text, html, "<1@x>").as_bytes()
    parsed = email.message_from_bytes(raw, policy=policy.default)
    assert parsed["Bcc"] is None
    assert "\n" not in parsed["Subject"]


def test_html_in_station_name_is_escaped():
    evil = StationView(id="x", name="<script>alert(1)</script>", tz="UTC")
    _, _, html = compose_alert(evil, RULE, Event("opened", 0, T, 0.4), {})
    assert "<script>" not in html
    assert "&lt;script&gt;" in html


def test_fault_text_from_telemetry_is_escaped_in_html():
    rule = Rule(id="kit", watch="equipment_fault", notify=("a@port.example",), steps=(Step("equipment fault", 1),))
    facts = {"faults": [{"kind": "<img src=x onerror=y>", "value": 1, "limit": 0, "since": "t"}]}
    _, _, html = compose_alert(STATION, rule, Event("opened", 0, T, 1), facts)
    assert "<img" not in html


def test_email_is_multipart_alternative_with_stable_message_id():
    # RFC 2046 section 5.1.4: multipart/alternative, plain text first.
    subject, text, html = opened()
    msg = build_email("Quay monitor <gauge@port.example>", "duty@port.example", subject, text, html,
                      "<abc.alert@host.quaywatch>", date=T)
    assert msg.get_content_type() == "multipart/alternative"
    assert [p.get_content_type() for p in msg.iter_parts()] == ["text/plain", "text/html"]
    assert msg["Message-ID"] == "<abc.alert@host.quaywatch>"


def test_attachment_is_added_as_a_part():
    msg = build_email("g@port.example", "d@port.example", "s", "t", "<p>h</p>", "<1@x>",
                      attachments=[{"filename": "report.html", "content_type": "text/html", "data": b"<p>r</p>"}])
    assert msg.get_content_type() == "multipart/mixed"
    assert [a.get_filename() for a in msg.iter_attachments()] == ["report.html"]


def test_test_message_carries_the_caution():
    _, text, html = compose_test(T, "127.0.0.1")
    assert CAUTION in text and "unofficial" in html


def test_forecast_range_from_the_residual_module_is_shown():
    hw = {"hw_t": T + 3600, "forecast": 5.2, "lower": 5.0, "upper": 5.45, "coverage": 0.9,
          "time": T + 3600, "level": 5.2, "note": "90% range from history"}
    _, text, _ = compose_alert(STATION, RULE, Event("opened", 0, T, 0.4), {"next_high_water": hw})
    assert "4.20 m above chart datum" in text and "(90% range 4.00 m to 4.45 m)" in text


def test_fault_line_names_sensor_value_limit_and_local_since():
    rule = Rule(id="kit", watch="equipment_fault", notify=("a@port.example",), steps=(Step("equipment fault", 1),))
    fault = {"kind": "stuck_sensor", "sensor": "primary", "value": 62.0, "limit": 30.0, "unit": "min", "since": T}
    _, text, _ = compose_alert(STATION, rule, Event("opened", 0, T, 1), {"faults": [fault]})
    assert "stuck sensor on primary: 62.0 min (limit 30.0 min), since 2025-10-23 13:00 IST" in text


# --- inline images (RFC 2387 multipart/related, RFC 2392 cid: URLs) ---------------------------------

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 32  # a PNG signature (PNG spec, ISO/IEC 15948) and filler
CID = "skq-2024-03-12-chart.png@quaywatch.invalid"
HTML_WITH_IMAGE = f'<p>Report</p><img src="cid:{CID}" alt="chart">'


def _parsed(msg):
    # Round trip through bytes with the standard library parser, as a mail client would receive it.
    return email.message_from_bytes(msg.as_bytes(), policy=policy.default)


def test_image_with_content_id_goes_inside_a_related_part():
    msg = _parsed(build_email("g@port.example", "d@port.example", "s", "text", HTML_WITH_IMAGE, "<1@x>",
                              attachments=[{"filename": "skq-2024-03-12-chart.png", "content_type": "image/png",
                                            "data": PNG, "content_id": CID}]))
    assert msg.get_content_type() == "multipart/alternative"
    text, related = msg.get_payload()
    assert text.get_content_type() == "text/plain" and related.get_content_type() == "multipart/related"
    assert [p.get_content_type() for p in related.iter_parts()] == ["text/html", "image/png"]


def test_inline_image_carries_the_content_id_the_html_cites():
    msg = _parsed(build_email("g@port.example", "d@port.example", "s", "text", HTML_WITH_IMAGE, "<1@x>",
                              attachments=[{"filename": "c.png", "content_type": "image/png", "data": PNG,
                                            "content_id": CID}]))
    html_part, image = msg.get_payload()[1].get_payload()
    assert image["Content-ID"] == f"<{CID}>"
    assert f"cid:{CID}" in html_part.get_content()
    assert image.get_content() == PNG and image.get_content_disposition() == "inline"


def test_image_keeps_inline_through_the_outbox_store():
    # The outbox keeps file name, type and data of an attachment; the cid the HTML cites names the file.
    import sqlite_utils

    from alerts.mail.outbox import _decode_attachments, enqueue

    db = sqlite_utils.Database(memory=True)
    enqueue(db, ["d@port.example"], "s", "text", HTML_WITH_IMAGE, kind="report", key="k",
            attachments=[{"filename": "skq-2024-03-12-chart.png", "content_type": "image/png", "data": PNG,
                          "content_id": CID}], now=T)
    row = next(db.query("SELECT html, attachments FROM outbox"))
    msg = _parsed(build_email("g@port.example", "d@port.example", "s", "text", row["html"], "<1@x>",
                              attachments=_decode_attachments(row["attachments"])))
    related = msg.get_payload()[1]
    assert related.get_content_type() == "multipart/related"
    assert related.get_payload()[1]["Content-ID"] == f"<{CID}>"


def test_attachment_not_cited_stays_an_attachment_beside_inline_images():
    msg = _parsed(build_email("g@port.example", "d@port.example", "s", "text", HTML_WITH_IMAGE, "<1@x>",
                              attachments=[{"filename": "c.png", "content_type": "image/png", "data": PNG,
                                            "content_id": CID},
                                           {"filename": "data.csv", "content_type": "text/csv", "data": b"t,l\n"}]))
    assert msg.get_content_type() == "multipart/mixed"
    assert [a.get_filename() for a in msg.iter_attachments()] == ["data.csv"]
    assert msg.get_payload()[0].get_content_type() == "multipart/alternative"


def test_a_barometer_gap_and_a_rising_surge_are_said_beside_the_forecast():
    hw = {"time": T + 4 * 3600, "level": 5.2, "lower": 4.7, "upper": 5.9, "coverage": 0.9, "rate": 0.12,
          "rising": 5.6, "note": "WIDE RANGE, a rule of thumb",
          "pressure_note": "barometer silent since 2025-10-23 09:00 UTC: forecast made without the pressure tendency"}
    _, text, _ = compose_alert(STATION, RULE, Event("opened", 0, T, 0.4), {"next_high_water": hw})
    assert "Barometer:" in text and "without the pressure tendency" in text
    assert "If the surge keeps rising:" in text and "4.60 m above chart datum" in text  # 5.6 m less CD's 1.0
    assert "WIDE RANGE" in text
