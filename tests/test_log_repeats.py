"""A failure that repeats is shown once whole, then at most every few minutes with its count.

A feed whose device is gone fails every poll; a broken rule every pass. The log keeps the
first traceback, then one line per ``logging.repeat_minutes`` saying how many of the same
were not shown, and the traceback again after a day.
"""
from __future__ import annotations

import io
import logging
import threading
from dataclasses import replace

import pytest

from monitor.service.config import validate_config
from monitor.service.daemon import FeedRuntime
from monitor.service import logs
from monitor.service.logs import RepeatFilter, setup_logging
from tests.units import day, hour, minute


def fail(logger: logging.Logger, text: str = "device gone") -> None:
    try:
        raise OSError(text)
    except OSError:
        logger.exception("feed %s: poll failed; will retry", "north")


def test_a_repeated_failure_is_shown_once_with_its_traceback(logged):
    logger, clock, out = logged
    for _ in range(100):
        fail(logger)
        clock.t += 3  # a poll every 3 s: 300 s in all
    text = out.getvalue()
    assert text.count("poll failed") == 1 and text.count("Traceback") == 1


def test_after_the_interval_it_is_shown_with_the_count_and_without_the_traceback(logged):
    logger, clock, out = logged
    fail(logger)                    # shown whole at t0
    for _ in range(99):
        clock.t += 5
        fail(logger)                # 99 hidden, the last 495 s after t0
    clock.t += 10 * minute - 495    # exactly the interval after the first showing
    fail(logger)
    lines = [ln for ln in out.getvalue().splitlines() if "poll failed" in ln]
    assert len(lines) == 2
    # the clock starts at 1,790,000,000 s: 2026-09-21T14:13:20Z (GNU date -u -d @1790000000)
    assert "the same 99 more time(s) from 2026-09-21T14:13:25Z to 2026-09-21T14:21:35Z, not shown" in lines[1]
    assert "OSError: device gone; traceback as shown at 2026-09-21T14:13:20Z" in lines[1]  # the error in one line
    assert out.getvalue().count("Traceback") == 1


def test_just_before_the_interval_it_stays_hidden(logged):
    logger, clock, out = logged
    fail(logger)
    clock.t += 10 * minute - 1
    fail(logger)
    assert out.getvalue().count("poll failed") == 1


def test_the_traceback_comes_again_after_a_day(logged):
    logger, clock, out = logged
    fail(logger)
    clock.t += day - 1
    fail(logger)                    # shown, a second short of a day: without its traceback
    clock.t += 10 * minute
    fail(logger)                    # shown, the traceback a day old: with it
    assert out.getvalue().count("poll failed") == 3
    assert out.getvalue().count("Traceback") == 2


def test_another_message_or_error_is_another_line(logged):
    logger, clock, out = logged
    fail(logger, "device gone")
    fail(logger, "permission denied")
    logger.error("station %s: processing failed", "north")
    logger.error("station %s: processing failed", "south")
    text = out.getvalue()
    assert text.count("device gone") == 1 and text.count("permission denied") == 1
    assert text.count("processing failed") == 2


def test_lines_below_warning_always_pass(logged):
    logger, clock, out = logged
    for _ in range(20):
        logger.info("feed north: 1 line(s) rejected")
    assert out.getvalue().count("rejected") == 20


def test_zero_minutes_shows_every_one():
    out, clock = io.StringIO(), (lambda: 1_790_000_000.0)
    handler = logging.StreamHandler(out)
    handler.addFilter(RepeatFilter(every_s=0, clock=clock))
    logger = logging.getLogger("qw.test.repeats.every")
    logger.propagate = False
    logger.addHandler(handler)
    try:
        for _ in range(5):
            fail(logger)
    finally:
        logger.removeHandler(handler)
    assert out.getvalue().count("Traceback") == 5


def test_one_filter_on_two_handlers_shows_the_same_on_both(logged):
    _, clock, _ = logged
    a, b = io.StringIO(), io.StringIO()
    repeats = RepeatFilter(every_s=10 * minute, clock=clock, wall=clock)
    logger = logging.getLogger("qw.test.repeats.two")
    logger.propagate = False
    handlers = [logging.StreamHandler(a), logging.StreamHandler(b)]
    for h in handlers:
        h.addFilter(repeats)
        logger.addHandler(h)
    try:
        for _ in range(3):
            fail(logger)
            clock.t += 6 * minute
    finally:
        for h in handlers:
            logger.removeHandler(h)
    assert a.getvalue() == b.getvalue()
    assert a.getvalue().count("poll failed") == 2 and a.getvalue().count("Traceback") == 1


def test_the_oldest_line_is_forgotten_past_the_limit(logged):
    logger, clock, out = logged
    for i in range(RepeatFilter.MAX_LINES + 1):
        logger.warning("line %d", i)
    logger.warning("line %d", 0)    # forgotten: shown again as new
    logger.warning("line %d", RepeatFilter.MAX_LINES)  # remembered: hidden
    lines = out.getvalue().splitlines()
    assert len(lines) == RepeatFilter.MAX_LINES + 2


def test_the_daemon_log_keeps_one_traceback_of_a_feed_that_fails_every_poll(daemon, tmp_path, root_logging):
    class Gone:
        def poll(self):
            raise OSError("[Errno 19] No such device: /dev/ttyGAUGE")

    log_file = tmp_path / "quaywatch.log"
    cfg = replace(daemon.cfg, logging=replace(daemon.cfg.logging, file=log_file))
    root_logging.handlers[:] = []
    setup_logging(cfg)
    daemon.feeds = [FeedRuntime("north-serial", daemon.cfg.stations[0].sensors["primary"], Gone())]
    for _ in range(50):
        daemon.poll()
    for h in root_logging.handlers:
        h.flush()
    text = log_file.read_text(encoding="utf-8")
    assert text.count("feed north-serial: poll failed; will retry") == 1
    assert text.count("Traceback") == 1 and "No such device" in text


def test_setup_logging_puts_one_filter_on_every_handler_once(daemon, root_logging):
    extra = logging.StreamHandler(io.StringIO())
    root_logging.addHandler(extra)
    setup_logging(daemon.cfg)
    setup_logging(daemon.cfg)
    filters = [[f for f in h.filters if isinstance(f, RepeatFilter)] for h in root_logging.handlers]
    assert all(len(f) == 1 for f in filters)
    assert len({id(f[0]) for f in filters}) == 1


def test_repeat_minutes_is_read_from_the_configuration(tmp_path):
    base = {"store": {"path": "q.db"}, "stations": [{"id": "p", "latitude": 50.0, "longitude": -4.0,
                                                     "constants": "history", "sensors": {"primary": {}}}]}
    cfg, errors = validate_config({**base, "logging": {"repeat_minutes": 30}}, tmp_path)
    assert errors == [] and cfg.logging.repeat_minutes == 30.0
    _, errors = validate_config({**base, "logging": {"repeat_minutes": -1}}, tmp_path)
    assert errors == ["logging.repeat_minutes: expected minutes from 0 to 1440, got integer -1"]


def test_a_message_that_cannot_be_made_is_passed_to_the_handler():
    # one argument short: the filter must not raise into the code that logged it; the
    # handler reports the broken line as logging does
    record = logging.LogRecord("qw.test", logging.ERROR, __file__, 1, "station %s: %d samples", ("north",), None)
    assert RepeatFilter(every_s=10 * minute, clock=lambda: 0.0).filter(record) is True


def test_a_failure_that_stops_has_its_count_said_once_quiet(logged):
    logger, clock, out = logged
    repeats = logger.handlers[0].filters[0]
    for _ in range(10):
        fail(logger)
        clock.t += minute           # nine repeats hidden, the last at +9 min
    assert repeats.quiet() == []    # one minute quiet only
    clock.t += 9 * minute
    said = repeats.quiet()
    assert said == [("qw.test.repeats", logging.ERROR, "feed north: poll failed; will retry [the same 9 more "
                     "time(s) from 2026-09-21T14:14:20Z to 2026-09-21T14:22:20Z, not shown; none since]")]
    assert repeats.quiet() == []    # said once


def test_stopping_says_every_count_not_said(logged):
    logger, clock, out = logged
    repeats = logger.handlers[0].filters[0]
    fail(logger)
    clock.t += 1
    fail(logger)
    assert [n for n, _, _ in repeats.quiet(everything=True)] == ["qw.test.repeats"]


def test_a_forgotten_line_has_its_count_said(logged):
    logger, clock, out = logged
    repeats = logger.handlers[0].filters[0]
    fail(logger)
    fail(logger)                    # hidden
    for i in range(RepeatFilter.MAX_LINES):
        logger.warning("line %d", i)  # pushes the failure out
    said = repeats.quiet()
    assert len(said) == 1 and "the same 1 more time(s)" in said[0][2]


def test_the_wall_clock_stepping_back_hides_nothing_longer(logged):
    logger, clock, out = logged
    walls = iter([1_790_000_000.0, 1_790_000_000.0 - hour])
    repeats = RepeatFilter(every_s=10 * minute, clock=clock, wall=lambda: next(walls))
    handler = logging.StreamHandler(io.StringIO())
    handler.addFilter(repeats)
    other = logging.getLogger("qw.test.repeats.wall")
    other.propagate = False
    other.addHandler(handler)
    try:
        fail(other)
        clock.t += 10 * minute      # ten minutes later by the clock that never steps back,
        fail(other)                 # an hour earlier by the wall clock
    finally:
        other.removeHandler(handler)
    assert handler.stream.getvalue().count("poll failed") == 2


def test_a_message_that_logs_while_it_is_made_does_not_wait_on_itself(logged):
    logger, clock, out = logged

    class Noisy:
        def __str__(self):
            logger.warning("made while another line was made")
            return "noisy"

    done = threading.Event()

    def log_it():
        logger.error("value %s", Noisy())
        done.set()

    worker = threading.Thread(target=log_it, daemon=True)
    worker.start()
    # a generous ceiling on the event, not a timing: a filter that waits on itself never sets it
    assert done.wait(timeout=60), "the filter waited on its own lock"
    assert "value noisy" in out.getvalue()


def test_the_daemon_says_the_counts_when_it_is_told_to(daemon, tmp_path, root_logging):
    log_file = tmp_path / "quaywatch.log"
    cfg = replace(daemon.cfg, logging=replace(daemon.cfg.logging, file=log_file))
    root_logging.handlers[:] = []
    setup_logging(cfg)
    named = logging.getLogger("monitor.service.daemon")
    for _ in range(3):
        named.error("feed north-serial: poll failed; will retry")
    logs.report_quiet_repeats(everything=True)
    for h in root_logging.handlers:
        h.flush()
    text = log_file.read_text(encoding="utf-8")
    assert text.count("poll failed") == 2 and "the same 2 more time(s)" in text and "none since" in text


def test_a_failure_back_after_its_count_was_said_is_shown_at_once(logged):
    logger, clock, out = logged
    repeats = logger.handlers[0].filters[0]
    fail(logger)
    clock.t += 1
    fail(logger)                    # hidden
    clock.t += 10 * minute
    assert len(repeats.quiet()) == 1   # "... none since"
    clock.t += 30
    fail(logger)                    # back: a new spell, not hidden behind the count just said
    assert out.getvalue().count("poll failed") == 2


def test_the_daemons_processing_round_says_the_counts_of_stopped_failures(daemon, root_logging, caplog, logged):
    _, clock, _ = logged
    repeats = RepeatFilter(every_s=10 * minute, clock=clock, wall=clock)
    logs._ACTIVE = repeats          # as setup_logging leaves it (given back by root_logging)
    caplog.handler.addFilter(repeats)
    named = logging.getLogger("monitor.service.daemon")
    with caplog.at_level(logging.WARNING):
        for _ in range(4):
            named.error("feed north-serial: poll failed; will retry")
        clock.t += 11 * minute
        daemon.process()
    lines = [r.getMessage() for r in caplog.records if "poll failed" in r.getMessage()]
    assert len(lines) == 2 and "the same 3 more time(s)" in lines[1] and "none since" in lines[1]
