"""Quality control's glue to the store: its tables, a station's pass, overrides and staff readings.

:func:`ensure_qc_schema` makes the tables (``qc_tests``, ``qc_overrides``,
``staff_readings``). :func:`run_station_qc` runs the tests of
:mod:`monitor.quality.checks` over a station's level sensors for a window of time (only
the rows it writes, with :func:`monitor.quality.tail.run_tests_tail`) and writes the
per-test flags and the aggregate flag after the technician's overrides
(:func:`write_rows`). :func:`set_override` records a technician's flag and
:func:`add_staff_reading` a tide-staff reading. A technician's flag and every pass without
a daemon's in-memory context (:mod:`monitor.quality.context`) raise the store's
:data:`EDITS_KEY` (:func:`note_edit`; read back with :func:`edits_mark`).
:func:`read_observations`, :func:`read_level_series`, :func:`read_overrides` and
:func:`read_staff_readings` read the store back as pandas objects indexed by UTC time.
"""
from __future__ import annotations

import math
import time as _time
from itertools import repeat as _repeat
from typing import Any, Mapping

import numpy as np
import pandas as pd

from alerts.transactions import transaction
from monitor.errors import QcError
from monitor.quality.checks import (FAIL, MISSING, NOT_EVALUATED, OVERRIDE_FLAGS, PACK, PACKED_SQL, SUSPECT, TESTS,
                                    QcSettings, aggregate_flags, apply_overrides, multi_sensor_test, usable_mask)
from monitor.quality.tail import confirm_tail, run_tests_tail
from monitor.surge.forecast import rebin_pressure
from predictor.timeutil import index_seconds


def _db(store: Any):
    """The sqlite_utils Database behind a Store (or the Database itself)."""
    return getattr(store, "db", store)


def ensure_qc_schema(db: Any) -> None:
    """Create the quality-control tables if missing (idempotent).

    ``qc_tests`` (station, sensor, t) with one INTEGER flag per test;
    ``qc_overrides`` (station, sensor, t) with flag, who, why, at;
    ``staff_readings`` (station, t) with reading [m], who, note.
    """
    db = _db(db)
    if {"qc_tests", "qc_overrides", "staff_readings"} <= set(db.table_names()):
        # a store made before a test was added gets its column once (older rows: NULL,
        # read as not evaluated); then no schema statement on the processing path
        have = set(db["qc_tests"].columns_dict)
        for c in TESTS:
            if c not in have:
                db.conn.execute(f"ALTER TABLE qc_tests ADD COLUMN {c} INTEGER")
        return
    db["qc_tests"].create({"station": str, "sensor": str, "t": int, **{c: int for c in TESTS}},
                          pk=("station", "sensor", "t"), if_not_exists=True)
    db["qc_overrides"].create({"station": str, "sensor": str, "t": int, "flag": int, "who": str,
                               "why": str, "at": int}, pk=("station", "sensor", "t"), if_not_exists=True)
    db["staff_readings"].create({"station": str, "t": int, "reading": float, "who": str, "note": str},
                                pk=("station", "t"), if_not_exists=True)


def _rows_between(conn: Any, select: str, start_t: float | None, end_t: float | None, **keys: str) -> list[tuple]:
    """The rows of ``select`` (a ``SELECT ... FROM`` of a table with a time column ``t``)
    whose columns equal ``keys`` (``station=``, ``sensor=``), with ``t`` from ``start_t`` to
    ``end_t`` [Unix s] widened to whole seconds (either bound None: open), in time order."""
    sql = f"{select} WHERE " + " AND ".join(f"{k} = ?" for k in keys)
    args: list[Any] = list(keys.values())
    if start_t is not None:
        sql += " AND t >= ?"
        args.append(int(math.floor(start_t)))
    if end_t is not None:
        sql += " AND t <= ?"
        args.append(int(math.ceil(end_t)))
    return conn.execute(sql + " ORDER BY t", args).fetchall()


def read_observations(store: Any, station: str, sensor: str, start_t: float | None = None,
                      end_t: float | None = None) -> pd.DataFrame:
    """Observations of one sensor as a DataFrame indexed by UTC time with columns
    ``value`` [m], ``flag``, ``time_source``."""
    rows = _rows_between(_db(store).conn, "SELECT t, value, flag, time_source FROM observations", start_t, end_t,
                         station=station, sensor=sensor)
    if rows:
        t, v, f, src = zip(*rows)
    else:
        t, v, f, src = (), (), (), ()
    idx = pd.DatetimeIndex(pd.to_datetime(np.asarray(t, dtype=np.int64), unit="s", utc=True), name="time")
    return pd.DataFrame({"value": np.asarray([np.nan if x is None else x for x in v], dtype=float),
                         "flag": np.asarray([NOT_EVALUATED if x is None else x for x in f], dtype=np.int16),
                         "time_source": list(src)}, index=idx)


def diagnostic_mask(flags, flat=None) -> np.ndarray:
    """True where a sample may feed a gauge diagnostic (drift, clock offset, datum steps).

    Usable samples (flag 1, 2 or 3) that the flat-line test does not doubt: a spell it marks
    suspect is a sensor that may already be stuck, whose values say nothing of the sea's
    level, so a diagnostic leaves it out before the spell is long enough to fail.
    """
    mask = usable_mask(flags)
    if flat is not None:
        mask &= ~np.isin(np.asarray(flat), (SUSPECT, FAIL))
    return mask


def read_level_series(store: Any, station: str, sensor: str, start_t: float, end_t: float) -> pd.Series:
    """Levels [m] of one sensor that a gauge diagnostic may use (see :func:`diagnostic_mask`),
    indexed by UTC time."""
    db = _db(store)
    ensure_qc_schema(db)
    rows = db.conn.execute(
        "SELECT o.t, o.value, o.flag, q.flat FROM observations o LEFT JOIN qc_tests q "
        "ON q.station = o.station AND q.sensor = o.sensor AND q.t = o.t "
        "WHERE o.station = ? AND o.sensor = ? AND o.t >= ? AND o.t <= ? ORDER BY o.t",
        (station, sensor, int(math.floor(start_t)), int(math.ceil(end_t)))).fetchall()
    if not rows:
        return pd.Series(dtype=float)
    t, v, f, flat = (np.asarray(c) for c in zip(*rows))
    keep = diagnostic_mask(f, np.where(flat == None, NOT_EVALUATED, flat).astype(int))  # noqa: E711
    idx = pd.to_datetime(t[keep].astype(np.int64), unit="s", utc=True)
    return pd.Series(v[keep].astype(float), index=idx, name=sensor).dropna()


def read_overrides(store: Any, station: str, sensor: str, start_t: float | None = None,
                   end_t: float | None = None) -> pd.Series:
    """Manual flags of one sensor, indexed by UTC time."""
    db = _db(store)
    ensure_qc_schema(db)
    rows = _rows_between(db.conn, "SELECT t, flag FROM qc_overrides", start_t, end_t, station=station, sensor=sensor)
    t = np.asarray([r[0] for r in rows], dtype=np.int64)
    return pd.Series(np.asarray([r[1] for r in rows], dtype=np.int8),
                     index=pd.to_datetime(t, unit="s", utc=True), name="override")


def _station_parts(station_cfg: Any) -> tuple[str, list[str]]:
    """Station id and its level sensors (primary first) from a StationConfig."""
    sid = getattr(station_cfg, "id", station_cfg)
    sensors = getattr(station_cfg, "sensors", None)
    if isinstance(sensors, Mapping):
        roles = [r for r in sensors if getattr(sensors[r], "is_level", r != "barometer")]
        roles.sort(key=lambda r: (r != "primary", r))
    else:
        roles = ["primary", "backup"]
    return str(sid), roles


def _position(station_cfg: Any) -> tuple[float, float] | None:
    """The configured (latitude, longitude) of a StationConfig, None when it has none."""
    lat, lon = getattr(station_cfg, "latitude", None), getattr(station_cfg, "longitude", None)
    return None if lat is None or lon is None else (float(lat), float(lon))


def _predict(model: Any, index: pd.DatetimeIndex) -> np.ndarray | None:
    if model is None or len(index) == 0:
        return None
    if callable(model) and not hasattr(model, "predict"):
        return np.asarray(model(index), dtype=float)
    return np.asarray(model.predict(index), dtype=float)


def pass_bounds(start_t: float, s: QcSettings) -> tuple[float, float, float]:
    """Where a pass over samples from ``start_t`` [Unix s] writes, judges and reads from [Unix s].

    Rows are written from one ``resid_window`` before the window (the residual outlier
    test's centred windows reach that far back), judged from two gap limits before that
    (the other sensor's flags are needed that far back for the comparison and the bore
    check), and read with the whole context of every window behind them.
    """
    write_from = start_t - s.resid_window
    judge_from = write_from - 2 * s.gap_limit
    return write_from, judge_from, judge_from - s.context_seconds()


def run_station_qc(store: Any, station_cfg: Any, settings: QcSettings | None, start_t: float, end_t: float,
                   model: Any = None, now: float | None = None, context: Any = None) -> dict[str, Any]:
    """Run every test for a station's level sensors over ``[start_t, end_t]`` and store
    the results.

    Reads the observations from ``start_t - settings.context_seconds()`` (so rolling
    statistics have their history), runs :func:`~monitor.quality.checks.run_tests` per sensor (each sensor's
    usable samples serve as the other's comparison), applies the technician's
    overrides, and writes ``qc_tests`` and ``observations.flag`` for samples from
    ``start_t - settings.resid_window`` (samples whose centred windows were incomplete
    on the previous pass are re-evaluated) to ``end_t``.

    Parameters
    ----------
    store : Store or sqlite_utils.Database
        Anything with a ``db`` attribute (a sqlite_utils Database), or the Database.
    station_cfg : StationConfig or str
        The station (its ``id`` and ``sensors``), or a station id (sensors
        ``primary`` and ``backup``).
    settings : QcSettings or None
        Thresholds; defaults when None.
    start_t, end_t : float
        Window to (re)evaluate [Unix s, UTC].
    model : TideModel or callable, optional
        ``model.predict(DatetimeIndex) -> m``; without it the residual tests run on
        the level itself.
    now : float, optional
        Processing time [Unix s]; defaults to the wall clock.
    context : monitor.quality.context.QcContext, optional
        The station's context kept between passes (the daemon's): only rows newer than
        those it holds are read, and the same flags are written. ``start_t`` must then be
        no later than the earliest row stored since the previous pass.

    Returns
    -------
    dict sensor -> DataFrame of the written rows (tests, ``flag`` after overrides); with a
    ``context``, sensor -> :class:`monitor.quality.context.QcRows` (the same rows as arrays).
    """
    if context is not None:
        return context.run(store, station_cfg, settings, start_t, end_t, model, now)
    s = settings or QcSettings()
    db = _db(store)
    ensure_qc_schema(db)
    station, sensors = _station_parts(station_cfg)
    now = _time.time() if now is None else now
    write_from, judge_from, read_from = pass_bounds(start_t, s)
    obs = {sn: read_observations(db, station, sn, read_from, end_t) for sn in sensors}
    obs = {sn: df for sn, df in obs.items() if not df.empty}
    single: dict[str, pd.DataFrame] = {}
    preds: dict[str, np.ndarray | None] = {}
    first: dict[str, int] = {}
    position = _position(station_cfg)
    for sn, df in obs.items():
        preds[sn] = _predict(model, df.index)
        first[sn] = int(np.searchsorted(index_seconds(df.index), judge_from, side="left"))
        single[sn] = run_tests_tail(df["value"], s, preds[sn], None, now, position=position, start=first[sn])
    results: dict[str, pd.DataFrame] = {}
    for sn, df in obs.items():
        tests = single[sn]
        k = first[sn]
        others = [o for o in obs if o != sn]
        if others:
            o = others[0]
            # the other sensor's values that are not failed, and (to confirm fast water) all
            # its values but those failed for reasons other than their shape; its rows before
            # those judged are never within reach of the rows written
            ko = first[o]
            judged = obs[o]["value"].iloc[ko:]
            other_ok = judged.where(single[o]["flag"].to_numpy() != FAIL)
            shape_only = ~(single[o][[c for c in TESTS if c not in ("spike", "resid")]] == FAIL).any(axis=1)
            tests = tests.copy()
            tests["multi"] = multi_sensor_test(df["value"].iloc[k:], other_ok, s.multi_suspect, s.gap_limit)
            tests["multi"] = tests["multi"].where(tests["syntax"] != MISSING, NOT_EVALUATED)
            tests["flag"] = aggregate_flags(tests)
            v = df["value"].to_numpy(dtype=float)
            resid = v - preds[sn] if preds[sn] is not None else v
            tests = confirm_tail(tests, df["value"], resid, judged.where(shape_only.to_numpy()), s, k)
        t = index_seconds(tests.index)
        sel = (t >= write_from) & (t <= end_t)
        part = tests[sel].copy()
        ov = read_overrides(db, station, sn, write_from, end_t)
        part["flag"] = apply_overrides(part["flag"], ov)
        _write(db, station, sn, part, df["flag"].to_numpy()[k:][sel])
        results[sn] = part
    return results


def _write(db: Any, station: str, sensor: str, part: pd.DataFrame, stored: np.ndarray | None = None) -> None:
    """Write what changed, in one transaction: ``qc_tests`` rows that are new or differ
    from the stored ones, and ``observations.flag`` where it differs from ``stored``.

    A re-run over an unchanged record reads the stored rows and writes nothing, and
    the daemon's incremental pass writes only its newest samples and the few whose
    centred windows have since completed.
    """
    if part.empty:
        return
    conn = db.conn
    t = (index_seconds(part.index)).round().astype(np.int64)
    tests = np.column_stack([part[c].to_numpy(dtype=np.int64) for c in TESTS])  # (n, tests)
    # Compare packed rows (PACK); a NULL packs to NULL and is rewritten.
    packed = tests @ PACK
    old = conn.execute(f"SELECT t, {PACKED_SQL} FROM qc_tests WHERE station = ? AND sensor = ? AND t BETWEEN ? AND ?",
                       (station, sensor, int(t.min()), int(t.max()))).fetchall()
    todo = np.ones(len(t), bool)
    if old and np.all(t[1:] > t[:-1]):
        old_arr = np.array(old, dtype=float)  # NULL -> NaN, never equal to a flag
        pos = np.minimum(t.searchsorted(old_arr[:, 0]), len(t) - 1)
        same = (t[pos] == old_arr[:, 0]) & (packed[pos] == old_arr[:, 1])
        todo[pos[same]] = False
    new = part["flag"].to_numpy()
    changed = np.ones(len(new), bool) if stored is None else (np.asarray(stored) != new)
    if not todo.any() and not changed.any():
        return
    write_rows(db, station, sensor, t[todo], tests[todo], t[changed], new[changed], edit=True)


#: The store's meta key raised by every write of flags that a daemon's in-memory context
#: did not make (:func:`set_override`, a pass without a context): see monitor.quality.context.
EDITS_KEY = "qc.edits"


def write_rows(db: Any, station: str, sensor: str, t_tests: np.ndarray, tests: np.ndarray, t_flags: np.ndarray,
               flags: np.ndarray, edit: bool = False) -> None:
    """In one transaction, store ``qc_tests`` rows (``tests``: one column per test of
    :data:`TESTS`) at ``t_tests`` and ``observations.flag`` at ``t_flags`` [Unix s];
    with ``edit`` raise the store's :data:`EDITS_KEY` too."""
    conn = _db(db).conn
    names = ", ".join(TESTS)
    tests = np.asarray(tests, dtype=np.int64)
    rows = zip(_repeat(station), _repeat(sensor), np.asarray(t_tests, dtype=np.int64).tolist(),
               *(tests[:, j].tolist() for j in range(len(TESTS))))
    fl = zip(np.asarray(flags).tolist(), _repeat(station), _repeat(sensor), np.asarray(t_flags, dtype=np.int64).tolist())
    marks = ", ".join("?" * len(TESTS))
    with transaction(conn):
        conn.executemany(
            f"INSERT OR REPLACE INTO qc_tests (station, sensor, t, {names}) VALUES (?, ?, ?, {marks})", rows)
        conn.executemany("UPDATE observations SET flag = ? WHERE station = ? AND sensor = ? AND t = ?", fl)
        if sensor == "barometer" and len(t_flags):  # a failed reading leaves the pressure's means
            rebin_pressure(conn, station, int(np.min(t_flags)), int(np.max(t_flags)))
        if edit:
            note_edit(conn)


def edits_mark(conn: Any, has_meta: bool = True) -> tuple:
    """What says that stored flags or the technician's overrides were changed by another
    writer since it was last read: the store's :data:`EDITS_KEY` value (raised by
    :func:`note_edit`) and the overrides table's largest row id; the latter alone for a
    database without the store's ``meta`` table (``has_meta`` False)."""
    if not has_meta:
        return tuple(conn.execute("SELECT max(rowid) FROM qc_overrides").fetchone())
    return tuple(conn.execute("SELECT (SELECT value FROM meta WHERE key = ?), (SELECT max(rowid) FROM qc_overrides)",
                              (EDITS_KEY,)).fetchone())


def note_edit(conn: Any) -> None:
    """Raise the store's :data:`EDITS_KEY` (inside the caller's transaction; a bare database
    without the store's ``meta`` table has none)."""
    if conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = 'meta'").fetchone():
        conn.execute("INSERT INTO meta(key, value) VALUES (?, '1') ON CONFLICT(key) DO UPDATE SET "
                     "value = CAST(value AS INTEGER) + 1", (EDITS_KEY,))


def set_override(store: Any, station: str, sensor: str, start_t: float, end_t: float | None, flag: int,
                 who: str, why: str, at: float | None = None) -> int:
    """Record a technician's flag for the samples of one sensor in ``[start_t, end_t]``.

    With ``end_t`` None the single sample at ``start_t`` is meant; when no sample is
    stamped exactly then, a QcError names the nearest one. The override wins over
    automatic flags now and whenever QC is re-run. Returns the number of samples.
    """
    if flag not in OVERRIDE_FLAGS:
        raise QcError(f"--set: expected one of {', '.join(map(str, OVERRIDE_FLAGS))} "
                        f"(1 pass, 3 suspect, 4 fail), got {flag}")
    if not who.strip():
        raise QcError("--who: say who sets the flag")
    if not why.strip():
        raise QcError("--why: say why the flag is set")
    db = _db(store)
    ensure_qc_schema(db)
    conn = db.conn
    lo = int(math.floor(start_t))
    hi = int(math.ceil(end_t)) if end_t is not None else lo
    if hi < lo:
        raise QcError("--to: is before --at")
    ts = [r[0] for r in conn.execute(
        "SELECT t FROM observations WHERE station = ? AND sensor = ? AND t BETWEEN ? AND ? ORDER BY t",
        (station, sensor, lo, hi))]
    if not ts:
        near = conn.execute(
            "SELECT t FROM observations WHERE station = ? AND sensor = ? ORDER BY abs(t - ?) LIMIT 1",
            (station, sensor, lo)).fetchone()
        where = f"{station}/{sensor}"
        if near is None:
            raise QcError(f"no observations of {where} in the store")
        iso = pd.Timestamp(near[0], unit="s", tz="UTC").isoformat().replace("+00:00", "Z")
        raise QcError(f"no sample of {where} at the time given (nearest: {iso}); "
                        f"give that time, or a range with --to")
    stamp = int(at if at is not None else _time.time())
    with transaction(conn):
        conn.executemany(
            "INSERT OR REPLACE INTO qc_overrides (station, sensor, t, flag, who, why, at) VALUES (?, ?, ?, ?, ?, ?, ?)",
            [(station, sensor, t, int(flag), who, why, stamp) for t in ts])
        conn.execute("UPDATE observations SET flag = ? WHERE station = ? AND sensor = ? AND t BETWEEN ? AND ?",
                     (int(flag), station, sensor, lo, hi))
        if sensor == "barometer":
            rebin_pressure(conn, station, lo, hi)
        note_edit(conn)
    return len(ts)


def add_staff_reading(store: Any, station: str, t: float, reading: float, who: str, note: str = "") -> None:
    """Store a tide-staff reading [m on the station datum] taken at ``t`` [Unix s]."""
    if not math.isfinite(reading) or abs(reading) > 1000:
        raise QcError(f"--reading: expected metres on the station datum, got {reading}")
    if not who.strip():
        raise QcError("--who: say who read the staff")
    db = _db(store)
    ensure_qc_schema(db)
    db["staff_readings"].upsert({"station": station, "t": int(round(t)), "reading": float(reading),
                                 "who": who, "note": note or ""}, pk=("station", "t"))


def read_staff_readings(store: Any, station: str, start_t: float | None = None,
                        end_t: float | None = None) -> pd.DataFrame:
    """Staff readings of a station: DataFrame indexed by UTC time with ``reading`` [m],
    ``who``, ``note``."""
    db = _db(store)
    ensure_qc_schema(db)
    rows = _rows_between(db.conn, "SELECT t, reading, who, note FROM staff_readings", start_t, end_t, station=station)
    t = np.asarray([r[0] for r in rows], dtype=np.int64)
    return pd.DataFrame({"reading": [r[1] for r in rows], "who": [r[2] for r in rows],
                         "note": [r[3] for r in rows]},
                        index=pd.DatetimeIndex(pd.to_datetime(t, unit="s", utc=True), name="time"))
