"""Read each file dropped into a folder once, in order of name.

Behaviour
---------
- Files are those matching ``pattern`` (a glob relative to the folder; ``**`` reaches into
  subfolders), taken in order of their relative name. Name dropped files so that this order
  is time order (``gauge-20240131T1200.csv``) and write them elsewhere and rename them in, or
  rely on ``settle``: a file modified less than ``settle`` seconds ago is left for later.
- Every line of a file is returned, its unterminated last line too (a dropped file is
  complete). Lines are numbered from 1 in each file.
- A file counts as done by its name, modification time and size: a file replaced by another
  under the same name (different time or size) is read again. Files no longer in the folder
  are forgotten, so the checkpoint stays as small as the folder.
- A large file is read over several polls; the checkpoint then also holds the file in
  progress (name, identity, byte offset, line number), and a restart resumes inside it.
- ``exhausted`` is True after a poll that found nothing left to read and nothing waiting to
  settle; new files dropped later are still picked up by later polls.
"""
from __future__ import annotations

import os
import time
from pathlib import Path
from typing import Any

from monitor.feeds.base import CHUNK_BYTES, Feed, RawLine, int_field, log
from monitor.feeds.filetail import FileCursor


class FolderFeed(Feed):
    """Drop-folder feed; see the module docstring.

    Parameters
    ----------
    name : str
        Feed name, for messages.
    folder : str
        The folder to watch.
    pattern : str
        Glob of the files to take, relative to the folder.
    settle : float
        Leave files modified less than this long ago [s].
    encoding : str
        ASCII-compatible text encoding of the files.
    chunk : int
        Most bytes read in one poll [bytes].
    """

    kind = "folder"

    def __init__(self, name: str, folder: str, pattern: str = "*", settle: float = 2.0,
                 encoding: str = "utf-8", chunk: int = CHUNK_BYTES):
        super().__init__(name)
        self.folder = os.fspath(folder)
        self.pattern = pattern
        self.settle = settle
        self.encoding = encoding
        self.chunk = chunk
        self._done: dict[str, tuple[int, int]] = {}
        self._cur: FileCursor | None = None
        self._cur_name: str | None = None
        self._resume_cur: dict[str, Any] | None = None
        self._exhausted = False

    @property
    def exhausted(self) -> bool:
        return self._exhausted

    def _listing(self) -> list[tuple[str, os.stat_result]]:
        root = Path(self.folder)
        if not root.is_dir():
            self._problem(f"folder {self.folder} does not exist")
            return []
        self._problem(None)
        found = []
        for p in root.glob(self.pattern):
            try:
                st = p.stat()
            except OSError:
                continue  # removed while we looked
            if p.is_file():
                found.append((p.relative_to(root).as_posix(), st))
        found.sort(key=lambda item: item[0])
        return found

    def _next_file(self, now: float) -> tuple[FileCursor, str] | None:
        """Open the next file to read, or None (and set ``exhausted`` when nothing waits)."""
        listing = self._listing()
        present = {name for name, _ in listing}
        self._done = {k: v for k, v in self._done.items() if k in present}
        if self._resume_cur is not None and self._resume_cur.get("name") not in present:
            self._resume_cur = None
        waiting = False
        for rel, st in listing:
            if self._done.get(rel) == (st.st_mtime_ns, st.st_size):
                continue
            if now - st.st_mtime < self.settle:
                waiting = True
                continue
            path = os.path.join(self.folder, rel)
            try:
                cur = FileCursor.open(path, self.encoding)
            except OSError:
                continue
            resume, self._resume_cur = self._resume_cur, None
            if resume is not None and resume.get("name") == rel:
                try:
                    if cur.resume(resume):
                        log.info("feed %s: resuming %s at line %d", self.name, rel, cur.lineno)
                except ValueError:
                    pass
            else:
                self._resume_cur = resume  # that file is not next (yet); keep the checkpoint
            return cur, rel
        self._exhausted = not waiting
        return None

    def poll(self) -> list[RawLine]:
        out: list[RawLine] = []
        received = time.time()
        budget = self.chunk
        while budget > 0:
            if self._cur is None:
                found = self._next_file(received)
                if found is None:
                    break
                self._cur, self._cur_name = found
                self._exhausted = False
            cur = self._cur
            try:
                got = cur.read(budget, received, out)
            except OSError as exc:
                self._problem(f"error reading {cur.path}: {exc.strerror or exc}")
                self._close_current()
                break
            budget -= got
            if got and budget <= 0:
                break  # more may follow; the next poll continues this file
            if got:
                continue  # a short read: check for more before calling it the end
            cur.finish(received, out)
            st = os.fstat(cur.fd)
            self._done[self._cur_name] = (st.st_mtime_ns, st.st_size)
            self._close_current()
        return out

    def _close_current(self) -> None:
        if self._cur is not None:
            self._cur.close()
        self._cur = None
        self._cur_name = None

    def state(self) -> dict[str, Any]:
        done = [[name, mtime, size] for name, (mtime, size) in sorted(self._done.items())]
        if self._cur is not None:
            current = {"name": self._cur_name, **self._cur.checkpoint()}
        else:
            current = self._resume_cur
        return {"kind": self.kind, "folder": self.folder, "done": done, "current": current}

    def restore(self, state: dict[str, Any] | None) -> None:
        self.close()
        self._done = {}
        self._resume_cur = None
        self._exhausted = False
        if not state:
            return
        try:
            for name, mtime, size in state.get("done") or []:
                if not isinstance(name, str):
                    raise ValueError(f"file name {name!r} is not text")
                self._done[name] = (int(mtime), int(size))
            current = state.get("current")
            if current:
                int_field(current, "offset"), int_field(current, "lineno")
                self._resume_cur = dict(current)
        except (TypeError, ValueError) as exc:
            log.warning("feed %s: ignoring unusable checkpoint (%s); every file in %s will be "
                        "read again", self.name, exc, self.folder)
            self._done = {}
            self._resume_cur = None

    def close(self) -> None:
        self._close_current()
