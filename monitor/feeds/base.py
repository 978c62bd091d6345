"""What every feed shares: the raw line, the feed interface, line splitting and file identity.

A feed hands out *complete* lines of telemetry as :class:`RawLine` records and can say, as a
small JSON-able dict, exactly how far it has got, so that the daemon can store that checkpoint
in the same transaction as the observations parsed from those lines.
"""
from __future__ import annotations

import abc
import hashlib
import logging
import os
from dataclasses import dataclass
from typing import Any, Iterator

log = logging.getLogger("monitor.feeds")

#: Bytes at the start of a file that, with device and inode, identify it across restarts.
HEAD_BYTES = 128
#: Most bytes one poll reads from a file, so that a poll never blocks for long.
CHUNK_BYTES = 4 << 20
#: A "line" longer than this without a newline is handed out as it is (the parser will
#: reject it) rather than held in memory without bound.
MAX_LINE_BYTES = 1 << 20

#: The first batch of a backfill [lines]: small, so that the first rows of a big file are
#: stored (and visible to other readers of the store) within a fraction of a second...
FIRST_BATCH_LINES = 2_000
#: ... and each batch after it this many times the one before, up to the most per batch.
BATCH_GROWTH = 2

_UTF8_BOM = b"\xef\xbb\xbf"


def batch_sizes(most: int, first: int = FIRST_BATCH_LINES, growth: int = BATCH_GROWTH) -> Iterator[int]:
    """Lines of each batch of a backfill, without end: ``first``, then ``growth`` times the
    one before, never more than ``most`` [lines]. A big file's first rows need not wait for
    a whole batch of ``most`` lines to be parsed and stored; the per-batch cost (one
    transaction, one checkpoint) is paid only a few more times."""
    size = max(1, min(first, most))
    while True:
        yield size
        size = min(most, size * growth)


@dataclass(slots=True)
class RawLine:
    """One complete line of telemetry, before parsing (treat as read-only).

    Attributes
    ----------
    text : str
        The line without its line ending, decoded with ``errors="replace"`` (undecodable bytes
        become U+FFFD and are left for the parser to reject).
    lineno : int or None
        Line number in ``source``, counting from 1; None where lines have no stable number
        (a serial line).
    source : str
        The file path or serial port the line came from.
    received : float
        When the feed read it [unix s].
    """

    text: str
    lineno: int | None
    source: str
    received: float


class Feed(abc.ABC):
    """A source of telemetry lines, polled by the daemon.

    Subclasses implement :meth:`poll`, :meth:`state`, :meth:`restore` and :meth:`close`.
    ``last_error`` holds a one-line description of the latest problem (file missing, device
    gone), or None while all is well; feeds never raise from :meth:`poll` for such problems.
    """

    kind: str = "?"

    def __init__(self, name: str):
        self.name = name
        self.last_error: str | None = None

    @abc.abstractmethod
    def poll(self) -> list[RawLine]:
        """Complete lines that arrived since the last poll; returns quickly, may be empty."""

    @abc.abstractmethod
    def state(self) -> dict[str, Any]:
        """A JSON-able checkpoint covering exactly the lines returned so far."""

    @abc.abstractmethod
    def restore(self, state: dict[str, Any] | None) -> None:
        """Resume from a checkpoint made by :meth:`state` (None or {} means from the start)."""

    @abc.abstractmethod
    def close(self) -> None:
        """Release files and devices; safe to call twice."""

    @property
    def exhausted(self) -> bool:
        """True when the feed has nothing more to give (a finished replay or drop folder)."""
        return False

    def _problem(self, message: str | None) -> None:
        # Log a problem once when it starts, not on every poll while it lasts.
        if message is not None and message != self.last_error:
            log.warning("feed %s: %s", self.name, message)
        elif message is None and self.last_error is not None:
            log.info("feed %s: recovered", self.name)
        self.last_error = message

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"


def decode_line(raw: bytes, encoding: str, *, first: bool = False) -> str:
    """Bytes of one line (without ``\\n``) to text.

    A trailing carriage return is dropped (lines ending in CR LF), and on the first line of a
    file a UTF-8 byte order mark, which spreadsheet exports put there, is dropped too.
    """
    if raw.endswith(b"\r"):
        raw = raw[:-1]
    if first and raw.startswith(_UTF8_BOM) and encoding.replace("_", "-").lower() in (
        "utf-8", "utf8", "utf-8-sig",
    ):
        raw = raw[len(_UTF8_BOM):]
    return raw.decode(encoding, errors="replace")


def decode_block(body: bytes, encoding: str, *, first: bool = False) -> list[str]:
    """Bytes of several whole lines (joined by ``\\n``, without the last ``\\n``) to texts.

    The same as :func:`decode_line` on each line, decoded in one go because that is several
    times faster; a line end is never part of a multi-byte character in an ASCII-compatible
    encoding, so the replacement of undecodable bytes does not depend on the split.
    """
    text = body.decode(encoding, errors="replace")
    if first and text.startswith("\ufeff") and body.startswith(_UTF8_BOM):
        text = text[1:]
    lines = text.split("\n")
    if "\r" in text:
        lines = [line[:-1] if line.endswith("\r") else line for line in lines]
    return lines


@dataclass
class FileIdentity:
    """Device, inode and the first bytes of a file: enough to know it again after a restart.

    The head guards against an inode number being reused by a new file after the old one was
    deleted, which tmpfs and ext4 both do readily.
    """

    dev: int
    ino: int
    head: bytes

    @classmethod
    def of_fd(cls, fd: int) -> "FileIdentity":
        st = os.fstat(fd)
        return cls(st.st_dev, st.st_ino, os.pread(fd, HEAD_BYTES, 0))

    def as_state(self) -> dict[str, Any]:
        return {
            "dev": self.dev,
            "ino": self.ino,
            "head_len": len(self.head),
            "head_sha1": hashlib.sha1(self.head).hexdigest(),
        }

    @staticmethod
    def matches_state(fd: int, state: dict[str, Any]) -> bool:
        """Whether the open file ``fd`` is the file a checkpoint ``state`` describes."""
        try:
            st = os.fstat(fd)
            if (st.st_dev, st.st_ino) != (int(state["dev"]), int(state["ino"])):
                return False
            n = int(state["head_len"])
            head = os.pread(fd, n, 0)
            return len(head) == n and hashlib.sha1(head).hexdigest() == state["head_sha1"]
        except (KeyError, TypeError, ValueError, OSError):
            return False

    def still_same(self, fd: int) -> bool:
        """Whether the first bytes of ``fd`` are unchanged; extends the head as the file grows."""
        n = len(self.head)
        if n and os.pread(fd, n, 0) != self.head:
            return False
        if n < HEAD_BYTES:
            self.head = os.pread(fd, HEAD_BYTES, 0)
        return True


def int_field(state: dict[str, Any], key: str, default: int = 0) -> int:
    """An integer from a checkpoint, tolerating its absence."""
    value = state.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise ValueError(f"checkpoint field {key!r} is not a non-negative integer: {value!r}")
    return value
