"""Daily reports from the store: gather a station's local day into a DayReport, write it,
keep the index, email it through the outbox, and decide which reports are due.

Rendering lives in :mod:`alerts.reports.render` (which knows nothing of the store); this module only
reads the store and fills the data structure. Levels are shown on chart datum when the station
defines a ``chart`` datum, else on the station datum.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import json
import logging
from pathlib import Path
from typing import Any, Iterable
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from alerts.mail.outbox import enqueue
from alerts.reports import model as report_model
from alerts.reports import render as report_render
from monitor.errors import ConfigError, MonitorError
from monitor.quality import checks as qc
from monitor.quality import diagnostics
from monitor.quality.records import read_level_series
from monitor.service.config import ResidualSettings, datum_words
from monitor.service import extremes as EX
from monitor.service.constants import load_model
from monitor.surge import forecast as surge_forecast
from monitor.surge import residual as surge_residual
from monitor.surge.residual import skew_surges
from monitor.surge.residual import tide_stands
from predictor.timeutil import utc_timestamp

log = logging.getLogger(__name__)

WEEK = pd.Timedelta(days=7)
#: Rejected lines shown in full in a report (all are counted).
REJECTS_SHOWN = 20
#: Flag runs closer than this [s] are shown as one episode (common practice, no source).
EPISODE_JOIN_S = 1800.0


# --------------------------------------------------------------------------- pure helpers


def low_water_differences(observed: pd.Series, extremes: pd.DataFrame) -> pd.DataFrame:
    """For each predicted low water, the lowest observed level in its cycle minus the prediction.

    The low-water counterpart of the skew surge, under its own name (the skew surge is a
    high-water quantity). The cycle runs between the neighbouring predicted high waters (the
    mirror image of the skew surge's cycle); a double low water is one low water, at its lower
    trough, and the peaks of a double high water bound the cycle from their side of the stand
    (:func:`monitor.surge.residual.tide_stands`). Returns ``time``, ``predicted``, ``observed``,
    ``observed_time``, ``difference`` [m], one row per low water with usable observations in
    its cycle.

    References
    ----------
    Williams, J., et al. (2016). Tide and skew surge independence. GRL 43 (skew surge, mirrored
    here at low water).
    """
    rows = []
    cols = ["time", "predicted", "observed", "observed_time", "difference"]
    if extremes is None or extremes.empty:
        return pd.DataFrame(rows, columns=cols)
    ext = tide_stands(extremes)
    obs = observed.dropna()
    highs = ext[ext["kind"] == "high"]["time"]
    for _, g in ext[ext["kind"] == "low"].groupby("stand", sort=True):
        row = g[g["principal"]].iloc[0]
        before = highs[highs < g["time"].min()]
        after = highs[highs > g["time"].max()]
        lo = before.iloc[-1] if len(before) else row["time"] - pd.Timedelta(hours=6.21)
        hi = after.iloc[0] if len(after) else row["time"] + pd.Timedelta(hours=6.21)
        window = obs[(obs.index >= lo) & (obs.index <= hi)]
        if window.empty:
            continue
        at = window.idxmin()
        rows.append({"time": row["time"], "predicted": float(row["level"]), "observed": float(window[at]),
                     "observed_time": at, "difference": float(window[at] - row["level"])})
    return pd.DataFrame(rows, columns=cols)


def qc_counts(tests: pd.DataFrame) -> dict[str, dict[int, int]]:
    """Per test column, the number of samples given each QARTOD flag (NULL counted as 2)."""
    out: dict[str, dict[int, int]] = {}
    for column in tests.columns:
        values = tests[column].fillna(2).astype(int)
        out[column] = {int(k): int(v) for k, v in values.value_counts().items()}
    return out


def barometric_share(residual: pd.Series | np.ndarray, barometric: pd.Series | np.ndarray) -> dict:
    """How much of a residual the inverse barometer explains.

    Parameters
    ----------
    residual, barometric : array-like
        Residual and inverse-barometer sea level at the same instants [m]; samples where
        either is missing are left out.

    Returns
    -------
    dict
        ``samples``; ``mean_ib``, ``min_ib``, ``max_ib``, ``mean_residual`` [m];
        ``variance_explained`` = 1 - var(residual - IB) / var(residual) [1] and the
        correlation of the two (``None`` with fewer than 3 samples or a flat residual).

    References
    ----------
    Pugh, diagnostics., Woodworth, P. (2014). Sea-Level Science, ch. 7 (the inverted barometer; removing
    it from the residual). Fraction of variance explained: the usual 1 - SS_res / SS_tot.
    """
    r = np.asarray(residual, dtype=float)
    b = np.asarray(barometric, dtype=float)
    ok = np.isfinite(r) & np.isfinite(b)
    r, b = r[ok], b[ok]
    out: dict[str, Any] = {"samples": int(ok.sum()), "mean_ib": None, "min_ib": None, "max_ib": None,
                           "mean_residual": None, "variance_explained": None, "correlation": None}
    if len(r) == 0:
        return out
    out.update(mean_ib=float(b.mean()), min_ib=float(b.min()), max_ib=float(b.max()), mean_residual=float(r.mean()))
    if len(r) >= 3 and np.var(r) > 0:
        out["variance_explained"] = float(1.0 - np.var(r - b) / np.var(r))
        if np.var(b) > 0:
            out["correlation"] = float(np.corrcoef(r, b)[0, 1])
    return out


def _report_datum(station: Any) -> tuple[str, float]:
    """The station's display datum in words and its height above the station datum [m]:
    ``stations[].display_datum`` (chart datum by default where its offset is given)."""
    datums = dict(getattr(station, "datums", {}) or {})
    name = getattr(station, "display_datum", None) or ("chart" if "chart" in datums else "station")
    return datum_words(name), float(datums.get(name, 0.0))


def _datum_note(station: Any) -> str:
    note = getattr(station, "datum_note", None)
    if note is not None:
        return note
    datums = dict(getattr(station, "datums", {}) or {})
    return "" if "chart" in datums else ("no chart datum offset is configured for this station, so levels "
                                         "are on the station datum (the gauge zero)")


def _alert_levels(station: Any, shift: float) -> list[report_model.AlertLevel]:
    """The operator's sample-rule steps, on the report's datum."""
    levels = []
    for rule in getattr(station, "rules", ()) or ():
        watch = getattr(rule, "watch", "")
        if watch not in ("level_above", "level_below", "residual_above", "residual_below"):
            continue
        quantity, direction = watch.split("_")
        for step in rule.steps:
            value = float(step.at) + (float(rule.datum_offset) - shift if quantity == "level" else 0.0)
            levels.append(report_model.AlertLevel(step.name, value, quantity, direction))
    return levels


def _table(db: Any, name: str) -> bool:
    return name in db.table_names()


# --------------------------------------------------------------------------- gathering


def gather_day(store: Any, station: Any, day: dt.date, settings: report_model.ReportSettings | None = None, *,
               model: Any = None, model_source: str = "", now: pd.Timestamp | None = None,
               residual: Any = None) -> report_model.DayReport:
    """Fill a :class:`alerts.reports.model.DayReport` for one station's local day from the store.

    Parameters
    ----------
    store : monitor.store.database.Store
    station : monitor.service.config.StationConfig
    day : date
        The local date in the station's zone.
    model : TideModel, optional
        The tide model in use (loaded from the station's constants when omitted).
    now : Timestamp, optional
        When the report is written (default the clock). The report describes its own day:
        forecasts shown are those issued during the day, never after it.
    residual : monitor.service.config.ResidualSettings, optional
        The forecast's settings, for a forecast made here when the daemon kept none.
    """
    settings = settings or report_model.ReportSettings()
    db = store.db
    sid = station.id
    start, end = report_model.day_bounds(day, station.tz)
    t0, t1 = int(start.timestamp()), int(end.timestamp()) - 1
    datum, shift = _report_datum(station)

    if model is None:
        try:
            model, model_source = load_model(store, station)
        except MonitorError as exc:
            model, model_source = None, str(exc)

    obs = store.observations(sid, "primary", t0, t1)
    derived = store.derived(sid, t0, t1)
    samples = report_model.empty_samples()
    if len(obs):
        samples = pd.DataFrame({"observed": obs["value"].to_numpy(dtype=float) - shift,
                                "flag": obs["flag"].to_numpy(dtype=int)}, index=obs.index.rename("time"))
        resid = derived["residual"].reindex(samples.index) if len(derived) else pd.Series(np.nan, index=samples.index)
        if resid.isna().all() and model is not None:
            resid = pd.Series(obs["value"].to_numpy(dtype=float) - model.predict(obs.index), index=obs.index)
        samples["residual"] = resid.to_numpy(dtype=float)
        samples = samples[["observed", "residual", "flag"]]

    predicted = pd.Series(dtype=float)
    tides: list[report_model.TideRow] = []
    if model is not None:
        grid = pd.date_range(start - pd.Timedelta(hours=1), end + pd.Timedelta(hours=1), freq="10min")
        predicted = pd.Series(np.asarray(model.predict(grid), dtype=float) - shift, index=grid)
        # A tide's cycle may begin the evening before or end the morning after.
        around = store.observations(sid, "primary", t0 - 14 * 3600, t1 + 14 * 3600)
        around = around[~around["flag"].isin([4, 9])]["value"].astype(float)
        tides = _tides(model, around, start, end, shift)

    # No nominal interval in the configuration: the report infers it from the day's samples,
    # or from the week before when the day is sparse.
    sample_interval = None
    if len(samples) < 10:
        before = store.observations(sid, "primary", t0 - 7 * 86400, t0 - 1)
        sample_interval = report_model.infer_interval(before.index)

    barometer = None
    if len(samples) and len(derived) and derived["barometric"].notna().any():
        usable = samples[~samples["flag"].isin([4, 9])]
        share = barometric_share(usable["residual"], derived["barometric"].reindex(usable.index))
        barometer = report_model.BarometerPart(**share) if share["samples"] else None
    now = now or pd.Timestamp.now(tz="UTC")
    forecast = staff = None
    verification: list = []
    try:
        forecast = _forecast(store, station, model, start, end, now, shift, residual)
    except Exception:  # the forecast must never stop the day's report
        log.exception("station %s: next high water forecast for the report failed", sid)
    try:
        verification = _verification(store, sid, tides, shift)
    except Exception:
        log.exception("station %s: forecast verification for the report failed", sid)
    try:
        staff = _staff(store, sid, end, settings.trend_weeks, shift)
    except Exception:
        log.exception("station %s: tide-staff check for the report failed", sid)
    rarity = None
    try:
        passed = samples.loc[samples["flag"] == 1, "observed"] if len(samples) else samples["observed"]
        rarity = EX.report_section(store, station, model, float(passed.max()) if len(passed) else None,
                                passed.idxmax() if len(passed) else None, qc_settings=getattr(station, "qc", None))
    except Exception:  # return levels must never stop the day's report
        log.exception("station %s: return levels for the report failed", sid)

    rejects, rejected = _rejects(db, sid, t0, t1)
    conflicts = store.conflict_count(sid, start_t=t0, end_t=t1, by="at")
    counts, episodes = _qc(store, sid, t0, t1)
    return report_model.DayReport(
        station_id=sid, station_name=station.name, tz=station.tz, day=day, datum=datum,
        datum_note=_datum_note(station), note=getattr(station, "note", "") or "",
        samples=samples, predicted=predicted, sample_interval=sample_interval,
        alert_levels=_alert_levels(station, shift), tides=tides,
        rejected_lines=rejected, rejects=rejects, conflicts=conflicts, qc_counts=counts, qc_episodes=episodes,
        diagnostics=_diagnostics(store, station, model, end, settings.trend_weeks),
        alerts=_alerts(db, station, t0, t1, shift), constants=_constants(store, sid, model, model_source, shift),
        generated_at=now, forecast=forecast, staff=staff, barometer=barometer, verification=verification,
        rarity=rarity,
    )


def _forecast(store: Any, station: Any, model: Any, start: pd.Timestamp, end: pd.Timestamp, now: pd.Timestamp,
              shift: float, residual: Any = None) -> report_model.HighWaterForecast | None:
    """The last next-high-water forecast issued during the report's day, never one issued after it.

    From the forecast log (every forecast the daemon made) or the daemon's latest forecast of
    each high water, issued between the day's start and its end (or now, if the day is not
    over); else, with a model, one made here as the daemon would have made it at that moment,
    from the store's history up to it (:mod:`monitor.surge.forecast`).
    """
    db = store.db
    sid = station.id
    t0, made_before = int(start.timestamp()), int(min(now, end).timestamp()) - 1
    log = surge_forecast.read_log(db, sid, t0, made_before)
    log = log[log["hw_t"] >= log["made_t"]] if len(log) else log
    if len(log):
        last = log[log["made_t"] == log["made_t"].max()].sort_values("hw_t").iloc[0]
        return _forecast_row(last.to_dict(), shift)
    if _table(db, "hw_forecasts"):
        cur = db.conn.execute("SELECT * FROM hw_forecasts WHERE station = ? AND made_t BETWEEN ? AND ? "
                              "AND hw_t >= made_t ORDER BY made_t DESC, hw_t ASC LIMIT 1", (sid, t0, made_before))
        row = cur.fetchone()
        if row:
            return _forecast_row(dict(zip([d[0] for d in cur.description], row)), shift)
    if model is None:
        return None
    return _forecast_at(store, station, model, made_before, shift, residual)


def _forecast_at(store: Any, station: Any, model: Any, at_t: int, shift: float, residual: Any) -> report_model.HighWaterForecast | None:
    """The forecast of the next high water as the daemon would have issued it at ``at_t``."""
    if residual is None:
        residual = ResidualSettings()
    sid = station.id
    at = pd.Timestamp(at_t, unit="s", tz="UTC")
    back = int((surge_forecast.RATE_HOURS + 1) * 3600)
    recent = store.derived(sid, at_t - back, at_t)["smoothed"]
    barometer = "barometer" in (getattr(station, "sensors", {}) or {})
    pressure = None
    if barometer:
        o = store.observations(sid, "barometer", at_t - back, at_t)
        pressure = o["value"][~o["flag"].isin((4, 9))]
    state = surge_forecast.storm_state(recent, at_t, pressure, barometer=barometer)
    if not np.isfinite(state.residual) or at_t - state.t > 3600:
        return None
    hw = surge_residual.next_high_water(model.high_low(at, at + pd.Timedelta(hours=30)), at)
    if hw is None:
        return None
    grid, skew, p_grid = surge_forecast.read_history(store.conn, sid, at_t - int(residual.history_days * 86400), at_t, barometer)
    forecaster = surge_forecast.SurgeForecaster.learn(grid, skew, p_grid, min_storms=residual.forecast_min_storms,
                                          min_history_days=residual.min_history_days)
    fc = forecaster.forecast(state, pd.Timestamp(hw["time"]).timestamp(), float(hw["level"]))
    return _forecast_row(fc, shift)


def _forecast_row(fc: dict, shift: float) -> report_model.HighWaterForecast:
    """A forecast dict of :mod:`monitor.surge.forecast` (or a stored row) on the report's datum."""
    def level(v: Any) -> float | None:
        v = _num(v)
        return None if v is None else v - shift

    return report_model.HighWaterForecast(
        time=utc_timestamp(fc["hw_t"]), predicted=level(fc["predicted_high"]), residual_now=_num(fc["residual_now"]),
        forecast=level(fc["forecast"]), made_at=utc_timestamp(fc["made_t"]), lower=level(fc.get("lower")),
        upper=level(fc.get("upper")), coverage=_num(fc.get("coverage")), note=fc.get("note") or "",
        method=fc.get("method") or "", rising=level(fc.get("rising")), rate=_num(fc.get("rate")),
        pressure_note=fc.get("pressure_note") or "")


#: Leads of the verification table [h]: what was forecast this long before each high water.
VERIFY_LEADS = (6, 3, 1)
#: The forecast "L h before" is the last one issued at or before then, if issued within this [s].
VERIFY_SLACK_S = 3600


def _verification(store: Any, sid: str, tides: list, shift: float) -> list[report_model.VerificationRow]:
    """For each high water of the day: what was forecast 6, 3 and 1 h before (the last forecast
    issued at or before each, within an hour of it), against what came (the highest observed
    level of its tidal cycle)."""
    highs = [w for w in tides if w.kind == "high"]
    if not highs:
        return []
    first = int(highs[0].predicted_time.timestamp())
    last = int(highs[-1].predicted_time.timestamp())
    log = surge_forecast.read_log(store.db, sid, first - max(VERIFY_LEADS) * 3600 - VERIFY_SLACK_S, last)
    rows = []
    for w in highs:
        hw_t = int(w.predicted_time.timestamp())
        mine = log[(log["hw_t"] - hw_t).abs() <= 300] if len(log) else log
        made = []
        for lead in VERIFY_LEADS:
            target = hw_t - lead * 3600
            near = mine[(mine["made_t"] <= target) & (mine["made_t"] > target - VERIFY_SLACK_S)] if len(mine) else mine
            if not len(near):
                made.append(None)
                continue
            fc = near.loc[near["made_t"].idxmax()].to_dict()
            row = _forecast_row(fc, shift)
            made.append(report_model.Verified(lead_h=lead, made_at=row.made_at, forecast=row.forecast, lower=row.lower,
                                   upper=row.upper, method=row.method))
        rows.append(report_model.VerificationRow(time=w.predicted_time, predicted=w.predicted_level,
                                      observed=w.observed_level, observed_time=w.observed_time,
                                      forecasts=tuple(made)))
    return rows


def _staff(store: Any, sid: str, end: pd.Timestamp, weeks: int, shift: float) -> report_model.StaffCheck | None:
    """The Van de Casteele check of the latest staff session in the recent weeks, if any."""
    db = store.db
    if not _table(db, "staff_readings"):
        return None
    t_end = int(end.timestamp())
    t_start = int((end - weeks * WEEK).timestamp())
    rows = db.conn.execute("SELECT t, reading FROM staff_readings WHERE station = ? AND t BETWEEN ? AND ? ORDER BY t",
                           (sid, t_start, t_end)).fetchall()
    if not rows:
        return None
    readings = pd.Series([r[1] for r in rows], dtype=float,
                         index=pd.to_datetime(np.asarray([r[0] for r in rows], dtype=np.int64), unit="s", utc=True))
    gauge = _series(store, sid, "primary", t_start - 3600, t_end + 3600)
    sessions = diagnostics.staff_sessions(readings, gauge)
    if sessions.empty:
        return None
    sessions = sessions.dropna(subset=["offset_mm"])
    if sessions.empty:
        return None
    last = sessions.iloc[-1]
    first_t, last_t = pd.Timestamp(last["start"]), pd.Timestamp(last["end"])
    first_t = first_t.tz_localize("UTC") if first_t.tz is None else first_t.tz_convert("UTC")
    last_t = last_t.tz_localize("UTC") if last_t.tz is None else last_t.tz_convert("UTC")
    part = readings[(readings.index >= first_t) & (readings.index <= last_t)]
    near = gauge[(gauge.index >= first_t - pd.Timedelta(hours=1)) & (gauge.index <= last_t + pd.Timedelta(hours=1))]
    points = diagnostics.van_de_casteele(part, near)["points"]
    points = points.assign(staff=points["staff"].astype(float) - shift)
    history = pd.Series(sessions["offset_mm"].to_numpy(dtype=float), index=pd.DatetimeIndex(sessions.index))
    return report_model.StaffCheck(
        start=first_t, end=last_t, readings=int(last["n"]), sessions=len(sessions),
        offset_mm=_num(last["offset_mm"]), offset_se_mm=_num(last["offset_se_mm"]),
        scale_error=_num(last["scale_error"]), scale_se=_num(last["scale_se"]),
        timing_s=_num(last["timing_error_s"]), timing_se_s=_num(last["timing_se_s"]), rms_mm=_num(last["rms_mm"]),
        points=points, history=history)


def _tides(model: Any, usable: pd.Series, start: pd.Timestamp, end: pd.Timestamp,
           shift: float) -> list[report_model.TideRow]:
    """Predicted high and low waters of the day against the usable observations [m, station datum]."""
    extremes = model.high_low(start - pd.Timedelta(hours=14), end + pd.Timedelta(hours=14))
    extremes = extremes.assign(time=pd.to_datetime(extremes["time"], utc=True))
    highs = skew_surges(usable, extremes) if len(usable) else pd.DataFrame(columns=["hw_t"])
    highs = highs.set_index("hw_t") if len(highs) else highs
    lows = low_water_differences(usable, extremes) if len(usable) else pd.DataFrame(columns=["time"])
    lows = lows.set_index("time") if len(lows) else lows
    rows = []
    ext = surge_residual.tide_stands(extremes) if len(extremes) else extremes.assign(stand=0, principal=True)
    size = ext.groupby("stand")["stand"].transform("size") if len(ext) else pd.Series(dtype=int)
    nth = ext.groupby("stand").cumcount() if len(ext) else pd.Series(dtype=int)
    for i, e in ext.iterrows():
        t = e["time"]
        if not (start <= t < end):
            continue
        level = float(e["level"]) - shift
        stand = ""
        if size[i] > 1:
            stand = (f"double {'high' if e['kind'] == 'high' else 'low'} water, peak {nth[i] + 1} of {size[i]}"
                     + (", the stand's tide" if e["principal"] else ""))
        if not e["principal"]:
            rows.append(report_model.TideRow(e["kind"], t, level, stand=stand))
            continue
        if e["kind"] == "high":
            key = int(t.timestamp())
            near = [k for k in (highs.index if len(highs) else []) if abs(int(k) - key) <= 60]
            if near:
                h = highs.loc[near[0]]
                rows.append(report_model.TideRow("high", t, level, utc_timestamp(h["observed_t"]), float(h["observed_high"]) - shift,
                                      float(h["skew_surge"]), stand=stand))
                continue
            rows.append(report_model.TideRow("high", t, level, partial=len(usable) > 0, stand=stand))
        else:
            if len(lows) and t in lows.index:
                w = lows.loc[t]
                rows.append(report_model.TideRow("low", t, level, w["observed_time"], float(w["observed"]) - shift,
                                      partial=not _covered(usable, w["observed_time"]),
                                      low_departure=float(w["difference"]), stand=stand))
                continue
            rows.append(report_model.TideRow("low", t, level, partial=len(usable) > 0, stand=stand))
    return rows


def _covered(usable: pd.Series, at: pd.Timestamp, hours: float = 6.0, gap_s: float = 3600.0) -> bool:
    """Whether the record around ``at`` has no gap longer than ``gap_s`` within ``hours``."""
    window = usable[(usable.index >= at - pd.Timedelta(hours=hours)) & (usable.index <= at + pd.Timedelta(hours=hours))]
    if len(window) < 2:
        return False
    return float(np.diff(window.index.as_unit("ns").asi8).max()) / 1e9 <= gap_s


def _rejects(db: Any, sid: str, t0: int, t1: int) -> tuple[list[report_model.RejectRow], int]:
    if not _table(db, "rejects"):
        return [], 0
    n = db.conn.execute("SELECT count(*) FROM rejects WHERE station = ? AND at BETWEEN ? AND ? AND kind IS NULL",
                        (sid, t0, t1)).fetchone()[0]
    rows = db.conn.execute("SELECT feed, lineno, reason, text FROM rejects WHERE station = ? AND at BETWEEN ? AND ? "
                           "ORDER BY id LIMIT ?", (sid, t0, t1, REJECTS_SHOWN)).fetchall()
    return [report_model.RejectRow(f or "-", lineno, reason or "", text or "") for f, lineno, reason, text in rows], int(n)


def _qc(store: Any, sid: str, t0: int, t1: int) -> tuple[dict, list[report_model.QcEpisode]]:
    db = store.db
    if not _table(db, "qc_tests"):
        return {}, []
    frame = pd.read_sql_query(
        f"SELECT sensor, t, {', '.join(qc.TESTS)} FROM qc_tests WHERE station = ? AND t BETWEEN ? AND ? "
        "ORDER BY sensor, t", db.conn, params=(sid, t0, t1))
    primary = frame[frame["sensor"] == "primary"]
    counts = qc_counts(primary[list(qc.TESTS)]) if len(primary) else {}
    episodes: list[report_model.QcEpisode] = []
    for sensor, part in frame.groupby("sensor"):
        index = pd.to_datetime(part["t"].to_numpy(dtype=np.int64), unit="s", utc=True)
        for test in qc.TESTS:
            flags = pd.Series(part[test].fillna(2).astype(int).to_numpy(), index=index)
            # Runs less than half an hour apart read as one episode to a technician.
            for _, ep in qc.episodes(flags, join_gap=EPISODE_JOIN_S).iterrows():
                episodes.append(report_model.QcEpisode(report_model.QC_TEST_NAMES.get(test, test), int(ep["worst"]), ep["start"],
                                            ep["end"], int(ep["samples"]), str(sensor)))
    episodes.sort(key=lambda e: (e.start, e.test))
    return counts, episodes


def _series(store: Any, sid: str, sensor: str, t0: int, t1: int) -> pd.Series:
    # flags 1, 2, 3 only (fail and missing never count), and no spell the flat-line test doubts
    return read_level_series(store, sid, sensor, t0, t1)


def _weekly_medians(timing: pd.DataFrame, week_ends: list) -> pd.Series:
    """Median ``lag_min`` of the timing windows ending within each week ``(end - 7 d, end]``."""
    out = pd.Series(np.nan, index=pd.DatetimeIndex(week_ends), dtype=float)
    if len(timing):
        ends = pd.DatetimeIndex(timing["end"])
        lags = timing["lag_min"].to_numpy(dtype=float)
        for we in week_ends:
            sel = (ends > we - WEEK) & (ends <= we)
            if sel.any():
                out.loc[we] = float(np.median(lags[sel]))
    return out


def _diagnostics(store: Any, station: Any, model: Any, end: pd.Timestamp, weeks: int) -> list[report_model.Diagnostic]:
    """Drift against the backup, clock offset and datum steps over the recent weeks.

    Each is computed week by week for the trend; the latest week gives the value shown.
    A diagnostic that cannot be computed (no backup, no model, too little data) is left out
    or says why, and never stops the report.
    """
    sid = station.id
    t_end = int(end.timestamp())
    t_start = int((end - weeks * WEEK).timestamp())
    primary = _series(store, sid, "primary", t_start, t_end)
    out: list[report_model.Diagnostic] = []
    if primary.empty:
        return out
    weeks_index = [end - k * WEEK for k in range(weeks, 0, -1)]
    sensors = getattr(station, "sensors", {}) or {}
    try:
        if "backup" in sensors:
            backup = _series(store, sid, "backup", t_start, t_end)
            if len(backup):
                values = {}
                for week_end in weeks_index:
                    a, b = week_end - WEEK, week_end
                    p = primary[(primary.index >= a) & (primary.index < b)]
                    if len(p) > 10:
                        values[week_end] = diagnostics.sensor_drift(p, backup[(backup.index >= a) & (backup.index < b)])
                latest = diagnostics.sensor_drift(primary[primary.index >= end - WEEK], backup[backup.index >= end - WEEK])
                values[end] = latest   # the chart's last point is the figure shown
                out.append(report_model.Diagnostic(
                    "Primary minus backup: drift", "mm/day", _num(latest["drift_mm_per_day"]),
                    _half_width(latest), pd.Series({k: v["drift_mm_per_day"] for k, v in values.items()}, dtype=float),
                    "last 7 days, Theil-Sen slope of hourly medians"))
                out.append(report_model.Diagnostic(
                    "Primary minus backup: offset", "mm", _num(latest["offset_mm"]), _num(latest["offset_se_mm"]),
                    pd.Series({k: v["offset_mm"] for k, v in values.items()}, dtype=float)))
        if "backup" in sensors and len(backup := _series(store, sid, "backup", t_start, t_end)):
            # Two sensors see the same sea: their relative clock is free of the surge.
            # The figure shown is the last week's median lag, and the chart's last point is
            # that same figure; the spans off by more than the limit are named in the note.
            rel = diagnostics.relative_clock(primary[primary.index >= end - WEEK], backup[backup.index >= end - WEEK])
            eps = rel["episodes"]
            history = _weekly_medians(diagnostics.relative_clock(primary, backup)["timing"], weeks_index)
            history.loc[end] = rel["median_min"]
            out.append(report_model.Diagnostic(
                "Backup clock against the primary", "min",
                _num(rel["median_min"]), _num(rel["offset_se_min"]), history,
                "last 7 days, median, positive: the backup is late; " + (", ".join(
                    f"{e['lag_min']:+.1f} min from {e['start'].tz_convert(station.tz):%d %b %H:%M} "
                    f"to {e['end'].tz_convert(station.tz):%d %b %H:%M}" for e in eps) if eps
                    else "no span off by more than 1.5 min")))
        if model is not None:
            # The figure is the last week's, the same window as the chart's last point.
            clock = diagnostics.clock_offset(primary[(primary.index > end - WEEK) & (primary.index <= end)], model)
            # Each week fitted as a whole: a storm day cannot pull the week's figure.
            history = diagnostics.clock_trend(primary, model, [end - k * WEEK for k in range(weeks - 1, -1, -1)])
            out.append(report_model.Diagnostic("Clock offset against the predicted tide", "min", _num(clock["offset_min"]),
                                    _num(clock["offset_se_min"]), history,
                                    f"last 7 days ({clock.get('days', 0)} days of record); positive: the "
                                    f"record lags the tide"))
            week = primary[primary.index >= end - WEEK]
            if "backup" in sensors and len(backup):
                # Primary minus backup first: sea and weather cancel, and the step is attributed.
                wk_b = backup[backup.index >= end - WEEK]
                steps = diagnostics.sensor_steps(week, wk_b, model)
                out.append(report_model.Diagnostic(
                    "Datum steps, primary minus backup, last 7 days", "mm",
                    float(steps["step_mm"].iloc[-1]) if len(steps) else None,
                    float(steps["se_mm"].iloc[-1]) if len(steps) else None,
                    note=f"{len(steps)} found" + (": " + ", ".join(
                        f"{r.step_mm:+.0f} mm in the {r.sensor} sensor at "
                        f"{r.time.tz_convert(station.tz):%d %b %H:%M}" for r in steps.itertuples())
                        if len(steps) else "")))
            else:
                resid = pd.Series(week.to_numpy() - model.predict(week.index), index=week.index)
                steps = diagnostics.datum_steps(resid)
                out.append(report_model.Diagnostic(
                    "Datum steps in the residual, last 7 days", "mm",
                    float(steps["step_mm"].iloc[-1]) if len(steps) else None,
                    float(steps["se_mm"].iloc[-1]) if len(steps) else None,
                    note=f"{len(steps)} found, steps that persist 3 h" + (": " + ", ".join(
                        f"{r.step_mm:+.0f} mm at {r.time.tz_convert(station.tz):%d %b %H:%M}"
                        for r in steps.itertuples()) if len(steps) else "")))
    except Exception:  # a diagnostic must never stop the day's report
        log.exception("station %s: diagnostics for the report failed", sid)
    return out


def _num(v: Any) -> float | None:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return None if np.isnan(v) else v


def _half_width(d: dict) -> float | None:
    lo, hi = _num(d.get("drift_low")), _num(d.get("drift_high"))
    return None if lo is None or hi is None else (hi - lo) / 2


def _alerts(db: Any, station: Any, t0: int, t1: int, shift: float) -> list[report_model.AlertEpisodeRow]:
    """The day's alert episodes; a level rule's peak moved from its own datum to the report's,
    a residual's kept with its sign."""
    sid = station.id
    datums = dict(getattr(station, "datums", {}) or {})
    if not _table(db, "alert_episodes"):
        return []
    episodes = list(db.query(
        "SELECT * FROM alert_episodes WHERE station = ? AND opened_at <= ? AND (closed_at IS NULL OR closed_at >= ?) "
        "ORDER BY opened_at", [sid, t1, t0]))
    has_outbox = _table(db, "outbox")
    rows = []
    for ep in episodes:
        deliveries: list[report_model.Delivery] = []
        if has_outbox:
            prefix = f"{sid}/{ep['rule']}/episode-{ep['id']}/"
            groups: dict[str, list[dict]] = {}
            for m in db.query("SELECT * FROM outbox WHERE key LIKE ? ORDER BY id", [prefix + "%"]):
                groups.setdefault(m["key"], []).append(m)
            for key, msgs in groups.items():
                what = key[len(prefix):].replace("/", ": ", 1).replace("_", " ")
                sent = [m["sent_at"] for m in msgs if m["sent_at"]]
                errors = sorted({m["last_error"] for m in msgs if m["last_error"] and m["status"] != "sent"})
                deliveries.append(report_model.Delivery(
                    what=what, queued_at=utc_timestamp(min(m["created_at"] for m in msgs)),
                    sent_at=utc_timestamp(max(sent)) if len(sent) == len(msgs) else None,
                    attempts=max(int(m["attempts"] or 0) for m in msgs), error="; ".join(errors),
                    recipients=len(msgs)))
        peak, watch = _num(ep.get("peak")), ep.get("watch") or ""
        if peak is not None and (watch.startswith("level") or watch == "next_high_water_above"):
            peak = peak + float(datums.get(ep.get("datum") or "station", 0.0)) - shift
        rows.append(report_model.AlertEpisodeRow(
            rule=ep["rule"], level=ep.get("top_step") or ep.get("step_now") or "", started=utc_timestamp(ep["opened_at"]),
            cleared=utc_timestamp(ep["closed_at"]), peak=peak, unit="m" if ep.get("unit") is None else ep["unit"],
            deliveries=tuple(deliveries), signed=watch.startswith("residual"),
            kind="gauge" if watch in ("equipment_fault", "feed_silent") else "water"))
    return rows


def _constants(store: Any, sid: str, model: Any, source: str, shift: float = 0.0) -> report_model.ConstantsInfo | None:
    """The constants in use; their mean level (on the station datum in the model) on the report's datum."""
    if model is None:
        return None
    fit = store.fit_in_use(sid) if source.startswith("fit") else None
    constituents = []
    for c in getattr(model, "constituents", ()) or ():
        get = c.get if isinstance(c, dict) else (lambda k, d=None, c=c: getattr(c, k, d))
        constituents.append(report_model.ConstituentRow(str(get("name")), float(get("amplitude")), float(get("phase")),
                                             _num(get("amplitude_ci")), _num(get("snr"))))
    constituents.sort(key=lambda k: -k.amplitude)
    return report_model.ConstantsInfo(
        source=source or "constants file", mean=None if _num(getattr(model, "mean", None)) is None
        else float(model.mean) - shift, constituents=tuple(constituents),
        fitted_at=utc_timestamp(fit["fitted_at"]) if fit else None, record_start=utc_timestamp(fit["start"]) if fit else None,
        record_end=utc_timestamp(fit["end"]) if fit else None, samples=int(fit["n"]) if fit else None,
        rms=_num(fit["rms"]) if fit else None, variance_explained=_num(fit["variance_explained"]) if fit else None)


# --------------------------------------------------------------------------- writing and sending


def refresh_index(config: Any, store: Any, now: pd.Timestamp | None = None, day: dt.date | None = None) -> Path:
    """Prune reports more than ``reports.keep_days`` before ``day`` (the day just written;
    once per day, :func:`prune_kept`) and write the index page from the summaries kept in
    ``report_runs``: no report file is read or listed, so a round costs about the same with
    40 reports kept or 6,000 (``benchmarks/bench_growth.py``). A report written before the
    summaries were kept has its summary read from its file once, and kept."""
    settings = settings_of(config)
    now = now or pd.Timestamp.now(tz="UTC")
    db = store.db
    day = day or now.tz_convert("UTC").date() - dt.timedelta(days=1)
    cutoff = (day - dt.timedelta(days=settings.keep_days)).isoformat() if settings.keep_days > 0 else ""
    try:
        if settings.keep_days > 0 and store.get_meta(PRUNED_FOR) != day.isoformat():
            prune_kept(store, settings.folder, settings.keep_days, day)
        entries = []
        for sid, day, path, summary in db.conn.execute(
                "SELECT station, day, path, summary FROM report_runs WHERE day >= ? ORDER BY station, day",
                (cutoff,)).fetchall():
            if summary is None:
                found = report_render.read_summary(Path(path)) if path else None
                if found is None:
                    continue  # gone (pruned, or written elsewhere)
                db.conn.execute("UPDATE report_runs SET summary = ? WHERE station = ? AND day = ?",
                                (json.dumps(found), sid, day))
            else:
                found = json.loads(summary)
            entries.append((sid, day, found))
        return report_render.write_index(settings.folder, now, entries)
    except OSError as exc:
        raise ConfigError(f"reports.folder {settings.folder}: cannot write the index ({exc})") from None


#: Meta key: the day whose pruning is done (reports are pruned once per day).
PRUNED_FOR = "reports.pruned_for"
#: Meta key: the day the reports folder was swept for files without a row (once per store).
SWEPT_FOR = "reports.swept_for"

#: Each station with kept reports, one index step each (a skip-scan of the primary key
#: (station, day), however many days are kept).
_STATIONS_KEPT = ("WITH RECURSIVE s(station) AS (SELECT MIN(station) FROM report_runs UNION ALL "
                  "SELECT (SELECT MIN(station) FROM report_runs WHERE station > s.station) FROM s "
                  "WHERE s.station IS NOT NULL) SELECT station FROM s WHERE station IS NOT NULL")


def prune_kept(store: Any, folder: Path, keep_days: int, day: dt.date) -> list[Path]:
    """Delete the reports of days more than ``keep_days`` [days] before ``day`` (a local
    date), file and ``report_runs`` row alike, and mark the day as pruned.

    What is past retention comes from the store, station by station through the primary key
    (station, day): only the rows that go are read, never the kept ones, nor the folder.
    The first pruning of a store (since this sweep came in) also sweeps ``folder`` once
    (:func:`alerts.reports.render.prune_reports`) for report files without a row.

    Parameters
    ----------
    store : monitor.store.database.Store
    folder : Path
        The reports folder (of the configuration, resolved).
    keep_days : int
        Days kept [days]; 0 or less keeps every report.
    day : date
        The day just written.

    Returns
    -------
    list of Path
        The report files removed (those of the rows, then those of the sweep).
    """
    if keep_days <= 0:
        return []
    cutoff = (day - dt.timedelta(days=keep_days)).isoformat()
    removed = _prune_rows(store, cutoff)
    if store.get_meta(SWEPT_FOR) is None:
        removed += report_render.prune_reports(folder, keep_days, day)
        store.set_meta(SWEPT_FOR, day.isoformat())
    store.set_meta(PRUNED_FOR, day.isoformat())
    return removed


def _prune_rows(store: Any, cutoff: str) -> list[Path]:
    """Remove the files and ``report_runs`` rows of days before ``cutoff`` (``YYYY-MM-DD``)."""
    removed = []
    conn = store.db.conn
    for (sid,) in conn.execute(_STATIONS_KEPT).fetchall():
        old = conn.execute("SELECT path FROM report_runs WHERE station = ? AND day < ?", (sid, cutoff)).fetchall()
        if not old:
            continue
        for (path,) in old:
            if path:
                Path(path).unlink(missing_ok=True)
                removed.append(Path(path))
        with store.transaction() as tx:
            tx.execute("DELETE FROM report_runs WHERE station = ? AND day < ?", (sid, cutoff))
    return removed


def find_station(config: Any, station_id: str) -> Any:
    for station in config.stations:
        if station.id == station_id:
            return station
    known = ", ".join(s.id for s in config.stations) or "none"
    raise ConfigError(f"--station {station_id!r}: no such station in the configuration (known: {known})")


def settings_of(config: Any) -> report_model.ReportSettings:
    settings = getattr(config, "reports", None) or report_model.ReportSettings()
    folder = Path(settings.folder)
    if not folder.is_absolute():
        folder = Path(getattr(config, "base_dir", ".")) / folder
    return dataclasses.replace(settings, folder=folder)


def write_station_day(config: Any, store: Any, station: Any, day: dt.date, *, send: bool = False,
                      now: pd.Timestamp | None = None, index: bool = True) -> Path:
    """Gather, write ``<folder>/<station>/<day>.html``, keep its index figures in
    ``report_runs``, refresh the index (unless ``index`` is false: a round of many
    stations writes it once at its end), and (with ``send``) queue the email to the report
    recipients. Returns the report's path."""
    settings = settings_of(config)
    now = now or pd.Timestamp.now(tz="UTC")
    report = gather_day(store, station, day, settings, now=now, residual=getattr(config, "residual", None))
    try:
        path = report_render.write_day_report(report, settings.folder)
    except OSError as exc:
        raise ConfigError(f"reports.folder {settings.folder}: cannot write the report ({exc})") from None
    summary = report_render.read_summary(path)
    queued = 0
    if send and settings.email and settings.recipients and getattr(config, "mail", None) is not None:
        queued = len(queue_email(store, report, settings.recipients, path, now))
    store.db["report_runs"].upsert({"station": station.id, "day": day.isoformat(), "written_at": int(now.timestamp()),
                                    "path": str(path), "queued": queued,
                                    "summary": None if summary is None else json.dumps(summary)},
                                   pk=("station", "day"))
    if index:
        refresh_index(config, store, now, day)
    return path


def queue_email(store: Any, report: report_model.DayReport, recipients: Iterable[str], path: Path | None = None,
                now: pd.Timestamp | None = None) -> list[int]:
    """Queue the report to ``recipients`` through the outbox, once per station and day.

    The HTML part cites its charts by Content-ID and the charts travel as inline images
    (multipart/related, RFC 2387), which mail clients show in place, unlike data: URIs;
    the text part is the summary. ``path`` (the written page) is not needed any more.
    """
    mail = report_render.render_day_email(report)
    return enqueue(store.db, list(recipients), mail.subject, mail.text, mail.html, kind="report",
                   key=f"report/{report.station_id}/{report.day.isoformat()}", attachments=mail.attachments(),
                   now=int((now or pd.Timestamp.now(tz="UTC")).timestamp()))


def due_day(now: pd.Timestamp, tz: str, write_at: dt.time) -> dt.date:
    """The latest local day whose report is due at ``now``: yesterday once the local clock has
    passed ``write_at``, the day before otherwise."""
    local = pd.Timestamp(now).tz_convert(ZoneInfo(tz))
    since = local - pd.Timedelta(hours=write_at.hour, minutes=write_at.minute)
    return since.date() - dt.timedelta(days=1)


def write_due_reports(config: Any, store: Any, now: Any = None) -> list[Path]:
    """Write (and queue by email) every station's report that is due and not yet written.

    Called by the daemon's scheduler every few minutes; idempotent (the ``report_runs`` table
    remembers what was written, so a restart neither repeats nor skips a day).
    """
    if getattr(config, "reports", None) is None:
        return []
    now = pd.Timestamp.now(tz="UTC") if now is None else pd.Timestamp(now, unit="s", tz="UTC") \
        if isinstance(now, (int, float)) else pd.Timestamp(now).tz_convert("UTC")
    settings = settings_of(config)
    written = []
    for station in config.stations:
        day = due_day(now, station.tz, settings.write_at)
        done = store.db.conn.execute("SELECT 1 FROM report_runs WHERE station = ? AND day = ?",
                                     (station.id, day.isoformat())).fetchone()
        if done:
            continue
        try:
            written.append(write_station_day(config, store, station, day, send=True, now=now, index=False))
            log.info("station %s: daily report for %s written", station.id, day)
        except MonitorError as exc:
            log.error("station %s: daily report for %s: %s", station.id, day, exc)
    if written:
        try:
            refresh_index(config, store, now, max(due_day(now, st.tz, settings.write_at) for st in config.stations))
        except MonitorError as exc:
            log.error("daily reports: %s", exc)
    return written
