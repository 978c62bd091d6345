"""The daemon: polls the feeds, stores what they give, and processes each station.

apscheduler (3.x, BackgroundScheduler with one worker thread for polling, processing and
reports, so they never overlap, and one for fits) runs these jobs, and an outbox thread of
its own delivers the mail:

- ``poll``: each feed's new lines are parsed and stored with the feed's checkpoint in one
  transaction (:func:`ingest_lines`); a station that got lines is processed in the same job,
  after ``daemon.coalesce_seconds`` and one more poll (:meth:`Daemon.process_delivered`),
  so a line reaches the rules within a poll interval and a second, not a timer's minute;
- ``process``: the catch-up pass over every station (late data, retries), per station, :meth:`Daemon.process_station` -- quality control, residual,
  skew surge, next high water forecast, then the alert rules (one pipeline, in order).
  Rows that arrive late (older than what was processed, of any sensor) are processed
  again from the earliest time stored. The rules get the new samples and the hour before
  them, the forecast dict, the feed's age and the equipment faults; sensor drift and clock
  offset, costly, are recomputed every ``daemon.diagnostics_minutes`` of data time. When
  the rules queue messages the outbox thread is woken at once;
- the outbox thread (:class:`OutboxWorker`, its own SQLite connection): delivers queued
  email when woken and every ``daemon.outbox_seconds`` (retries, anything queued by other
  means). One round at a time, each send recorded before the next; an SMTP server that
  does not answer holds up only this thread, never the processing;
- ``reports``: daily reports, when the report writer is installed;
- ``refit``: refit stations whose constants come from their own history, on a worker of
  its own (the ``fits`` executor) with its own SQLite connection, so a fit of years of
  one-minute data never holds up polling and processing; the new constants are taken by the
  processing thread between passes (:meth:`Daemon.refit`). A station's first fit goes the
  same way, except on a replayed clock (which outruns a fit).

SIGTERM and SIGINT stop it cleanly: the batch in hand is finished and committed, then
the feeds and the store are closed and the process exits 0. A second daemon on the same
store is refused by the store's lock.
"""
from __future__ import annotations

import bisect
import datetime as dt
import logging
import math
import os
import signal
import sqlite3
import threading
import time
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd
import sqlite_utils
from apscheduler.executors.pool import ThreadPoolExecutor
from apscheduler.schedulers.background import BackgroundScheduler

from alerts import engine
from alerts import rules
from alerts.mail import outbox
from monitor import feeds as feeds_mod
from monitor.errors import MonitorError
from monitor.feeds.parse import parse_lines
from monitor.quality import checks as qc
from monitor.quality import diagnostics
from monitor.quality import records as qc_records
from monitor.quality.context import QcContext
from monitor.quality.checks import QcSettings
from monitor.service.config import Config, SensorConfig, StationConfig, unsendable
from monitor.service.constants import load_model, model_from_text, model_to_text
from monitor.service.diag_memory import DiagnosticsMemory, usable_series
from monitor.service.live_pages import LivePages
from monitor.service.logs import report_quiet_repeats, setup_logging
from monitor.service.reporting import write_due_reports
from monitor.store.database import BatchResult, EMPTY_BATCH, Store, check_folder, check_store_path
from monitor.store.migrations import DERIVED_COLUMNS
from monitor.surge import forecast as surge_forecast
from monitor.surge import residual as surge_residual
from predictor import harmonic_fit_chunks
from predictor.errors import FitError

log = logging.getLogger("monitor.service.daemon")

PROCESS_CHUNK = 7 * 86400   # [s] most data time processed in one pass (bounds memory in a backfill)
REWRITE_BACK = 3600         # [s] derived rows before a window that are recomputed (QC may revise flags)
OUTBOX_DRAIN_WAIT = 30.0    # [s] with --until-exhausted, longest wait for the outbox after the feeds end
PRUNE_EVERY = 86400.0       # [s, wall clock] how often the outbox thread prunes delivered messages
HISTORY_REFRESH = 6 * 3600  # [s, data time] least time between two learns of the forecaster (surge_forecast.relearn_due)
# [s] samples before a window handed to the alert rules besides the new ones: messages show the
# change over the last hour, taken from a sample up to 15 min either side of an hour back
TREND_BACK = 75 * 60
#: [s] smoothed residual before a window that the forecast's storm state reads (the rate over
#: RATE_HOURS, and an hour more)
FORECAST_BACK = int((surge_forecast.RATE_HOURS + 1) * 3600)
#: [s] derived rows a station keeps in memory behind its last pass (:class:`DerivedTail`):
#: what the next pass's forecast reads and the rows it rewrites
TAIL_KEEP = FORECAST_BACK + REWRITE_BACK
#: [s] longest window the in-memory pass takes; a longer one (catching up after the daemon
#: or the feed stopped) goes the full way, reading from the store
STEADY_MAX = REWRITE_BACK


def judged_samples(samples: pd.DataFrame | engine.Samples) -> pd.DataFrame | engine.Samples:
    """The samples whose quality-control flags are final enough for the alert rules: all
    but the newest.

    The spike test (QARTOD Test 6) and the one-sample jump judge a sample by the one after
    it; until that sample arrives the newest one is "not evaluated" by them, and a lone
    spike would count for the rules as a good sample. So the newest sample is held back
    until its follower has come, whatever its time stamp says (a feed running late
    delivers old stamps, and their followers still come). A held-back sample does not move
    a rule's watermark, so the next pass counts it with its final flag; after a silence
    longer than the gap limit that is the pass of the first sample after it.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 6 (the spike test needs the
    following sample, hence its delay of one sample).
    """
    if isinstance(samples, engine.Samples):
        return engine.Samples(samples.t[:-1], {c: v[:-1] for c, v in samples.columns.items()})
    return samples.iloc[:-1]


# --------------------------------------------------------------------------- ingest

def future_tolerance(station: StationConfig | None) -> float:
    """How far ahead of the clock a station's time stamps may be [s] (``qc.future_tolerance``)."""
    qs = getattr(station, "qc", None) or QcSettings()
    return float(qs.future_tolerance)


def ingest_lines(store: Store, sensor: SensorConfig, lines: Sequence[Any], feed: str | None = None,
                 state: dict | None = None, received: float | None = None,
                 max_ahead: float | None = QcSettings.future_tolerance) -> BatchResult:
    """Parse lines of one sensor and store them (with the feed checkpoint) in one transaction.

    Parameters
    ----------
    store : Store
    sensor : SensorConfig
        Line format, station and role (the sensor key in the store).
    lines : sequence of RawLine or str
        Raw lines from a feed, or plain text lines (then ``received`` is their receive time).
    feed : str, optional
        Feed name (or ingest source) recorded with the rejects; with ``state`` the checkpoint key.
    state : dict, optional
        The feed's checkpoint covering these lines.
    max_ahead : float, optional
        A line stamped more than this [s] after it was received goes to the reject log,
        never into the store (the station's ``qc.future_tolerance``; QARTOD Test 1). A
        time stamp from the future would otherwise move the processing window, the feed's
        age and the alert rules' marks. None: not checked.
    """
    if not lines and state is None:
        return EMPTY_BATCH
    now = time.time() if received is None else received
    if lines and hasattr(lines[0], "text"):
        texts = [ln.text for ln in lines]
        linenos = [ln.lineno if ln.lineno is not None else -1 for ln in lines]
        recv = np.array([ln.received for ln in lines], dtype=float)
    else:
        texts = list(lines)
        linenos = None
        recv = now
    parsed = parse_lines(texts, sensor.format, recv, linenos, max_ahead)
    return store.write_batch(sensor.station, sensor.role, parsed.t, parsed.value, parsed.time_source,
                             parsed.rejects, feed=feed, state=state, skipped=parsed.skipped, now=now,
                             lines=row_lines(parsed, texts))


def row_lines(parsed, texts: Sequence[Any]) -> tuple:
    """(line numbers, texts) of the parsed rows, for the reject log's conflicting repeats.
    Each text is looked up when asked for (only a conflicting repeat's is), so a batch
    builds no list of row texts."""
    return parsed.lineno, RowTexts(texts, parsed.index)


class RowTexts:
    """The text of each parsed row (``texts[index[j]]``, bytes decoded), looked up on demand.

    Parameters
    ----------
    texts : sequence of str or bytes
        The batch's lines.
    index : ndarray of int or None
        Position in ``texts`` of each parsed row (None: texts unknown, each row's is None).
    """

    __slots__ = ("texts", "index")

    def __init__(self, texts: Sequence[Any], index: np.ndarray | None):
        self.texts = texts
        self.index = index

    def __getitem__(self, j: int) -> str | None:
        if self.index is None:
            return None
        text = self.texts[int(self.index[j])]
        return text.decode("utf-8", "backslashreplace") if isinstance(text, bytes) else text


#: A refit is checked on the most recent days of quality-controlled data that the constants in
#: use have not seen, up to this many [days]: a week holds 14 tides and a spring-neap half-cycle
#: (common practice, no source).
REFIT_CHECK_DAYS = 7.0
#: ... and needs at least this much of it [days] (two tidal days).
REFIT_CHECK_MIN_DAYS = 2.0
#: The candidate may hindcast that far worse [m RMS] and still be taken: half a millimetre, below
#: what a gauge resolves (common practice, no source).
REFIT_TOLERANCE_M = 0.0005


def refit_station(store: Store, station: StationConfig, now: float | None = None, use: bool | None = None,
                  span_days: float | None = None, robust: Any = True, infer: Any = "auto",
                  force: bool = False, stop: threading.Event | None = None) -> dict:
    """Fit constants to a station's quality-controlled primary record and keep the fit.

    Samples flagged fail (4) or missing (9) never enter the fit (design rule). The fit is
    meant for use when ``use`` (default: when the station's constants come from its history).
    The record is read from the store in chunks (:func:`predictor.harmonic_fit_chunks`), so the
    fit's memory does not grow with the history. ``infer`` goes to the fit (default
    ``"auto"``: neighbours the record cannot resolve are inferred from equilibrium ratios;
    Foreman 1977, sec. 2.3) and is recorded in the fit's metadata.

    Good constants are never replaced by worse ones: when a fit is already in use, the
    candidate is fitted without the recent days that fit has not seen (up to
    :data:`REFIT_CHECK_DAYS`), both hindcast those days, and the candidate is put in use only
    if its RMS error there is no worse (within :data:`REFIT_TOLERANCE_M`). Otherwise it is kept
    for comparison, with the numbers in its note. Without enough unseen days (under
    :data:`REFIT_CHECK_MIN_DAYS`) the constants in use stay. ``force`` (an operator's
    ``refit --use``) skips the check. ``stop``, once set, ends the fit at its next chunk of
    the record (a daemon that is stopping does not wait for a fit of years).

    Returns
    -------
    dict
        The fit's row: id, fitted_at, start, end, n, rms, variance_explained, in_use, model,
        and ``check`` (what the hindcast comparison found, in words; empty without one).

    Raises
    ------
    predictor.errors.FitError
        Too little history, a fit that fails, or one stopped by ``stop``.
    """
    now = time.time() if now is None else now
    # the fit span ends at the last usable sample: one stamped in the future, or failed,
    # would leave the span empty
    end = store.last_time(station.id, "primary", until=int(now + future_tolerance(station)), usable=True)
    if end is None:
        raise FitError(f"station {station.id}: no usable observations in {store.path} to fit")
    span = (station.fit_span_days if span_days is None else span_days) * 86400
    record = _FitRecord(store, station.id, int(end - span), int(end), stop)
    _enough(station, record)
    in_use = station.fit_from_history if use is None else use
    current = store.fit_in_use(station.id) if in_use and not force else None
    check = ""
    if current is None:
        model = _fit_record(station, record, robust, infer)
    else:
        model, in_use, check = _checked_fit(station, record, current, robust, infer)
    model.datum = "station"  # the store keeps levels on the station datum
    md = model.metadata or {}
    start_t = int(pd.Timestamp(md["record_start"]).timestamp())
    end_t = int(pd.Timestamp(md["record_end"]).timestamp())
    n = int(md["n_samples"])
    fid = store.add_fit(station.id, fitted_at=int(now), start=start_t, end=end_t, n=n,
                        rms=float(md.get("rms", float("nan"))),
                        variance_explained=float(md.get("variance_explained", float("nan"))),
                        constants=model_to_text(model), in_use=in_use,
                        robust=md.get("method", "").startswith("robust"), note=check)
    have = (end_t - start_t) / 86400
    log.info("station %s: fit #%d over %.1f days, rms %.3f m%s%s", station.id, fid, have,
             md.get("rms", float("nan")), " (in use)" if in_use else "", f"; {check}" if check else "")
    return {"id": fid, "fitted_at": int(now), "start": start_t, "end": end_t, "n": n,
            "rms": md.get("rms"), "variance_explained": md.get("variance_explained"), "in_use": in_use,
            "model": model, "check": check}


_NOT_FITTED = (4, 9)  # QARTOD fail and missing: never in a fit


@dataclass(frozen=True)
class _FitRecord:
    """A station's primary record between two times [Unix s] (inclusive) as a fit reads it:
    in chunks from the store, samples flagged fail (4) or missing (9) left out, so a fit's
    memory does not grow with the history (``predictor.harmonic_fit_chunks``)."""

    store: Store
    station: str
    start: int
    end: int
    stop: threading.Event | None = None

    def __call__(self):
        for t, value, flag in self.store.observation_chunks(self.station, "primary", self.start, self.end):
            if self.stop is not None and self.stop.is_set():
                raise FitError(f"station {self.station}: fit stopped, the daemon is stopping")
            keep = ~np.isin(flag, _NOT_FITTED)
            yield t[keep], value[keep]

    def between(self, start: int, end: int) -> "_FitRecord":
        return _FitRecord(self.store, self.station, int(start), int(end), self.stop)

    def frame(self) -> pd.DataFrame:
        """The samples in memory (a short span only: the hindcast check's days)."""
        parts = list(self())
        t = np.concatenate([p[0] for p in parts]) if parts else np.empty(0, np.int64)
        v = np.concatenate([p[1] for p in parts]) if parts else np.empty(0)
        return pd.DataFrame({"value": v}, index=pd.to_datetime(t, unit="s", utc=True))


def _enough(station: StationConfig, record: _FitRecord) -> None:
    first, last = _usable_span(record)
    have = (last - first) / 86400 if first is not None and last is not None and last > first else 0.0
    if have < station.fit_min_days:
        raise FitError(f"station {station.id}: {have:.1f} days of usable history, "
                        f"stations[].fit_min_days = {station.fit_min_days:g} needed for a fit")


def _usable_span(record: _FitRecord) -> tuple[int | None, int | None]:
    """First and last sample a fit of ``record`` reads (flags 4 and 9 left out) [Unix s]."""
    first, last, _ = record.store.observation_span(record.station, "primary", record.start, record.end,
                                                   without=_NOT_FITTED)
    return first, last


def _fit_record(station: StationConfig, record: _FitRecord, robust: Any, infer: Any):
    try:
        meta = {"station": station.id, "infer": infer if isinstance(infer, str) else
                ("none" if not infer else "given")}
        return harmonic_fit_chunks(record, robust=robust, infer=infer, metadata=meta)
    except ValueError as exc:
        raise FitError(f"station {station.id}: fit failed: {exc}") from None


def _hindcast_rms(model, obs: pd.DataFrame) -> float:
    return float(np.sqrt(np.mean((obs["value"].to_numpy() - model.predict(obs.index)) ** 2)))


def _checked_fit(station: StationConfig, record: _FitRecord, current: dict, robust: Any,
                 infer: Any) -> tuple[Any, bool, str]:
    """The candidate fitted without the days the fit in use has not seen, whether it hindcasts
    those days no worse, and the comparison in words."""
    cur_model = model_from_text(current["constants"], f"fit {current['id']}")
    _, last_t = _usable_span(record)
    split_t = max(int(current["end"]), int(last_t) - int(REFIT_CHECK_DAYS * 86400))
    unseen = record.between(split_t + 1, record.end).frame()
    train = record.between(record.start, split_t)
    days = (unseen.index[-1] - unseen.index[0]).total_seconds() / 86400 if len(unseen) > 1 else 0.0
    if days < REFIT_CHECK_MIN_DAYS:
        model = _fit_record(station, record, robust, infer)
        return model, False, (f"kept for comparison: only {days:.1f} days of data since fit #{current['id']} "
                              f"in use, {REFIT_CHECK_MIN_DAYS:g} needed to compare hindcasts")
    _enough(station, train)
    model = _fit_record(station, train, robust, infer)
    new, old = _hindcast_rms(model, unseen), _hindcast_rms(cur_model, unseen)
    words = (f"hindcast of the {days:.1f} days from {unseen.index[0]:%Y-%m-%d %H:%MZ} (unseen by both): "
             f"rms {new:.3f} m against {old:.3f} m for fit #{current['id']} in use")
    if new <= old + REFIT_TOLERANCE_M:
        return model, True, "put in use: " + words
    return model, False, "not put in use, worse than the constants in use: " + words


# --------------------------------------------------------------------------- runtime

@dataclass
class FeedRuntime:
    name: str
    sensor: SensorConfig
    feed: Any


@dataclass
class StationRuntime:
    cfg: StationConfig
    model: Any = None
    model_source: str = ""
    view: Any = None
    extremes_span: tuple[float, float] = (math.inf, -math.inf)
    forecaster: Any = None          # monitor.surge.forecast.SurgeForecaster, relearnt when relearn_due says
    history_at: float = -math.inf
    storm_seen: bool = False        # storm conditions in a forecast state since the forecaster learnt
    replay_clock: bool = False
    last_fit_try: float = -math.inf
    new_model: tuple | None = None  # (model, source) from a fit on the fits worker, taken between passes
    diag_at: float = -math.inf      # data time of the last drift and clock diagnostics [Unix s]
    diag_phase: float = 0.0         # fraction of daemon.diagnostics_minutes this station's runs are offset by
    diag: dict = field(default_factory=dict)  # their results: "drift", "clock.primary", ...
    diag_faults: tuple | None = field(default=None, repr=False)  # (diag, settings, the faults they give)
    diag_memory: DiagnosticsMemory = field(default_factory=DiagnosticsMemory, repr=False)  # between runs
    predicted: "PredictionMemo | None" = field(default=None, repr=False)
    qc_context: QcContext = field(default_factory=QcContext, repr=False)  # QC's record between passes
    # the rules' state rows as the last evaluation stored them (the daemon is their one writer)
    alert_memo: engine.StateMemo = field(default_factory=engine.StateMemo, repr=False)
    _extremes: "Frozen | None" = field(default=None, repr=False)
    turns: "TideTurns | None" = field(default=None, repr=False)  # the extremes as arrays
    # The station's derived rows of the last hours, as the store holds them, for the
    # in-memory pass; valid for the model it was made with, after the pass ending at tail_end.
    tail: "DerivedTail | None" = field(default=None, repr=False)
    tail_model: Any = field(default=None, repr=False)
    tail_end: int | None = None
    horizon: tuple | None = field(default=None, repr=False)  # (cfg, its longest clear_horizon)
    # (hw_t, slot) of the forecasts steady passes put in hw_forecast_log, committed or in the
    # pass's open transaction (forgotten with it, _forget_pass): never logged again
    slots_logged: set = field(default_factory=set, repr=False)

    # The tide's extremes (kept about a week) are kept as plain arrays: the pass reads
    # ``turns``; code that needs the table gets a new pandas object at each read (see Frozen).
    @property
    def extremes(self) -> pd.DataFrame | None:
        """Predicted high and low waters around the window (``time``, ``level``, ``kind``)."""
        return None if self._extremes is None else self._extremes.thaw()

    @extremes.setter
    def extremes(self, frame: pd.DataFrame | None) -> None:
        self._extremes = None if frame is None else Frozen(frame)
        self.turns = None if frame is None else TideTurns(frame)


class TideTurns:
    """The predicted high and low waters of a station as plain arrays, for the pass.

    Made once with the extremes (about once a week): the stands of
    :func:`monitor.surge.residual.tide_stands`, and every time as
    :meth:`pandas.Timestamp.timestamp` gives it, so what the pass reads is what the table
    gave before, without a pandas object per pass.
    """

    def __init__(self, frame: pd.DataFrame):
        ext = surge_residual.tide_stands(frame)
        self.t = ext["t"].to_numpy(dtype=float)
        self.t_ns = pd.DatetimeIndex(ext["time"]).as_unit("ns").asi8 if len(ext) else np.empty(0, np.int64)
        self.high = (ext["kind"] == "high").to_numpy()
        self.stand = ext["stand"].to_numpy()
        self.level = ext["level"].to_numpy(dtype=float)
        self.stamp = np.array([x.timestamp() for x in ext["time"]], dtype=float)
        lows = frame[frame["kind"] == "low"]
        self.low_t = np.array([x.timestamp() for x in lows["time"]], dtype=float)
        # the high waters alone as Python lists, for the pass's look-up (high_waters_after)
        hi = np.flatnonzero(self.high)
        self._hi = (self.t[hi].tolist(), self.t_ns[hi].tolist(), self.stand[hi].tolist(),
                    self.level[hi].tolist(), self.stamp[hi].tolist())
        self._hi_plain = bool(np.all(np.diff(self.t[hi]) >= 0)) and not np.isnan(self.level[hi]).any()

    def high_waters(self, after: pd.Timestamp, until: pd.Timestamp) -> list[tuple[float, float]]:
        """(time [Unix s], level [m]) of the high waters after ``after`` up to ``until``, at
        least the next (as :func:`monitor.surge.residual.high_waters_within`)."""
        rows = surge_residual.high_water_rows(self.t, self.t_ns, self.high, self.stand, self.level,
                                              after.as_unit("ns").value / 1e9, until.as_unit("ns").value)
        return [(float(self.stamp[i]), float(self.level[i])) for i in rows]

    def high_waters_after(self, t: float, horizon_ns: int) -> list[tuple[float, float]]:
        """:meth:`high_waters` after ``pd.Timestamp(t, unit="s")`` up to ``horizon_ns`` [ns]
        later, with no pandas object made for an integral ``t`` [Unix s] (the pass's)."""
        if float(t).is_integer() and abs(t) < surge_forecast.EXACT_SECONDS:
            after_s, until_ns = float(t), int(t) * 1_000_000_000 + int(horizon_ns)
        else:
            now = pd.Timestamp(t, unit="s", tz="UTC")
            after_s = now.as_unit("ns").value / 1e9
            until_ns = (now + pd.Timedelta(int(horizon_ns), unit="ns")).as_unit("ns").value
        if not self._hi_plain:
            rows = surge_residual.high_water_rows(self.t, self.t_ns, self.high, self.stand, self.level,
                                                  after_s, until_ns)
            return [(float(self.stamp[i]), float(self.level[i])) for i in rows]
        return self._high_waters_plain(after_s, until_ns)

    def _high_waters_plain(self, after_s: float, until_ns: int) -> list[tuple[float, float]]:
        """:func:`monitor.surge.residual.high_water_rows` walked in Python over the high waters
        (a pass looks at one or two stands): each stand from the first after ``after_s``
        [Unix s] that starts by ``until_ns`` [ns] (and the first, whenever it starts) gives
        its highest peak (the first of equal ones), kept if by ``until_ns`` (the first always)."""
        t, t_ns, stand, level, stamp = self._hi
        k, n = bisect.bisect_right(t, after_s), len(t)
        out: list[tuple[float, float]] = []
        while k < n and (not out or t_ns[k] <= until_ns):
            best, e = k, k + 1
            while e < n and stand[e] == stand[k]:
                if level[e] > level[best]:
                    best = e
                e += 1
            if not out or t_ns[best] <= until_ns:
                out.append((stamp[best], level[best]))
            k = e
        return out


class DerivedTail:
    """A station's ``derived`` rows of the last hours, held between passes as the store
    holds them (the daemon is their only writer, and every row it writes goes here too).

    ``since`` is the time from which the rows are all here [Unix s].
    """

    def __init__(self, t: np.ndarray, columns: dict[str, np.ndarray], since: int):
        self.t = np.asarray(t, dtype=np.int64)
        self.columns = {c: np.asarray(columns[c], dtype=float) for c in DERIVED_COLUMNS}
        self.since = int(since)
        #: the last steady pass's computation (:class:`monitor.surge.residual.DerivedMemo`):
        #: its rows from the first new or changed one on are the only ones made again
        self.memo: surge_residual.DerivedMemo | None = None

    @classmethod
    def read(cls, store: Store, station: str, since: int, end_t: int) -> "DerivedTail":
        t, cols = store.derived_arrays(station, since, end_t)
        return cls(t, cols, since)

    def differs(self, t: np.ndarray, columns: dict[str, np.ndarray]) -> np.ndarray:
        """Which of the rows at times ``t`` are not held, or held with other values."""
        if not len(self.t) or (len(t) and t[0] > self.t[-1]):
            return np.ones(len(t), dtype=bool)  # all after the rows held (a steady pass's new rows)
        pos = self.t.searchsorted(t)
        held = pos < len(self.t)
        held[held] = self.t[pos[held]] == t[held]
        out = ~held
        p = pos[held]
        for c in DERIVED_COLUMNS:
            old, new = self.columns[c][p], columns[c][held]
            out[held] |= ~((old == new) | (np.isnan(old) & np.isnan(new)))
        return out

    def merge(self, t: np.ndarray, columns: dict[str, np.ndarray], keep_from: int) -> None:
        """Take the rows written at times ``t``, every row from ``t[0]`` on (they replace
        those held from then), and forget the rows before ``keep_from`` [Unix s]."""
        if len(t):
            cut = int(self.t.searchsorted(t[0], side="left"))
            self.t = np.concatenate([self.t[:cut], t])
            self.columns = {c: np.concatenate([self.columns[c][:cut], columns[c]]) for c in DERIVED_COLUMNS}
        first = int(self.t.searchsorted(keep_from, side="left"))
        self.t = self.t[first:]
        self.columns = {c: v[first:] for c, v in self.columns.items()}
        self.since = max(self.since, int(keep_from))

    def smoothed_between(self, a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Times [Unix s] and smoothed residual [m] of the rows in [a, b]."""
        i, j = self.t.searchsorted(a, side="left"), self.t.searchsorted(b, side="right")
        return self.t[i:j].astype(float), self.columns["smoothed"][i:j]


class Frozen:
    """A DataFrame or Series kept between processing passes as plain numpy arrays;
    :meth:`thaw` makes a new pandas object from them at each read.

    With pandas' copy-on-write every column, slice or filter taken of a pandas object
    leaves a weak reference on its blocks and index, pruned only once such a list has
    doubled past its last size; a frame kept for days and read every pass piled them up:
    the daemon's memory grew by megabytes a day at 500 stations (``benchmarks/bench_soak.py``).
    Numpy arrays keep no such list.
    """

    def __init__(self, obj: pd.DataFrame | pd.Series):
        self.series = isinstance(obj, pd.Series)
        self.name = obj.name if self.series else None
        frame = obj.to_frame(name="__value__") if self.series else obj
        self.index = self._freeze(frame.index)
        self.columns = [(c, self._freeze(frame[c])) for c in frame.columns]

    @staticmethod
    def _freeze(values: Any) -> tuple:
        if isinstance(values, pd.RangeIndex):
            return ("range", values.start, values.stop, values.step, values.name)
        if isinstance(values, pd.DatetimeIndex) and values.tz is not None and len(values) > 2:
            ns = values.as_unit("ns").asi8
            step = int(ns[1] - ns[0])
            if step > 0 and (np.diff(ns) == step).all():  # a regular grid (a resampled history) costs
                return ("grid", int(ns[0]), step, len(ns), values.dtype, values.name)  # nothing to keep
        dtype = values.dtype
        name = getattr(values, "name", None)
        if isinstance(dtype, pd.DatetimeTZDtype):  # kept as UTC
            utc = values.tz_convert("UTC") if isinstance(values, pd.Index) else values.dt.tz_convert("UTC")
            return ("tz", np.array(utc.tz_localize(None) if isinstance(values, pd.Index) else
                                   utc.dt.tz_localize(None), copy=True), dtype, name)
        return ("plain", np.array(values, copy=True), dtype, name)

    @staticmethod
    def _thaw(kept: tuple, index: pd.Index | None = None) -> Any:
        if kept[0] == "range":
            return pd.RangeIndex(kept[1], kept[2], kept[3], name=kept[4])
        if kept[0] == "grid":
            _, first, step, n, dtype, name = kept
            ns = first + step * np.arange(n, dtype=np.int64)
            return pd.DatetimeIndex(ns.astype("datetime64[ns]"), name=name).tz_localize("UTC") \
                .tz_convert(dtype.tz).as_unit(dtype.unit)
        kind, arr, dtype, name = kept
        if index is None:  # an index
            if kind == "tz":
                return pd.DatetimeIndex(arr.copy(), name=name).tz_localize("UTC").tz_convert(dtype.tz)
            return pd.Index(arr.copy(), dtype=dtype, name=name)
        if kind == "tz":
            return pd.Series(pd.DatetimeIndex(arr.copy()).tz_localize("UTC").tz_convert(dtype.tz),
                             index=index, name=name)
        return pd.Series(arr.copy(), index=index, dtype=dtype, name=name)

    def thaw(self) -> pd.DataFrame | pd.Series:
        index = self._thaw(self.index)
        cols = {c: self._thaw(kept, index) for c, kept in self.columns}
        if self.series:
            return cols["__value__"].rename(self.name)
        return pd.DataFrame(cols, index=index)


def open_feed_runtimes(cfg: Config) -> list[FeedRuntime]:
    """Open every configured feed (from the start; the caller restores the checkpoints).

    Raises
    ------
    monitor.errors.FeedError
        A feed that cannot be opened (a replay file missing); those opened are closed again.
    """
    out: list[FeedRuntime] = []
    try:
        for st in cfg.stations:
            for sensor in st.sensors.values():
                if sensor.feed is not None:
                    feed = feeds_mod.open_feed(sensor.feed, sensor.feed_name,
                                               capture_dir=cfg.captures / sensor.feed_name)
                    out.append(FeedRuntime(sensor.feed_name, sensor, feed))
    except BaseException:
        for fr in out:
            fr.feed.close()
        raise
    return out


def preflight(cfg: Config) -> dict[str, str]:
    """Everything ``run`` can check before it creates anything (store, lock, log file).

    Every configured constants file is read (and put on its station's datum), and the store's
    path (and, with a serial line, the capture folder) must be one where the store and its
    lock can be created: a broken constants file found after the store was made would leave
    an empty store and a lock file behind.

    Returns
    -------
    dict
        Station id -> where its constants come from, in words, for stations with a constants file.

    Raises
    ------
    monitor.errors.MonitorError
        Naming the file or key and what is wrong.
    """
    sources = {st.id: load_model(None, st)[1] for st in cfg.stations if st.constants is not None}
    check_store_path(cfg.store_path)
    if any(getattr(s.feed, "kind", None) == "serial" for st in cfg.stations for s in st.sensors.values()):
        check_folder(cfg.captures, "store.captures")
    return sources


class PredictionMemo:
    """A model's predicted tide at the sample times already asked for.

    A processing pass asks for the same times more than once (quality control predicts
    its day of context for each level sensor, then the residual the primary's last hours),
    and the next pass asks for nearly all of them again, one sample later. Only times not
    asked for before are predicted; :meth:`forget_before` bounds what is kept.
    """

    def __init__(self, model: Any):
        self.model = model
        self._t = np.empty(0, np.int64)  # [ns since 1970, UTC], sorted, unique
        self._v = np.empty(0)            # [m]

    def predict(self, times: Any) -> np.ndarray:
        """The model's prediction at ``times`` (as ``TideModel.predict``) [m]."""
        return self._at(pd.DatetimeIndex(times).as_unit("ns").asi8)

    def predict_seconds(self, t: np.ndarray) -> np.ndarray:
        """The prediction at times ``t`` [Unix s, integers] [m], with no pandas object made."""
        return self._at(np.asarray(t, dtype=np.int64) * 1_000_000_000)

    def _at(self, t: np.ndarray) -> np.ndarray:
        pos = self._t.searchsorted(t)
        known = pos < len(self._t)
        known[known] = self._t[pos[known]] == t[known]
        if not known.all():
            new = np.unique(t[~known])
            v = np.asarray(self.model.predict(new.astype("datetime64[ns]")), dtype=float)
            order = np.argsort(np.concatenate([self._t, new]), kind="stable")
            self._t = np.concatenate([self._t, new])[order]
            self._v = np.concatenate([self._v, v])[order]
            pos = self._t.searchsorted(t)
        return self._v[pos]

    def forget_before(self, t: float) -> None:
        """Drop the times before ``t`` [Unix s] (the times are sorted: a slice from the first
        kept, no copy)."""
        first = int(self._t.searchsorted(int(t * 1e9), side="left"))
        if first:
            self._t, self._v = self._t[first:], self._v[first:]


class Daemon:
    """The running monitor: feeds, store, stations and the jobs that drive them."""

    def __init__(self, cfg: Config, store: Store, feeds: list[FeedRuntime] | None = None):
        self.cfg = cfg
        self.store = store
        self.feeds = feeds or []
        self.stop = threading.Event()
        self.done = threading.Event()
        self.empty_polls = 0
        self.delivered: set[str] = set()  # stations whose feeds delivered lines since their last pass
        self.feeds_done_at: float | None = None
        self.until_exhausted = False
        self.qc = qc
        self.qc_records = qc_records
        # The alert engine and the diagnostics run only for stations with rules.
        self.diag = self.engine = self.rules_mod = None
        if any(st.rules for st in cfg.stations):
            self.diag, self.engine, self.rules_mod = diagnostics, engine, rules
            # the rules' tables looked for once here, not at every pass (evaluate(schema_ready=True))
            engine.ensure_alert_schema(store.db)
        self.outbox = None
        self.claimer: str | None = None
        if cfg.mail is not None:
            self.outbox = outbox
            self.claimer = outbox.process_identity("daemon")
        self.outbox_worker: OutboxWorker | None = None
        # Every table the jobs write exists already: Store.open ran the schema migrations
        # (monitor/store/migrations.py), so no schema statement contends with the outbox thread.
        self.stations = {st.id: self._station_runtime(st) for st in cfg.stations}
        for i, rt in enumerate(self.stations.values()):
            rt.diag_phase = i / len(self.stations)
        # Replay feeds run the rules and the daily reports on the replayed clock, so a replayed
        # storm reads as it would have live. Delivery does not: the outbox keeps the wall clock.
        self.replay_clock = bool(self.stations) and all(rt.replay_clock for rt in self.stations.values())
        self.data_now: float | None = None
        self.live = LivePages(cfg) if cfg.live is not None else None
        self.scheduler: BackgroundScheduler | None = None  # while run() runs: fits go to its "fits" worker
        self._model_lock = threading.Lock()             # guards StationRuntime.new_model

    def _station_runtime(self, st: StationConfig) -> StationRuntime:
        model, source = load_model(self.store, st)
        view = None
        if self.rules_mod is not None:
            view = self.rules_mod.StationView(id=st.id, name=st.name, tz=st.tz, datums=dict(st.datums),
                                               notes=st.note, display_datum=st.display_datum,
                                               datum_note=st.datum_note,
                                               forms=getattr(self.cfg.mail, "forms", ()) or (),
                                               # as evaluate() would make them at each pass (its
                                               # subsets of the rules keep every level_above rule)
                                               marks=self.engine.station_marks(st.rules or ()))
        kinds = [getattr(s.feed, "kind", None) for s in st.sensors.values() if s.feed is not None]
        rt = StationRuntime(cfg=st, model=model, model_source=source, view=view,
                            replay_clock=bool(kinds) and all(k == "replay" for k in kinds))
        log.info("station %s: constants %s", st.id, source)
        return rt

    # ------------------------------------------------------------------ feeds
    def open_feeds(self) -> None:
        """Open every configured feed (unless given already) and restore it from its stored
        checkpoint."""
        if not self.feeds:
            self.feeds = open_feed_runtimes(self.cfg)
        for fr in self.feeds:
            fr.feed.restore(self.store.checkpoint(fr.name))

    def close_feeds(self) -> None:
        for fr in self.feeds:
            try:
                fr.feed.close()
            except Exception:  # closing must not stop the rest from closing
                log.exception("feed %s: close failed", fr.name)

    def poll(self) -> int:
        """Poll every feed once; each feed's lines and checkpoint commit together. Returns lines read."""
        total = 0
        for fr in self.feeds:
            if self.stop.is_set():
                break
            try:
                lines = fr.feed.poll()
                if not lines:
                    continue
                rt = self.stations.get(fr.sensor.station)
                res = ingest_lines(self.store, fr.sensor, lines, fr.name, fr.feed.state(),
                                   max_ahead=future_tolerance(rt.cfg if rt is not None else None))
            except MonitorError as exc:
                log.error("feed %s: %s", fr.name, exc)
                continue
            except Exception:
                log.exception("feed %s: poll failed; will retry", fr.name)
                continue
            total += len(lines)
            if rt is not None:
                self.delivered.add(rt.cfg.id)
            if res.rejected:
                log.warning("feed %s: %d line(s) rejected (see 'quaywatch status')", fr.name, res.rejected)
            log.debug("feed %s: %s", fr.name, res)
        self.empty_polls = 0 if total else self.empty_polls + 1
        return total

    def feeds_exhausted(self) -> bool:
        """All feeds finished (replays played out) or silent for ``daemon.idle_polls`` polls."""
        if not self.feeds:
            return True
        if all(getattr(fr.feed, "exhausted", False) for fr in self.feeds):
            return self.empty_polls >= 1
        return self.empty_polls >= self.cfg.daemon.idle_polls

    # ------------------------------------------------------------------ processing
    def process(self) -> int:
        """Process new data of every station, then rewrite the live pages that are due.
        Returns the number of stations with new data."""
        changed: set[str] = set()
        self.delivered.clear()
        for rt in self.stations.values():
            if self.stop.is_set():
                break
            try:
                if self.process_station(rt):
                    changed.add(rt.cfg.id)
            except Exception:
                log.exception("station %s: processing failed; will retry", rt.cfg.id)
        self.write_live(changed)
        report_quiet_repeats()  # the count of a repeated failure that has stopped
        return len(changed)

    def write_live(self, changed: set[str] | None = None) -> None:
        """Rewrite the live page of each station with new data (``changed``), and of each silent
        one once ``live.refresh`` has passed, so its page says STALE on time."""
        if self.live is None:
            return

        def clock(st: StationConfig) -> tuple[float, int]:
            rt = self.stations[st.id]
            now = self.data_now if (rt.replay_clock and self.data_now is not None) else time.time()
            return now, int(now + future_tolerance(st))

        self.live.update(self.store, [(rt.cfg, rt.model) for rt in self.stations.values()], changed or set(), clock)

    def process_station(self, rt: StationRuntime, now: float | None = None) -> int:
        """Process a station's data newer than its mark; returns samples processed.

        Late data -- rows older than the mark, of any sensor, say a backup whose feed lags
        the primary's or a gap filled afterwards -- is processed again from the earliest
        time a batch touched (the store's ``touched.STATION``, folded into the mark here,
        :meth:`Store.take_touched`, in a transaction of its own). When every row stored
        since the last pass lies after the mark (the steady case) the mark stays as it is,
        and ``touched`` is cleared by the first window once it sees those rows
        (:meth:`Store.clear_touched`, in a steady pass inside its transaction): a batch
        landing meanwhile with an earlier time keeps it, and a failed pass leaves it.
        """
        st = rt.cfg
        levels = [r for r in st.sensors if r != "barometer"]
        # Nothing stamped beyond the clock (plus the timing test's tolerance) is processed:
        # the parser refuses such lines, and one left in the store by an older version must
        # not drag the window (and with it the rules' clock) into the future.
        horizon = self._horizon(rt, now)
        last, mark, touched = self.store.pass_bounds(st.id, levels, until=horizon)
        ends = [t for t in last.values() if t is not None]
        if not ends:
            return 0
        end_t = max(ends)
        clear = touched is not None
        if clear and (mark is None or touched <= mark):  # late rows (or nothing processed yet)
            mark, clear = self.store.take_touched(st.id), False
        if mark is not None and end_t <= mark:
            return 0
        if mark is None:
            starts = [t for t in (self.store.first_time(st.id, r) for r in levels) if t is not None]
            start_t = min(starts)
        else:
            start_t = mark + 1
        done = 0
        while start_t <= end_t and not self.stop.is_set():
            chunk_end = min(end_t, start_t + PROCESS_CHUNK - 1)
            done += self.process_window(rt, start_t, chunk_end, now, latest=chunk_end == end_t, clear_touched=clear)
            clear = False
            start_t = end_t + 1 if chunk_end >= end_t else self._next_data(st.id, levels, chunk_end, end_t)
        return done

    def _horizon(self, rt: StationRuntime, now: float | None = None) -> int:
        """The latest sample time that may be processed or show a feed alive [Unix s]: the
        wall clock (or ``now`` when a caller gives one) plus ``qc.future_tolerance``."""
        return int((time.time() if now is None else now) + future_tolerance(rt.cfg))

    def _next_data(self, station: str, levels: list[str], after: int, end_t: int) -> int:
        """Where the next window starts after ``after`` [Unix s]: the next second, or, across
        a span without a level sample (a station off the air, or one line stamped decades
        early that lowered the mark), the next sample -- so a lone sample never makes a pass
        step through empty weeks. ``end_t + 1`` when nothing is left up to ``end_t``."""
        nxt = [t for t in (self.store.first_time(station, r, after=after, until=end_t) for r in levels)
               if t is not None]
        return min(nxt) if nxt else end_t + 1

    def process_window(self, rt: StationRuntime, start_t: int, end_t: int, now: float | None = None,
                       latest: bool = True, clear_touched: bool = False) -> int:
        """The processing pipeline for one station over [start_t, end_t] (data time), in order:
        quality control, residual and smoothed residual (into ``derived``), skew surge of
        completed cycles, next high water forecast, alert rules; then the station's
        processing mark (``processed.STATION``) moves to ``end_t``.

        ``latest`` is false for the earlier chunks of a backfill or of late data: then
        no forecast is made and only the rules on samples run (the forecast, feed age
        and equipment faults describe the present, not that chunk).

        A steady pass (:meth:`_steady`) stores all of that in one write transaction, the
        forecaster's learn (which reads years of history) made before it; if the
        transaction fails, what the station holds in memory on the strength of its writes
        is forgotten (:meth:`_forget_pass`). Other passes commit each step on its own.

        ``clear_touched``: the station's ``touched.STATION`` is cleared when every row it
        records lies at or after ``start_t`` (:meth:`Store.clear_touched`; the first window
        of :meth:`process_station` when the mark did not move): in a steady pass inside its
        transaction, which sees every row stored before it began; otherwise before the
        window's first step reads the store.
        """
        now = (end_t if rt.replay_clock else time.time()) if now is None else now
        self._take_new_model(rt)
        self._maybe_fit(rt, now)
        steady = self._steady(rt, start_t, end_t, latest)
        if not steady:
            if clear_touched:
                self.store.clear_touched(rt.cfg.id, start_t)
            new, queued = self._window(rt, start_t, end_t, now, latest, steady)
            self.store.set_meta(f"processed.{rt.cfg.id}", str(end_t))
        else:
            # before the write transaction: a learn reads years of history (about a second),
            # and the store's other writers (the outbox thread) must not wait for it
            self._learn(rt, end_t, "barometer" in rt.cfg.sensors)
            try:
                with self.store.transaction():
                    new, queued = self._window(rt, start_t, end_t, now, latest, steady)
                    self._pass_intact(steady)
                    if clear_touched:
                        self.store.clear_touched(rt.cfg.id, start_t)
                    self.store.set_meta(f"processed.{rt.cfg.id}", str(end_t))
            except BaseException:
                self._forget_pass(rt)
                raise
        if queued:  # once committed: at once, not at the outbox's next turn, and off this thread
            self.wake_outbox()
        return new

    def _pass_intact(self, steady: bool) -> None:
        """In a steady pass: raise when its write transaction has ended early. After some
        errors (a full disk, an I/O error) SQLite rolls the transaction back itself, and a
        step that logs its error and goes on (the equipment-fault checks) would leave what
        comes after it -- the rules' writes, the processing mark -- to be stored on its own,
        outside the pass whose other writes are gone."""
        if steady and not self.store.conn.in_transaction:
            raise sqlite3.OperationalError("the pass's write transaction ended early (after the error logged "
                                           "before this); nothing of the pass is kept, the next pass does it again")

    @staticmethod
    def _forget_pass(rt: StationRuntime) -> None:
        """After a steady pass's transaction rolled back: forget what the station holds on
        the strength of the pass's writes (QC's rows with their flags as stored, the derived
        rows held, the forecasts known to be logged, the rules' state rows), so the next pass
        reads them from the store. (The diagnostics' memory needs no more: every pass marks
        its rows as changed, ``note_changed``, and the next run reads them again.)"""
        rt.qc_context.reset()
        rt.tail = None
        rt.slots_logged.clear()
        rt.alert_memo.forget()

    def _window(self, rt: StationRuntime, start_t: int, end_t: int, now: float, latest: bool,
                steady: bool) -> tuple[int, bool]:
        """:meth:`process_window`'s steps (``steady``: from memory, inside the pass's
        transaction). Returns the samples processed and whether mail was queued."""
        st, store = rt.cfg, self.store
        self.data_now = end_t if self.data_now is None else max(self.data_now, end_t)
        # quality control may write flags from a resid_window before the window on: the
        # diagnostics read those rows again at their next run
        rt.diag_memory.note_changed(start_t - (st.qc or self.qc.QcSettings()).resid_window)
        model = rt.model
        rs = self.cfg.residual
        # every row written or handed to the rules gets the smoothed value of the whole record
        lookback = surge_residual.smoothing_span_s(rs.median_minutes, rs.mean_minutes) + max(REWRITE_BACK, TREND_BACK)
        predicted = None
        if model is not None:
            if rt.predicted is None or rt.predicted.model is not model:
                rt.predicted = PredictionMemo(model)
            predicted = rt.predicted
            context_s = (st.qc or self.qc.QcSettings()).context_seconds()
            predicted.forget_before(start_t - max(context_s, lookback))

        # 1. quality control (writes per-test flags and observations.flag). If it fails, the
        # window fails and is retried on the next pass: samples nobody has checked must never
        # reach the alert rules (a spike would pass as "not evaluated").
        qc_results = self.qc_records.run_station_qc(store, st, st.qc, start_t, end_t, predicted, now=now,
                                                    context=rt.qc_context) or {}

        # 2.-4. residual into ``derived``, skew surges, forecasts: in memory in the steady
        # state, the full way otherwise
        if steady:
            done = self._pass_in_memory(rt, start_t, end_t, lookback)
        else:
            done = self._pass_full(rt, start_t, end_t, lookback, latest)
        if done is None:
            return 0, False
        new, samples, context = done

        # 5. alert rules, on the new samples and the hour before them (for the trend)
        if self.engine is not None and st.rules and rt.view is not None:
            rules = st.rules
            if latest:
                ctx = self._alert_context(rt, context, qc_results, now, end_t)
            else:
                ctx = None
                kinds = self.rules_mod.SAMPLE_KINDS
                rules = [r for r in rules if r.watch in kinds]
            samples = judged_samples(samples)
            self._pass_intact(steady)  # (the rules' context may have logged an error that ended it)
            events = []
            try:
                # in a steady pass's transaction: a rule that fails undoes its own writes alone
                # (its savepoint in evaluate); what else escapes evaluate comes before any rule
                # wrote, or after the transaction itself was lost
                events = self.engine.evaluate(store.db, rt.view, rules, samples, now=now, context=ctx,
                                              schema_ready=True, memo=rt.alert_memo)
            except Exception:
                if steady and not store.conn.in_transaction:
                    raise  # the pass's transaction itself is gone (an I/O error): nothing of it is stored
                log.exception("station %s: alert rules failed for this window", st.id)
            return new, bool(events)
        return new, False

    def _steady(self, rt: StationRuntime, start_t: int, end_t: int, latest: bool) -> bool:
        """Whether the window can be processed from what the station holds in memory: it
        follows the last pass directly (no late data, no restart), with the same model (no
        refit), is short (no catch-up) and is the present (no backfill chunk)."""
        return (latest and rt.model is not None and rt.tail is not None and rt.tail_model is rt.model
                and rt.predicted is not None and rt.predicted.model is rt.model and rt.turns is not None
                and rt.tail_end is not None and start_t == rt.tail_end + 1 and end_t - start_t <= STEADY_MAX
                and rt.tail.since <= start_t - FORECAST_BACK)

    def _pass_full(self, rt: StationRuntime, start_t: int, end_t: int, lookback: int,
                   latest: bool) -> tuple[int, pd.DataFrame, list | None] | None:
        """Residual, skew surges and forecasts of a window from the store, with pandas (the
        first pass, late data, a backfill, a refit); then the station's in-memory state is
        made again from the store. Returns (new samples, samples for the rules, forecasts)."""
        st, store, rs = rt.cfg, self.store, self.cfg.residual
        model = rt.model
        predicted = rt.predicted if model is not None else None
        rt.tail = None
        obs = store.observations(st.id, "primary", start_t - lookback, end_t)
        if obs.empty:
            return None
        pred = predicted.predict(obs.index) if predicted is not None else None
        pressure = None
        if "barometer" in st.sensors:
            pressure = store.observations(st.id, "barometer", start_t - lookback - 3600, end_t + 3600)["value"]
        full = surge_residual.derive(obs, pred, pressure, rs.median_minutes, rs.mean_minutes, rs.reference_pressure)
        d = full[full.index >= pd.Timestamp(start_t - REWRITE_BACK, unit="s", tz="UTC")]
        store.write_derived(st.id, d)
        new = int((d.index >= pd.Timestamp(start_t, unit="s", tz="UTC")).sum())

        context = None
        if model is not None:
            self._ensure_extremes(rt, start_t, end_t)
            # 3. skew surge, for cycles whose closing low water fell in this window
            self._skew_surges(rt, start_t, end_t)
            # 4. next high water forecast
            if latest:
                context = self._forecast(rt, start_t, end_t)
        samples = full.loc[full.index >= pd.Timestamp(start_t - TREND_BACK, unit="s", tz="UTC"),
                           ["observed", "predicted", "residual", "smoothed", "flag"]]
        if latest and model is not None:
            rt.tail = DerivedTail.read(store, st.id, end_t - TAIL_KEEP, end_t)
            rt.tail_model, rt.tail_end = model, end_t
        return new, samples, context

    def _pass_in_memory(self, rt: StationRuntime, start_t: int, end_t: int,
                        lookback: int) -> tuple[int, engine.Samples, list] | None:
        """:meth:`_pass_full` for a window that follows the last pass: the primary's
        observations of the residual's lookback taken as arrays from the QC context that has
        just judged the window (:meth:`_primary_rows`), the smoothed residual made again
        only from the first row whose inputs changed since the last pass
        (:meth:`_derive_in_memory`), only the derived rows that are new or changed written,
        the forecast's storm state taken from the rows held (:class:`DerivedTail`) and the
        coming high waters from :class:`TideTurns`. Stores what the full way stores."""
        st, store, rs = rt.cfg, self.store, self.cfg.residual
        tail, rt.tail = rt.tail, None  # any failure below: the next pass goes the full way
        t, value, flag = self._primary_rows(rt, start_t - lookback, end_t)
        if len(t) == 0:
            return None
        pressure = None
        if "barometer" in st.sensors:
            pt, pv, _ = store.observation_arrays(st.id, "barometer", start_t - lookback - 3600, end_t + 3600)
            ok = np.isfinite(pv)
            pressure = (pt[ok].astype(float), pv[ok])
        full, lo = self._derive_in_memory(tail, t, value, flag, rt.predicted.predict_seconds(t), pressure,
                                          int(t.searchsorted(start_t - max(REWRITE_BACK, TREND_BACK))),
                                          int(t.searchsorted(start_t - REWRITE_BACK)))
        rows = {c: full[c][lo:] for c in DERIVED_COLUMNS}
        changed = tail.differs(t[lo:], rows)
        new = int((t >= start_t).sum())
        self._ensure_extremes(rt, start_t, end_t)
        # the forecaster was learnt by process_window, before the pass's transaction
        with store.transaction():  # the pass's (or, alone, one commit for these rows)
            store.write_derived_rows(st.id, t[lo:][changed], {c: v[changed] for c, v in rows.items()})
            tail.merge(t[lo:], rows, end_t - TAIL_KEEP)
            self._skew_surges(rt, start_t, end_t)
            context = self._forecast_in_memory(rt, tail, start_t, end_t)
        k = t >= start_t - TREND_BACK
        samples = engine.Samples(t[k], {c: np.asarray(full[c][k], dtype=float)
                                        for c in ("observed", "predicted", "residual", "smoothed", "flag")})
        rt.tail, rt.tail_end = tail, end_t
        return new, samples, context

    def _derive_in_memory(self, tail: DerivedTail, t: np.ndarray, value: np.ndarray, flag: np.ndarray,
                          predicted: np.ndarray, pressure: tuple | None, used: int,
                          written: int) -> tuple[dict[str, np.ndarray], int]:
        """The primary's derived columns of the rows from ``used`` on [index] (those the rules
        or the store get: ``written`` on go to the store), bit for bit those of
        :func:`monitor.surge.residual.derive_arrays` over the whole lookback, the smoothed
        residual made again only from the first row whose inputs changed since the last pass
        (a new sample, a flag quality control revised, an override), with the memo the tail
        keeps (:attr:`DerivedTail.memo`). Returns them and the first row [index, >=
        ``written``] that may differ from the rows held: the rows before it are held as they are."""
        rs = self.cfg.residual
        full, changed, tail.memo = surge_residual.derive_arrays_again(
            tail.memo, t, value, flag, predicted, pressure, rs.median_minutes, rs.mean_minutes,
            rs.reference_pressure, first=used)
        return full, max(changed, written)

    def _primary_rows(self, rt: StationRuntime, a: int, end_t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The primary's observations with ``a <= t <= end_t`` as :meth:`Store.observation_arrays`
        reads them (times [Unix s], values [m], stored flags), taken from the station's QC
        context when it has just judged this window on the store's connection and holds rows
        from ``a`` on (it holds every stored row from its first on, with the flags as just
        written; another writer's flags make it read them again before this), else read
        from the store."""
        ctx = rt.qc_context
        held = ctx.sensors.get("primary")
        if (held is None or ctx.end_t != end_t or ctx.key is None or ctx.key[0] is not self.store.conn
                or not len(held.t) or held.t[0] > a):
            return self.store.observation_arrays(rt.cfg.id, "primary", a, end_t)
        i, j = held.t.searchsorted(a, side="left"), held.t.searchsorted(end_t, side="right")
        return held.t[i:j].copy(), held.v[i:j].copy(), held.flag[i:j].astype(np.int64)

    def _skew_surges(self, rt: StationRuntime, start_t: int, end_t: int) -> None:
        """Skew surges of the cycles whose closing low water fell in this window."""
        lt = rt.turns.low_t
        closing = lt[(lt > start_t - REWRITE_BACK) & (lt <= end_t)]
        if len(closing):
            st = rt.cfg
            ext = rt.extremes
            a = int(closing.min() - 2 * surge_residual.HALF_M2 - 3600)
            o = self.store.observations(st.id, "primary", a, end_t)
            o = o[~o["flag"].isin((4, 9))]["value"]
            ss = surge_residual.skew_surges(o, ext)
            if len(ss):
                self.store.write_skew_surges(st.id, ss[ss["hw_t"] >= a + 3600])

    def _ensure_extremes(self, rt: StationRuntime, start_t: float, end_t: float) -> None:
        # Kept while the list reaches 2 days past both ends of the window: a tidal cycle
        # (about 12.4 h, up to a day where the tide is diurnal) on either side is what skew
        # surges and the next high water need. Made 3 days back and 10 ahead (past a whole
        # backfill chunk) so a live daemon remakes it about once a week, not every pass.
        lo, hi = rt.extremes_span
        if rt.turns is not None and lo <= start_t - 2 * 86400 and hi >= end_t + 2 * 86400:
            return
        a, b = start_t - 3 * 86400, max(end_t, start_t + PROCESS_CHUNK) + 10 * 86400
        rt.extremes = rt.model.high_low(pd.Timestamp(a, unit="s", tz="UTC"), pd.Timestamp(b, unit="s", tz="UTC"))
        rt.extremes_span = (a, b)

    def _forecast(self, rt: StationRuntime, start_t: int, end_t: int) -> list[dict]:
        """Forecast every predicted high water within the station's longest ``clear_horizon``
        (at least the next one) from the storm state, as issued at the end of the window and
        at each half hour of it (so a long window -- a backfill, a fast replay -- is judged
        by the forecast of its own time, not of its end). Each is stored as the latest
        forecast of its high water and kept in the forecast log. Returns them all, in the
        order issued."""
        st = rt.cfg
        horizon = self._horizon_delta(rt)
        barometer = "barometer" in st.sensors
        self._learn(rt, end_t, barometer)
        back = FORECAST_BACK
        recent = self.store.derived(st.id, start_t - back, end_t)["smoothed"].dropna()
        pressure_now = None
        if barometer:
            o = self.store.observations(st.id, "barometer", start_t - back, end_t)
            pressure_now = o["value"][~o["flag"].isin((4, 9))]
        fcs: list[dict] = []
        for at in self._issue_times(start_t, end_t):
            state = surge_forecast.storm_state(recent, at, pressure_now, barometer=barometer)
            if not np.isfinite(state.residual) or at - state.t > 3600:
                continue  # no live residual then (a gap): no forecast
            rt.storm_seen |= state.storm
            now = pd.Timestamp(state.t, unit="s", tz="UTC")
            hws = surge_residual.high_waters_within(rt.extremes, now, now + horizon)
            fcs += [rt.forecaster.forecast(state, row.time.timestamp(), float(row.level)) for row in hws.itertuples()]
        self._keep_forecasts(st.id, fcs)
        return fcs

    def _forecast_in_memory(self, rt: StationRuntime, tail: DerivedTail, start_t: int, end_t: int) -> list[dict]:
        """:meth:`_forecast` from the rows held in memory and the extremes as arrays (the
        forecaster learnt by the caller, outside its transaction)."""
        st = rt.cfg
        horizon = self._horizon_delta(rt)
        barometer = "barometer" in st.sensors
        rt_s, rv = tail.smoothed_between(start_t - FORECAST_BACK, end_t)
        pressure_now = None
        if barometer:
            pt, pv, pf = self.store.observation_arrays(st.id, "barometer", start_t - FORECAST_BACK, end_t)
            ok = (pf != 4) & (pf != 9)
            pressure_now = (pt[ok].astype(float), pv[ok])
        fcs: list[dict] = []
        for at in self._issue_times(start_t, end_t):
            state = surge_forecast.storm_state_arrays(rt_s, rv, at, pressure_now, barometer=barometer)
            if not math.isfinite(state.residual) or at - state.t > 3600:
                continue  # no live residual then (a gap): no forecast
            rt.storm_seen |= state.storm
            fcs += [rt.forecaster.forecast(state, hw_t, level)
                    for hw_t, level in rt.turns.high_waters_after(state.t, horizon.value)]
        self._keep_forecasts(st.id, fcs, rt.slots_logged)
        return fcs

    @staticmethod
    def _horizon_delta(rt: StationRuntime) -> pd.Timedelta:
        """The station's longest ``clear_horizon``, made once per configuration (frozen)."""
        made = rt.horizon
        if made is None or made[0] is not rt.cfg:
            delta = pd.Timedelta(seconds=max((getattr(r, "clear_horizon", 0.0) for r in rt.cfg.rules or ()),
                                             default=0.0))
            made = rt.horizon = (rt.cfg, delta)
        return made[1]

    @staticmethod
    def _issue_times(start_t: int, end_t: int) -> list[int]:
        """Each half hour of the window, and its end [Unix s]."""
        slot = surge_forecast.LOG_SLOT_S
        return [*range(-(-start_t // slot) * slot, end_t, slot), end_t]

    def _learn(self, rt: StationRuntime, end_t: int, barometer: bool) -> None:
        """Relearn the station's forecaster from its history when
        :func:`monitor.surge.forecast.relearn_due` says so (never sooner than ``HISTORY_REFRESH``
        of data time after the last learn)."""
        st, rs = rt.cfg, self.cfg.residual
        if rt.forecaster is None or surge_forecast.relearn_due(rt.forecaster, end_t - rt.history_at, rt.storm_seen,
                                                               least_s=HISTORY_REFRESH):
            grid, skew, pressure = surge_forecast.read_history(self.store.conn, st.id, end_t - int(rs.history_days * 86400),
                                                   end_t, barometer)
            rt.forecaster = surge_forecast.SurgeForecaster.learn(grid, skew, pressure, min_storms=rs.forecast_min_storms,
                                                     min_history_days=rs.min_history_days,
                                                     max_lead_h=self._horizon_delta(rt).total_seconds() / 3600)
            rt.history_at, rt.storm_seen = end_t, False

    def _keep_forecasts(self, station: str, fcs: list[dict], logged: set | None = None) -> None:
        """Each forecast as the latest of its high water, and in the forecast log (one
        transaction). ``logged``: the (hw_t, slot) known to be in the log already (the log
        keeps the first forecast of each; those are not offered to it again), to which
        those logged now are added."""
        with self.store.transaction() as conn:
            self.store.write_forecasts(station, fcs)
            if logged is None:
                surge_forecast.log_forecasts(conn, station, fcs)
                return
            new = [fc for fc in fcs if surge_forecast.log_key(fc) not in logged]
            surge_forecast.log_forecasts(conn, station, new)
            self._note_logged(logged, {surge_forecast.log_key(fc) for fc in new})

    @staticmethod
    def _note_logged(logged: set, keys: set) -> None:
        """Add ``keys`` to ``logged``, dropping those of slots two or more before the newest."""
        if keys:
            newest = max(k[1] for k in keys)
            logged -= {k for k in logged if k[1] < newest - 1}
            logged |= keys

    def _alert_context(self, rt: StationRuntime, fcs: list[dict] | None, qc_results: dict, now: float,
                       end_t: int | None = None):
        """The engine's context: the high water forecasts as monitor.surge.forecast made them
        (the next first), the feed's age, and the equipment faults (silent, stuck, drifting,
        clock off)."""
        st = rt.cfg
        # A feed is alive by its usable samples only: one that failed quality control, or is
        # stamped ahead of the clock, says nothing of the sea and must not end a silence.
        horizon = int(now + future_tolerance(st))
        last = {r: self._last_usable(rt, r, end_t, horizon) for r in st.sensors}
        age = None if last.get("primary") is None else max(0.0, now - last["primary"])
        faults: list = []
        if self.diag is not None:
            try:
                flat = {}
                for sn, part in (qc_results or {}).items():
                    if hasattr(part, "flat_since"):  # monitor.quality.context.QcRows
                        flat[sn] = part.flat_since()
                    elif "flat" in getattr(part, "columns", ()):
                        flat[sn] = self.diag.flat_since(part["flat"])
                faults = self.diag.equipment_faults(now, st.qc, station=st.id, last_sample=last, flat=flat)
            except Exception:
                log.exception("station %s: equipment fault check failed", st.id)
            faults += self._diagnostic_faults(rt, now, end_t)
        last = [f for f in fcs or [] if f["made_t"] == fcs[-1]["made_t"]]
        return self.engine.AlertContext(next_high_water=last[0] if last else None, feed_age=age, faults=faults,
                                        high_waters=list(fcs or []))

    def _last_usable(self, rt: StationRuntime, sensor: str, end_t: int | None, horizon: int) -> int | None:
        """A sensor's latest usable sample at or before ``horizon`` [Unix s], as
        :meth:`Store.last_time` (``usable=True``) reads it, taken from the QC context that
        has just judged the window ending at ``end_t`` when it can say: it holds every
        stored row of a level sensor up to ``end_t`` with its flag as stored (a row stored
        after ``end_t`` since the pass began is left to the next pass: the age is that of
        the window judged, at most a pass younger than the store would say). A newest usable
        row held as 2 (not evaluated) may be NULL in the store; then, and when no row held
        is usable, the store is asked."""
        ctx = rt.qc_context
        held = ctx.sensors.get(sensor)
        if (held is not None and end_t is not None and ctx.end_t == end_t and ctx.key is not None
                and ctx.key[0] is self.store.conn and len(held.t) and held.t[-1] <= horizon):
            f = held.flag
            newest = int(f[-1])  # the usual case: the newest row held is usable
            if newest in (qc.PASS, qc.SUSPECT):
                return int(held.t[-1])
            usable = qc.usable_mask(f).nonzero()[0]
            if len(usable) and f[usable[-1]] != qc.NOT_EVALUATED:
                return int(held.t[usable[-1]])
        return self.store.last_time(rt.cfg.id, sensor, until=horizon, usable=True)

    def _diagnostic_faults(self, rt: StationRuntime, now: float, end_t: int | None) -> list[dict]:
        """Sensor drift (primary against backup, over ``qc.drift_window``) and clock offset
        (each level sensor against the predicted tide, over ``daemon.clock_window_days``)
        as equipment faults. Both are recomputed once ``daemon.diagnostics_minutes`` of data
        time have passed since their last run; in between their last results stand."""
        st, dset = rt.cfg, self.cfg.daemon
        if end_t is None:
            end_t = int(now)
        period = dset.diagnostics_minutes * 60
        if end_t - rt.diag_at >= period:
            # The first run comes at once; the next after a share of the period that differs
            # by station, so with many stations the runs spread over the period rather than
            # all landing in one pass each hour.
            rt.diag_at = end_t - (rt.diag_phase * period if rt.diag_at == -math.inf else 0.0)
            rt.diag = self._run_diagnostics(rt, end_t)
        qs = st.qc
        made = rt.diag_faults
        if made is None or made[0] is not rt.diag or made[1] is not qs:
            # (drift and clock faults depend on the results and the limits alone, not on
            # ``now``: made once a run, each pass gets copies)
            faults: list[dict] = []
            try:
                if "drift" in rt.diag:
                    faults += self.diag.equipment_faults(now, qs, station=st.id, drift=rt.diag["drift"])
                for key, clock in rt.diag.items():
                    if key.startswith("clock."):
                        faults += self.diag.equipment_faults(now, qs, station=st.id, clock=clock)
            except Exception:
                log.exception("station %s: drift and clock fault check failed", st.id)
                return faults
            made = rt.diag_faults = (rt.diag, qs, faults)
        return [dict(f) for f in made[2]]

    def _run_diagnostics(self, rt: StationRuntime, end_t: int) -> dict:
        """Drift (primary against backup, over ``qc.drift_window``) and clock offset (the
        backup against the primary, else each level sensor against the predicted tide, over
        ``daemon.clock_window_days``) up to ``end_t`` [Unix s]. The rows, the backup's timing
        windows and the drift's bins of the last run are kept in ``rt.diag_memory``
        (:class:`monitor.service.diag_memory.DiagnosticsMemory`): a run reads and computes
        only what is new or may have changed, and gives what a run from scratch gives."""
        st, store, memo = rt.cfg, self.store, rt.diag_memory
        out: dict = {}
        qs = st.qc or self.qc.QcSettings()
        drift_from = int(end_t - qs.drift_window)
        a = int(end_t - self.cfg.daemon.clock_window_days * 86400)
        levels = [r for r in st.sensors if r != "barometer"]
        if rt.model is None and "backup" not in st.sensors:
            return out
        try:
            since = memo.begin(store, end_t)
            # each level sensor's usable rows over the clock's span, held for the next run
            rows = {r: memo.rows(store, st.id, r, a, end_t, since) for r in levels}
            if "backup" in st.sensors:
                drift = memo.drift(store, st.id, drift_from, end_t, since, gap_limit=qs.gap_limit)
                if drift is not None:
                    out["drift"] = drift
            if rt.model is not None:
                series = {r: usable_series(*rows[r]) for r in levels}
                for role, o in series.items():
                    if role == "backup" and len(series.get("primary", ())) > 1 and len(o) > 1:
                        # Against the primary the surge cancels: the relative clock comes first.
                        c = self.diag.relative_clock(series["primary"], o, cache=memo.timing)
                        if math.isfinite(c["offset_min"]):
                            c["since"] = int(c["timing"]["start"].iloc[-1].timestamp())
                            out["clock.backup"] = {k: v for k, v in c.items() if k != "timing"}
                            continue
                    # a day of record at least: the fit solves one shift across whole days
                    if len(o) < 2 or (o.index[-1] - o.index[0]).total_seconds() < 86400:
                        continue
                    c = self.diag.clock_offset(o, rt.model)
                    c["sensor"] = role
                    c["since"] = int(o.index[0].timestamp())
                    out[f"clock.{role}"] = c
        except Exception:
            memo.forget()
            log.exception("station %s: drift and clock diagnostics failed", st.id)
        return out

    def _maybe_fit(self, rt: StationRuntime, now: float) -> None:
        """A station fitted from history gets its first fit as soon as it has enough data."""
        st = rt.cfg
        # at most one try an hour: a fit reads the whole history (the hour is our choice)
        if not st.fit_from_history or rt.model is not None or now - rt.last_fit_try < 3600:
            return
        rt.last_fit_try = now
        horizon = int(now + future_tolerance(st))
        last = self.store.last_time(st.id, until=horizon, usable=True)
        # the usable record within the span a fit reads (a lone sample from decades back,
        # a logger's reset clock, is not a history)
        first = None if last is None else self.store.first_time(
            st.id, after=int(last - st.fit_span_days * 86400) - 1, until=horizon, usable=True)
        if first is None or (last - first) / 86400 < st.fit_min_days:
            return
        # Live, the fit goes to the fits worker and this pass goes on without constants, as the
        # passes before it did; a replay's clock outruns a fit, so there the fit is made here and
        # the replay's next windows use it, as they would have live.
        if self.scheduler is not None and not rt.replay_clock:
            self.scheduler.add_job(self.job_fit, args=[rt, now], executor="fits", id=f"fit.{st.id}",
                                   replace_existing=True)
            return
        self.refit(rt, now)

    def refit(self, rt: StationRuntime, now: float | None = None, store: Store | None = None) -> None:
        """Refit a station from its history; the result replaces the constants in use only if
        it hindcasts the days they have not seen no worse (:func:`refit_station`).

        ``store`` is the caller's own connection (the fits worker's): the new constants are
        then left for the processing thread, which takes them before its next pass
        (:meth:`_take_new_model`). Without it the daemon's store is used and they are taken at
        once (callers on the processing thread)."""
        try:
            refit_station(self.store if store is None else store, rt.cfg, now=now, use=True, stop=self.stop)
        except (MonitorError, FitError) as exc:  # FitError: too little history yet, say so and go on
            log.warning("%s", exc)
            return
        self._offer_model(rt, *load_model(self.store if store is None else store, rt.cfg), at_once=store is None)

    def refit_due(self, store: Store | None = None) -> None:
        """Refit stations whose constants come from their history, every ``daemon.refit_days``
        (``store``: the caller's own connection, see :meth:`refit`)."""
        days = self.cfg.daemon.refit_days
        db = self.store if store is None else store
        for rt in self.stations.values():
            if self.stop.is_set() or not rt.cfg.fit_from_history:
                continue
            fit = db.fit_in_use(rt.cfg.id)
            if fit is not None and not rt.model_source.startswith(f"fit #{fit['id']} "):
                # a fit put in use from the command line ('quaywatch refit')
                self._offer_model(rt, *load_model(db, rt.cfg), at_once=store is None)
            # due from the latest try, taken or not: a candidate kept out of use for hindcasting
            # worse is not retried every hour
            fits = db.fits(rt.cfg.id)
            last_try = float(fits["fitted_at"].max()) if len(fits) else -math.inf
            if fit is None or (days > 0 and time.time() - last_try >= days * 86400):
                self.refit(rt, store=store)

    def _offer_model(self, rt: StationRuntime, model: Any, source: str, at_once: bool) -> None:
        """New constants for a station: in use at once, or left for the processing thread."""
        with self._model_lock:
            rt.new_model = (model, source)
        if at_once:
            self._take_new_model(rt)

    def _take_new_model(self, rt: StationRuntime) -> None:
        """Put in use the constants a fit left for this station, if any (between passes, on
        the processing thread: a pass sees one model from its start to its end)."""
        with self._model_lock:
            offered, rt.new_model = rt.new_model, None
        if offered is None:
            return
        rt.model, rt.model_source = offered
        rt.extremes, rt.extremes_span = None, (math.inf, -math.inf)
        log.info("station %s: constants now %s", rt.cfg.id, rt.model_source)

    def job_refit(self) -> None:
        """The hourly refit job, on the fits worker with a connection of its own (SQLite
        connections are not shared between threads; WAL lets it read while processing writes)."""
        try:
            with Store.open(self.store.real_path, create=False) as store:
                self.refit_due(store)
        except Exception:
            log.exception("refit failed; will retry")

    def job_fit(self, rt: StationRuntime, now: float) -> None:
        """A station's first fit, on the fits worker with a connection of its own."""
        try:
            with Store.open(self.store.real_path, create=False) as store:
                self.refit(rt, now, store=store)
        except Exception:
            log.exception("station %s: fit failed; will retry", rt.cfg.id)

    # ------------------------------------------------------------------ outbox and reports
    def outbox_pending(self) -> int:
        if self.cfg.mail is None:
            return 0
        try:
            return int(self.store.conn.execute(
                f"SELECT count(*) FROM outbox WHERE status IN {self.outbox.WAITING_SQL}").fetchone()[0])
        except sqlite3.OperationalError:  # no outbox table yet: nothing queued
            return 0

    def deliver(self, db=None) -> None:
        """One delivery round on the wall clock (never the replayed one: delivery is real).

        ``db`` is the caller's connection (the outbox thread has its own); default the store's,
        for callers on the processing thread."""
        if self.outbox is None:
            return
        try:
            summary = self.outbox.deliver_due(self.store.db if db is None else db, self.cfg.mail,
                                              claimer=self.claimer)
            log.debug("outbox: %s", summary)
        except Exception:
            log.exception("outbox delivery failed; will retry")

    def prune_outbox(self, db=None) -> None:
        """Delete delivered messages past ``mail.keep_delivered`` (the outbox thread, once a day)."""
        if self.outbox is None:
            return
        try:
            self.outbox.prune_delivered(self.store.db if db is None else db, self.cfg.mail)
        except Exception:
            log.exception("outbox: pruning delivered messages failed; will retry")

    def wake_outbox(self) -> None:
        """Ask the outbox thread for a round now; without one running, deliver here."""
        if self.outbox_worker is not None and self.outbox_worker.is_alive():
            self.outbox_worker.wake.set()
        else:
            self.deliver()

    def reports(self) -> None:
        """Write due daily reports, on the replayed clock for replay feeds (which day is due
        follows the data; a report email is still queued on the wall clock)."""
        if self.cfg.reports is None:
            return

        now = self.data_now if (self.replay_clock and self.data_now is not None) else None
        try:
            write_due_reports(self.cfg, self.store, now)
        except Exception:
            log.exception("daily reports failed; will retry")

    # ------------------------------------------------------------------ jobs
    def job_poll(self) -> None:
        """Poll the feeds; the stations that got lines are processed at once, after
        ``daemon.coalesce_seconds`` and one more poll (so lines of a station's other
        sensors, or the rest of a burst, join the same pass)."""
        if not self.poll():
            return
        wait = self.cfg.daemon.coalesce_seconds
        if wait > 0 and not self.stop.wait(wait):
            self.poll()
        self.process_delivered()

    def process_delivered(self) -> int:
        """Process the stations whose feeds delivered lines since their last pass. Returns
        the number of stations with new data."""
        changed: set[str] = set()
        while self.delivered and not self.stop.is_set():
            rt = self.stations.get(self.delivered.pop())
            if rt is None:
                continue
            try:
                if self.process_station(rt):
                    changed.add(rt.cfg.id)
            except Exception:
                log.exception("station %s: processing failed; will retry", rt.cfg.id)
        if changed:
            self.write_live(changed)
        return len(changed)

    def job_process(self) -> None:
        n = self.process()
        if self.until_exhausted and n == 0 and self.feeds_exhausted():
            if self.feeds_done_at is None:
                self.feeds_done_at = time.monotonic()
                self.wake_outbox()
            pending = self.outbox_pending()
            if pending == 0 or time.monotonic() - self.feeds_done_at > OUTBOX_DRAIN_WAIT:
                self.reports()
                if pending:
                    log.warning("leaving %d message(s) queued in the outbox for the next run", pending)
                log.info("feeds exhausted and processing caught up: stopping")
                self.done.set()
        else:
            self.feeds_done_at = None

    def build_scheduler(self) -> BackgroundScheduler:
        """The jobs on a scheduler, not started: polling, processing and reports on one worker
        (they never overlap), fits on another (``fits``) so processing never waits for one."""
        d = self.cfg.daemon
        sched = BackgroundScheduler(executors={"default": ThreadPoolExecutor(1), "fits": ThreadPoolExecutor(1)},
                                    job_defaults={"coalesce": True, "max_instances": 1,
                                                  "misfire_grace_time": None},
                                    timezone="UTC")
        sched.add_job(self.job_poll, "interval", seconds=d.poll_seconds, id="poll", next_run_time=_now_dt())
        sched.add_job(self.job_process, "interval", seconds=d.process_seconds, id="process")
        # on the replayed clock a day passes in minutes, so reports are looked at more often
        sched.add_job(self.reports, "interval", seconds=max(2 * d.process_seconds, 5) if self.replay_clock else 600,
                      id="reports")
        sched.add_job(self.job_refit, "interval", hours=1, id="refit", next_run_time=_now_dt(), executor="fits")
        return sched

    def run(self, until_exhausted: bool = False) -> int:
        """Run the jobs until SIGTERM/SIGINT (or, with ``until_exhausted``, until the feeds end)."""
        self.until_exhausted = until_exhausted
        sched = self.build_scheduler()
        if self.outbox is not None:
            self.outbox_worker = OutboxWorker(self, self.cfg.daemon.outbox_seconds)

        def on_signal(signum, _frame):
            log.info("signal %d: finishing the current batch, then stopping", signum)
            self.stop.set()

        old = {s: signal.signal(s, on_signal) for s in (signal.SIGTERM, signal.SIGINT)}
        if self.outbox is not None:
            # A predecessor killed with a message in flight left it claimed: resend it now
            # (same Message-ID) rather than hold that recipient's later mail until the
            # claim lapses.
            try:
                self.outbox.take_over_claims(self.store.db, holds_store_lock=self.store.locked)
            except Exception:
                log.exception("outbox: taking over the claims of a previous run failed; they lapse on their own")
        if self.outbox_worker is not None:
            self.outbox_worker.start()
        self.scheduler = sched
        sched.start()
        log.info("quaywatch daemon running (pid %d, store %s, %d feed(s), %d station(s))",
                 os.getpid(), self.store.path, len(self.feeds), len(self.stations))
        try:
            while not self.stop.is_set() and not self.done.is_set():
                self.stop.wait(0.2)
        finally:
            sched.shutdown(wait=True)  # lets the job in hand finish its batch (a fit stops at its next chunk)
            self.scheduler = None
            if self.outbox_worker is not None:
                # a round in hand records each send before the next; one stuck on a server
                # that does not answer is left (a restart takes its claim over at once)
                self.outbox_worker.halt(timeout=5.0)
            for s, h in old.items():
                signal.signal(s, h)
        log.info("quaywatch daemon stopped")
        return 0


class OutboxWorker(threading.Thread):
    """Delivers the outbox on its own thread and SQLite connection, so a slow or unreachable
    SMTP server never holds up polling and processing.

    A round runs when :attr:`wake` is set (new messages) or every ``interval`` seconds
    (retries); one round at a time, so two deliveries never race. A wake-up during a round
    brings another round straight after it.
    """

    def __init__(self, daemon: "Daemon", interval: float):
        super().__init__(name="quaywatch-outbox", daemon=True)
        self.owner = daemon
        self.interval = float(interval)
        self.wake = threading.Event()
        self._halt = threading.Event()

    def run(self) -> None:
        conn = sqlite3.connect(str(self.owner.store.real_path), isolation_level=None, timeout=30.0)
        try:
            conn.execute("PRAGMA busy_timeout = 30000")
            db = sqlite_utils.Database(conn)
            pruned_at = -math.inf
            while not self._halt.is_set():
                self.wake.wait(self.interval)
                self.wake.clear()
                if self._halt.is_set():
                    break
                self.owner.deliver(db)
                if time.monotonic() - pruned_at >= PRUNE_EVERY:
                    pruned_at = time.monotonic()
                    self.owner.prune_outbox(db)
        finally:
            conn.close()

    def halt(self, timeout: float | None = None) -> None:
        """Stop after the round in hand (waits up to ``timeout`` seconds for it)."""
        self._halt.set()
        self.wake.set()
        self.join(timeout)


def _now_dt():
    return dt.datetime.now(dt.timezone.utc)


# --------------------------------------------------------------------------- entry

def run_daemon(cfg: Config, until_exhausted: bool = False, verbose: int = 0) -> int:
    """``quaywatch run``: check what can be checked, open the feeds, lock the store, run the
    jobs, close everything. Nothing is created before the checks pass."""
    preflight(cfg)
    feeds = open_feed_runtimes(cfg)
    store = daemon = None
    try:
        setup_logging(cfg, verbose)
        for problem in unsendable(cfg):
            log.warning("%s (the messages wait in the outbox)", problem)
        store = Store.open(cfg.store_path, lock=True)
        daemon = Daemon(cfg, store, feeds)
        daemon.open_feeds()
        return daemon.run(until_exhausted=until_exhausted)
    finally:
        for fr in feeds:
            try:
                fr.feed.close()
            except Exception:  # closing must not stop the rest from closing
                log.exception("feed %s: close failed", fr.name)
        if store is not None:
            store.close()
        report_quiet_repeats(everything=True)  # the counts of repeated lines not said yet
