"""What a station's hourly drift and clock diagnostics keep between runs.

The daemon runs the diagnostics once every ``daemon.diagnostics_minutes`` of data time
per station, over a week (the clock) and a month (the drift) of one-minute record. Made
from scratch each time, a run reads that whole record and recomputes every window and
bin; :class:`DiagnosticsMemory` keeps what the last run read and made, so the next run
reads the rows that are new or may have changed and recomputes only what they touch:

- the level sensors' usable rows over the clock window (:class:`HeldRows`, 12 bytes a
  row): rows newer than the last run are read, and again every row from the earliest
  time that may have changed since (see below);
- :func:`monitor.quality.diagnostics.sensor_timing`'s windows
  (:class:`monitor.quality.diagnostics.TimingWindows`, keyed by a digest of each
  window's samples, so a window whose samples changed is recomputed whatever the
  bookkeeping says);
- :func:`monitor.quality.diagnostics.sensor_drift`'s bins
  (:func:`monitor.quality.diagnostics.drift_bins`, on a fixed grid in absolute time):
  the bins older than the earliest change are kept; the first bins (which the window's
  start cuts) and those from the earliest change on are made again from their rows.

Which rows may have changed: the daemon calls :meth:`DiagnosticsMemory.note_changed` at
the start of every processing window with the earliest time quality control may write a
flag in it (the window's start less ``qc.resid_window``). A window starts no later than
the earliest row stored since the last pass (late rows and rows stored by another
process lower the processing mark, :meth:`monitor.store.database.Store.take_touched`),
so that time bounds every row stored or re-flagged by the daemon. Flags written by
anyone else (a technician's override, ``quaywatch qc``) raise the store's ``qc.edits``
meta value or add ``qc_overrides`` rows: when either differs from the last run, or the
store connection is another, everything is read again. Without the store's ``meta`` or
``qc_overrides`` table nothing is trusted and every run reads everything.

What a run gives equals a run from scratch on the same store
(``tests/test_diag_memory.py``). The output is an automated, unofficial aid: official
warnings and local emergency authorities come first.
"""
from __future__ import annotations

import math
import sqlite3
from typing import Any

import numpy as np
import pandas as pd

from monitor.quality import diagnostics
from monitor.quality.checks import NOT_EVALUATED, USABLE_FLAGS
from monitor.quality.records import edits_mark


class HeldRows:
    """One sensor's usable rows (flag 1, 2 or 3, a value) in ``[lo, hi]`` [Unix s] as the
    store held them at the last run: times as 32-bit offsets from ``lo`` [s] and values [m]
    (12 bytes a row). Rows that are not usable need not be held: rows older than the
    earliest change keep their flags, and every newer row is read again.

    Parameters
    ----------
    lo, hi : int
        The span the rows were read over [Unix s].
    t : array of int64
        Times of the usable rows [Unix s], sorted, within ``[lo, hi]``.
    v : array of float
        Their values [m].
    """

    def __init__(self, lo: int, hi: int, t: np.ndarray, v: np.ndarray):
        self.lo, self.hi = int(lo), int(hi)
        self.dt = (t - self.lo).astype(np.int32)
        self.v = v

    def between(self, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
        """Times [Unix s, int64] and values [m] of the rows held in ``[lo, hi]`` [Unix s]."""
        i = self.dt.searchsorted(max(lo - self.lo, -1), side="left")
        j = self.dt.searchsorted(min(hi - self.lo, 2 ** 31 - 1), side="right")
        return self.dt[i:j].astype(np.int64) + self.lo, self.v[i:j]


def usable_series(t: np.ndarray, v: np.ndarray) -> pd.Series:
    """Usable samples (times [Unix s], levels [m]) as a Series [m] on a UTC DatetimeIndex, as
    :func:`monitor.quality.diagnostics.usable_only` gives them from the store's frame."""
    idx = pd.DatetimeIndex(pd.to_datetime(t, unit="s", utc=True), name="time")
    return pd.Series(v, index=idx, name="value")


def _usable(rows: tuple[np.ndarray, np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The usable rows (flag 1, 2 or 3, a value) of the store's (times, values, flags)."""
    t, v, f = rows
    m = np.isin(f, USABLE_FLAGS) & np.isfinite(v)
    return t[m], v[m]


def _edits(conn: Any) -> tuple | None:
    """What says that flags were changed by another writer (as the QC context reads it,
    :func:`monitor.quality.records.edits_mark`), or None when the store cannot say."""
    try:
        return edits_mark(conn)
    except sqlite3.Error:
        return None


#: The usable samples (flag 1, 2 or 3; not evaluated yet when NULL) in SQL.
_USABLE_SQL = f"coalesce(flag, {NOT_EVALUATED}) IN ({', '.join(str(f) for f in USABLE_FLAGS)})"


class DiagnosticsMemory:
    """A station's diagnostics state between hourly runs (see the module's notes).

    Attributes
    ----------
    timing : TimingWindows
        The backup's timing windows.
    rows_read : int
        Rows read from the store by the last run (all sensors).
    drift_computed : int
        Drift bins made by the last run (the others were kept).
    """

    def __init__(self) -> None:
        self.timing = diagnostics.TimingWindows()
        self.forget()

    def forget(self) -> None:
        """Drop everything held: the next run reads and computes everything."""
        self.held: dict[str, HeldRows] = {}
        self.hi: int | None = None
        self.changed_from = math.inf
        self.edits: tuple | None = None
        self.conn: Any = None
        self.bins: pd.DataFrame | None = None   # drift bins kept, by bin number
        self.bins_span: tuple[int, int] = (0, -1)  # bin numbers made, first and last
        self.width: float | None = None         # their width [s]
        self.bins_key: tuple | None = None
        self.rows_read = 0
        self.drift_computed = 0

    def note_changed(self, t: float) -> None:
        """Rows from ``t`` [Unix s] on may have been stored or re-flagged since the last run."""
        self.changed_from = min(self.changed_from, math.floor(t))

    # ------------------------------------------------------------------ a run
    def begin(self, store: Any, end_t: int) -> float:
        """Start a run ending at ``end_t``.

        Parameters
        ----------
        store : Store
            The store the run reads (its connection and ``qc.edits`` are compared with the
            last run's).
        end_t : int
            End of the run's spans [Unix s].

        Returns
        -------
        float
            The time [Unix s] before which the rows held are still as the store holds them
            (``-inf``: nothing held can be trusted).
        """
        conn = store.conn
        edits = _edits(conn)
        trusted = edits is not None and edits == self.edits and conn is self.conn and self.hi is not None
        since = min(self.changed_from, self.hi + 1, end_t + 1) if trusted else -math.inf
        self.edits, self.conn, self.changed_from = edits, conn, math.inf
        self.rows_read = self.drift_computed = 0
        self.hi = int(end_t)
        return since

    def rows(self, store: Any, station: str, sensor: str, lo: int, hi: int, since: float
             ) -> tuple[np.ndarray, np.ndarray]:
        """A sensor's usable rows in ``[lo, hi]``, the same as the store holds, held for the
        next run.

        Parameters
        ----------
        store : Store
            Where rows are read.
        station, sensor : str
            Whose rows.
        lo, hi : int
            The span [Unix s], both ends included.
        since : float
            From :meth:`begin`: rows from this time [Unix s] on are read again; all are when
            the rows held do not reach back to ``lo``.

        Returns
        -------
        (t, v) : tuple of ndarray
            Times [Unix s, int64] and levels [m] of the samples flagged 1, 2 or 3 (or not
            yet) with a value, in time order.
        """
        held = self.held.get(sensor)
        if held is None or lo < held.lo or since <= lo:
            read = store.observation_arrays(station, sensor, lo, hi)
            self.rows_read += len(read[0])
            t, v = _usable(read)
        else:
            keep_to = int(min(since - 1, held.hi, hi))
            kt, kv = held.between(lo, keep_to)
            read = store.observation_arrays(station, sensor, keep_to + 1, hi)
            self.rows_read += len(read[0])
            nt, nv = _usable(read)
            t, v = np.concatenate([kt, nt]), np.concatenate([kv, nv])
        self.held[sensor] = HeldRows(lo, hi, t, v)
        return t, v

    def _between(self, store: Any, station: str, sensor: str, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray]:
        """Usable rows in ``[lo, hi]`` from those held this run where they reach, else from the store."""
        held = self.held.get(sensor)
        if held is not None and held.lo <= lo and hi <= held.hi:
            return held.between(lo, hi)
        read = store.observation_arrays(station, sensor, lo, hi)
        self.rows_read += len(read[0])
        return _usable(read)

    def drift(self, store: Any, station: str, lo: int, hi: int, since: float, *, gap_limit: float,
              bin_seconds: float = 3600.0, max_bins: int = diagnostics.DRIFT_MAX_BINS,
              confidence: float = 0.95) -> dict | None:
        """:func:`monitor.quality.diagnostics.sensor_drift` of the primary against the backup.

        The bins kept from the last run whose rows are all older than ``since`` (less
        ``gap_limit``: a bin uses the backup that far beyond it) and not cut by ``lo`` are
        taken as they are; the rest are made from their rows (held this run, else read).

        Parameters
        ----------
        store : Store
            Where rows not held are read.
        station : str
            Whose sensors.
        lo, hi : int
            The drift window [Unix s], both ends included.
        since : float
            From :meth:`begin` [Unix s].
        gap_limit, bin_seconds : float
            As :func:`monitor.quality.diagnostics.sensor_drift` [s].
        max_bins : int
            As :func:`monitor.quality.diagnostics.sensor_drift`.
        confidence : float
            Confidence level of the drift's interval [1].

        Returns
        -------
        dict or None
            As :func:`monitor.quality.diagnostics.sensor_drift` over the usable samples of
            ``[lo, hi]``; None when either sensor has none there.
        """
        if not (self._any_usable(store, station, "primary", lo, hi)
                and self._any_usable(store, station, "backup", lo, hi)):
            self.bins = None
            return None
        key = (float(gap_limit), float(bin_seconds), int(max_bins))
        width = self.width if self.width is not None and key == self.bins_key else \
            diagnostics.drift_bin_width(hi - lo, bin_seconds, max_bins)
        bins, c0, c1 = self._kept_bins(lo, since, width, gap_limit, key)
        for _ in range(3):  # again only when the span asks for bins of another width
            if bins is None:
                bins = self._bins_of(store, station, lo, hi, gap_limit, width)
            else:
                head = self._bins_of(store, station, lo, int(c0 * width + gap_limit), gap_limit, width)
                tail = self._bins_of(store, station, int((c1 + 1) * width - gap_limit), hi, gap_limit, width)
                bins = pd.concat([head[head.index < c0], bins, tail[tail.index > c1]])
            want = width if bins.empty else diagnostics.drift_bin_width(
                float(bins["last"].iloc[-1] - bins["first"].iloc[0]), bin_seconds, max_bins)
            if want == width:
                break
            width, bins = want, None
        self.width, self.bins_key = width, key
        first = math.ceil((lo + gap_limit) / width)
        self.bins = bins[bins.index >= first]
        self.bins_span = (first, math.floor(hi / width))
        return diagnostics.drift_line(bins, confidence)

    def _kept_bins(self, lo: int, since: float, width: float, gap_limit: float, key: tuple):
        """The bins kept that are still valid, and the first and last bin number they stand
        for (None when there are none)."""
        if self.bins is None or key != self.bins_key or width != self.width or not math.isfinite(since):
            return None, 0, -1
        c0 = max(self.bins_span[0], math.ceil((lo + gap_limit) / width))
        c1 = min(self.bins_span[1], math.floor((since - gap_limit) / width) - 1)
        if c1 < c0:
            return None, 0, -1
        k = self.bins.index
        return self.bins[(k >= c0) & (k <= c1)], c0, c1

    def _bins_of(self, store: Any, station: str, lo: int, hi: int, gap_limit: float,
                 width: float) -> pd.DataFrame:
        """The drift bins of the usable rows in ``[lo, hi]`` [Unix s]."""
        tp, vp = self._between(store, station, "primary", lo, hi)
        tb, vb = self._between(store, station, "backup", lo, hi)
        bins = diagnostics.drift_bins(tp.astype(float), vp, tb.astype(float), vb, gap_limit, width)
        self.drift_computed += len(bins)
        return bins

    def _any_usable(self, store: Any, station: str, sensor: str, lo: int, hi: int) -> bool:
        """Whether a sensor has a usable sample (flag 1, 2 or 3, or none yet, and a value) in
        ``[lo, hi]`` [Unix s]: from the rows held when they show one, else from the store."""
        held = self.held.get(sensor)
        if held is not None and held.lo >= lo and held.hi <= hi and len(held.v):
            return True
        return store.conn.execute(
            "SELECT 1 FROM observations WHERE station = ? AND sensor = ? AND t BETWEEN ? AND ? "
            f"AND {_USABLE_SQL} AND value IS NOT NULL LIMIT 1",
            (station, sensor, int(lo), int(hi))).fetchone() is not None
