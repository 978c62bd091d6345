"""Telemetry line parsing (monitor.feeds.parse)."""
from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.feeds.parse import LineFormat
from monitor.feeds.parse import Observation, Reject, parse_line, parse_lines
from units import mm

RECV = 1_760_000_000.0  # an arbitrary receive time [s]


def utc(*args) -> int:
    """Unix seconds by the standard library (datetime, a general-purpose reference)."""
    return int(dt.datetime(*args, tzinfo=dt.timezone.utc).timestamp())


def test_iso_time_with_z():
    obs = parse_line("2025-10-20T06:30:00Z,3.442", LineFormat(), RECV)
    assert obs == Observation(utc(2025, 10, 20, 6, 30), 3.442, "sensor", 1)


def test_iso_time_with_offset_is_converted_to_utc():
    obs = parse_line("2025-10-20T07:30:00+01:00,1.0", LineFormat(), RECV)
    assert obs.t == utc(2025, 10, 20, 6, 30)


def test_iso_basic_format():
    fmt = LineFormat(delimiter="whitespace", time_column=3, value_column=4)
    obs = parse_line("QW1 DNM2 20251020T000100Z 389.1 cm", fmt, RECV)
    assert obs.t == utc(2025, 10, 20, 0, 1) and obs.value == pytest.approx(389.1)


def test_epoch_seconds_and_milliseconds():
    # 1 700 000 000 s is 2023-11-14T22:13:20Z (checked with datetime, from the standard library)
    assert parse_line("1700000000,2", LineFormat(time_format="epoch"), RECV).t == utc(2023, 11, 14, 22, 13, 20)
    assert parse_line("1700000000500,2", LineFormat(time_format="epoch_ms"), RECV).t == 1700000000 + 1


def test_feet_become_metres_and_the_offset_is_added():
    # 1 ft = 0.3048 m exactly (international yard and pound agreement, 1959)
    fmt = LineFormat(scale=0.3048, offset=-1.0)
    assert parse_line("2025-01-01T00:00:00Z,10", fmt, RECV).value == pytest.approx(3.048 - 1.0, abs=0.001 * mm)


def test_line_without_a_time_uses_the_receive_time():
    fmt = LineFormat(time_column=0, value_column=1)
    obs = parse_line("2.345", fmt, RECV)
    assert obs.t == int(RECV) and obs.time_source == "receive"


def test_empty_time_field_uses_the_receive_time():
    obs = parse_line(",2.0", LineFormat(), RECV)
    assert obs.time_source == "receive"


def test_naive_time_is_refused_without_a_zone():
    rej = parse_line("2025-01-01 00:00:00,1.0", LineFormat(), RECV)
    assert isinstance(rej, Reject) and "no UTC offset" in rej.reason


def test_naive_time_in_a_configured_zone():
    fmt = LineFormat(naive_time_zone="Europe/Dublin")
    # Irish Standard Time (UTC+1) in summer
    assert parse_line("2025-07-01 12:00:00,1.0", fmt, RECV).t == utc(2025, 7, 1, 11)


def test_ambiguous_local_time_at_the_clock_change_is_rejected():
    fmt = LineFormat(naive_time_zone="Europe/Dublin")
    # 2025-10-26 01:30 happens twice in Dublin (clocks go back at 02:00 IST), EU summer-time rule
    rej = parse_line("2025-10-26 01:30:00,1.0", fmt, RECV)
    assert isinstance(rej, Reject) and "ambiguous or skipped" in rej.reason


@pytest.mark.parametrize("line, reason", [
    ("2025-01-01T00:00:00Z,abc", "is not a number"),
    ("2025-01-01T00:00:00Z,nan", "not a finite number"),
    ("2025-01-01T00:00:00Z", "expected at least 2 columns"),
    ("2025-13-01T00:00:00Z,1", "not an ISO 8601"),
    ("2025-01-01,1", "not an ISO 8601"),
    ("2025-01-01T00:00:00Z,-999", "missing-value marker"),
])
def test_bad_lines_are_rejected_with_a_reason(line, reason):
    rej = parse_line(line, LineFormat(missing_marker="-999"), RECV, lineno=7)
    assert isinstance(rej, Reject) and reason in rej.reason and rej.lineno == 7 and rej.text == line


def test_blank_comment_and_header_lines_are_skipped():
    res = parse_lines(["time,level", "", "# note", "2025-01-01T00:00:00Z,1"], LineFormat(header_lines=1), RECV)
    assert len(res) == 1 and res.skipped == 3 and res.rejects == []


def test_a_batch_keeps_good_lines_and_counts_bad_ones():
    lines = [f"2025-01-01T00:{i:02d}:00Z,{i / 100}" for i in range(50)]
    lines[10] = "garbage"
    res = parse_lines(lines, LineFormat(), RECV)
    assert len(res) == 49 and [r.lineno for r in res.rejects] == [11]
    assert np.all(np.diff(res.t) > 0)


# -- property tests: any text or bytes gives an observation, a reject or a skip, never an exception

FORMATS = [LineFormat(), LineFormat(time_format="epoch"), LineFormat(delimiter="whitespace", time_column=3,
                                                                    value_column=4),
           LineFormat(time_column=0, value_column=1), LineFormat(naive_time_zone="Europe/Dublin",
                                                                 missing_marker="-999", header_lines=2)]
texty = st.one_of(
    st.text(max_size=60),
    st.binary(max_size=60),
    st.builds(lambda a, b: f"{a},{b}", st.text(max_size=30), st.text(max_size=10)),
    st.builds(lambda t, v: f"{t.isoformat()}Z,{v}", st.datetimes(), st.floats(allow_nan=True)),
    st.builds(lambda t, v: f"{t},{v}", st.integers(), st.floats()),
)


@settings(max_examples=300, deadline=None)
@given(line=texty, fmt=st.sampled_from(FORMATS), lineno=st.integers(-1, 5))
def test_any_line_parses_or_is_rejected_with_a_reason(line, fmt, lineno):
    out = parse_line(line, fmt, RECV, lineno)
    if isinstance(out, Reject):
        assert out.reason and isinstance(out.text, str)
        out.text.encode("utf-8")  # storable as SQLite text
    elif isinstance(out, Observation):
        assert np.isfinite(out.value) and out.time_source in ("sensor", "receive")
    else:
        assert out is None


@settings(max_examples=100, deadline=None)
@given(lines=st.lists(texty, max_size=20), fmt=st.sampled_from(FORMATS))
def test_every_line_of_a_batch_is_accounted_for(lines, fmt):
    res = parse_lines(lines, fmt, RECV)
    assert len(res) + len(res.rejects) + res.skipped == len(lines)


# --------------------------------------------------------------------------- time stamps ahead of the clock
# QARTOD Test 1 (timing/gap; U.S. IOOS 2021, v2.1): a time stamp ahead of the clock is a fault.
second, minute = 1, 60


def test_a_far_future_time_stamp_is_rejected_with_its_reason():
    rej = parse_line("2099-01-01T00:00:00Z,2.5", LineFormat(), RECV, lineno=4, max_ahead=2 * minute)
    assert isinstance(rej, Reject) and rej.lineno == 4
    assert "2099-01-01T00:00:00Z" in rej.reason and "ahead of the clock" in rej.reason


def test_the_future_tolerance_is_checked_from_both_sides():
    fmt = LineFormat(time_format="epoch")
    inside = parse_line(f"{RECV + 2 * minute - 1 * second:.0f},2.5", fmt, RECV, max_ahead=2 * minute)
    outside = parse_line(f"{RECV + 2 * minute + 1 * second:.0f},2.5", fmt, RECV, max_ahead=2 * minute)
    assert isinstance(inside, Observation) and isinstance(outside, Reject)


def test_each_line_is_held_against_its_own_receive_time():
    fmt = LineFormat(time_format="epoch")
    lines = [f"{RECV + 10 * minute:.0f},1.0", f"{RECV + 10 * minute:.0f},1.0"]
    res = parse_lines(lines, fmt, [RECV, RECV + 9 * minute], max_ahead=2 * minute)
    assert [r.lineno for r in res.rejects] == [1] and res.lineno.tolist() == [2]


def test_without_a_tolerance_the_clock_is_not_consulted():
    assert isinstance(parse_line("2099-01-01T00:00:00Z,2.5", LineFormat(), RECV), Observation)
