"""The SQLite store: schema and migrations, the one-daemon lock, batches and read helpers.

One file per network of stations, in WAL mode (readers never block the writer). Times
are integer Unix seconds UTC in column ``t``; levels are metres on the station datum.
Observations are keyed by (station, sensor, t), so reading the same line twice stores it
once; a line that repeats a stored time with a different value (a logger re-sending
another reading for the same minute) keeps the first value and is recorded in the reject
log as a conflict, with both values. A batch of observations, its rejected lines and the feed checkpoint that covers
them commit in one transaction: after a crash at any instant the store holds exactly
the lines up to some checkpoint, and the feed resumes from that checkpoint.

Tables are created through sqlite-utils; writes inside a batch use plain SQL in an
explicit ``BEGIN IMMEDIATE`` transaction (sqlite-utils' own helpers commit as they go).
"""
from __future__ import annotations

import contextlib
import fcntl
import functools
import itertools
import json
import logging
import math
import os
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ContextManager, Sequence

import numpy as np
import pandas as pd
import sqlite_utils

from alerts.transactions import transaction
from monitor.errors import StoreError
from monitor.store.migrations import (DERIVED_COLUMNS, HISTORY_BINS_KEY, HISTORY_BINS_VERSION, MIGRATIONS,
                                      SCHEMA_VERSION)
from monitor.surge.forecast import rebin_all, rebin_pressure, rebin_residual

log = logging.getLogger("monitor.store.database")

#: Aggregate QARTOD flags a sample may carry and still move anything (1 pass, 2 not
#: evaluated, 3 suspect); the same set as ``monitor.quality.checks.USABLE_FLAGS``.
USABLE_SQL = "flag IN (1, 2, 3)"


@dataclass(frozen=True)
class BatchResult:
    """What one batch did: lines read, observations stored, exact duplicates ignored,
    rejects, skipped, and conflicting repeats (same time, another value: the first kept)."""

    read: int
    stored: int
    duplicates: int
    rejected: int
    skipped: int = 0
    conflicts: int = 0

    def __add__(self, other: "BatchResult") -> "BatchResult":
        return BatchResult(self.read + other.read, self.stored + other.stored,
                           self.duplicates + other.duplicates, self.rejected + other.rejected,
                           self.skipped + other.skipped, self.conflicts + other.conflicts)


EMPTY_BATCH = BatchResult(0, 0, 0, 0, 0, 0)
#: ``rejects.kind`` of a conflicting repeat; unreadable lines have none.
CONFLICT = "conflict"
#: Two readings of one time closer than this are the same reading [m or hPa] (far below
#: any gauge's resolution; a re-read line parses to the very same number).
SAME_VALUE = 1e-6


def _as_arrays(rows: list[tuple]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows of (t, value, flag) as arrays: times [Unix s, int64], values, flags (int64)."""
    if not rows:
        return np.empty(0, np.int64), np.empty(0), np.empty(0, np.int64)
    t, value, flag = zip(*rows)
    return np.array(t, dtype=np.int64), np.array(value, dtype=float), np.array(flag, dtype=np.int64)


#: The columns of ``hw_forecasts`` a forecast fills, and the statement that stores one.
_FORECAST_KEYS = ("hw_t", "made_t", "predicted_high", "residual_now", "forecast", "lower", "upper", "coverage", "note")
_FORECAST_SQL = (f"INSERT OR REPLACE INTO hw_forecasts (station, {', '.join(_FORECAST_KEYS)}) "
                 f"VALUES ({', '.join('?' * (len(_FORECAST_KEYS) + 1))})")


class Store:
    """A quaywatch store. Open with :meth:`open`; use as a context manager to close it.

    Attributes
    ----------
    path : Path
        The SQLite file.
    conn : sqlite3.Connection
        Autocommit connection (explicit transactions through :meth:`transaction`).
    db : sqlite_utils.Database
        The same connection through sqlite-utils, for other packages' tables.
    """

    def __init__(self, path: Path, conn: sqlite3.Connection, lock_file: Any = None, real_path: Path | None = None):
        self.path = path
        self.real_path = real_path or path  # through any symbolic link: what further connections open
        self.conn = conn
        self.db = sqlite_utils.Database(conn)
        self._lock_file = lock_file

    # ------------------------------------------------------------------ open/close
    @classmethod
    def open(cls, path: str | Path, *, lock: bool = False, create: bool = True) -> "Store":
        """Open (or create) a store, migrating it to this program's schema.

        Parameters
        ----------
        path : Path
            SQLite file.
        lock : bool
            Take the one-daemon lock (``PATH.lock`` beside the file the path resolves to,
            through any symbolic link; fcntl.flock); a second holder is refused.
        create : bool
            When false, a missing file is a StoreError (for read-only verbs).

        Raises
        ------
        StoreError
            Missing file (``create=False``), not a SQLite file, a newer schema, or locked.
        """
        path = Path(path)
        if not create and not path.exists():
            raise StoreError(f"store {path} does not exist yet (run 'quaywatch run' or 'quaywatch ingest' first)")
        if create:
            try:
                path.parent.mkdir(parents=True, exist_ok=True)
            except OSError as exc:
                raise StoreError(f"store folder {path.parent}: cannot be created ({exc})") from None
        # The lock (and SQLite) go by the file's real path: a second name for the same file, a
        # symbolic link, must meet the same lock.
        real = path.resolve()
        lock_file = _take_lock(real, shown=path) if lock else None
        try:
            conn = sqlite3.connect(str(real), isolation_level=None, check_same_thread=False, timeout=30.0)
        except sqlite3.Error as exc:
            _release(lock_file)
            raise StoreError(f"store {path}: cannot be opened ({exc})") from None
        store = cls(path, conn, lock_file, real)
        try:
            conn.execute("PRAGMA busy_timeout = 30000")
            conn.execute("PRAGMA journal_mode = WAL")
            # NORMAL under WAL: a process crash loses nothing committed; see SQLite "WAL" docs.
            conn.execute("PRAGMA synchronous = NORMAL")
            store._migrate()
        except sqlite3.DatabaseError as exc:
            store.close()
            raise StoreError(f"store {path}: not a quaywatch store or damaged ({exc})") from None
        except StoreError:
            store.close()
            raise
        return store

    @property
    def locked(self) -> bool:
        """Whether this store holds the one-daemon lock."""
        return self._lock_file is not None

    def close(self) -> None:
        with contextlib.suppress(Exception):
            self.conn.close()
        _release(self._lock_file)
        self._lock_file = None

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _migrate(self) -> None:
        self.conn.execute("CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT)")
        version = int(self.get_meta("schema_version") or 0)
        if version > SCHEMA_VERSION:
            raise StoreError(
                f"store {self.path} has schema version {version}, newer than this quaywatch understands "
                f"(version {SCHEMA_VERSION}); upgrade quaywatch, or point store.path at another file")
        for v in range(version + 1, SCHEMA_VERSION + 1):
            if v == HISTORY_BINS_VERSION and version > 0:
                log.info("store %s: making the ten-minute means of the stored history (once; about a second "
                         "per station and three years)", self.path)
            with self.transaction():
                MIGRATIONS[v](self.db)
                self.set_meta("schema_version", str(v))
        if self.locked and self.get_meta(HISTORY_BINS_KEY) is None:
            # Upgraded by a program without the lock (any verb), a daemon of the version before
            # may have gone on writing rows without their means: made again, once.
            with self.transaction():
                if version >= HISTORY_BINS_VERSION:
                    log.info("store %s: making the ten-minute means of the stored history again (once: "
                             "another program upgraded the store)", self.path)
                    rebin_all(self.conn)
                self.set_meta(HISTORY_BINS_KEY, "1")

    def transaction(self) -> ContextManager[sqlite3.Connection]:
        """An immediate write transaction: commit on success, roll back on any exception
        (:func:`alerts.transactions.transaction`; nested, the outer transaction decides)."""
        return transaction(self.conn)

    # ------------------------------------------------------------------ meta
    def get_meta(self, key: str, default: str | None = None) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return row[0] if row else default

    def set_meta(self, key: str, value: str) -> None:
        self.conn.execute("INSERT INTO meta(key, value) VALUES (?, ?) "
                          "ON CONFLICT(key) DO UPDATE SET value = excluded.value", (key, str(value)))

    # ------------------------------------------------------------------ writing
    def write_batch(self, station: str, sensor: str, t: np.ndarray, value: np.ndarray,
                    time_source: np.ndarray | None = None, rejects: list | tuple = (), *,
                    feed: str | None = None, state: dict | None = None, skipped: int = 0,
                    now: float | None = None, lines: tuple | None = None) -> BatchResult:
        """Store parsed observations, their rejected lines and the feed checkpoint atomically.

        Parameters
        ----------
        station, sensor : str
            Keys of the observations.
        t : array of int
            Times [s, Unix UTC].
        value : array of float
            Levels [m, station datum] or pressure [hPa].
        time_source : array of str, optional
            'sensor' or 'receive' per row (default 'sensor').
        rejects : list of monitor.feeds.parse.Reject
            Lines that could not be read; kept with the feed name and reason.
        feed : str, optional
            Feed name; with ``state``, the checkpoint stored in the same transaction.
        state : dict, optional
            JSON-able feed state covering every line of this batch.
        lines : (linenos, texts), optional
            The line number and text of each row, recorded with a conflicting repeat.

        Returns
        -------
        BatchResult
            Existing (station, sensor, t) rows are left alone: a row with the same value
            counts as a duplicate, one with another value as a conflict, which is also
            recorded in the reject log (``kind = 'conflict'``, the time ``t``, the value
            ``kept`` and the ``value`` refused). Within a batch the first line wins.

        Notes
        -----
        A batch that stores rows also lowers the station's ``touched.STATION`` meta value
        to its earliest time, in the same transaction, so rows arriving late (older than
        what was processed already) are processed again (:meth:`take_touched`).
        """
        now = int(time.time() if now is None else now)
        n = len(t)
        # the keys repeated, not listed; the numbers as one list each
        rows = zip(itertools.repeat(station, n), itertools.repeat(sensor, n),
                   np.asarray(t, dtype=np.int64).tolist(), np.asarray(value, dtype=float).tolist(),
                   itertools.repeat("sensor", n) if time_source is None else list(time_source))
        rej_rows = [(feed, station, sensor, int(r.lineno) if r.lineno and r.lineno > 0 else None, r.text, r.reason, now)
                    for r in rejects]
        with self.transaction() as conn:
            before = conn.total_changes
            conn.executemany("INSERT OR IGNORE INTO observations (station, sensor, t, value, time_source) "
                             "VALUES (?, ?, ?, ?, ?)", rows)
            stored = conn.total_changes - before
            conflicts = []
            if stored < n:  # some times were there already (or twice in the batch)
                conflicts = self._conflicts(station, sensor, np.asarray(t, dtype=np.int64),
                                            np.asarray(value, dtype=float), lines, feed, now)
            if stored:
                conn.execute("INSERT INTO meta(key, value) VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET "
                             "value = min(CAST(value AS INTEGER), CAST(excluded.value AS INTEGER))",
                             (f"touched.{station}", str(int(np.min(t)))))
                if sensor == "barometer":  # the pressure's ten-minute means, with the rows they are made of
                    rebin_pressure(conn, station, int(np.min(t)), int(np.max(t)))
            if rej_rows:
                conn.executemany("INSERT INTO rejects (feed, station, sensor, lineno, text, reason, at) "
                                 "VALUES (?, ?, ?, ?, ?, ?, ?)", rej_rows)
            if conflicts:
                conn.executemany("INSERT INTO rejects (feed, station, sensor, lineno, text, reason, at, kind, t, "
                                 "kept, value) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", conflicts)
                log.warning("%s/%s: %d line(s) repeat a stored time with another value; the first value is "
                            "kept (see 'quaywatch status')", station, sensor, len(conflicts))
            if feed is not None and state is not None:
                self._put_checkpoint(feed, state, now)
        return BatchResult(n + len(rej_rows), stored, n - stored - len(conflicts), len(rej_rows), skipped,
                           len(conflicts))

    def _conflicts(self, station: str, sensor: str, t: np.ndarray, value: np.ndarray,
                   lines: tuple | None, feed: str | None, now: int) -> list[tuple]:
        """Reject-log rows for the batch rows whose time is stored with another value.

        Called after the batch's ``INSERT OR IGNORE``: the stored value of each time is then
        the first one (from before, or from earlier in the batch)."""
        uniq = np.unique(t)
        kept: dict[int, float] = {}
        step = 900  # bound variables per statement (SQLite's limit is 999 in old builds)
        for i in range(0, len(uniq), step):
            part = uniq[i:i + step].tolist()
            kept.update(self.conn.execute(
                f"SELECT t, value FROM observations WHERE station = ? AND sensor = ? AND t IN "
                f"({', '.join('?' * len(part))})", (station, sensor, *part)).fetchall())
        first = np.array([kept.get(int(x), np.nan) for x in t])
        differ = np.flatnonzero(~(np.abs(value - first) <= SAME_VALUE))
        # the first occurrence of a time in the batch is the row stored (or an exact duplicate)
        unit = "hPa" if sensor == "barometer" else "m"
        digits = 1 if unit == "hPa" else 3
        out = []
        for j in differ:
            lineno = text = None
            if lines is not None:
                lineno = int(lines[0][j]) if lines[0][j] is not None and lines[0][j] > 0 else None
                text = str(lines[1][j])[:500]
            when = pd.Timestamp(int(t[j]), unit="s", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ")
            reason = (f"conflicting repeat of {when}: {value[j]:.{digits}f} {unit} here, {first[j]:.{digits}f} "
                      f"{unit} stored first (the first value is kept)")
            out.append((feed, station, sensor, lineno, text, reason, now, CONFLICT, int(t[j]),
                        float(first[j]), float(value[j])))
        return out

    def take_touched(self, station: str) -> int | None:
        """The station's processing mark, lowered below the earliest time written since.

        Reads ``processed.STATION`` (the last data time processed [Unix s]) and
        ``touched.STATION`` (the earliest time a batch stored since it was last taken);
        in one transaction, lowers the mark to just before that time and clears it.
        Returns the mark (None: nothing processed yet).
        """
        key, tkey = f"processed.{station}", f"touched.{station}"
        with self.transaction():
            mark, touched = self.conn.execute("SELECT (SELECT value FROM meta WHERE key = ?), "
                                              "(SELECT value FROM meta WHERE key = ?)", (key, tkey)).fetchone()
            if touched is None:
                return None if mark is None else int(mark)
            self.conn.execute("DELETE FROM meta WHERE key = ?", (tkey,))
            if mark is None:
                return None
            mark = min(int(mark), int(touched) - 1)
            self.set_meta(key, str(mark))
            return mark

    def clear_touched(self, station: str, since: int) -> bool:
        """Clear ``touched.STATION`` when every time it records is at or after ``since``
        [Unix s]: the rows stored since it was last taken are then all in or past a window
        starting at ``since`` that sees them. One statement; a row stored earlier than
        ``since`` (late data landing after the mark was read) keeps it, so
        :meth:`take_touched` lowers the mark at the next pass. Returns whether it was
        cleared."""
        cur = self.conn.execute("DELETE FROM meta WHERE key = ? AND CAST(value AS INTEGER) >= ?",
                                (f"touched.{station}", int(since)))
        return cur.rowcount > 0

    def _put_checkpoint(self, feed: str, state: dict, now: int) -> None:
        self.conn.execute(
            "INSERT INTO feed_checkpoints (feed, state, updated_at) VALUES (?, ?, ?) "
            "ON CONFLICT(feed) DO UPDATE SET state = excluded.state, updated_at = excluded.updated_at",
            (feed, json.dumps(state, sort_keys=True), now))

    def write_derived(self, station: str, frame: pd.DataFrame) -> int:
        """Upsert derived rows (index: UTC times; columns from DERIVED_COLUMNS). Returns rows written."""
        if frame.empty:
            return 0
        return self.write_derived_rows(station, _to_unix(frame.index),
                                       {c: frame[c].to_numpy(dtype=float) for c in DERIVED_COLUMNS
                                        if c in frame.columns})

    def write_derived_rows(self, station: str, t: np.ndarray, columns: dict[str, np.ndarray]) -> int:
        """Upsert derived rows given as arrays: times ``t`` [Unix s] and columns of
        DERIVED_COLUMNS [m] (NaN stored as NULL), and with a ``smoothed`` column the
        ``residual_bins`` of their times, in the same transaction. Returns rows written."""
        if len(t) == 0:
            return 0
        cols = tuple(c for c in DERIVED_COLUMNS if c in columns)
        data = [np.asarray(columns[c], dtype=float).tolist() for c in cols]
        t = np.asarray(t, dtype=np.int64)
        rows = [(station, ti, *[v if math.isfinite(v) else None for v in values])
                for ti, *values in zip(t.tolist(), *data)]
        with self.transaction() as conn:
            conn.executemany(_derived_sql(cols), rows)
            if "smoothed" in cols:  # the residual's ten-minute means, with the rows they are made of
                smoothed = data[cols.index("smoothed")]
                rebin_residual(conn, station, int(t.min()), int(t.max()),
                               emptied=not all(map(math.isfinite, smoothed)))
        return len(rows)

    def write_skew_surges(self, station: str, frame: pd.DataFrame) -> int:
        """Upsert skew surges (columns hw_t, predicted_high, observed_high, observed_t, skew_surge)."""
        if frame.empty:
            return 0
        cols = ["hw_t", "predicted_high", "observed_high", "observed_t", "skew_surge"]
        rows = [(station, *r) for r in frame[cols].itertuples(index=False, name=None)]
        with self.transaction() as conn:
            conn.executemany("INSERT OR REPLACE INTO skew_surges (station, hw_t, predicted_high, observed_high, "
                             "observed_t, skew_surge) VALUES (?, ?, ?, ?, ?, ?)",
                             [(s, int(a), float(b), float(c), int(d), float(e)) for s, a, b, c, d, e in rows])
        return len(rows)

    def write_forecast(self, station: str, fc: dict) -> None:
        """Store the latest next-high-water forecast (one row per predicted high water)."""
        self.write_forecasts(station, [fc])

    def write_forecasts(self, station: str, fcs: list[dict]) -> None:
        """:meth:`write_forecast` of each forecast in turn, in one statement (a later forecast
        of the same high water replaces an earlier one).

        Parameters
        ----------
        station : str
        fcs : list of dict
            Forecasts as :meth:`monitor.surge.forecast.SurgeForecaster.forecast` makes them:
            ``hw_t``, ``made_t`` [Unix s], levels [m, station datum], ``coverage`` [1], notes.
        """
        if not fcs:
            return
        with self.transaction() as conn:
            conn.executemany(_FORECAST_SQL, [(station, *[fc.get(k) for k in _FORECAST_KEYS]) for fc in fcs])

    def add_fit(self, station: str, *, fitted_at: int, start: int, end: int, n: int, rms: float,
                variance_explained: float, constants: str, in_use: bool, robust: bool = True,
                note: str = "") -> int:
        """Keep a fit; with ``in_use`` it replaces the station's fit in use. Returns its id."""
        with self.transaction() as conn:
            if in_use:
                conn.execute("UPDATE fits SET in_use = 0 WHERE station = ?", (station,))
            cur = conn.execute(
                "INSERT INTO fits (station, fitted_at, start, end, n, rms, variance_explained, constants, "
                "in_use, robust, note) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (station, int(fitted_at), int(start), int(end), int(n), float(rms), float(variance_explained),
                 constants, int(bool(in_use)), int(bool(robust)), note))
            return int(cur.lastrowid)

    # ------------------------------------------------------------------ backup
    def backup(self, dest: str | Path) -> dict:
        """A consistent copy of the store at ``dest``, taken while a daemon may be writing.

        SQLite's online backup copies the whole database in one step, inside one read
        transaction: the copy is the store as of one commit (every batch with its feed
        checkpoint, or neither), while the daemon goes on writing (in WAL mode readers
        never block the writer). The copy is written beside ``dest`` under a temporary
        name, checked (``PRAGMA integrity_check``), made a self-contained file (rollback
        journal, no ``-wal``), fsynced and then renamed into place.

        Returns
        -------
        dict
            ``path``, ``bytes``, ``observations`` and ``checkpoint`` (the latest feed
            checkpoint time in the copy [Unix s], None without one).

        Raises
        ------
        StoreError
            ``dest`` exists, cannot be written, or the copy fails its integrity check.
        """
        dest = Path(dest)
        if dest.exists():
            raise StoreError(f"{dest}: already exists; a backup never overwrites a file (remove it, or name "
                            f"another file or a folder)")
        if dest.resolve() == self.path.resolve():
            raise StoreError(f"{dest}: is the store itself")
        tmp = dest.with_name(f".{dest.name}.partial-{os.getpid()}")
        try:
            target = sqlite3.connect(str(tmp), isolation_level=None)
        except sqlite3.Error as exc:
            raise StoreError(f"{dest}: cannot be created ({exc})") from None
        try:
            try:
                self.conn.backup(target)  # pages=-1: all of it in one step, one snapshot
                target.execute("PRAGMA journal_mode = DELETE")
                check = target.execute("PRAGMA integrity_check").fetchall()
                info = {"observations": target.execute("SELECT count(*) FROM observations").fetchone()[0],
                        "checkpoint": target.execute("SELECT max(updated_at) FROM feed_checkpoints").fetchone()[0]}
            finally:
                target.close()
            if check != [("ok",)]:
                raise StoreError(f"{dest}: the copy failed SQLite's integrity check ({check[0][0]}); the store "
                                f"may be damaged: keep it and earlier backups")
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            os.replace(tmp, dest)
            _fsync_dir(dest.resolve().parent)
        except (sqlite3.Error, OSError) as exc:
            raise StoreError(f"{dest}: backup failed ({exc})") from None
        finally:
            with contextlib.suppress(OSError):
                tmp.unlink()
        return {"path": dest, "bytes": dest.stat().st_size, **info}

    # ------------------------------------------------------------------ reading
    def checkpoint(self, feed: str) -> dict | None:
        row = self.conn.execute("SELECT state FROM feed_checkpoints WHERE feed = ?", (feed,)).fetchone()
        return json.loads(row[0]) if row else None

    def checkpoints(self) -> dict[str, tuple[dict, int]]:
        """Feed name -> (state, updated_at [s])."""
        return {f: (json.loads(s), u) for f, s, u in
                self.conn.execute("SELECT feed, state, updated_at FROM feed_checkpoints")}

    def observations(self, station: str, sensor: str = "primary", start_t: int | None = None,
                     end_t: int | None = None) -> pd.DataFrame:
        """Observations of one sensor between two times (inclusive).

        Returns
        -------
        DataFrame
            Index ``time`` (UTC DatetimeIndex); columns ``value`` [m or hPa], ``flag``
            (aggregate QARTOD), ``time_source``.
        """
        lo = -(2 ** 62) if start_t is None else int(start_t)
        hi = 2 ** 62 if end_t is None else int(end_t)
        cur = self.conn.execute(
            "SELECT t, value, flag, time_source FROM observations WHERE station = ? AND sensor = ? "
            "AND t BETWEEN ? AND ? ORDER BY t", (station, sensor, lo, hi))
        rows = cur.fetchall()
        t = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
        frame = pd.DataFrame({
            "value": np.fromiter((r[1] for r in rows), dtype=float, count=len(rows)),
            "flag": np.fromiter((2 if r[2] is None else r[2] for r in rows), dtype=np.int64, count=len(rows)),
            "time_source": [r[3] for r in rows],
        }, index=_from_unix(t))
        return frame

    def observation_chunks(self, station: str, sensor: str = "primary", start_t: int | None = None,
                           end_t: int | None = None, rows: int = 65536):
        """Observations of one sensor between two times (inclusive), in time order, a chunk at
        a time: memory holds one chunk whatever the span (a fit over decades reads this way).

        Parameters
        ----------
        rows : int
            Samples per chunk.

        Yields
        ------
        (t, value, flag) : tuple of numpy.ndarray
            Times [Unix s] (int64), values [m or hPa], aggregate QARTOD flags (2 where not
            evaluated yet).
        """
        lo = -(2 ** 62) if start_t is None else int(start_t)
        hi = 2 ** 62 if end_t is None else int(end_t)
        sql = ("SELECT t, value, coalesce(flag, 2) FROM observations WHERE station = ? AND sensor = ? "
               "AND t >= ? AND t <= ? ORDER BY t LIMIT ?")
        while True:
            page = self.conn.execute(sql, (station, sensor, lo, hi, int(rows))).fetchall()
            if not page:
                return
            t, value, flag = _as_arrays(page)
            yield t, value, flag
            if len(page) < rows:
                return
            lo = int(t[-1]) + 1  # keyset: (station, sensor, t) is the key

    def observation_span(self, station: str, sensor: str = "primary", start_t: int | None = None,
                         end_t: int | None = None, without: tuple = ()) -> tuple[int | None, int | None, int]:
        """First and last time [Unix s] (None without samples) and the number of a sensor's
        samples between two times (inclusive), leaving out those flagged ``without`` (e.g.
        ``(4, 9)``, failed and missing: what a fit leaves out; a sample not evaluated yet
        counts)."""
        lo = -(2 ** 62) if start_t is None else int(start_t)
        hi = 2 ** 62 if end_t is None else int(end_t)
        flags = tuple(int(f) for f in without)
        sql = ("SELECT min(t), max(t), count(*) FROM observations WHERE station = ? AND sensor = ? "
               "AND t >= ? AND t <= ?")
        if flags:
            sql += f" AND (flag IS NULL OR flag NOT IN ({', '.join('?' * len(flags))}))"
        row = self.conn.execute(sql, (station, sensor, lo, hi) + flags).fetchone()
        return row[0], row[1], int(row[2])

    def observation_arrays(self, station: str, sensor: str, start_t: int, end_t: int
                           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """:meth:`observations` as plain arrays, for the daemon's pass: times [Unix s, int64],
        values [m or hPa] and aggregate flags (2 where not evaluated yet), in time order."""
        rows = self.conn.execute(
            "SELECT t, value, coalesce(flag, 2) FROM observations WHERE station = ? AND sensor = ? "
            "AND t BETWEEN ? AND ? ORDER BY t", (station, sensor, int(start_t), int(end_t))).fetchall()
        return _as_arrays(rows)

    def observation_count(self, station: str | None = None, sensor: str | None = None) -> int:
        sql, args = "SELECT count(*) FROM observations WHERE 1", []
        if station is not None:
            sql, args = sql + " AND station = ?", args + [station]
        if sensor is not None:
            sql, args = sql + " AND sensor = ?", args + [sensor]
        return int(self.conn.execute(sql, args).fetchone()[0])

    def last_time(self, station: str, sensor: str = "primary", *, until: int | None = None,
                  usable: bool = False) -> int | None:
        """Time of a sensor's latest sample [Unix s], or None.

        Parameters
        ----------
        until : int, optional
            Only samples at or before this time [Unix s] (the clock plus its tolerance:
            a sample stamped in the future is no sign of life).
        usable : bool
            Only samples whose aggregate flag is 1, 2 or 3 (pass, not evaluated yet,
            suspect): a sample that failed quality control, or is missing, moves nothing.
        """
        sql, args = "SELECT t FROM observations WHERE station = ? AND sensor = ?", [station, sensor]
        if until is not None:
            sql, args = sql + " AND t <= ?", args + [int(until)]
        if usable:
            sql += f" AND {USABLE_SQL}"
        # ORDER BY ... LIMIT 1 walks the primary key backwards from ``until``
        row = self.conn.execute(sql + " ORDER BY t DESC LIMIT 1", args).fetchone()
        return None if row is None else int(row[0])

    def last_times(self, station: str, sensors: Sequence[str], *, until: int) -> dict[str, int | None]:
        """:meth:`last_time` of each sensor (``until``, not ``usable``) in one statement:
        sensor -> time of its latest sample at or before ``until`` [Unix s], or None (the
        first part of :meth:`pass_bounds`)."""
        return self.pass_bounds(station, sensors, until=until)[0]

    def pass_bounds(self, station: str, sensors: Sequence[str], *,
                    until: int) -> tuple[dict[str, int | None], int | None, int | None]:
        """What a pass starts from, in one statement: :meth:`last_times` of the sensors, the
        processing mark ``processed.STATION`` and ``touched.STATION`` (the earliest time a
        batch stored since it was last taken) [Unix s, None when absent]. Read only: the
        mark is lowered by :meth:`take_touched` and ``touched`` cleared by
        :meth:`clear_touched`."""
        one = "(SELECT t FROM observations WHERE station = ? AND sensor = ? AND t <= ? ORDER BY t DESC LIMIT 1)"
        meta = "(SELECT value FROM meta WHERE key = ?)"
        args = [x for sensor in sensors for x in (station, sensor, int(until))]
        row = self.conn.execute(f"SELECT {', '.join([one] * len(sensors) + [meta, meta])}",
                                args + [f"processed.{station}", f"touched.{station}"]).fetchone()
        last = {sensor: None if t is None else int(t) for sensor, t in zip(sensors, row)}
        mark, touched = row[len(sensors):]
        return last, None if mark is None else int(mark), None if touched is None else int(touched)

    def first_time(self, station: str, sensor: str = "primary", *, after: int | None = None,
                   until: int | None = None, usable: bool = False) -> int | None:
        """Time of a sensor's earliest sample [Unix s] (after ``after``, at or before ``until``,
        only usable ones: as :meth:`last_time`), or None."""
        sql, args = "SELECT t FROM observations WHERE station = ? AND sensor = ?", [station, sensor]
        if after is not None:
            sql, args = sql + " AND t > ?", args + [int(after)]
        if until is not None:
            sql, args = sql + " AND t <= ?", args + [int(until)]
        if usable:
            sql += f" AND {USABLE_SQL}"
        row = self.conn.execute(sql + " ORDER BY t LIMIT 1", args).fetchone()
        return None if row is None else int(row[0])

    def derived(self, station: str, start_t: int | None = None, end_t: int | None = None) -> pd.DataFrame:
        """Derived series (index UTC times; observed, predicted, residual, smoothed [m], barometric [m])."""
        lo = -(2 ** 62) if start_t is None else int(start_t)
        hi = 2 ** 62 if end_t is None else int(end_t)
        rows = self.conn.execute(
            f"SELECT t, {', '.join(DERIVED_COLUMNS)} FROM derived WHERE station = ? AND t BETWEEN ? AND ? "
            "ORDER BY t", (station, lo, hi)).fetchall()
        arr = np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=float).reshape(
            len(rows), len(DERIVED_COLUMNS) + 1)
        return pd.DataFrame(arr[:, 1:], columns=list(DERIVED_COLUMNS), index=_from_unix(arr[:, 0].astype(np.int64)))

    def derived_arrays(self, station: str, start_t: int, end_t: int) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """:meth:`derived` as plain arrays: times [Unix s, int64] and each of DERIVED_COLUMNS
        [m] (NaN where NULL), in time order."""
        rows = self.conn.execute(
            f"SELECT t, {', '.join(DERIVED_COLUMNS)} FROM derived WHERE station = ? AND t BETWEEN ? AND ? "
            "ORDER BY t", (station, int(start_t), int(end_t))).fetchall()
        a = np.array(rows, dtype=float).reshape(len(rows), len(DERIVED_COLUMNS) + 1)
        return a[:, 0].astype(np.int64), {c: a[:, k + 1] for k, c in enumerate(DERIVED_COLUMNS)}

    def latest_derived(self, station: str) -> dict | None:
        row = self.conn.execute(f"SELECT t, {', '.join(DERIVED_COLUMNS)} FROM derived WHERE station = ? "
                                "ORDER BY t DESC LIMIT 1", (station,)).fetchone()
        return dict(zip(("t", *DERIVED_COLUMNS), row)) if row else None

    def skew_surges(self, station: str, start_t: int | None = None, end_t: int | None = None) -> pd.DataFrame:
        lo = -(2 ** 62) if start_t is None else int(start_t)
        hi = 2 ** 62 if end_t is None else int(end_t)
        return pd.read_sql_query(
            "SELECT hw_t, predicted_high, observed_high, observed_t, skew_surge FROM skew_surges "
            "WHERE station = ? AND hw_t BETWEEN ? AND ? ORDER BY hw_t", self.conn, params=(station, lo, hi))

    def latest_forecast(self, station: str) -> dict | None:
        cur = self.conn.execute("SELECT * FROM hw_forecasts WHERE station = ? ORDER BY made_t DESC, hw_t DESC "
                                "LIMIT 1", (station,))
        row = cur.fetchone()
        return dict(zip([d[0] for d in cur.description], row)) if row else None

    def rejects(self, station: str | None = None, feed: str | None = None, limit: int = 100) -> pd.DataFrame:
        """The most recent entries of the reject log (id, feed, station, sensor, lineno, text,
        reason, at, kind, t, kept, value): unreadable lines, and conflicting repeats
        (``kind = 'conflict'``, with the time repeated, the value kept and the one refused)."""
        sql, args = ("SELECT id, feed, station, sensor, lineno, text, reason, at, kind, t, kept, value "
                     "FROM rejects WHERE 1"), []
        if station is not None:
            sql, args = sql + " AND station = ?", args + [station]
        if feed is not None:
            sql, args = sql + " AND feed = ?", args + [feed]
        return pd.read_sql_query(sql + " ORDER BY id DESC LIMIT ?", self.conn, params=(*args, int(limit)))

    def reject_counts(self, station: str | None = None, conflicts: bool = False) -> dict[str, int]:
        """Feed (or ingest source) -> number of unreadable lines (with ``conflicts``: of
        conflicting repeats instead)."""
        sql = "SELECT coalesce(feed, '-'), count(*) FROM rejects WHERE kind IS " + \
            ("?" if conflicts else "NULL")
        args: tuple = (CONFLICT,) if conflicts else ()
        if station is not None:
            sql, args = sql + " AND station = ?", args + (station,)
        return {f: int(n) for f, n in self.conn.execute(sql + " GROUP BY 1 ORDER BY 1", args)}

    def conflict_count(self, station: str, sensor: str | None = None, start_t: int | None = None,
                       end_t: int | None = None, by: str = "t") -> int:
        """Conflicting repeats of a station (one sensor), by the time they repeat (``by="t"``)
        or the time they were received (``by="at"``) between two times (inclusive)."""
        col = {"t": "t", "at": "at"}[by]
        sql, args = "SELECT count(*) FROM rejects WHERE kind = ? AND station = ?", [CONFLICT, station]
        if sensor is not None:
            sql, args = sql + " AND sensor = ?", args + [sensor]
        if start_t is not None:
            sql, args = sql + f" AND {col} >= ?", args + [int(start_t)]
        if end_t is not None:
            sql, args = sql + f" AND {col} <= ?", args + [int(end_t)]
        return int(self.conn.execute(sql, args).fetchone()[0])

    def fits(self, station: str) -> pd.DataFrame:
        """Every fit kept for a station, newest first (without the constants text)."""
        return pd.read_sql_query(
            "SELECT id, fitted_at, start, end, n, rms, variance_explained, in_use, robust, note FROM fits "
            "WHERE station = ? ORDER BY fitted_at DESC, id DESC", self.conn, params=(station,))

    def fit(self, fit_id: int) -> dict | None:
        cur = self.conn.execute("SELECT * FROM fits WHERE id = ?", (int(fit_id),))
        row = cur.fetchone()
        return dict(zip([d[0] for d in cur.description], row)) if row else None

    def fit_in_use(self, station: str) -> dict | None:
        """The fit in use for a station (all columns, constants as TOML text), or None."""
        cur = self.conn.execute("SELECT * FROM fits WHERE station = ? AND in_use = 1 ORDER BY id DESC LIMIT 1",
                                (station,))
        row = cur.fetchone()
        return dict(zip([d[0] for d in cur.description], row)) if row else None


# ---------------------------------------------------------------------- helpers

def check_store_path(path: str | Path, key: str = "store.path") -> None:
    """Refuse a store path that could not be created or written, creating nothing.

    The file, if there, must be a regular file we may write; otherwise its folder must
    exist and be writable, or the nearest folder above it that exists must be one where the
    missing folders can be made (none of them may be a file).

    Raises
    ------
    StoreError
        Naming ``key``, the path and what is wrong.
    """
    path = Path(path)
    if path.exists():
        if not path.is_file():
            raise StoreError(f"{key} {path}: is not a file (a folder or a device?); name a file for the store")
        if not os.access(path, os.R_OK | os.W_OK):
            raise StoreError(f"{key} {path}: cannot be written by this user")
        folder = path.resolve().parent
        if not os.access(folder, os.W_OK | os.X_OK):
            raise StoreError(f"{key} {path}: its folder {folder} is not writable (the lock file and "
                            f"SQLite's journal go beside the store)")
        return
    if path.is_symlink():
        raise StoreError(f"{key} {path}: a symbolic link to nothing ({os.readlink(path)})")
    check_folder(path.parent, key, shown=path)


def check_folder(folder: str | Path, key: str, shown: str | Path | None = None) -> None:
    """Refuse a folder that neither exists writable nor could be made, creating nothing.

    Raises
    ------
    StoreError
        Naming ``key``, the path (``shown``, default the folder) and what is wrong.
    """
    folder = Path(folder)
    shown = folder if shown is None else shown
    existing = folder
    while not existing.exists() and existing != existing.parent:
        if existing.is_symlink():  # a dangling link on the way
            raise StoreError(f"{key} {shown}: folder {existing} is a symbolic link to nothing")
        existing = existing.parent
    if not existing.is_dir():
        raise StoreError(f"{key} {shown}: folder {folder} cannot be created, {existing} is a file")
    if not os.access(existing, os.W_OK | os.X_OK):
        what = "nothing can be created in it" if existing == folder else \
            f"folder {folder} cannot be created in it"
        raise StoreError(f"{key} {shown}: {existing} is not writable by this user; {what}")


def _fsync_dir(folder: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _take_lock(real: Path, shown: Path | None = None):
    """Take the lock of the store whose resolved path is ``real`` (``shown`` in messages)."""
    path = shown or real
    lock_path = real.with_name(real.name + ".lock")
    try:
        fh = open(lock_path, "a+")
    except OSError as exc:
        raise StoreError(f"store {path}: cannot create lock file {lock_path} ({exc})") from None
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        fh.seek(0)
        holder = fh.read().strip() or "unknown"
        fh.close()
        raise StoreError(f"store {path} is in use by another quaywatch daemon (pid {holder}, lock {lock_path}); "
                        f"stop that one first, or point store.path at another file") from None
    fh.seek(0)
    fh.truncate()
    fh.write(f"{os.getpid()}\n")
    fh.flush()
    return fh


def _release(fh) -> None:
    if fh is None:
        return
    with contextlib.suppress(Exception):
        fh.seek(0)
        fh.truncate()
        fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
    with contextlib.suppress(Exception):
        fh.close()


@functools.lru_cache(maxsize=8)
def _derived_sql(cols: tuple[str, ...]) -> str:
    """The upsert of ``derived`` rows with these columns (made once per set of columns)."""
    sets = ", ".join(f"{c} = excluded.{c}" for c in cols)
    return (f"INSERT INTO derived (station, t, {', '.join(cols)}) VALUES ({', '.join('?' * (len(cols) + 2))}) "
            f"ON CONFLICT(station, t) DO UPDATE SET {sets}")


def _from_unix(t: np.ndarray) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(pd.to_datetime(np.asarray(t, dtype=np.int64), unit="s", utc=True), name="time")


def _to_unix(index: pd.Index) -> np.ndarray:
    idx = pd.DatetimeIndex(index)
    if idx.tz is None:
        idx = idx.tz_localize("UTC")
    return (idx.tz_convert("UTC").tz_localize(None).to_numpy(dtype="datetime64[ns]").view(np.int64)
            // 1_000_000_000)


to_unix = _to_unix
from_unix = _from_unix
