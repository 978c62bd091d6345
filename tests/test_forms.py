"""Alert emails by reader (alerts/mail/forms.py): brief, full and gauge forms, read as a phone would."""
from __future__ import annotations

import email
import html as html_lib
import re
import warnings
from dataclasses import replace
from email import policy

import pytest

from alerts.engine import station_marks
from alerts.mail.forms import FORMS, compose, form_for, forms_from_config
from alerts.mail.message import CAUTION, CAUTION_LINE, build_email
from alerts.mail.outbox import mail_settings_from
from alerts.rules import Event, Rule, Step, StationView, rules_from_config

T = 1761220800  # 2025-10-23 12:00 UTC = 13:00 IST (Europe/Dublin summer time, tz database)
PREVIEW = 140   # characters a phone shows of a message before it is opened (common practice, no source)

QUAY = Rule(id="quay", watch="level_above", datum="chart", datum_offset=1.0, notify=("a@port.example",),
            steps=(Step("boards out", 4.0), Step("over the quay", 4.25)),
            action="Move vehicles off the quay and keep off the quay wall.",
            note="Quay top 4.25 m above chart datum.")
SURGE = Rule(id="surge", watch="residual_above", notify=("a@port.example",),
             steps=(Step("raised", 0.4), Step("high", 0.7)))
GAUGE = Rule(id="gauge", watch="equipment_fault", notify=("t@port.example",),
             steps=(Step("equipment fault", 1),))
STATION = replace(StationView(id="dunmerrow", name="Port Dunmerrow (invented)", tz="Europe/Dublin",
                              datums={"chart": 1.0}), marks=station_marks([QUAY]))
FAULT = {"kind": "clock_offset", "sensor": "backup", "value": 3.2, "limit": 1.0, "unit": "min",
         "since": T - 7200}
# Levels on the station datum; chart datum stands 1.0 m above it.
FACTS = {"observed": 5.05, "predicted": 4.50, "residual": 0.55, "trend": 0.10,
         "next_high_water": {"time": T + 3 * 3600, "level": 5.30, "lower": 5.10, "upper": 5.50,
                             "coverage": 0.9, "note": "conditioned on 14 storms of the station's record"},
         "faults": [FAULT]}

EVENTS = {"quay": (QUAY, Event("opened", 0, T, 4.05)),
          "surge": (SURGE, Event("opened", 0, T, 0.55)),
          "gauge": (GAUGE, Event("opened", 0, T, 1.0))}


def visible_text(html: str) -> str:
    """What a mail client shows of an HTML part, in reading order (head dropped, tags
    stripped, entities decoded, white space collapsed); shares no code with the forms."""
    body = re.sub(r"(?is)<head>.*?</head>", " ", html)
    body = re.sub(r"(?s)<[^>]+>", " ", body)
    return " ".join(html_lib.unescape(body).split())


def preview(text: str) -> str:
    return " ".join(text.split())[:PREVIEW]


def all_forms():
    for form in FORMS:
        for name, (rule, event) in EVENTS.items():
            yield form, name, compose(form, STATION, rule, event, FACTS)


@pytest.mark.parametrize("form", sorted(FORMS))
@pytest.mark.parametrize("part", ["text", "html"])
def test_every_form_carries_the_one_line_caution(form, part):
    for rule, event in EVENTS.values():
        _, text, html = compose(form, STATION, rule, event, FACTS)
        body = text if part == "text" else visible_text(html)
        assert " ".join(CAUTION_LINE.split()) in " ".join(body.split())


def test_the_one_line_caution_is_the_start_of_the_full_caution():
    # one home: the line is not a second copy of the text
    assert CAUTION.startswith(CAUTION_LINE)
    for words in ("unofficial", "official warnings", "emergency authorities", "licensed practice"):
        assert words in CAUTION_LINE.lower()


@pytest.mark.parametrize("form", ["full", "gauge"])
def test_long_forms_carry_the_full_caution_too(form):
    _, text, html = compose(form, STATION, QUAY, EVENTS["quay"][1], FACTS)
    assert CAUTION in text and CAUTION in visible_text(html)


@pytest.mark.parametrize("form", ["brief", "full"])
@pytest.mark.parametrize("part", ["text", "html"])
def test_phone_preview_carries_the_level_not_the_caution(form, part):
    _, text, html = compose(form, STATION, QUAY, EVENTS["quay"][1], FACTS)
    first = preview(text if part == "text" else visible_text(html))
    assert "4.05 m" in first            # observed 5.05 m on the station datum, chart datum 1.0 m up
    assert "unofficial" not in first.lower()


@pytest.mark.parametrize("part", ["text", "html"])
def test_gauge_form_preview_carries_the_fault_and_its_numbers(part):
    _, text, html = compose("gauge", STATION, GAUGE, EVENTS["gauge"][1], FACTS)
    first = preview(text if part == "text" else visible_text(html))
    assert "clock offset on backup" in first and "3.2 min" in first and "limit 1.0 min" in first
    assert "unofficial" not in first.lower()


def test_gauge_form_lists_the_faults_before_the_readings():
    _, text, _ = compose("gauge", STATION, GAUGE, EVENTS["gauge"][1], FACTS)
    assert text.index("Equipment faults") < text.index("Observed level")


def test_html_does_not_open_with_the_caution_twice():
    for form, name, (_, _, html) in all_forms():
        top = visible_text(html)[:600].lower()
        assert top.count("automated and unofficial") == 1, (form, name)


def test_plain_text_caution_is_not_after_the_signature_marker():
    for form, name, (_, text, _) in all_forms():
        assert "unofficial" in text.lower()
        if "\n-- \n" in text:
            assert "unofficial" not in text.split("\n-- \n", 1)[1].lower(), (form, name)


def test_brief_form_tells_the_level_against_the_marks_in_plain_words():
    _, text, _ = compose("brief", STATION, QUAY, EVENTS["quay"][1], FACTS)
    first = text.splitlines()[0]
    assert 'the water has reached "boards out"' in first
    assert "4.05 m above chart datum" in first
    assert '0.05 m above "boards out" (4.00 m)' in first
    assert '0.20 m below "over the quay" (4.25 m)' in first


def test_brief_form_says_whether_the_next_high_water_reaches_the_mark():
    _, text, _ = compose("brief", STATION, QUAY, EVENTS["quay"][1], FACTS)
    line = next(ln for ln in text.splitlines() if ln.startswith("Next high water"))
    assert "16:00 IST" in line and "4.30 m above chart datum" in line
    assert 'forecast to reach "over the quay" (4.25 m)' in line


def test_brief_form_says_when_the_range_could_reach_a_mark_the_forecast_does_not():
    facts = dict(FACTS, next_high_water={"time": T + 3 * 3600, "level": 4.90, "upper": 5.10})
    _, text, _ = compose("brief", STATION, QUAY, EVENTS["quay"][1], facts)
    line = next(ln for ln in text.splitlines() if ln.startswith("Next high water"))
    assert 'not forecast to reach "boards out" (4.00 m)' in line      # 3.90 m on chart datum
    assert "could" in line and "4.10 m" in line


def test_brief_form_has_the_operators_action_line():
    _, text, html = compose("brief", STATION, QUAY, EVENTS["quay"][1], FACTS)
    assert "What to do: Move vehicles off the quay and keep off the quay wall." in text
    assert "Move vehicles off the quay" in visible_text(html)


def test_brief_form_has_nothing_else():
    _, text, html = compose("brief", STATION, QUAY, EVENTS["quay"][1], FACTS)
    lines = [ln for ln in text.splitlines() if ln.strip()]
    assert len(lines) == 4   # happening + level now, caution, next high water, action
    for technical in ("Rule", "Step", "Residual", "Forecast method", "clock offset", "mm/day",
                      "conditioned", "UTC", "-- "):
        assert technical not in text and technical not in visible_text(html), technical


def test_surge_rule_brief_form_tells_the_level_against_the_quay_marks_too():
    _, text, _ = compose("brief", STATION, SURGE, EVENTS["surge"][1], FACTS)
    first = text.splitlines()[0]
    assert "0.55 m above the predicted tide" in first and '"over the quay" (4.25 m)' in first


def test_forms_map_addresses_and_default_to_full():
    forms, errors = forms_from_config({"Volunteers@Port.example": "brief", "t@port.example": "gauge"},
                                      "mail.forms")
    assert errors == []
    assert form_for("volunteers@port.example", forms) == "brief"
    assert form_for("t@port.example", tuple(forms.items())) == "gauge"
    assert form_for("office@port.example", forms) == "full"


def test_unknown_form_is_refused_by_key_path():
    settings, errors = mail_settings_from({"sender": "g@port.example", "host": "127.0.0.1",
                                           "forms": {"v@port.example": "short"}}, "mail")
    assert settings is None
    assert any(e.startswith('mail.forms."v@port.example": unknown form') and "brief" in e for e in errors)


def test_form_key_must_be_an_address():
    _, errors = forms_from_config({"volunteers": "brief"}, "mail.forms")
    assert errors and errors[0].startswith('mail.forms."volunteers": not a plain email address')


def test_equipment_fault_subject_does_not_repeat_itself():
    subject, _, _ = compose("full", STATION, GAUGE, EVENTS["gauge"][1], FACTS)
    assert subject.lower().count("equipment fault") == 1
    assert "clock offset on backup" in subject


def test_changed_fault_subject_names_the_new_fault_once():
    subject, _, _ = compose("full", STATION, GAUGE, Event("changed", 0, T, 2.0),
                            dict(FACTS, new_faults=[FAULT]))
    assert subject.lower().count("equipment fault") == 1 and "new: clock offset on backup" in subject


def _raw_headers(msg) -> list[str]:
    raw = msg.as_bytes(policy=policy.SMTP).split(b"\r\n\r\n", 1)[0].decode("ascii")
    return raw.split("\r\n")


def test_no_header_goes_out_empty_or_as_none():
    _, text, html = compose("full", STATION, GAUGE, EVENTS["gauge"][1], FACTS)
    msg = build_email("Gauge <g@port.example>", "t@port.example", "s", text, html, "<1@port.example>")
    for name, value in msg.items():
        assert str(value).strip() not in ("", "None"), name
    assert "X-Priority" not in msg


@pytest.mark.parametrize("subject", [
    "[quaywatch] Port Dunmerrow (invented): not clear yet - the high water at 11:59 may reach "
    "boards out again (water level 3.95 m above chart datum)",
    "Daily tide report: Port Dunmerrow (invented), 2025-10-23 \u2014 high 4.31 m above chart datum, "
    "residual +0.62 m, 2 alert episodes (automated, unofficial)",
    "[quaywatch] " + "Dunmerrow-" * 12 + ": raised",
])
def test_folded_subject_starts_on_its_own_line(subject):
    msg = build_email("g@port.example", "t@port.example", subject, "x", None, "<1@port.example>")
    lines = _raw_headers(msg)
    i = next(k for k, ln in enumerate(lines) if ln.startswith("Subject:"))
    assert lines[i][len("Subject:"):].strip() != ""
    back = email.message_from_bytes(msg.as_bytes(policy=policy.SMTP), policy=policy.default)
    assert " ".join(str(back["Subject"]).split()) == " ".join(subject.split())


def test_action_key_is_validated_by_key_path():
    raw = {"id": "quay", "when": "level_above", "notify": ["a@port.example"],
           "action": "line one\nline two", "steps": [{"name": "boards out", "at": 4.0}]}
    _, errors = rules_from_config([raw], "stations[0].rules", {})
    assert any(e.startswith("stations[0].rules[0].action: one line") for e in errors)


def test_old_rule_key_is_read_with_a_notice_naming_the_new_key():
    raw = {"id": "quay", "watch": "level_above", "notify": ["a@port.example"],
           "steps": [{"name": "boards out", "at": 4.0}]}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        rules, errors = rules_from_config([raw], "stations[0].rules", {})
    assert errors == [] and rules[0].watch == "level_above"
    notes = [str(w.message) for w in caught if issubclass(w.category, DeprecationWarning)]
    assert notes and notes[0].startswith("stations[0].rules[0].watch: renamed to 'when'")


def test_old_and_new_rule_key_together_are_refused():
    raw = {"id": "quay", "watch": "level_above", "when": "level_above", "notify": ["a@port.example"],
           "steps": [{"name": "boards out", "at": 4.0}]}
    _, errors = rules_from_config([raw], "stations[0].rules", {})
    assert any(e.startswith("stations[0].rules[0].watch: renamed to 'when'") for e in errors)


def test_brief_all_clear_says_the_water_is_back_below_the_mark():
    _, text, _ = compose("brief", STATION, QUAY, Event("cleared", 1, T, 3.80), dict(FACTS, observed=4.80))
    first = text.splitlines()[0]
    assert 'all clear - the water is back below "boards out"' in first and "3.80 m above chart datum" in first
    assert "What to do" not in text          # the action line is for while it lasts


def test_brief_held_all_clear_says_why():
    _, text, _ = compose("brief", STATION, QUAY, Event("held", 0, T, 3.90), dict(FACTS, observed=4.90))
    assert 'not clear yet - the next high water may reach "boards out" again' in text.splitlines()[0]


def test_brief_silent_gauge_says_there_is_no_reading():
    silent = Rule(id="quiet", watch="feed_silent", notify=("t@port.example",), steps=(Step("feed quiet", 1800),))
    facts = {k: v for k, v in FACTS.items() if k not in ("observed", "predicted", "residual", "trend")}
    _, text, _ = compose("brief", STATION, silent, Event("opened", 0, T, 2700.0), facts)
    assert "no data from the gauge for 45 min" in text and "No level reading from the gauge now." in text
