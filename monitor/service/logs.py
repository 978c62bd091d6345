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

__all__ = ["RepeatFilter", "log_formatter", "report_quiet_repeats", "setup_logging"]

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
    global _ACTIVE
    repeats = _ACTIVE = RepeatFilter(every_s=cfg.logging.repeat_minutes * 60.0)
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
    """One repeated line: what it says, when it was last shown and with its traceback
    (``clock`` times [s]), and the repeats not shown since: how many, the first and last
    (wall times [Unix s]), the last also on ``clock``."""
    name: str
    level: int
    text: str
    shown: float
    traced: float
    traced_at: float
    hidden: int = 0
    first_hidden: float = math.nan
    last: float = math.nan
    last_tick: float = math.nan


class RepeatFilter(logging.Filter):
    """Shows a warning or an error that repeats at most once every ``every_s``.

    The same line is the same logger, level, message and exception (its type and text). The
    first is shown whole; the next one after ``every_s`` is shown with the count of those
    not shown and their first and last times, and without its traceback unless the last one
    shown is over ``trace_every_s`` old. Lines below WARNING always pass. A line that stops
    repeating has its count said by :meth:`quiet` (:func:`report_quiet_repeats`, called by
    the daemon after each processing round and when it stops).

    Parameters
    ----------
    every_s : float
        Least time between two showings of the same line [s]; 0 shows every one.
    trace_every_s : float
        Least time between two showings of its traceback [s].
    clock : callable
        A clock that never steps back, for the intervals [s] (``time.monotonic``).
    wall : callable or None
        The times written in the lines [Unix s]; None: each record's own time.

    Notes
    -----
    One instance serves every handler that :func:`setup_logging` found or made: the first
    handler's call decides for a record (and rewrites its message), the others read that
    decision, so the file and the terminal show the same lines. Calls from several threads
    take turns (a reentrant lock: a message whose making logs again does not wait on
    itself). At most ``MAX_LINES`` lines are remembered; the one seen longest ago is
    forgotten first, its count of lines not shown said by the next :meth:`quiet`.
    """

    MAX_LINES = 1000

    def __init__(self, every_s: float = 600.0, trace_every_s: float = TRACE_AGAIN_S,
                 clock: Callable[[], float] = time.monotonic, wall: Callable[[], float] | None = None):
        super().__init__()
        self.every_s, self.trace_every_s = float(every_s), float(trace_every_s)
        self.clock, self.wall = clock, wall
        self._seen: dict[tuple, _Seen] = {}
        self._spilled: list[_Seen] = []  # forgotten with lines not shown, for quiet()
        self._lock = threading.RLock()  # the daemon logs from its jobs' threads, the outbox's and the fit's

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

    def quiet(self, everything: bool = False) -> list[tuple[str, int, str]]:
        """The lines with repeats not shown that have not come again for ``every_s``.

        Parameters
        ----------
        everything : bool
            All lines with repeats not shown, however recent (the daemon is stopping).

        Returns
        -------
        list of (str, int, str)
            Logger name, level and text (the line with the count and times) of each. Their
            counts start again, and each line's next one is shown at once.
        """
        with self._lock:
            now = self.clock()
            done = [s for s in self._seen.values()
                    if s.hidden and (everything or now - s.last_tick >= self.every_s)] + self._spilled
            self._spilled = []
            out = []
            for s in done:
                out.append((s.name, s.level, f"{s.text} [{_hidden_note(s)}; none since]"))
                # said: its next one starts a new spell, shown at once (its traceback as due)
                s.hidden, s.shown = 0, -math.inf
            return out

    def _decide(self, record: logging.LogRecord) -> bool:
        if record.levelno < logging.WARNING or self.every_s <= 0:
            return True
        key = _line_key(record)
        now, at = self.clock(), record.created if self.wall is None else self.wall()
        seen = self._seen.pop(key, None)  # put back last: the dict stays in order of last sight
        if seen is None:
            self._remember(key, _Seen(record.name, record.levelno, key[2], shown=now,
                                      traced=now if record.exc_info else -math.inf, traced_at=at))
            return True
        self._seen[key] = seen
        if now - seen.shown < self.every_s:
            if not seen.hidden:
                seen.first_hidden = at
            seen.hidden, seen.last, seen.last_tick = seen.hidden + 1, at, now
            return False
        notes = [_hidden_note(seen)] if seen.hidden else []
        if record.exc_info and now - seen.traced < self.trace_every_s:
            notes.append(f"{key[3]}: {key[4]}; traceback as shown at {iso_utc(seen.traced_at)}")
            record.exc_info, record.exc_text = None, None
        elif record.exc_info:
            seen.traced, seen.traced_at = now, at
        if notes:
            record.msg, record.args = f"{key[2]} [{'; '.join(notes)}]", None
        seen.shown, seen.hidden = now, 0
        return True

    def _remember(self, key: tuple, seen: _Seen) -> None:
        while len(self._seen) >= self.MAX_LINES:
            old = self._seen.pop(next(iter(self._seen)))
            if old.hidden:
                self._spilled.append(old)
        self._seen[key] = seen


#: The filter :func:`setup_logging` put on the handlers (None before it ran).
_ACTIVE: RepeatFilter | None = None


def report_quiet_repeats(everything: bool = False) -> None:
    """Log the count of each repeated line that stopped repeating, at its own level and on
    its own logger (nothing before :func:`setup_logging`).

    Parameters
    ----------
    everything : bool
        As :meth:`RepeatFilter.quiet`: every count not said yet (the daemon is stopping).
    """
    repeats = _ACTIVE
    if repeats is None:
        return
    for name, level, text in repeats.quiet(everything):
        logging.getLogger(name).log(level, "%s", text, extra={"_qw_shown": True})


def _hidden_note(seen: _Seen) -> str:
    return (f"the same {seen.hidden} more time(s) from {iso_utc(seen.first_hidden)} to {iso_utc(seen.last)}, "
            "not shown")


def _line_key(record: logging.LogRecord) -> tuple:
    """What makes two records the same line: logger, level, message, exception type and text."""
    exc = record.exc_info[1] if record.exc_info else None
    return (record.name, record.levelno, record.getMessage(),
            None if exc is None else type(exc).__qualname__, None if exc is None else str(exc))
