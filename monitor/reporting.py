"""Daily reports from the store: gather a station's local day into a DayReport, write it,
keep the index, email it through the outbox, and decide which reports are due.

Rendering lives in :mod:`alerts.report` (which knows nothing of the store); this module only
reads the store and fills the data structure. Levels are shown on chart datum when the station
defines a ``chart`` datum, else on the station datum.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import logging
from pathlib import Path
from typing import Any, Iterable
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from alerts import report as R
from monitor.errors import UserError

log = logging.getLogger(__name__)

WEEK = pd.Timedelta(days=7)
#: Rejected lines shown in full in a report (all are counted).
REJECTS_SHOWN = 20
#: Flag runs closer than this [s] are shown as one episode (common practice, no source).
EPISODE_JOIN_S = 1800.0


# --------------------------------------------------------------------------- pure helpers


def low_water_differences(observed: pd.Series, extremes: pd.DataFrame) -> pd.DataFrame:
    """For each predicted low water, the lowest observed level in its cycle minus the prediction.

    The cycle runs between the neighbouring predicted high waters (the mirror image of the
    skew surge's cycle). Returns ``time``, ``predicted``, ``observed``, ``observed_time``,
    ``difference`` [m], one row per low water with usable observations in its cycle.

    References
    ----------
    Williams, J., et al. (2016). Tide and skew surge independence. GRL 43 (skew surge, applied
    here to low waters as a negative surge measure).
    """
    rows = []
    ext = extremes.sort_values("time").reset_index(drop=True)
    obs = observed.dropna()
    for i, row in ext[ext["kind"] == "low"].iterrows():
        before = ext.loc[: i - 1][ext.loc[: i - 1, "kind"] == "high"]["time"]
        after = ext.loc[i + 1:][ext.loc[i + 1:, "kind"] == "high"]["time"]
        lo = before.iloc[-1] if len(before) else row["time"] - pd.Timedelta(hours=6.21)
        hi = after.iloc[0] if len(after) else row["time"] + pd.Timedelta(hours=6.21)
        window = obs[(obs.index >= lo) & (obs.index <= hi)]
        if window.empty:
            continue
        at = window.idxmin()
        rows.append({"time": row["time"], "predicted": float(row["level"]), "observed": float(window[at]),
                     "observed_time": at, "difference": float(window[at] - row["level"])})
    return pd.DataFrame(rows, columns=["time", "predicted", "observed", "observed_time", "difference"])


def qc_counts(tests: pd.DataFrame) -> dict[str, dict[int, int]]:
    """Per test column, the number of samples given each QARTOD flag (NULL counted as 2)."""
    out: dict[str, dict[int, int]] = {}
    for column in tests.columns:
        values = tests[column].fillna(2).astype(int)
        out[column] = {int(k): int(v) for k, v in values.value_counts().items()}
    return out


def _report_datum(station: Any) -> tuple[str, float]:
    datums = dict(getattr(station, "datums", {}) or {})
    if "chart" in datums:
        return "chart datum", float(datums["chart"])
    return "station datum", 0.0


def _alert_levels(station: Any, shift: float) -> list[R.AlertLevel]:
    """The operator's sample-rule steps, on the report's datum."""
    levels = []
    for rule in getattr(station, "rules", ()) or ():
        watch = getattr(rule, "watch", "")
        if watch not in ("level_above", "level_below", "residual_above", "residual_below"):
            continue
        quantity, direction = watch.split("_")
        for step in rule.steps:
            value = float(step.at) + (float(rule.datum_offset) - shift if quantity == "level" else 0.0)
            levels.append(R.AlertLevel(step.name, value, quantity, direction))
    return levels


def _ts(t: Any) -> pd.Timestamp | None:
    if t is None or (isinstance(t, float) and np.isnan(t)):
        return None
    return pd.Timestamp(int(t), unit="s", tz="UTC")


def _table(db: Any, name: str) -> bool:
    return name in db.table_names()


# --------------------------------------------------------------------------- gathering


def gather_day(store: Any, station: Any, day: dt.date, settings: R.ReportSettings | None = None, *,
               model: Any = None, model_source: str = "", now: pd.Timestamp | None = None) -> R.DayReport:
    """Fill a :class:`alerts.report.DayReport` for one station's local day from the store.

    Parameters
    ----------
    store : monitor.store.Store
    station : monitor.config.StationConfig
    day : date
        The local date in the station's zone.
    model : TideModel, optional
        The tide model in use (loaded from the station's constants when omitted).
    """
    settings = settings or R.ReportSettings()
    db = store.db
    sid = station.id
    start, end = R.day_bounds(day, station.tz)
    t0, t1 = int(start.timestamp()), int(end.timestamp()) - 1
    datum, shift = _report_datum(station)

    if model is None:
        from monitor.daemon import load_model

        try:
            model, model_source = load_model(store, station)
        except UserError as exc:
            model, model_source = None, str(exc)

    obs = store.observations(sid, "primary", t0, t1)
    derived = store.derived(sid, t0, t1)
    samples = R.empty_samples()
    if len(obs):
        samples = pd.DataFrame({"observed": obs["value"].to_numpy(dtype=float) - shift,
                                "flag": obs["flag"].to_numpy(dtype=int)}, index=obs.index.rename("time"))
        resid = derived["residual"].reindex(samples.index) if len(derived) else pd.Series(np.nan, index=samples.index)
        if resid.isna().all() and model is not None:
            resid = pd.Series(obs["value"].to_numpy(dtype=float) - model.predict(obs.index), index=obs.index)
        samples["residual"] = resid.to_numpy(dtype=float)
        samples = samples[["observed", "residual", "flag"]]

    predicted = pd.Series(dtype=float)
    tides: list[R.TideRow] = []
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
        sample_interval = R.infer_interval(before.index)

    rejects, rejected = _rejects(db, sid, t0, t1)
    counts, episodes = _qc(store, sid, t0, t1)
    return R.DayReport(
        station_id=sid, station_name=station.name, tz=station.tz, day=day, datum=datum,
        note=getattr(station, "note", "") or "",
        samples=samples, predicted=predicted, sample_interval=sample_interval,
        alert_levels=_alert_levels(station, shift), tides=tides,
        rejected_lines=rejected, rejects=rejects, qc_counts=counts, qc_episodes=episodes,
        diagnostics=_diagnostics(store, station, model, end, settings.trend_weeks),
        alerts=_alerts(db, sid, t0, t1), constants=_constants(store, sid, model, model_source),
        generated_at=now or pd.Timestamp.now(tz="UTC"),
    )


def _tides(model: Any, usable: pd.Series, start: pd.Timestamp, end: pd.Timestamp,
           shift: float) -> list[R.TideRow]:
    """Predicted high and low waters of the day against the usable observations [m, station datum]."""
    from monitor.residual import skew_surges

    extremes = model.high_low(start - pd.Timedelta(hours=14), end + pd.Timedelta(hours=14))
    extremes = extremes.assign(time=pd.to_datetime(extremes["time"], utc=True))
    highs = skew_surges(usable, extremes) if len(usable) else pd.DataFrame(columns=["hw_t"])
    highs = highs.set_index("hw_t") if len(highs) else highs
    lows = low_water_differences(usable, extremes) if len(usable) else pd.DataFrame(columns=["time"])
    lows = lows.set_index("time") if len(lows) else lows
    rows = []
    for _, e in extremes.iterrows():
        t = e["time"]
        if not (start <= t < end):
            continue
        level = float(e["level"]) - shift
        if e["kind"] == "high":
            key = int(t.timestamp())
            near = [k for k in (highs.index if len(highs) else []) if abs(int(k) - key) <= 60]
            if near:
                h = highs.loc[near[0]]
                rows.append(R.TideRow("high", t, level, _ts(h["observed_t"]), float(h["observed_high"]) - shift,
                                      float(h["skew_surge"])))
                continue
            rows.append(R.TideRow("high", t, level, partial=len(usable) > 0))
        else:
            if len(lows) and t in lows.index:
                w = lows.loc[t]
                rows.append(R.TideRow("low", t, level, w["observed_time"], float(w["observed"]) - shift,
                                      float(w["difference"]), partial=not _covered(usable, w["observed_time"])))
                continue
            rows.append(R.TideRow("low", t, level, partial=len(usable) > 0))
    return rows


def _covered(usable: pd.Series, at: pd.Timestamp, hours: float = 6.0, gap_s: float = 3600.0) -> bool:
    """Whether the record around ``at`` has no gap longer than ``gap_s`` within ``hours``."""
    window = usable[(usable.index >= at - pd.Timedelta(hours=hours)) & (usable.index <= at + pd.Timedelta(hours=hours))]
    if len(window) < 2:
        return False
    return float(np.diff(window.index.as_unit("ns").asi8).max()) / 1e9 <= gap_s


def _rejects(db: Any, sid: str, t0: int, t1: int) -> tuple[list[R.RejectRow], int]:
    if not _table(db, "rejects"):
        return [], 0
    n = db.conn.execute("SELECT count(*) FROM rejects WHERE station = ? AND at BETWEEN ? AND ?",
                        (sid, t0, t1)).fetchone()[0]
    rows = db.conn.execute("SELECT feed, lineno, reason, text FROM rejects WHERE station = ? AND at BETWEEN ? AND ? "
                           "ORDER BY id LIMIT ?", (sid, t0, t1, REJECTS_SHOWN)).fetchall()
    return [R.RejectRow(f or "-", lineno, reason or "", text or "") for f, lineno, reason, text in rows], int(n)


def _qc(store: Any, sid: str, t0: int, t1: int) -> tuple[dict, list[R.QcEpisode]]:
    from monitor import qc as Q

    db = store.db
    if not _table(db, "qc_tests"):
        return {}, []
    frame = pd.read_sql_query(
        f"SELECT sensor, t, {', '.join(Q.TESTS)} FROM qc_tests WHERE station = ? AND t BETWEEN ? AND ? "
        "ORDER BY sensor, t", db.conn, params=(sid, t0, t1))
    primary = frame[frame["sensor"] == "primary"]
    counts = qc_counts(primary[list(Q.TESTS)]) if len(primary) else {}
    episodes: list[R.QcEpisode] = []
    for sensor, part in frame.groupby("sensor"):
        index = pd.to_datetime(part["t"].to_numpy(dtype=np.int64), unit="s", utc=True)
        for test in Q.TESTS:
            flags = pd.Series(part[test].fillna(2).astype(int).to_numpy(), index=index)
            # Runs less than half an hour apart read as one episode to a technician.
            for _, ep in Q.episodes(flags, join_gap=EPISODE_JOIN_S).iterrows():
                episodes.append(R.QcEpisode(R.QC_TEST_NAMES.get(test, test), int(ep["worst"]), ep["start"],
                                            ep["end"], int(ep["samples"]), str(sensor)))
    episodes.sort(key=lambda e: (e.start, e.test))
    return counts, episodes


def _series(store: Any, sid: str, sensor: str, t0: int, t1: int) -> pd.Series:
    obs = store.observations(sid, sensor, t0, t1)
    if obs.empty:
        return pd.Series(dtype=float)
    obs = obs[~obs["flag"].isin([4, 9])]
    return obs["value"].astype(float)


def _diagnostics(store: Any, station: Any, model: Any, end: pd.Timestamp, weeks: int) -> list[R.Diagnostic]:
    """Drift against the backup, clock offset and datum steps over the recent weeks.

    Each is computed week by week for the trend; the latest week gives the value shown.
    A diagnostic that cannot be computed (no backup, no model, too little data) is left out
    or says why, and never stops the report.
    """
    from monitor import diagnostics as D

    sid = station.id
    t_end = int(end.timestamp())
    t_start = int((end - weeks * WEEK).timestamp())
    primary = _series(store, sid, "primary", t_start, t_end)
    out: list[R.Diagnostic] = []
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
                        values[week_end] = D.sensor_drift(p, backup[(backup.index >= a) & (backup.index < b)])
                latest = D.sensor_drift(primary[primary.index >= end - WEEK], backup[backup.index >= end - WEEK])
                out.append(R.Diagnostic(
                    "Primary minus backup: drift", "mm/day", _num(latest["drift_mm_per_day"]),
                    _half_width(latest), pd.Series({k: v["drift_mm_per_day"] for k, v in values.items()}, dtype=float),
                    "last 7 days, Theil-Sen slope of hourly medians"))
                out.append(R.Diagnostic(
                    "Primary minus backup: offset", "mm", _num(latest["offset_mm"]), _num(latest["offset_se_mm"]),
                    pd.Series({k: v["offset_mm"] for k, v in values.items()}, dtype=float)))
        if model is not None:
            clock = D.clock_offset(primary, model)
            per_day = clock.get("per_day", pd.Series(dtype=float))
            history = (per_day / 60.0).resample("7D").mean() if len(per_day) else pd.Series(dtype=float)
            out.append(R.Diagnostic("Clock offset against the predicted tide", "min", _num(clock["offset_min"]),
                                    _num(clock["offset_se_min"]), history,
                                    f"{clock.get('days', 0)} days; positive: the record lags the tide"))
            week = primary[primary.index >= end - WEEK]
            resid = pd.Series(week.to_numpy() - model.predict(week.index), index=week.index)
            steps = D.datum_steps(resid)
            out.append(R.Diagnostic(
                "Datum steps in the residual, last 7 days", "mm",
                float(steps["step_mm"].iloc[-1]) if len(steps) else None,
                float(steps["se_mm"].iloc[-1]) if len(steps) else None,
                note=f"{len(steps)} found" + (": " + ", ".join(
                    f"{r.step_mm:+.0f} mm at {r.time.tz_convert(station.tz):%d %b %H:%M}" for r in steps.itertuples())
                    if len(steps) else "")))
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


def _alerts(db: Any, sid: str, t0: int, t1: int) -> list[R.AlertEpisodeRow]:
    if not _table(db, "alert_episodes"):
        return []
    episodes = list(db.query(
        "SELECT * FROM alert_episodes WHERE station = ? AND opened_at <= ? AND (closed_at IS NULL OR closed_at >= ?) "
        "ORDER BY opened_at", [sid, t1, t0]))
    has_outbox = _table(db, "outbox")
    rows = []
    for ep in episodes:
        deliveries: list[R.Delivery] = []
        if has_outbox:
            prefix = f"{sid}/{ep['rule']}/episode-{ep['id']}/"
            groups: dict[str, list[dict]] = {}
            for m in db.query("SELECT * FROM outbox WHERE key LIKE ? ORDER BY id", [prefix + "%"]):
                groups.setdefault(m["key"], []).append(m)
            for key, msgs in groups.items():
                what = key[len(prefix):].replace("/", ": ", 1).replace("_", " ")
                sent = [m["sent_at"] for m in msgs if m["sent_at"]]
                errors = sorted({m["last_error"] for m in msgs if m["last_error"] and m["status"] != "sent"})
                deliveries.append(R.Delivery(
                    what=what, queued_at=_ts(min(m["created_at"] for m in msgs)),
                    sent_at=_ts(max(sent)) if len(sent) == len(msgs) else None,
                    attempts=max(int(m["attempts"] or 0) for m in msgs), error="; ".join(errors),
                    recipients=len(msgs)))
        rows.append(R.AlertEpisodeRow(
            rule=ep["rule"], level=ep.get("top_step") or ep.get("step_now") or "", started=_ts(ep["opened_at"]),
            cleared=_ts(ep["closed_at"]), peak=_num(ep.get("peak")), unit=ep.get("unit") or "m",
            deliveries=tuple(deliveries)))
    return rows


def _constants(store: Any, sid: str, model: Any, source: str) -> R.ConstantsInfo | None:
    if model is None:
        return None
    fit = store.fit_in_use(sid) if source.startswith("fit") else None
    constituents = []
    for c in getattr(model, "constituents", ()) or ():
        get = c.get if isinstance(c, dict) else (lambda k, d=None, c=c: getattr(c, k, d))
        constituents.append(R.ConstituentRow(str(get("name")), float(get("amplitude")), float(get("phase")),
                                             _num(get("amplitude_ci")), _num(get("snr"))))
    constituents.sort(key=lambda k: -k.amplitude)
    return R.ConstantsInfo(
        source=source or "constants file", mean=_num(getattr(model, "mean", None)), constituents=tuple(constituents),
        fitted_at=_ts(fit["fitted_at"]) if fit else None, record_start=_ts(fit["start"]) if fit else None,
        record_end=_ts(fit["end"]) if fit else None, samples=int(fit["n"]) if fit else None,
        rms=_num(fit["rms"]) if fit else None, variance_explained=_num(fit["variance_explained"]) if fit else None)


# --------------------------------------------------------------------------- writing and sending


def _ensure_runs(db: Any) -> None:
    db["report_runs"].create({"station": str, "day": str, "written_at": int, "path": str, "queued": int},
                             pk=("station", "day"), if_not_exists=True)


def find_station(config: Any, station_id: str) -> Any:
    for station in config.stations:
        if station.id == station_id:
            return station
    known = ", ".join(s.id for s in config.stations) or "none"
    raise UserError(f"--station {station_id!r}: no such station in the configuration (known: {known})")


def settings_of(config: Any) -> R.ReportSettings:
    settings = getattr(config, "reports", None) or R.ReportSettings()
    folder = Path(settings.folder)
    if not folder.is_absolute():
        folder = Path(getattr(config, "base_dir", ".")) / folder
    return dataclasses.replace(settings, folder=folder)


def write_station_day(config: Any, store: Any, station: Any, day: dt.date, *, send: bool = False,
                      now: pd.Timestamp | None = None) -> Path:
    """Gather, write ``<folder>/<station>/<day>.html``, refresh the index, and (with ``send``)
    queue the email to the report recipients. Returns the report's path."""
    settings = settings_of(config)
    now = now or pd.Timestamp.now(tz="UTC")
    report = gather_day(store, station, day, settings, now=now)
    try:
        path = R.write_day_report(report, settings.folder)
        R.prune_reports(settings.folder, settings.keep_days, day)
        R.write_index(settings.folder, now)
    except OSError as exc:
        raise UserError(f"reports.folder {settings.folder}: cannot write the report ({exc})") from None
    queued = 0
    if send and settings.email and settings.recipients and getattr(config, "mail", None) is not None:
        queued = len(queue_email(store, report, settings.recipients, path, now))
    _ensure_runs(store.db)
    store.db["report_runs"].upsert({"station": station.id, "day": day.isoformat(), "written_at": int(now.timestamp()),
                                    "path": str(path), "queued": queued}, pk=("station", "day"))
    return path


def queue_email(store: Any, report: R.DayReport, recipients: Iterable[str], path: Path,
                now: pd.Timestamp | None = None) -> list[int]:
    """Queue the report to ``recipients`` through the outbox, once per station and day.

    The HTML part is the self-contained page (chart embedded); the chart also goes as a PNG
    attachment for mail clients that hide embedded images; the text part is the summary.
    """
    from alerts import charts
    from alerts.outbox import enqueue

    mail = R.render_day_email(report)
    html = path.read_text(encoding="utf-8")
    attachments = [(f"{report.station_id}-{report.day.isoformat()}.png", charts.day_chart(report), "image/png")]
    return enqueue(store.db, list(recipients), mail.subject, mail.text, html, kind="report",
                   key=f"report/{report.station_id}/{report.day.isoformat()}", attachments=attachments,
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
    _ensure_runs(store.db)
    written = []
    for station in config.stations:
        day = due_day(now, station.tz, settings.write_at)
        done = store.db.conn.execute("SELECT 1 FROM report_runs WHERE station = ? AND day = ?",
                                     (station.id, day.isoformat())).fetchone()
        if done:
            continue
        try:
            written.append(write_station_day(config, store, station, day, send=True, now=now))
            log.info("station %s: daily report for %s written", station.id, day)
        except UserError as exc:
            log.error("station %s: daily report for %s: %s", station.id, day, exc)
    return written
