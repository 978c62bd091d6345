"""Play back a recorded telemetry file at a chosen pace, for demonstrations and backfill.

Pacing
------
- ``speedup`` > 0 with ``time_column``: each line is released when as much wall-clock time
  has passed since the previous line as its recorded timestamps differ, divided by
  ``speedup`` (60 plays an hour of record in a minute). Lines whose time cannot be read
  (headers, comments, damaged lines) go out without delay and are left to the parser;
  a timestamp earlier than the one before goes out at once.
- ``rate``: a fixed number of lines per second, whatever the timestamps say.
- ``speedup = 0``: as fast as the reader takes them (in batches, so a poll stays short).
- ``max_pause`` caps the wait between two lines [s], so a gap of days in the record does not
  stall a demonstration.
- The first line goes out at once; a poll returns every line whose time has come, so a daemon
  that polls late catches up rather than drifting.

The checkpoint holds the file identity, the byte offset just past the last line returned and
its line number; a restart resumes there (pacing starts afresh), and a file that is no longer
the recorded one is played from its start. ``exhausted`` is True once every line is out.
"""
from __future__ import annotations

import os
import time
from datetime import datetime, timezone
from typing import Any, Callable

from monitor.errors import FeedError
from monitor.feeds.base import (
    CHUNK_BYTES,
    Feed,
    FileIdentity,
    RawLine,
    decode_block,
    decode_line,
    int_field,
    log,
)

#: Most lines one poll returns when paced (as fast as possible, a poll reads ``chunk`` bytes).
BATCH_LINES = 20000


def parse_time(text: str, time_format: str) -> float | None:
    """A timestamp field to [unix s], or None if it does not read as one.

    ``time_format`` is ``"iso"`` (ISO 8601, as Python's ``datetime.fromisoformat`` reads it),
    ``"unix"`` (seconds since 1970-01-01 UTC) or a ``strptime`` pattern. Times without a zone
    are taken as UTC; only differences matter for pacing.
    """
    try:
        if time_format == "unix":
            value = float(text)
            return value if value == value and abs(value) != float("inf") else None
        if time_format == "iso":
            moment = datetime.fromisoformat(text)
        else:
            moment = datetime.strptime(text, time_format)
    except (ValueError, OverflowError):
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.timestamp()


class ReplayFeed(Feed):
    """Replay feed; see the module docstring.

    Parameters
    ----------
    name : str
        Feed name, for messages.
    path : str
        The recorded file.
    speedup : float
        Playback speed relative to the recorded timestamps; 0 for as fast as possible.
    rate : float, optional
        Lines per second instead of timestamps [1/s].
    time_column : int or str, optional
        Column holding the time: a number counting from 1, or the column's header name.
    time_format : str
        ``"iso"``, ``"unix"`` or a ``strptime`` pattern.
    delimiter : str
        Column separator; ``"whitespace"`` for runs of blanks.
    max_pause : float, optional
        Longest wait between two lines [s].
    encoding : str
        ASCII-compatible text encoding.
    chunk : int
        Most bytes read in one poll when playing as fast as possible [bytes].
    clock : callable
        Monotonic clock [s]; replaceable in tests.
    """

    kind = "replay"

    def __init__(self, name: str, path: str, speedup: float = 1.0, rate: float | None = None,
                 time_column: int | str | None = None, time_format: str = "iso",
                 delimiter: str = ",", max_pause: float | None = None,
                 encoding: str = "utf-8", chunk: int = CHUNK_BYTES,
                 clock: Callable[[], float] = time.monotonic):
        super().__init__(name)
        self.path = os.fspath(path)
        self.speedup = speedup
        self.rate = rate
        self.time_column = time_column
        self.time_format = time_format
        self.delimiter = delimiter
        self.max_pause = max_pause
        self.encoding = encoding
        self.chunk = chunk
        self.clock = clock
        try:
            self._f = open(self.path, "rb")
        except OSError as exc:
            raise FeedError(f"feed {name}: cannot open the replay file {self.path}: "
                            f"{exc.strerror or exc}") from None
        self._identity = FileIdentity.of_fd(self._f.fileno())
        self._start(0, 0, None)

    def _start(self, offset: int, lineno: int, column: int | None) -> None:
        self._f.seek(offset)
        self._offset = offset
        self._lineno = lineno
        self._column = column if column is not None else (
            self.time_column - 1 if isinstance(self.time_column, int) else None)
        self._next: tuple[bytes, float | None] | None = None
        self._eof = False
        self._last_due: float | None = None
        self._last_t: float | None = None

    @property
    def exhausted(self) -> bool:
        return self._eof and self._next is None

    def _fields(self, text: str) -> list[str]:
        parts = text.split() if self.delimiter == "whitespace" else text.split(self.delimiter)
        return [p.strip().strip('"').strip() for p in parts]

    def _time_of(self, text: str) -> float | None:
        if self.time_column is None:
            return None
        fields = self._fields(text)
        if self._column is None:  # a column named in a header not seen yet
            if self.time_column in fields:
                self._column = fields.index(self.time_column)
            return None
        if self._column >= len(fields):
            return None
        return parse_time(fields[self._column], self.time_format)

    def _due(self, t: float | None, now: float) -> float:
        if self._last_due is None:
            return now
        if self.rate is not None:
            gap = 1.0 / self.rate
        elif t is None or self._last_t is None:
            gap = 0.0
        else:
            gap = max(0.0, (t - self._last_t) / self.speedup)
        if self.max_pause is not None:
            gap = min(gap, self.max_pause)
        return self._last_due + gap

    def _poll_unpaced(self, received: float) -> list[RawLine]:
        # Whole blocks of lines at once: backfill speed matters here.
        data = os.pread(self._f.fileno(), self.chunk, self._offset)
        if not data:
            self._eof = True
            return []
        cut = data.rfind(b"\n")
        if cut >= 0:
            body, used = data[:cut], cut + 1
        else:  # the unterminated last line of the file, or a piece of an overlong line
            body, used = data, len(data)
        texts = decode_block(body, self.encoding, first=self._offset == 0)
        n = self._lineno
        out = [RawLine(text, n + i, self.path, received) for i, text in enumerate(texts, 1)]
        self._lineno = n + len(texts)
        self._offset += used
        return out

    def poll(self) -> list[RawLine]:
        received = time.time()
        if self.rate is None and self.speedup == 0:
            return self._poll_unpaced(received)
        out: list[RawLine] = []
        now = self.clock()
        while len(out) < BATCH_LINES:
            if self._next is None:
                raw = self._f.readline()
                if not raw:
                    self._eof = True
                    break
                text = decode_line(raw.rstrip(b"\n") if raw.endswith(b"\n") else raw,
                                   self.encoding, first=self._offset == 0)
                self._next = (raw, self._time_of(text), text)
            raw, t, text = self._next
            due = self._due(t, now)
            if due > now:
                break
            self._next = None
            self._offset += len(raw)
            self._lineno += 1
            out.append(RawLine(text, self._lineno, self.path, received))
            self._last_due = max(due, now) if self._last_due is None else due
            if t is not None:
                self._last_t = t
        return out

    def state(self) -> dict[str, Any]:
        return {"kind": self.kind, "path": self.path, **self._identity.as_state(),
                "offset": self._offset, "lineno": self._lineno, "column": self._column}

    def restore(self, state: dict[str, Any] | None) -> None:
        if not state:
            self._start(0, 0, None)
            return
        fd = self._f.fileno()
        try:
            offset, lineno = int_field(state, "offset"), int_field(state, "lineno")
            column = state.get("column")
            if column is not None:
                column = int_field(state, "column")
        except ValueError as exc:
            log.warning("feed %s: ignoring unusable checkpoint (%s)", self.name, exc)
            self._start(0, 0, None)
            return
        if FileIdentity.matches_state(fd, state) and os.fstat(fd).st_size >= offset:
            self._start(offset, lineno, column)
        else:
            log.info("feed %s: %s is not the file at the checkpoint; playing it from the start",
                     self.name, self.path)
            self._start(0, 0, None)

    def close(self) -> None:
        self._f.close()
