"""Read telemetry lines from a serial line (or any port pyserial can open by URL).

Behaviour
---------
- The port is opened with the configured speed and framing and read without blocking: each
  poll takes what the device has buffered and returns the complete lines in it.
- A line ends at CR, LF or CR LF; empty lines are skipped.
- When the port cannot be opened, or fails while open (a USB adapter unplugged, a pseudo
  terminal closed), it is closed and opened again after a back-off that starts at
  ``reopen_after`` seconds and doubles up to ``reopen_max``; the back-off starts afresh once
  data flows again. A partial line cut off by the failure is dropped (and counted).
- Lines from a serial line cannot be read twice, so the checkpoint holds only counters;
  with a capture folder, every complete line is appended to a daily raw capture file
  (:mod:`monitor.feeds.capture`), flushed and fsynced, before the poll hands it on, so the
  record can be rebuilt with ``quaywatch ingest``.
"""
from __future__ import annotations

import time
from typing import Any, Callable

import serial

from monitor.feeds.base import MAX_LINE_BYTES, Feed, RawLine, decode_line, int_field
from monitor.feeds.capture import RawCapture

#: Our parity names to pyserial's.
PARITIES = {
    "none": serial.PARITY_NONE,
    "even": serial.PARITY_EVEN,
    "odd": serial.PARITY_ODD,
    "mark": serial.PARITY_MARK,
    "space": serial.PARITY_SPACE,
}
#: Stop bits as written in the configuration to pyserial's.
STOPBITS = {1: serial.STOPBITS_ONE, 1.5: serial.STOPBITS_ONE_POINT_FIVE, 2: serial.STOPBITS_TWO}
#: Flow control names.
FLOWS = ("none", "xonxoff", "rtscts", "dsrdtr")

_READ_BYTES = 1 << 16
_COUNTERS = ("lines", "opens", "failures", "dropped_partial")


class SerialFeed(Feed):
    """Serial-line feed; see the module docstring.

    Parameters
    ----------
    name : str
        Feed name, for messages.
    port : str
        Device path (``/dev/ttyUSB0``) or pyserial URL (``socket://host:port``).
    baud : int
        Line speed [bit/s].
    bytesize : int
        Data bits per character (5 to 8).
    parity : str
        One of ``none``, ``even``, ``odd``, ``mark``, ``space``.
    stopbits : float
        1, 1.5 or 2.
    flow : str
        Flow control: ``none``, ``xonxoff``, ``rtscts`` or ``dsrdtr``.
    encoding : str
        ASCII-compatible text encoding.
    reopen_after, reopen_max : float
        First and longest wait before opening the port again after a failure [s].
    opener : callable, optional
        Replaces ``serial.serial_for_url`` (same arguments).
    capture_dir : path, optional
        Folder of this feed's raw capture files; None keeps none.
    """

    kind = "serial"

    def __init__(self, name: str, port: str, baud: int = 9600, bytesize: int = 8,
                 parity: str = "none", stopbits: float = 1, flow: str = "none",
                 encoding: str = "utf-8", reopen_after: float = 1.0, reopen_max: float = 60.0,
                 opener: Callable[..., Any] | None = None, capture_dir: str | None = None):
        super().__init__(name)
        self.capture = RawCapture(capture_dir, name, port) if capture_dir is not None else None
        self.port = port
        self.settings = dict(
            baudrate=baud,
            bytesize=bytesize,
            parity=PARITIES[parity],
            stopbits=STOPBITS[stopbits],
            xonxoff=flow == "xonxoff",
            rtscts=flow == "rtscts",
            dsrdtr=flow == "dsrdtr",
        )
        self.encoding = encoding
        self.reopen_after = reopen_after
        self.reopen_max = reopen_max
        self._opener = opener or serial.serial_for_url
        self._dev = None
        self._buf = b""
        self._delay = reopen_after
        self._next_open = 0.0  # time.monotonic() of the next attempt
        self.counters = dict.fromkeys(_COUNTERS, 0)

    @property
    def is_open(self) -> bool:
        """Whether the port is open now."""
        return self._dev is not None

    def _open(self) -> bool:
        now = time.monotonic()
        if now < self._next_open:
            return False
        try:
            self._dev = self._opener(self.port, timeout=0, write_timeout=0, **self.settings)
        except (serial.SerialException, OSError, ValueError) as exc:
            self._failed(f"cannot open {self.port}: {exc}")
            return False
        self.counters["opens"] += 1
        self._problem(None)
        return True

    def _failed(self, message: str) -> None:
        if self._dev is not None:
            try:
                self._dev.close()
            except (serial.SerialException, OSError):
                pass
            self._dev = None
        if self._buf:
            self.counters["dropped_partial"] += 1
            self._buf = b""
        self.counters["failures"] += 1
        self._problem(f"{message}; trying again in {self._delay:g} s")
        self._next_open = time.monotonic() + self._delay
        self._delay = min(self._delay * 2, self.reopen_max)

    def poll(self) -> list[RawLine]:
        if self._dev is None and not self._open():
            return []
        data = b""
        try:
            while len(data) < _READ_BYTES:
                piece = self._dev.read(_READ_BYTES)
                if not piece:
                    break
                data += piece
        except (serial.SerialException, OSError) as exc:
            self._failed(f"{self.port} failed: {exc}")
        if not data:
            return []
        self._delay = self.reopen_after  # data flows: the next failure starts a fresh back-off
        received = time.time()
        buf = (self._buf + data).replace(b"\r", b"\n")
        parts = buf.split(b"\n")
        self._buf = parts.pop()
        if len(self._buf) > MAX_LINE_BYTES:
            parts.append(self._buf)
            self._buf = b""
        if self._dev is None and self._buf:
            self.counters["dropped_partial"] += 1  # cut off by the failure above
            self._buf = b""
        parts = [p for p in parts if p]
        if self.capture is not None:
            self.capture.append(parts, received)  # before anything parses them
        out = [RawLine(decode_line(p, self.encoding), None, self.port, received) for p in parts]
        self.counters["lines"] += len(out)
        return out

    def state(self) -> dict[str, Any]:
        return {"kind": self.kind, "port": self.port, **self.counters}

    def restore(self, state: dict[str, Any] | None) -> None:
        for key in _COUNTERS:
            try:
                self.counters[key] = int_field(state or {}, key)
            except ValueError:
                self.counters[key] = 0

    def close(self) -> None:
        if self.capture is not None:
            self.capture.close()
        if self._dev is not None:
            try:
                self._dev.close()
            except (serial.SerialException, OSError):
                pass
            self._dev = None
