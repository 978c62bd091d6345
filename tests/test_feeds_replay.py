"""Replay of a recorded file at a speed-up, at a fixed rate, and as fast as possible.

Timestamps are ISO 8601 (ISO 8601-1:2019, as read by Python's ``datetime.fromisoformat``);
the expected unix times below are from the POSIX definition of seconds since the Epoch
(POSIX.1-2017, Base Definitions 4.16), computed by hand.
"""
from __future__ import annotations

import json
import time

import pytest

from monitor.errors import FeedError
from monitor.feeds import feed_from_config, open_feed
from monitor.feeds.replay import ReplayFeed, parse_time
from units import second


RECORD = "time,level\n" + "".join(
    f"2031-03-01T00:{m:02d}:00Z,{1 + m / 100:.2f}\n" for m in range(10))


class FakeClock:
    def __init__(self):
        self.now = 1000.0

    def __call__(self):
        return self.now


def texts(lines) -> list[str]:
    return [line.text for line in lines]


@pytest.fixture
def record(tmp_path):
    path = tmp_path / "record.csv"
    path.write_text(RECORD)
    return path


def test_parse_time_iso_with_zone():
    # POSIX 4.16 by hand: 61 years 1970-2030 with 15 leap days = 22280 days, plus 59 days of
    # January and February 2031 = 22339 days = 1930089600 s
    assert parse_time("2031-03-01T00:00:00Z", "iso") == 1930089600


def test_parse_time_naive_taken_as_utc():
    assert parse_time("2031-03-01 00:00", "iso") == 1930089600


def test_parse_time_strptime_pattern_and_unix():
    assert parse_time("01/03/2031 00:00", "%d/%m/%Y %H:%M") == 1930089600
    assert parse_time("1930089600", "unix") == 1930089600


def test_parse_time_header_is_none():
    assert parse_time("time", "iso") is None


def test_first_line_at_once_then_paced_by_timestamps(record):
    clock = FakeClock()
    feed = ReplayFeed("demo", str(record), speedup=60, time_column=1, clock=clock)
    # header and first sample at once; the next sample is one minute later in the record,
    # i.e. one second later at a speed-up of 60
    assert texts(feed.poll()) == ["time,level", "2031-03-01T00:00:00Z,1.00"]
    clock.now += 0.5 * second
    assert feed.poll() == []
    clock.now += 0.5 * second
    assert texts(feed.poll()) == ["2031-03-01T00:01:00Z,1.01"]


def test_late_poll_catches_up_in_order(record):
    clock = FakeClock()
    feed = ReplayFeed("demo", str(record), speedup=60, time_column="time", clock=clock)
    feed.poll()
    clock.now += 3 * second
    assert texts(feed.poll()) == [f"2031-03-01T00:0{m}:00Z,1.0{m}" for m in (1, 2, 3)]


def test_max_pause_caps_a_gap_in_the_record(tmp_path):
    path = tmp_path / "gap.csv"
    path.write_text("2031-03-01T00:00Z,1\n2031-03-08T00:00Z,2\n")   # a week apart
    clock = FakeClock()
    feed = ReplayFeed("demo", str(path), speedup=60, time_column=1, max_pause=2, clock=clock)
    feed.poll()
    clock.now += 2 * second
    assert texts(feed.poll()) == ["2031-03-08T00:00Z,2"]


def test_rate_paces_lines_regardless_of_timestamps(record):
    clock = FakeClock()
    feed = ReplayFeed("demo", str(record), rate=4, clock=clock)
    assert len(feed.poll()) == 1
    clock.now += 0.5 * second
    assert len(feed.poll()) == 2


def test_speedup_zero_gives_everything_and_is_exhausted(record):
    feed = ReplayFeed("demo", str(record), speedup=0)
    assert len(feed.poll()) == 11
    assert feed.poll() == [] and feed.exhausted


def test_speedup_zero_reads_in_chunks_without_splitting_lines(record):
    feed = ReplayFeed("demo", str(record), speedup=0, chunk=64)
    polls = []
    while not feed.exhausted:
        polls.append(texts(feed.poll()))
    assert len([p for p in polls if p]) > 1
    assert [t for p in polls for t in p] == RECORD.splitlines()


def test_speedup_zero_unterminated_last_line_is_returned(tmp_path):
    path = tmp_path / "r.csv"
    path.write_bytes(b"a\r\nb")
    feed = ReplayFeed("demo", str(path), speedup=0)
    got = []
    while not feed.exhausted:
        got += texts(feed.poll())
    assert got == ["a", "b"]


def test_restart_resumes_without_repeats(record):
    feed = ReplayFeed("demo", str(record), speedup=0, chunk=100)
    first = texts(feed.poll())
    state = json.loads(json.dumps(feed.state()))
    feed.close()
    again = ReplayFeed("demo", str(record), speedup=0)
    again.restore(state)
    lines = again.poll()
    assert first + texts(lines) == RECORD.splitlines()
    assert lines[0].lineno == len(first) + 1


def test_restart_keeps_header_named_time_column(record):
    clock = FakeClock()
    feed = ReplayFeed("demo", str(record), speedup=60, time_column="time", clock=clock)
    feed.poll()
    state = json.loads(json.dumps(feed.state()))
    again = ReplayFeed("demo", str(record), speedup=60, time_column="time", clock=clock)
    again.restore(state)
    assert len(again.poll()) == 1                # paced: the header is behind us
    clock.now += 1 * second
    assert len(again.poll()) == 1


def test_changed_file_is_played_from_start(record):
    feed = ReplayFeed("demo", str(record), speedup=0, chunk=50)
    feed.poll()
    state = feed.state()
    feed.close()
    record.write_text("other,file\n")
    again = ReplayFeed("demo", str(record), speedup=0)
    again.restore(state)
    assert texts(again.poll()) == ["other,file"]


def test_missing_replay_file_is_a_user_error(tmp_path):
    with pytest.raises(FeedError, match="absent.csv"):
        ReplayFeed("demo", str(tmp_path / "absent.csv"), speedup=0)


def test_real_clock_speedup_is_ordered_and_not_all_at_once(record):
    # ten samples one minute apart at a speed-up of 1200: 0.05 s apart, 0.45 s in all
    spec, errors = feed_from_config(
        {"kind": "replay", "path": str(record), "speedup": 1200, "time_column": 1},
        "feeds.demo")
    assert errors == []
    feed = open_feed(spec, "demo")
    polls = []
    end = time.monotonic() + 10 * second
    while not feed.exhausted and time.monotonic() < end:
        polls.append(texts(feed.poll()))
        time.sleep(0.01)
    got = [t for p in polls for t in p]
    assert got == RECORD.splitlines()
    assert max(len(p) for p in polls) < len(got)
