"""Raw capture files: what a serial line delivered, kept so the record can be read again.

A serial line cannot be re-read, so every complete line a serial feed reads is appended
to a capture file before the daemon parses it; with the capture files ``quaywatch
ingest`` rebuilds the station's record after the store is lost.

Format
------
One file per feed and UTC day of reception, ``CAPTURES/FEED/YYYY-MM-DD.capture``. The
first line is a header starting ``# quaywatch capture v1``; every further line is the time
the line was read (Unix seconds UTC, written so that it reads back to the very same
number) then a tab, then the bytes of the line exactly as received, without its line
end (the serial feed ends lines at CR, LF or CR LF). Each batch is flushed and fsynced
before its lines are handed on, so a line that reached the store is in its capture file.
"""
from __future__ import annotations

import itertools
import logging
import math
import numbers
import os
import time
from pathlib import Path
from typing import Iterator, Sequence

log = logging.getLogger("monitor.feeds")

MAGIC = b"# quaywatch capture v1"
SUFFIX = ".capture"


class RawCapture:
    """Appends a feed's lines to its daily capture files (see the module docstring).

    Parameters
    ----------
    folder : path
        The feed's capture folder (made when the first line arrives).
    feed : str
        Feed name, for the header.
    source : str
        Port or device, for the header.
    """

    def __init__(self, folder: str | os.PathLike, feed: str, source: str):
        self.folder = Path(folder)
        self.feed = feed
        self.source = source
        self._fh = None
        self._day: str | None = None
        self._error: str | None = None

    def append(self, lines: Sequence[bytes], received: float) -> None:
        """Append complete lines read at ``received`` [Unix s]; flushed and fsynced.

        A capture that cannot be written is logged (once per problem); the lines still go
        on to the store, which is the record that matters most now.
        """
        if not lines:
            return
        try:
            self._open_for(time.strftime("%Y-%m-%d", time.gmtime(received)))
            stamp = repr(float(received)).encode("ascii") + b"\t"
            self._fh.write(b"".join(stamp + line + b"\n" for line in lines))
            self._fh.flush()
            os.fsync(self._fh.fileno())
        except OSError as exc:
            message = f"cannot write capture file in {self.folder}: {exc.strerror or exc}"
            if message != self._error:
                log.error("feed %s: %s; its lines are still stored, but the store could not be rebuilt "
                          "from captures for this stretch", self.feed, message)
            self._error = message
            self.close()
            return
        if self._error is not None:
            log.info("feed %s: capture files written again", self.feed)
            self._error = None

    def _open_for(self, day: str) -> None:
        if self._fh is not None and day == self._day:
            return
        self.close()
        self.folder.mkdir(parents=True, exist_ok=True)
        path = self.folder / f"{day}{SUFFIX}"
        fh = open(path, "ab")
        if fh.tell() == 0:
            fh.write(MAGIC + f": feed {self.feed}, from {self.source}; each line: the time it was read "
                             f"[Unix s UTC], a tab, the line as received\n".encode("utf-8", "replace"))
            fh.flush()
            os.fsync(fh.fileno())
            _fsync_folder(self.folder)  # the new file's name survives a crash too
        self._fh, self._day = fh, day

    def close(self) -> None:
        if self._fh is not None:
            try:
                self._fh.close()
            except OSError:
                pass
            self._fh = None
            self._day = None


def _fsync_folder(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def is_capture(path: str | os.PathLike) -> bool:
    """Whether a file is a capture file (by its header)."""
    try:
        with open(path, "rb") as fh:
            return fh.read(len(MAGIC)) == MAGIC
    except OSError:
        return False


def read_capture(path: str | os.PathLike,
                 size: int | Iterator[int]) -> Iterator[tuple[list, list, list, list, int]]:
    """Records of a capture file in batches of up to ``size`` records (any integer, numpy's
    too), or of each size an iterator of sizes gives, in turn.

    Yields
    ------
    (raws, received, linenos, bad, position)
        The line bytes as received, when each was read [Unix s], their line numbers in the
        capture file, ``(lineno, text)`` of records that cannot be read (cut short by a
        crash, say), and the bytes read so far.
    """
    with open(path, "rb") as fh:
        header = fh.readline()
        if not header.startswith(MAGIC):
            raise ValueError(f"{path}: not a quaywatch capture file")
        raws: list[bytes] = []
        recv: list[float] = []
        linenos: list[int] = []
        bad: list[tuple[int, str]] = []
        lineno = 1
        sizes = itertools.repeat(int(size)) if isinstance(size, numbers.Integral) else iter(size)
        limit = next(sizes)
        for record in fh:
            lineno += 1
            if not record.endswith(b"\n"):  # the last record of a capture cut off mid-write
                bad.append((lineno, record.decode("utf-8", "backslashreplace")))
                continue
            stamp, tab, raw = record[:-1].partition(b"\t")
            try:
                received = float(stamp) if tab else float("nan")
            except ValueError:
                received = float("nan")
            if not math.isfinite(received):
                bad.append((lineno, record[:-1].decode("utf-8", "backslashreplace")))
                continue
            raws.append(raw)
            recv.append(received)
            linenos.append(lineno)
            if len(raws) >= limit:
                yield raws, recv, linenos, bad, fh.tell()
                raws, recv, linenos, bad = [], [], [], []
                limit = next(sizes)
        if raws or bad:
            yield raws, recv, linenos, bad, fh.tell()
