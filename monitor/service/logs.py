"""The daemon's log: its format, its handlers, and how a failure that repeats is shown.

A daemon that retries goes on failing the same way until someone mends the cause: a feed
whose device is gone fails every poll (each second), a broken alert rule every pass. Each
failure used to write its whole traceback, so a day of one fault filled the rotating log
(and pushed out what came before it) with one message. :class:`RepeatFilter` shows a warning
or error again only after ``logging.repeat_minutes``, with how many of the same were not shown
and between which times, and its traceback again only after a day; the first of each is
shown whole, as before.
"""
from __future__ import annotations

import logging
import logging.handlers
import math
import threading
import time
from dataclasses import dataclass
from typing import Callable

from monitor.errors import ConfigError
from monitor.service.config import Config
from predictor.timeutil import iso_utc

__all__ = ["RepeatFilter", "log_formatter", "setup_logging"]

#: A repeated failure's traceback is written again after this long [s] (a rotated log may
#: have lost the first one).
TRACE_AGAIN_S = 86400.0


def log_formatter() -> logging.Formatter:
    """Log lines stamped in ISO 8601 UTC to the millisecond: ``2025-10-23T12:00:00.123Z
    INFO name: message`` (the daemon's log, and the command line's warnings)."""
    fmt = logging.Formatter("%(asctime)s.%(msecs)03dZ %(levelname)s %(name)s: %(message)s",
                            datefmt="%Y-%m-%dT%H:%M:%S")
    fmt.converter = time.gmtime
    return fmt


def setup_logging(cfg: Config, verbose: int = 0) -> None:
    """Log to stderr (set up by the command line) and, if configured, a rotating file; a
    repeated warning or error shown at most every ``logging.repeat_minutes`` on each."""
    root = logging.getLogger()
    level = getattr(logging, cfg.logging.level.upper(), logging.INFO)
    if verbose:
        level = min(level, logging.DEBUG if verbose > 1 else logging.INFO)
    root.setLevel(level)
    # the scheduler logs every job run at INFO, drowning the monitor's lines: its warnings
    # and errors only, unless -vv
    aps = logging.getLogger("apscheduler")
    aps.setLevel(logging.DEBUG if verbose > 1 else logging.WARNING)
    sched_log = logging.getLogger("apscheduler.scheduler")
    for f in [f for f in sched_log.filters if isinstance(f, _SkippedRunFilter)]:
        sched_log.removeFilter(f)
    if verbose < 2:
        sched_log.addFilter(_SkippedRunFilter())
    fmt = log_formatter()  # ISO 8601 UTC stamps
    if not root.handlers:
        h = logging.StreamHandler()
        h.setFormatter(fmt)
        root.addHandler(h)
    if cfg.logging.file is not None:
        try:
            cfg.logging.file.parent.mkdir(parents=True, exist_ok=True)
            fh = logging.handlers.RotatingFileHandler(cfg.logging.file, maxBytes=cfg.logging.max_bytes,
                                                      backupCount=cfg.logging.backups, encoding="utf-8")
        except OSError as exc:
            raise ConfigError(f"logging.file: cannot open {cfg.logging.file} ({exc})") from None
        fh.setFormatter(fmt)
        root.addHandler(fh)
    # one filter for every handler, so a record is judged once and shown alike on each
    repeats = RepeatFilter(every_s=cfg.logging.repeat_minutes * 60.0)
    for h in root.handlers:
        for f in [f for f in h.filters if isinstance(f, RepeatFilter)]:
            h.removeFilter(f)
        h.addFilter(repeats)


class _SkippedRunFilter(logging.Filter):
    """Drops apscheduler's warning that a run was skipped because the previous one is still
    going: with max_instances=1 that is the intended behaviour during a long backfill."""

    def filter(self, record: logging.LogRecord) -> bool:
        return "maximum number of running instances" not in record.getMessage()


@dataclass
class _Seen:
    """One repeated line: when it was last shown, with its traceback last, and the repeats
    not shown since (how many, the first and last time) [Unix s]."""
    shown: float
    traced: float
    hidden: int = 0
    first_hidden: float = math.nan
    last: float = math.nan


class RepeatFilter(logging.Filter):
    """Shows a warning or an error that repeats at most once every ``every_s``.

    The same line is the same logger, level, message and exception (its type and text). The
    first is shown whole; the next one after ``every_s`` is shown with the count of those
    not shown and their first and last times, and without its traceback unless the last one
    shown is over ``trace_every_s`` old. Lines below WARNING always pass.

    Parameters
    ----------
    every_s : float
        Least time between two showings of the same line [s]; 0 shows every one.
    trace_every_s : float
        Least time between two showings of its traceback [s].
    clock : callable
        Time now [Unix s] (tests give their own).

    Notes
    -----
    One instance serves every handler: the first handler's call decides for a record (and
    rewrites its message), the others read that decision, so the file and the terminal show
    the same lines. Calls from several threads take turns (a lock). At most ``MAX_LINES`` lines are remembered; the one seen longest ago is
    forgotten first.
    """

    MAX_LINES = 1000

    def __init__(self, every_s: float = 600.0, trace_every_s: float = TRACE_AGAIN_S,
                 clock: Callable[[], float] = time.time):
        super().__init__()
        self.every_s, self.trace_every_s, self.clock = float(every_s), float(trace_every_s), clock
        self._seen: dict[tuple, _Seen] = {}
        self._lock = threading.Lock()  # the daemon logs from its jobs' threads, the outbox's and the fit's

    def filter(self, record: logging.LogRecord) -> bool:
        with self._lock:
            decided = record.__dict__.get("_qw_shown")
            if decided is None:
                try:
                    decided = self._decide(record)
                except Exception:  # a message that cannot be made (its handler says so): shown as it is
                    decided = True
                record._qw_shown = decided
        return decided

    def _decide(self, record: logging.LogRecord) -> bool:
        if record.levelno < logging.WARNING or self.every_s <= 0:
            return True
        now = self.clock()
        key = _line_key(record)
        seen = self._seen.pop(key, None)  # put back last: the dict stays in order of last sight
        if seen is None:
            self._remember(key, _Seen(shown=now, traced=now if record.exc_info else -math.inf))
            return True
        self._seen[key] = seen
        if now - seen.shown < self.every_s:
            if not seen.hidden:
                seen.first_hidden = now
            seen.hidden, seen.last = seen.hidden + 1, now
            return False
        notes = []
        if seen.hidden:
            notes.append(f"the same {seen.hidden} more time(s) from {iso_utc(seen.first_hidden)} to "
                         f"{iso_utc(seen.last)}, not shown")
        if record.exc_info and now - seen.traced < self.trace_every_s:
            notes.append(f"traceback as shown at {iso_utc(seen.traced)}")
            record.exc_info, record.exc_text = None, None
        elif record.exc_info:
            seen.traced = now
        if notes:
            record.msg, record.args = f"{record.getMessage()} [{'; '.join(notes)}]", None
        seen.shown, seen.hidden = now, 0
        return True

    def _remember(self, key: tuple, seen: _Seen) -> None:
        while len(self._seen) >= self.MAX_LINES:
            del self._seen[next(iter(self._seen))]
        self._seen[key] = seen


def _line_key(record: logging.LogRecord) -> tuple:
    """What makes two records the same line: logger, level, message, exception type and text."""
    exc = record.exc_info[1] if record.exc_info else None
    return (record.name, record.levelno, record.getMessage(),
            None if exc is None else type(exc).__qualname__, None if exc is None else str(exc))
