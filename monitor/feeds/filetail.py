"""Follow a growing text file by name, the way ``tail`` does with its retry-by-name mode.

Behaviour
---------
- The file need not exist yet; the feed waits for it.
- Only complete lines (ending in ``\\n``) are returned; an unterminated last line waits until
  the writer completes it. Lines are numbered from 1 in each file.
- Rotation (the file renamed away and a new one created under the name): the old file is read
  to its end first, and once it has stopped growing its unterminated last line, if any, is
  taken as complete; then the new file is followed from its start.
- Truncation (the file shrinks below the position read, or its first bytes change): reading
  starts again at byte 0.
- Bytes that do not decode are replaced (U+FFFD) and left for the parser to reject.
- A backlog (the daemon started on a big file, or a burst after an outage) is read in
  polls that grow from ``FIRST_READ_BYTES`` to ``chunk``, doubling while each poll fills
  its budget, so the first lines of a backlog are stored within a poll's small batch,
  not after a whole chunk's; a poll that finds less than its budget starts the ramp again.

The checkpoint (:meth:`FileFeed.state`) holds the identity of the file being read (device,
inode, a hash of its first bytes), the byte offset just past the last line returned, and its
line number. After a restart, if the name now points to a different file, the feed looks in the
same directory for the file it was reading (rotated under another name) and finishes that
first; if it cannot be found, the new file is read from its start.
"""
from __future__ import annotations

import os
import stat
import time
from typing import Any

from monitor.feeds.base import (
    CHUNK_BYTES,
    MAX_LINE_BYTES,
    Feed,
    FileIdentity,
    RawLine,
    decode_block,
    int_field,
    log,
)


#: The first poll of a backlog reads at most this [bytes] (about 2,000 one-minute lines).
FIRST_READ_BYTES = 64 << 10


class FileCursor:
    """An open file with a read position, the pending partial line and a line count.

    ``offset`` is the byte just past the last complete line handed out; ``pos`` is how far
    the file has been read (``offset`` plus the pending bytes).
    """

    def __init__(self, path: str, fd: int, encoding: str):
        self.path = path
        self.fd = fd
        self.encoding = encoding
        self.identity = FileIdentity.of_fd(fd)
        self.offset = 0
        self.pos = 0
        self.pending = b""
        self.lineno = 0

    @classmethod
    def open(cls, path: str, encoding: str) -> "FileCursor":
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_CLOEXEC", 0))
        try:
            if not stat.S_ISREG(os.fstat(fd).st_mode):
                raise IsADirectoryError(f"{path} is not a regular file")
            return cls(path, fd, encoding)
        except BaseException:
            os.close(fd)
            raise

    def seek(self, offset: int, lineno: int) -> None:
        self.offset = self.pos = offset
        self.lineno = lineno
        self.pending = b""

    def check_reset(self) -> bool:
        """Start again at 0 if the file was truncated or rewritten; True if it was."""
        size = os.fstat(self.fd).st_size
        if size < self.pos or not self.identity.still_same(self.fd):
            self.identity = FileIdentity.of_fd(self.fd)
            self.seek(0, 0)
            return True
        return False

    def read(self, budget: int, received: float, out: list[RawLine]) -> int:
        """Read up to ``budget`` [bytes], append the complete lines to ``out`` stamped ``received``
        [Unix s, UTC]; returns the bytes read."""
        data = os.pread(self.fd, budget, self.pos)
        if not data:
            return 0
        self.pos += len(data)
        buf = self.pending + data if self.pending else data
        cut = buf.rfind(b"\n")
        if cut >= 0:
            self.emit_block(buf[:cut], received, out)
            self.offset += cut + 1
            self.pending = buf[cut + 1:]
        else:
            self.pending = buf
        if len(self.pending) > MAX_LINE_BYTES:
            self.finish(received, out)
        return len(data)

    def emit_block(self, body: bytes, received: float, out: list[RawLine]) -> None:
        """Hand out the whole lines in ``body``, which starts at ``offset`` [bytes], stamped
        ``received`` [Unix s, UTC]."""
        texts = decode_block(body, self.encoding, first=self.offset == 0)
        n, path = self.lineno, self.path
        out.extend([RawLine(text, n + i, path, received) for i, text in enumerate(texts, 1)])
        self.lineno = n + len(texts)

    def finish(self, received: float, out: list[RawLine]) -> None:
        """Take the pending unterminated bytes as a complete last line, stamped ``received`` [Unix s, UTC]."""
        if self.pending:
            self.emit_block(self.pending, received, out)
            self.offset += len(self.pending)
            self.pending = b""

    def checkpoint(self) -> dict[str, Any]:
        return {**self.identity.as_state(), "file": self.path, "offset": self.offset,
                "lineno": self.lineno}

    def resume(self, state: dict[str, Any]) -> bool:
        """Move to a checkpoint if it describes this file; False if it does not."""
        if not FileIdentity.matches_state(self.fd, state):
            return False
        offset, lineno = int_field(state, "offset"), int_field(state, "lineno")
        if os.fstat(self.fd).st_size < offset:
            return False  # truncated while we were away
        self.seek(offset, lineno)
        return True

    def close(self) -> None:
        if self.fd >= 0:
            os.close(self.fd)
            self.fd = -1


class FileFeed(Feed):
    """Follow the file at ``path``; see the module docstring for the behaviour.

    Parameters
    ----------
    name : str
        Feed name, for messages.
    path : str
        The file to follow, by name.
    encoding : str
        ASCII-compatible text encoding of the file.
    chunk : int
        Most bytes read in one poll [bytes].
    """

    kind = "file"

    def __init__(self, name: str, path: str, encoding: str = "utf-8",
                 chunk: int = CHUNK_BYTES):
        super().__init__(name)
        self.path = os.fspath(path)
        self.encoding = encoding
        self.chunk = chunk
        self._budget = min(FIRST_READ_BYTES, chunk)  # this poll's, growing through a backlog
        self._cur: FileCursor | None = None
        self._resume: dict[str, Any] | None = None

    # -- opening ---------------------------------------------------------------------------
    def _open_name(self) -> FileCursor | None:
        try:
            cur = FileCursor.open(self.path, self.encoding)
        except FileNotFoundError:
            self._problem(f"waiting for {self.path} to appear")
            return None
        except OSError as exc:
            self._problem(f"cannot read {self.path}: {exc.strerror or exc}")
            return None
        self._problem(None)
        state, self._resume = self._resume, None
        if state is None or cur.resume(state):
            return cur
        # The name points elsewhere now: finish the file we were reading if it was only renamed.
        old = self._find_renamed(state)
        if old is not None:
            cur.close()
            return old
        log.info("feed %s: %s is a different file than at the checkpoint; reading it from "
                 "the start", self.name, self.path)
        return cur

    def _find_renamed(self, state: dict[str, Any]) -> FileCursor | None:
        folder = os.path.dirname(os.path.abspath(self.path))
        try:
            entries = list(os.scandir(folder))
        except OSError:
            return None
        for entry in entries:
            try:
                st = entry.stat(follow_symlinks=False)
                if (st.st_dev, st.st_ino) != (state.get("dev"), state.get("ino")):
                    continue
                cur = FileCursor.open(entry.path, self.encoding)
            except OSError:
                continue
            try:
                if cur.resume(state):
                    log.info("feed %s: finishing rotated file %s", self.name, entry.path)
                    return cur
            except ValueError:
                pass
            cur.close()
        return None

    def _name_moved_on(self, cur: FileCursor) -> bool:
        try:
            st = os.stat(self.path)
        except OSError:
            return False  # gone without a successor yet: keep the file we have
        return (st.st_dev, st.st_ino) != (cur.identity.dev, cur.identity.ino)

    # -- the Feed interface ------------------------------------------------------------------
    def poll(self) -> list[RawLine]:
        out: list[RawLine] = []
        received = time.time()
        budget = self._budget
        while budget > 0:
            if self._cur is None:
                self._cur = self._open_name()
                if self._cur is None:
                    break
            cur = self._cur
            try:
                if cur.check_reset():
                    log.warning("feed %s: %s was truncated or rewritten; reading it again "
                                "from the start", self.name, cur.path)
                want = budget
                got = cur.read(want, received, out)
            except OSError as exc:
                self._problem(f"error reading {cur.path}: {exc.strerror or exc}")
                cur.close()
                self._cur = None
                self._resume = None
                break
            budget -= got
            if got == want or not self._name_moved_on(cur):
                break
            if got:
                break  # the old file was still growing: finish it on a later poll
            cur.finish(received, out)
            cur.close()
            self._cur = None  # and go round to open the new file under the name
        self._grow(filled=budget <= 0)
        return out

    def _grow(self, filled: bool) -> None:
        """Double the next poll's budget after a poll that filled it (up to ``chunk``); back
        to ``FIRST_READ_BYTES`` after one that did not (the backlog is read)."""
        first = min(FIRST_READ_BYTES, self.chunk)
        self._budget = min(self.chunk, self._budget * 2) if filled else first

    def state(self) -> dict[str, Any]:
        if self._cur is not None:
            return {"kind": self.kind, "path": self.path, **self._cur.checkpoint()}
        if self._resume is not None:
            return dict(self._resume)
        return {"kind": self.kind, "path": self.path, "offset": 0, "lineno": 0}

    def restore(self, state: dict[str, Any] | None) -> None:
        self.close()
        self._resume = None
        if not state or "dev" not in state:
            return
        try:
            int_field(state, "offset"), int_field(state, "lineno")
        except ValueError as exc:
            log.warning("feed %s: ignoring unusable checkpoint (%s); reading from the start",
                        self.name, exc)
            return
        self._resume = dict(state)

    def close(self) -> None:
        if self._cur is not None:
            self._cur.close()
            self._cur = None
