"""A station's quality-control context kept in memory between processing passes.

:func:`monitor.quality.records.run_station_qc` judges a window's samples against the 25 h
of record before them. Read from the store at every pass, that context cost most of a
station's steady-state pass. :class:`QcContext` keeps it (per level sensor: times, values,
stored flags, the predicted tide, the flags last written and the residual outlier test's
departures, :class:`monitor.quality.tail.ResidMemo`) and reads only the rows newer than
the last one held. The flags are those of the pass without a context, equal to a run over
the whole record (``tests/test_qc_context.py``).

The context is rebuilt from the store, as a pass without one reads it, on any sign that
it may not hold what the store holds: the first pass, a window that does not start just
after the last one (late rows or a backfill lower the daemon's processing mark; a failed
pass is retried), a new row more than ``gap_limit`` after the last one held, more new
rows than a steady pass brings, other settings, another model, position, sensors or
store connection, or a change of the technician's overrides or of the stored flags by
another writer (the store's ``qc.edits`` meta value, raised by
:func:`monitor.quality.records.set_override` and by every pass without a context, and the
overrides table's largest row id). An error inside a pass forgets the context. Windows
too wide to hold as matrices (very fine sampling) send the pass, and the next
:data:`WIDE_PASSES`, to the pass without a context.
"""
from __future__ import annotations

import contextlib
import math
import time as _time
from typing import Any, Callable

import numpy as np
import pandas as pd

from alerts.transactions import transaction
from monitor.quality import checks as _qc
from monitor.quality import records as _records
from monitor.quality import tail as _tail
from monitor.quality.checks import _COL, FAIL, MISSING, NOT_EVALUATED, PACK, PACKED_SQL, TESTS, QcSettings

_NOT_SHAPE = np.array([c not in ("spike", "resid") for c in TESTS])
#: New rows per sensor a pass takes from the context; more (a backfill) rebuild it.
STEADY_ROWS_MAX = 120
#: Passes that go without the context after its windows were found too wide (an hour of
#: one-minute passes; our choice).
WIDE_PASSES = 60


class QcRows:
    """The rows a pass wrote for one sensor, as plain arrays.

    Attributes
    ----------
    t : array of int64
        Times [Unix s, UTC].
    tests : array of int8, shape (n, len(TESTS))
        One QARTOD flag per test of :data:`monitor.quality.checks.TESTS`.
    flag : array of int8
        The aggregate flag after the technician's overrides.
    """

    def __init__(self, t: np.ndarray, tests: np.ndarray, flag: np.ndarray):
        self.t, self.tests, self.flag = t, tests, flag

    def __len__(self) -> int:
        return len(self.t)

    def column(self, test: str) -> np.ndarray:
        """One test's flags [int8]."""
        return self.tests[:, _COL[test]]

    def flat_since(self, at_least: int = FAIL) -> float | None:
        """Start [Unix s] of the flat-line run (flagged ``at_least`` or worse) that the last
        row ends, or None (as :func:`monitor.quality.diagnostics.flat_since`)."""
        f = self.column("flat")
        if not len(f) or f[-1] < at_least:
            return None
        below = np.flatnonzero(f < at_least)
        return float(self.t[below[-1] + 1 if below.size else 0])

    def frame(self) -> pd.DataFrame:
        """The rows as :func:`monitor.quality.records.run_station_qc` returns them without a
        context: one column per test and ``flag``, indexed by UTC time."""
        idx = pd.DatetimeIndex(pd.to_datetime(self.t, unit="s", utc=True), name="time")
        out = pd.DataFrame(self.tests, index=idx, columns=list(TESTS))
        out["flag"] = self.flag
        return out


class _Column:
    """A 1-D array that grows at its end and loses rows at its front, held in a larger
    buffer: a pass's few new rows are written in place instead of the whole array copied
    (the buffer is copied only when its spare room runs out, then with an eighth more)."""

    __slots__ = ("buf", "lo", "hi")

    def __init__(self, a: np.ndarray):
        self.buf, self.lo, self.hi = a, 0, len(a)

    def view(self) -> np.ndarray:
        """The rows held (a view of the buffer)."""
        return self.buf[self.lo:self.hi]

    def append(self, new: np.ndarray | None = None, count: int = 0, fill: Any = None) -> np.ndarray:
        """Add ``new`` (or ``count`` rows of ``fill``) at the end; returns :meth:`view`."""
        m = len(new) if new is not None else count
        if self.hi + m > len(self.buf):
            n = self.hi - self.lo
            # room for an eighth more, at least 64 rows (our choice: a copy every few hours
            # of one-minute rows, and at most an eighth more memory)
            buf = np.empty(n + m + max(64, n // 8), dtype=self.buf.dtype)
            buf[:n] = self.buf[self.lo:self.hi]
            self.buf, self.lo, self.hi = buf, 0, n
        if new is not None:
            self.buf[self.hi:self.hi + m] = new
        else:
            self.buf[self.hi:self.hi + m] = fill
        self.hi += m
        return self.buf[self.lo:self.hi]

    def drop(self, count: int) -> np.ndarray:
        """Forget the first ``count`` rows; returns :meth:`view`."""
        self.lo = min(self.lo + count, self.hi)
        return self.buf[self.lo:self.hi]


class _Sensor:
    """One level sensor's rows held: from the context's start to the last row read.

    ``t``, ``v``, ``flag``, ``p`` and ``packed`` are views of growing buffers
    (:class:`_Column`): write into them in place, never assign them.
    """

    def __init__(self, t: np.ndarray, v: np.ndarray, flag: np.ndarray, p: np.ndarray | None):
        self._cols = [_Column(t), _Column(v), _Column(flag)] + ([_Column(p)] if p is not None else [])
        self.t = t          # [Unix s] int64, sorted, unique
        self.v = v          # [m], NaN where missing
        self.flag = flag    # observations.flag as stored (NULL read as 2)
        self.p = p          # predicted tide [m] or None
        # the qc_tests rows as stored (packed; -1 unknown) of rows packed_at, packed_at + 1, ...
        self._packed = _Column(_tail._filled(len(t), -1, np.int64))
        self.packed = self._packed.view()
        self.packed_at = 0
        self.ov_t = np.empty(0, dtype=np.int64)  # the technician's overrides from the start on
        self.ov_f = np.empty(0, dtype=np.int8)
        self.memo = _tail.ResidMemo()

    def _views(self, views: list) -> None:
        self.t, self.v, self.flag = views[0], views[1], views[2]
        if len(views) > 3:
            self.p = views[3]

    def drop_before(self, t0: int) -> None:
        cut = int(self.t.searchsorted(t0, side="left"))
        if cut:
            self._views([c.drop(cut) for c in self._cols])
            self.packed_at -= cut
            self.memo.drop(cut)

    def append(self, t: np.ndarray, v: np.ndarray, flag: np.ndarray, p: np.ndarray | None) -> None:
        new = (t, v, flag, p)
        self._views([c.append(a) for c, a in zip(self._cols, new)])
        self.packed = self._packed.append(count=len(t), fill=-1)

    def stored(self, rows: np.ndarray) -> np.ndarray:
        """The packed qc_tests rows held as stored at ``rows``, ascending (-1: not known)."""
        i = rows - self.packed_at
        if len(i) and i[0] >= 0 and i[-1] < len(self.packed):  # (a steady pass: every row held)
            return self.packed[i]
        inside = (i >= 0) & (i < len(self.packed))
        return np.where(inside, self.packed[np.minimum(np.maximum(i, 0), len(self.packed) - 1)], -1) \
            if len(self.packed) else np.full(len(rows), -1, dtype=np.int64)

    def keep_from(self, row: int) -> None:
        """Forget what rows before ``row`` were written as: only a backfill or late data
        (which rebuild the context) write them again."""
        if row > self.packed_at:
            self.packed = self._packed.drop(row - self.packed_at)
            self.packed_at = row
        self.memo.keep_rows_from(row)

    def unknown_before(self, count: int) -> None:
        """Hold ``count`` more rows before those of ``packed``, not known as stored (-1)."""
        self._packed = _Column(np.concatenate([_tail._filled(count, -1, np.int64), self.packed]))
        self.packed = self._packed.view()
        self.packed_at -= count


class QcContext:
    """A station's quality-control context between passes (see the module's notes).

    Hand the same instance to :func:`monitor.quality.records.run_station_qc` at every pass
    of one station (``context=``); it is valid for one store connection, station,
    settings and model, and rebuilds itself when any of them changes.
    """

    def __init__(self) -> None:
        self.rebuilds = 0   # passes that read their context from the store (for tests and logs)
        # passes left that go straight to the pass without a context, after windows too wide
        # to hold as matrices (the context would read the store only to find that again)
        self.wide_passes = 0
        self.reset()

    def reset(self) -> None:
        """Forget everything held: the next pass reads its context from the store."""
        self.sensors: dict[str, _Sensor] = {}
        self.key: tuple | None = None
        self.settings: QcSettings | None = None
        self.model: Any = None
        self.end_t: int | None = None
        self.edits: tuple | None = None
        self.has_meta = False
        self.ahead_t = np.empty(0, dtype=np.int64)  # [Unix s] times asked of the model's memo ahead
        self.ahead_p = np.empty(0)                    # and its predictions there [m]

    # ------------------------------------------------------------------ the pass
    def run(self, store: Any, station_cfg: Any, settings: QcSettings | None, start_t: float, end_t: float,
            model: Any = None, now: float | None = None) -> dict[str, QcRows]:
        """:func:`monitor.quality.records.run_station_qc` from the context (same parameters).

        ``start_t`` must not be later than the earliest row stored since the previous pass
        (the daemon's processing mark sees to it). Returns sensor -> :class:`QcRows`.
        """
        now = _time.time() if now is None else now
        if self.wide_passes:
            self.wide_passes -= 1
            return self._without(store, station_cfg, settings, start_t, end_t, model, now)
        try:
            return self._run(store, station_cfg, settings or QcSettings(), start_t, end_t, model, now)
        except _tail._TooWide:
            # windows too wide to hold as matrices (very fine sampling): the pass without a
            # context, which takes the whole-record tests for such tails, for this pass and
            # the next WIDE_PASSES (then the context is tried again: the sampling may change)
            self.reset()
            self.wide_passes = WIDE_PASSES
            return self._without(store, station_cfg, settings, start_t, end_t, model, now)
        except BaseException:
            self.reset()
            raise

    @staticmethod
    def _without(store: Any, station_cfg: Any, settings: QcSettings | None, start_t: float, end_t: float,
                 model: Any, now: float) -> dict[str, QcRows]:
        """The pass without a context, its rows as :class:`QcRows`."""
        done = _records.run_station_qc(store, station_cfg, settings, start_t, end_t, model, now)
        return {sn: QcRows(np.round(_qc.index_seconds(df.index)).astype(np.int64),
                           df[list(TESTS)].to_numpy(dtype=np.int8), df["flag"].to_numpy(dtype=np.int8))
                for sn, df in done.items()}

    def _run(self, store: Any, station_cfg: Any, s: QcSettings, start_t: float, end_t: float, model: Any,
             now: float) -> dict[str, QcRows]:
        db = _records._db(store)
        station, sensors = _records._station_parts(station_cfg)
        position = _records._position(station_cfg)
        write_from, judge_from, read_from = _records.pass_bounds(start_t, s)
        read_from = int(math.floor(read_from))
        hi = int(math.ceil(end_t))
        # the connection itself, not its id(): a store reopened may get a freed id back
        key = (db.conn, station, tuple(sensors), position)
        if key != self.key:
            _records.ensure_qc_schema(db)
            self.has_meta = db.conn.execute(
                "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'meta'").fetchone() is not None
        edits = _records.edits_mark(db.conn, self.has_meta)
        # Without the store's ``meta`` table another writer's flags leave no mark (note_edit
        # has nowhere to count them): every pass then rebuilds from the store.
        steady = (self.has_meta and self.end_t is not None and start_t == self.end_t + 1 and key == self.key
                  and edits == self.edits and model is self.model
                  and (s is self.settings or s == self.settings)
                  and self._advance(db, station, sensors, read_from, hi, model, s))
        if not steady:
            self._rebuild(db, station, sensors, read_from, hi, model, write_from)
            self.key, self.settings, self.model = key, s, model
        results = self._judge(db, station, s, now, position, judge_from, write_from, end_t)
        self.end_t = int(end_t) if float(end_t).is_integer() else None
        self.edits = edits
        return results

    def _advance(self, db: Any, station: str, sensors: list[str], read_from: int, hi: int, model: Any,
                 s: QcSettings) -> bool:
        """Read each sensor's rows newer than the last held and drop those before
        ``read_from``; False when that is not a steady step (then nothing is trusted)."""
        new = {}
        for sn in sensors:
            held = self.sensors.get(sn)
            if held is None:  # a sensor without rows in the context: has it any now?
                if len(_read(db, station, sn, read_from, hi)[0]):
                    return False
                continue
            t, v, f = _read(db, station, sn, max(int(held.t[-1]) + 1, read_from), hi)
            if len(t) > STEADY_ROWS_MAX or (len(t) and t[0] - held.t[-1] > s.gap_limit):
                return False
            if not len(t) and held.t[-1] < read_from:
                return False  # every row it held leaves the context
            new[sn] = (t, v, f)
        for sn, (t, v, f) in new.items():
            held = self.sensors[sn]
            if len(t):
                held.append(t, v, f, self._predict_new(model, t, int(held.t[-1])))
            held.drop_before(read_from)
        return True

    def _predict_new(self, model: Any, t: np.ndarray, last: int) -> np.ndarray | None:
        """The predicted tide at new rows [m]. A model that keeps what it predicts (the
        daemon's memo, with ``forget_before``) is asked for the next :data:`AHEAD` samples'
        times at the last step too, and those predictions are kept here: at one-minute steps
        one model evaluation an hour, not one a pass (the memo holds the same values for the
        residual). The step is the new rows' own, or from ``last`` [Unix s], the newest row
        held, for a single new row."""
        if model is None or not hasattr(model, "forget_before"):
            return _predict(model, t)
        if len(t) == 1 and len(self.ahead_t):  # a steady pass's one new row
            i = int(self.ahead_t.searchsorted(t[0]))
            if i < len(self.ahead_t) and self.ahead_t[i] == t[0]:
                return self.ahead_p[i:i + 1].copy()
        pos = self.ahead_t.searchsorted(t)
        if len(self.ahead_t) and np.all(pos < len(self.ahead_t)) and np.array_equal(self.ahead_t[pos], t):
            return self.ahead_p[pos]  # asked for before: the values the memo holds too
        step = int(t[-1] - t[-2]) if len(t) > 1 else int(t[-1]) - last
        if not 0 < step <= 3600:
            return _predict(model, t)
        more = int(t[-1]) + step * np.arange(1, AHEAD + 1, dtype=np.int64)
        both = np.concatenate([t, more])
        p = _predict(model, both)
        self.ahead_t, self.ahead_p = both, p
        return p[:len(t)]

    def _rebuild(self, db: Any, station: str, sensors: list[str], read_from: int, hi: int, model: Any,
                 write_from: float) -> None:
        self.rebuilds += 1
        self.ahead_t, self.ahead_p = np.empty(0, dtype=np.int64), np.empty(0)
        self.sensors = {}
        for sn in sensors:
            t, v, f = _read(db, station, sn, read_from, hi)
            if not len(t):
                continue
            held = _Sensor(t, v, f, _predict(model, t))
            rows = db.conn.execute("SELECT t, flag FROM qc_overrides WHERE station = ? AND sensor = ? AND t >= ? "
                                   "ORDER BY t", (station, sn, read_from)).fetchall()
            if rows:
                held.ov_t = np.array([r[0] for r in rows], dtype=np.int64)
                held.ov_f = np.array([r[1] for r in rows], dtype=np.int8)
            # the qc_tests rows stored for the rows the next pass may write
            a = int(math.floor(write_from))
            stored = db.conn.execute(f"SELECT t, {PACKED_SQL} FROM qc_tests WHERE station = ? AND sensor = ? AND t >= ? "
                                     f"AND t <= ?", (station, sn, a, hi)).fetchall()
            for tq, packed in stored:
                i = int(held.t.searchsorted(tq))
                if packed is not None and i < len(held.t) and held.t[i] == tq:
                    held.packed[i - held.packed_at] = packed
            self.sensors[sn] = held

    def _judge(self, db: Any, station: str, s: QcSettings, now: float, position: Any, judge_from: float,
               write_from: float, end_t: float) -> dict[str, QcRows]:
        """The tests at the rows from ``judge_from`` on, the two sensors combined as
        :func:`monitor.quality.records.run_station_qc` combines them; writes what changed."""
        single = {}
        for sn, h in self.sensors.items():
            k = int(h.t.searchsorted(judge_from, side="left"))
            table = _tail.tail_table(h.t * 1_000_000_000, h.v, h.p, s, now, position, k, h.memo)
            single[sn] = (k, table)
        results: dict[str, QcRows] = {}
        writes = []
        for sn, h in self.sensors.items():
            k, table = single[sn]
            others = [o for o in self.sensors if o != sn]
            if others:
                o = others[0]
                ho, (ko, table_o) = self.sensors[o], single[o]
                to, vo = ho.t[ko:].astype(float), ho.v[ko:]
                flag_o = _qc._aggregate(table_o)
                other_ok = np.isfinite(vo) & (flag_o != FAIL)
                table = table.copy()
                dm = _qc.difference_on_arrays(h.t[k:].astype(float), h.v[k:], to[other_ok], vo[other_ok],
                                              s.gap_limit)
                multi = _tail._filled(len(dm), NOT_EVALUATED, np.int8)
                fin = np.isfinite(dm)
                multi[fin] = _qc.PASS
                multi[fin & (np.abs(dm) > s.multi_suspect)] = _qc.SUSPECT
                table[:, _COL["multi"]] = np.where(table[:, _COL["syntax"]] != MISSING, multi, NOT_EVALUATED)
                # (confirm_on_arrays returns at once without a failed spike, the only verdict
                # the other sensor may confirm: its arguments are made only when one failed)
                if (table[:, _COL["spike"]] == FAIL).any():
                    shape_only = ~(table_o[:, _NOT_SHAPE] == FAIL).any(axis=1) & np.isfinite(vo)
                    resid = h.v - h.p if h.p is not None else h.v
                    table = _tail.confirm_on_arrays(table, h.t.astype(float), h.v, resid, to[shape_only],
                                                  vo[shape_only], s, k)
            flag = _qc._aggregate(table)
            tt = h.t[k:]
            sel = (tt >= write_from) & (tt <= end_t)
            rows = sel.nonzero()[0] + k
            part, flag = table[sel], flag[sel]
            if len(h.ov_t):
                pos = np.minimum(h.ov_t.searchsorted(h.t[rows]), len(h.ov_t) - 1)
                hit = h.ov_t[pos] == h.t[rows]
                flag = np.where(hit, h.ov_f[pos], flag).astype(np.int8)
            writes.append((sn, h, rows, part, flag))
            results[sn] = QcRows(h.t[rows], part, flag)
        # every sensor's writes in one transaction (begun only if something changed)
        with contextlib.ExitStack() as stack:
            begun: list = []

            def begin() -> None:
                if not begun:
                    begun.append(stack.enter_context(transaction(db.conn)))
            for sn, h, rows, part, flag in writes:
                self._write(db, station, sn, h, rows, part, flag, begin)
                # a steady next pass (from end_t + 1) judges from here on
                h.keep_from(int(h.t.searchsorted(_records.pass_bounds(end_t + 1, s)[1] - 1)))
        return results

    @staticmethod
    def _write(db: Any, station: str, sensor: str, h: _Sensor, rows: np.ndarray, part: np.ndarray,
               flag: np.ndarray, begin: Callable[[], None]) -> None:
        """Write the ``qc_tests`` rows that differ from those held as stored, and
        ``observations.flag`` where it differs from the stored flag (``begin()`` first: the
        pass's one transaction, begun at its first write)."""
        if not len(rows):
            return
        packed = part.astype(np.int64) @ PACK
        todo = h.stored(rows) != packed
        changed = h.flag[rows] != flag
        if not todo.any() and not changed.any():
            return
        t = h.t[rows]
        begin()
        _records.write_rows(db, station, sensor, t[todo], part[todo], t[changed], flag[changed])
        i = rows - h.packed_at
        if i[0] < 0:  # rows before those kept (not on a steady pass): hold them again
            h.unknown_before(-int(i[0]))
            i = rows - h.packed_at
        h.packed[i] = packed
        h.flag[rows] = flag


def _read(db: Any, station: str, sensor: str, lo: int, hi: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A sensor's rows with ``lo <= t <= hi``: times [Unix s], values [m] (NaN for NULL),
    stored flags (NULL read as 2)."""
    rows = db.conn.execute("SELECT t, value, flag FROM observations WHERE station = ? AND sensor = ? "
                           "AND t >= ? AND t <= ? ORDER BY t", (station, sensor, lo, hi)).fetchall()
    if not rows:
        return np.empty(0, dtype=np.int64), np.empty(0), np.empty(0, dtype=np.int16)
    t, v, f = zip(*rows)
    return (np.array(t, dtype=np.int64), np.array(v, dtype=float),
            np.array([NOT_EVALUATED if x is None else x for x in f], dtype=np.int16))


#: Samples predicted ahead, at the last step, when a memo of predictions is asked for new
#: rows (one model evaluation an hour at one-minute steps instead of one a minute).
AHEAD = 60


def _predict(model: Any, t: np.ndarray) -> np.ndarray | None:
    """The predicted tide [m] at ``t`` [Unix s], as the pass without a context asks for it."""
    if model is None or not len(t):
        return None if model is None else np.empty(0)
    if callable(model) and not hasattr(model, "predict"):
        return np.asarray(model(pd.to_datetime(t, unit="s", utc=True)), dtype=float)
    return np.asarray(model.predict((t * 1_000_000_000).astype("datetime64[ns]")), dtype=float)
