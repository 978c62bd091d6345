"""Alert rule configuration and the episode state machine (alerts/rules.py)."""
from __future__ import annotations

import dataclasses

import pytest
from hypothesis import given, settings, strategies as st

from alerts.rules import Rule, RuleState, Step, advance, parse_duration, rules_from_config, with_watermark
from units import m, mm, minute, hour


DATUMS = {"chart": -2.10 * m}  # invented port: chart datum 2.10 m below station datum

SURGE = {
    "id": "surge",
    "when": "residual_above",
    "hold": "10min",
    "band": 0.05,
    "notify": ["duty@port.example"],
    "steps": [
        {"name": "very high", "at": 0.9, "notify": ["master@port.example"]},
        {"name": "raised", "at": 0.3},
        {"name": "high", "at": 0.6},
    ],
}


def parse(raw, datums=DATUMS):
    return rules_from_config(raw, "stations[0].rules", datums)


def test_valid_rule_sorts_steps_mildest_first():
    rules, errors = parse([SURGE])
    assert errors == []
    assert [s.name for s in rules[0].steps] == ["raised", "high", "very high"]


def test_hold_and_settle_durations_in_seconds():
    rules, _ = parse([dict(SURGE, settle="1h")])
    assert rules[0].hold == 10 * minute
    assert rules[0].settle == 1 * hour


def test_settle_defaults_to_hold():
    rules, _ = parse([SURGE])
    assert rules[0].settle == rules[0].hold


def test_level_rule_takes_datum_offset_from_station():
    raw = {"id": "quay", "when": "level_above", "datum": "chart", "notify": ["a@port.example"],
           "steps": [{"name": "over the quay", "at": 5.2}]}
    rules, errors = parse([raw])
    assert errors == []
    assert rules[0].datum_offset == pytest.approx(-2.10 * m, abs=1 * mm)


def test_below_rule_sorts_steps_downwards():
    raw = {"id": "keel", "when": "level_below", "datum": "chart", "notify": ["a@port.example"],
           "steps": [{"name": "low", "at": 0.5}, {"name": "very low", "at": 0.2}]}
    rules, _ = parse([raw])
    assert [s.name for s in rules[0].steps] == ["low", "very low"]


def test_unknown_datum_names_the_key_and_the_choices():
    raw = dict(SURGE, id="q", when="level_above", datum="lat")
    _, errors = parse([raw])
    assert any(e.startswith("stations[0].rules[0].datum:") and "chart" in e for e in errors)


def test_unknown_key_is_reported_with_its_path():
    _, errors = parse([dict(SURGE, thershold=1)])
    assert errors == [e for e in errors if e.startswith("stations[0].rules[0].")]
    assert any("thershold" in e for e in errors)


def test_official_warning_vocabulary_is_refused_as_a_step_name():
    raw = dict(SURGE, steps=[{"name": "Flood Warning", "at": 0.5}])
    _, errors = parse([raw])
    assert any(e.startswith("stations[0].rules[0].steps[0].name:") and "warning" in e for e in errors)


def test_default_step_names_avoid_official_vocabulary():
    raw = {"id": "s", "when": "residual_above", "notify": ["a@port.example"],
           "steps": [{"at": 0.3}, {"at": 0.6}, {"at": 0.9}]}
    rules, errors = parse([raw])
    assert errors == []
    assert [s.name for s in rules[0].steps] == ["raised", "high", "very high"]


def test_duplicate_rule_id_is_an_error():
    _, errors = parse([SURGE, SURGE])
    assert any(e.startswith("stations[0].rules[1].id:") for e in errors)


def test_rule_without_recipients_is_an_error():
    raw = {k: v for k, v in SURGE.items() if k != "notify"}
    raw["steps"] = [{"name": "raised", "at": 0.3}]
    _, errors = parse([raw])
    assert any(e.startswith("stations[0].rules[0].notify:") for e in errors)


def test_bad_address_is_an_error():
    _, errors = parse([dict(SURGE, notify=["duty@port.example\r\nBcc: x@evil.example"])])
    assert any(e.startswith("stations[0].rules[0].notify[0]:") for e in errors)


def test_feed_silent_defaults_to_one_step_of_thirty_minutes():
    rules, errors = parse([{"id": "quiet", "when": "feed_silent", "notify": ["tech@port.example"]}])
    assert errors == []
    assert rules[0].steps[0].at == 30 * minute
    assert rules[0].hold == 0


@pytest.mark.parametrize("text,seconds", [("90s", 90), ("10min", 600), ("2h", 7200), ("1d", 86400), (45, 45)])
def test_parse_duration(text, seconds):
    assert parse_duration(text) == seconds


@pytest.mark.filterwarnings("ignore:.*renamed to 'when':DeprecationWarning")  # the old key, read on purpose
@settings(max_examples=150, deadline=None)
@given(st.lists(st.dictionaries(
    st.sampled_from(["id", "when", "watch", "datum", "hold", "band", "notify", "steps", "series", "x"]),
    st.one_of(st.none(), st.booleans(), st.integers(-5, 5), st.floats(allow_nan=True),
              st.text(max_size=8), st.lists(st.text(max_size=5), max_size=2),
              st.sampled_from(["residual_above", "level_below", "feed_silent", "10min", "chart"]),
              st.lists(st.dictionaries(st.sampled_from(["name", "at", "notify"]),
                                       st.one_of(st.text(max_size=6), st.floats(-2, 2)), max_size=3),
                       max_size=3))),
    max_size=3))
def test_any_input_gives_rules_or_keyed_errors_never_an_exception(raw):
    rules, errors = parse(raw)
    assert all(isinstance(r, Rule) for r in rules)
    assert all(e.startswith("stations[0].rules") for e in errors)


# --------------------------------------------------------------------------- state machine
# Hysteresis with a minimum dwell time before a change counts: common practice in alarm
# handling, no single published source.

RULE = Rule(id="r", watch="residual_above", hold=10 * minute, settle=10 * minute, band=0.05,
            notify=("a@port.example",),
            steps=(Step("raised", 0.30), Step("high", 0.60), Step("very high", 0.90)))


def run(values, rule=RULE, step=minute, state=None):
    state = state or RuleState()
    events = []
    for i, v in enumerate(values):
        state, ev = advance(rule, state, i * step, v)
        events += ev
    return state, events


def test_value_must_stay_beyond_the_step_for_the_hold_time():
    _, events = run([0.35] * 10)
    assert events == []


def test_opens_once_the_hold_time_has_passed():
    _, events = run([0.35] * 11)
    assert [(e.kind, e.level, e.t) for e in events] == [("opened", 0, 10 * minute)]


def test_hovering_around_the_step_opens_one_episode():
    values = [0.2] * 5 + [0.35] * 12 + [0.28, 0.31, 0.27, 0.33, 0.29, 0.32] * 10
    _, events = run(values)
    assert [e.kind for e in events] == ["opened"]


def test_clears_after_leaving_the_band_for_the_settle_time():
    state, events = run([0.35] * 11 + [0.20] * 11)
    assert [e.kind for e in events] == ["opened", "cleared"]
    assert state.level == -1


def test_escalation_is_one_new_event():
    _, events = run([0.35] * 11 + [0.65] * 30)
    assert [(e.kind, e.level) for e in events] == [("opened", 0), ("escalated", 1)]


def test_stepping_down_and_back_up_within_an_episode_is_quiet():
    values = [0.65] * 11 + [0.40] * 15 + [0.65] * 15 + [0.40] * 15
    _, events = run(values)
    assert [(e.kind, e.level) for e in events] == [("opened", 1)]


def test_all_clear_reports_the_highest_step_of_the_episode():
    _, events = run([0.95] * 11 + [0.0] * 11)
    assert [(e.kind, e.level) for e in events] == [("opened", 2), ("cleared", 2)]


def test_below_rule_opens_when_the_value_falls_under_the_step():
    rule = Rule(id="low", watch="residual_below", hold=0, settle=0, band=0.05,
                notify=("a@port.example",), steps=(Step("low", -0.40),))
    _, events = run([-0.1, -0.45, -0.38, -0.30], rule=rule)
    assert [(e.kind, e.t) for e in events] == [("opened", 1 * minute), ("cleared", 3 * minute)]


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(-0.2, 1.2), max_size=120), st.integers(0, 15))
def test_events_always_form_episodes_open_escalate_clear(values, hold_min):
    rule = Rule(id="r", watch="residual_above", hold=hold_min * minute, settle=hold_min * minute, band=0.05,
                notify=("a@port.example",),
                steps=(Step("raised", 0.30), Step("high", 0.60), Step("very high", 0.90)))
    _, events = run(values, rule=rule)
    open_, top = False, -1
    for e in events:
        if e.kind == "opened":
            assert not open_
            open_, top = True, e.level
            assert e.value >= rule.steps[e.level].at
        elif e.kind == "escalated":
            assert open_ and e.level > top
            top = e.level
        else:
            assert open_ and e.level == top
            assert e.value < rule.steps[0].at - rule.band
            open_ = False


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(-0.2, 0.2999), max_size=60))
def test_values_below_every_step_never_raise_anything(values):
    _, events = run(values, rule=RULE)
    assert events == []


@settings(max_examples=200, deadline=None)
@given(level=st.integers(-1, 3), top=st.integers(-1, 3), held=st.booleans(), wm=st.none() | st.integers(0, 2 ** 40),
       above=st.lists(st.none() | st.integers(0, 2 ** 40), max_size=3),
       inside=st.lists(st.none() | st.integers(0, 2 ** 40), max_size=3), t=st.integers(0, 2 ** 40))
def test_moving_the_watermark_keeps_every_other_field(level, top, held, wm, above, inside, t):
    # Reference: dataclasses.replace, which names no field (a field added later is kept too)
    state = RuleState(level=level, top_sent=top, above_since=tuple(above), inside_since=tuple(inside),
                      watermark=wm, held=held)
    assert with_watermark(state, t) == dataclasses.replace(state, watermark=t)
