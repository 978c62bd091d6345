"""How rare was this water, and is the sea rising here: one station's own record.

Gathers the station's quality-controlled primary record from the store, and runs the
library's published methods on it:

- the sea-level trend (:mod:`predictor.sealevel`): monthly and annual means from days with
  enough QC-passed data (the rule in :data:`predictor.sealevel.COMPLETENESS_RULE`), the trend
  by generalised least squares with AR(1) errors, the nodal term fitted or left in by record
  length, datum steps corrected or the record split at them;
- return levels (:mod:`predictor.extremes`) of the sea as it stands at the trend's epoch
  (trend taken out, datum steps corrected): annual maxima with a GEV fit, and declustered skew
  surges over a threshold with a GPD joined with the predicted high waters of a nodal cycle,
  side by side, with their 95 % bands and threshold diagnostics.

Only samples that **passed** quality control (aggregate flag 1) enter; samples flagged
suspect, fail, missing or not yet evaluated are counted and left out, and the highest of them
is named when it stands above everything that passed (a storm's crest flagged suspect should
be confirmed by a technician, not silently dropped).

Datum steps come from two places, named in the output: steps found by quality control's
datum-step test (:func:`monitor.quality.diagnostics.datum_steps`, run here on the hourly residual of
the passed record) and steps the technician gives (the station log: a gauge replaced, a zero
reset).

Results are cached in table ``extremes_cache`` (owned here), keyed on the events the fits
rest on: they are computed again only when a new annual maximum or a new storm (a skew surge
above the cached threshold) arrives after the cached record's end, or the options change
(:func:`cached_analysis`). Checking costs the new tail only.

The output is an automated, unofficial aid: official flood-risk assessments, local
authorities and licensed practice come first.

References
----------
Coles, S. (2001). An Introduction to Statistical Modeling of Extreme Values. Springer.
Batstone, C., et al. (2013). A UK best-practice approach for extreme sea-level analysis along
complex topographic coastlines. Ocean Engineering 71.
Pugh, D., Woodworth, P. (2014). Sea-Level Science. Cambridge University Press, ch. 7 and 10.
"""
from __future__ import annotations

import hashlib
import json
import math
import time as _time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from alerts.reports.rarity import RaritySection
from monitor.errors import MonitorError
from monitor.quality import diagnostics as dg
from monitor.store.migrations import ensure_extremes_cache
from monitor.surge.residual import skew_surges
from predictor import extremes as ex
from predictor import sealevel as sl
from predictor.rarity import rarity_words

__all__ = ["RecordError", "StationRecord", "read_record", "analyse", "cached_analysis", "result_curves",
           "readable_curve", "on_todays_sea", "CURVE_PERIODS", "TABLE", "PASSED"]

TABLE = "extremes_cache"
#: Aggregate QARTOD flag of a sample that passed every test (U.S. IOOS 2021).
PASSED = 1
#: Return periods [year] of the stored curve (the words of the report read it backwards).
CURVE_PERIODS = (1.1, 2.0, 5.0, 10.0, 20.0, 50.0, 100.0, 200.0, 500.0)
#: Fewest years of record for any return level (with fewer, one line says so).
MIN_YEARS = 3.0
#: Version of the analysis: a new version invalidates the cache.
VERSION = 1
_HOUR = 3600


class RecordError(MonitorError):
    """The station's record cannot give what was asked; the message says why."""


# ============================================================================ the record
@dataclass
class StationRecord:
    """A station's QC-passed primary record, reduced to hours.

    Attributes
    ----------
    hourly_mean : pandas.Series
        Mean of each clock hour's passed samples [m, station datum], stamped at their mean time.
    hourly_max : pandas.Series
        Highest passed sample of each clock hour [m, station datum], stamped at its time.
    counts : dict
        Samples by aggregate flag: ``passed``, ``suspect``, ``fail``, ``missing``,
        ``not_evaluated``.
    highest_left_out : dict or None
        ``time`` (UTC), ``level`` [m, station datum], ``flag`` of the highest sample left out,
        when it stands above the highest passed one.
    """

    hourly_mean: pd.Series
    hourly_max: pd.Series
    counts: dict
    highest_left_out: dict | None = None

    @property
    def years(self) -> float:
        """Hours with passed data, in years [year]."""
        return len(self.hourly_mean) / (365.25 * 24)


def read_record(store: Any, station_id: str, sensor: str = "primary",
                start_t: int | None = None) -> StationRecord:
    """The QC-passed record of a sensor, as hourly means and hourly maxima (SQL aggregates).

    Parameters
    ----------
    store : monitor.store.Store
    station_id, sensor : str
    start_t : int, optional
        Only samples after this time [Unix s] (the cache's check of the new tail).

    Returns
    -------
    StationRecord
    """
    conn = store.conn
    lo = -(2 ** 62) if start_t is None else int(start_t)
    rows = conn.execute(
        "SELECT max(value), t, avg(t), avg(value) FROM observations WHERE station = ? AND sensor = ? "
        "AND t > ? AND flag = ? GROUP BY t / ? ORDER BY t / ?",
        (station_id, sensor, lo, PASSED, _HOUR, _HOUR)).fetchall()
    arr = np.array(rows, dtype=float).reshape(len(rows), 4)
    hmax = pd.Series(arr[:, 0], index=_utc(arr[:, 1]), name="level")
    hmean = pd.Series(arr[:, 3], index=_utc(arr[:, 2]), name="level")
    counts = {"passed": 0, "suspect": 0, "fail": 0, "missing": 0, "not_evaluated": 0}
    names = {1: "passed", 3: "suspect", 4: "fail", 9: "missing"}
    for flag, n in conn.execute(
            "SELECT coalesce(flag, 2), count(*) FROM observations WHERE station = ? AND sensor = ? "
            "AND t > ? GROUP BY 1", (station_id, sensor, lo)):
        key = names.get(int(flag), "not_evaluated")
        counts[key] += int(n)
    top = conn.execute(
        "SELECT t, value, coalesce(flag, 2) FROM observations WHERE station = ? AND sensor = ? AND t > ? "
        "AND coalesce(flag, 2) NOT IN (1, 4, 9) AND value IS NOT NULL ORDER BY value DESC LIMIT 1",
        (station_id, sensor, lo)).fetchone()
    left = None
    if top is not None and (hmax.empty or top[1] > hmax.max()):
        left = {"time": pd.Timestamp(int(top[0]), unit="s", tz="UTC"), "level": float(top[1]),
                "flag": int(top[2])}
    return StationRecord(hourly_mean=hmean, hourly_max=hmax, counts=counts, highest_left_out=left)


def _utc(secs: np.ndarray) -> pd.DatetimeIndex:
    return pd.to_datetime(np.round(secs).astype(np.int64), unit="s", utc=True)


# ============================================================================ datum steps
def qc_datum_steps(record: StationRecord, model: Any, qc_settings: Any = None) -> pd.DataFrame:
    """Datum steps found by quality control's test on the hourly residual of the passed record.

    The test (:func:`monitor.quality.diagnostics.datum_steps`) with the station's ``qc.step_min_mm``;
    its window is six hours of hourly means either side (the record is reduced to hours).

    Returns
    -------
    pandas.DataFrame
        ``time`` (UTC), ``step_mm``, ``se_mm``; empty when none is found.
    """
    s = record.hourly_mean
    if len(s) < 48 or model is None:
        return pd.DataFrame(columns=["time", "step_mm", "se_mm"])
    resid = s - model.predict(s.index)
    min_step = 1e-3 * float(getattr(qc_settings, "step_min_mm", 20.0) or 20.0)
    found = dg.datum_steps(resid, window=6 * _HOUR, min_step=min_step, gap_limit=2 * _HOUR + 1)
    return found[["time", "step_mm", "se_mm"]] if len(found) else \
        pd.DataFrame(columns=["time", "step_mm", "se_mm"])


# ============================================================================ the analysis
@dataclass(frozen=True)
class Options:
    """What was asked (part of the cache key)."""

    periods: tuple = ex.DEFAULT_PERIODS
    datum_steps: tuple = ()              # ISO times given by the technician
    step_handling: str = "correct"       # "correct" or "split" (the trend's; extremes always correct)
    run_length_h: float = ex.DEFAULT_RUN_LENGTH / 3600.0
    threshold: float | None = None       # skew-surge threshold [m]; None: the 0.99 quantile
    bootstrap: int = ex.DEFAULT_BOOTSTRAP

    def to_json(self) -> str:
        return json.dumps({"periods": [float(p) for p in self.periods], "datum_steps": list(self.datum_steps),
                           "step_handling": self.step_handling, "run_length_h": self.run_length_h,
                           "threshold": self.threshold, "bootstrap": self.bootstrap})

    @classmethod
    def from_json(cls, text: str) -> "Options":
        d = json.loads(text)
        return cls(periods=tuple(d["periods"]), datum_steps=tuple(d["datum_steps"]),
                   step_handling=d["step_handling"], run_length_h=d["run_length_h"],
                   threshold=d["threshold"], bootstrap=d["bootstrap"])

    def key(self) -> str:
        text = json.dumps([VERSION, self.to_json()])
        return hashlib.sha1(text.encode()).hexdigest()[:16]


def analyse(record: StationRecord, model: Any, station: Any, options: Options = Options(),
            qc_settings: Any = None) -> dict:
    """Trend and return levels of a station's record; every level on the display datum.

    Parameters
    ----------
    record : StationRecord
    model : predictor.TideModel
        The station's tide on the station datum (its trend is left out).
    station : monitor.service.config.StationConfig
        For the display datum (``display_offset``, ``display_label``).
    options : Options
    qc_settings : monitor.quality.checks.QcSettings, optional
        For the datum-step test's minimum step.

    Returns
    -------
    dict
        JSON-ready: ``station``, ``datum``, ``record``, ``sea_level``, ``datum_steps``,
        ``annual_maxima``, ``joint_probability``, ``threshold_diagnostics``, ``warnings``,
        ``events`` (what the cache is keyed on).

    Raises
    ------
    RecordError
        No passed data, or too little for anything.
    """
    if record.hourly_mean.empty:
        raise RecordError(_no_data_message(station.id, record.counts))
    if record.years < MIN_YEARS:
        raise RecordError(f"station {station.id}: only {record.years:.1f} years of QC-passed hourly data; "
                          f"return levels need at least {MIN_YEARS:.0f} years (and decades for a 1-in-50-year level)")
    shift = float(station.display_offset)
    out: dict = {"station": station.id, "datum": station.display_label,
                 "datum_offset_m": shift, "record": _record_summary(record), "warnings": []}
    steps_qc = qc_datum_steps(record, model, qc_settings)
    given = [pd.Timestamp(t) for t in options.datum_steps]
    given = [t.tz_localize("UTC") if t.tz is None else t.tz_convert("UTC") for t in given]
    steps = sorted(list(pd.DatetimeIndex(steps_qc["time"])) + given) if len(steps_qc) else sorted(given)
    out["datum_steps"] = ([{"time": _iso(r.time), "step_mm": float(r.step_mm), "se_mm": float(r.se_mm),
                            "source": "found by quality control (datum-step test on the hourly residual)"}
                           for r in steps_qc.itertuples()] +
                          [{"time": _iso(t), "source": "given (station log)"} for t in given])
    trend, trend_main = _sea_level(record, steps, options, out)
    if trend is not None:
        sea_max = sl.stationary_levels(record.hourly_max, trend)
        out["stationary"] = (f"levels are those of the sea as it stands at {trend.epoch:%Y-%m-%d}: the trend "
                             f"({trend.rate_mm_per_year:.2f} mm/year) taken out"
                             + (" and the datum steps corrected" if trend.steps else ""))
    else:
        sea_max = record.hourly_max
        out["stationary"] = "levels as recorded: no trend could be fitted, none taken out"
    epoch = trend.epoch if trend is not None else record.hourly_max.index[-1]
    _annual_route(sea_max, options, shift, out, trend)
    _joint_route(sea_max, model, epoch, options, shift, out, trend)
    out["events"] = _events(record, out)
    return out


def _no_data_message(sid: str, counts: dict) -> str:
    total = sum(counts.values())
    if total == 0:
        return f"station {sid}: no primary samples in the store (ingest some first)"
    return (f"station {sid}: none of its {total:,} primary samples has passed quality control "
            f"({counts['not_evaluated']:,} not evaluated yet, {counts['suspect']:,} suspect, "
            f"{counts['fail']:,} failed); run quality control over the record first "
            f"(quaywatch qc CONFIG --station {sid} --from ... --to ...)")


def _record_summary(record: StationRecord) -> dict:
    idx = record.hourly_mean.index
    out = {"first": _iso(idx[0]), "last": _iso(idx[-1]), "years_of_hours": round(record.years, 2),
           "samples": record.counts,
           "used": "samples that passed quality control (flag 1) only; suspect, failed, missing and "
                   "not yet evaluated samples are left out"}
    if record.highest_left_out is not None:
        h = record.highest_left_out
        what = {3: "suspect", 2: "not yet evaluated"}.get(h["flag"], f"flag {h['flag']}")
        out["highest_left_out"] = {"time": _iso(h["time"]), "level_station_m": h["level"], "flag": h["flag"],
                                   "note": f"the record's highest reading ({_iso(h['time'])}) is {what} and "
                                           "left out: a technician should confirm it (quaywatch flag ... --set 1) "
                                           "or fail it; if it was real water the return levels here are low"}
    return out


def _sea_level(record: StationRecord, steps: list, options: Options, out: dict):
    """Means and trend into ``out['sea_level']``; (trend with steps corrected, trend as asked)."""
    msl = sl.mean_sea_levels(record.hourly_mean)
    sea: dict = {"rule": msl.rule, "days": int(len(msl.daily)), "months": int(len(msl.monthly)),
                 "years": int(len(msl.annual)),
                 "annual_means": [{"year": int(y), "mean_m": float(m)} for y, m in msl.annual["mean"].items()]}
    out["sea_level"] = sea
    try:
        trend = sl.sea_level_trend(msl.monthly, datum_steps=steps, step_handling="correct")
    except sl.SeaLevelError as exc:
        sea["trend"] = None
        sea["note"] = f"no trend: {exc}"
        out["warnings"].append(f"No sea-level trend ({exc}); return levels use the levels as recorded.")
        return None, None
    shown = trend
    if options.step_handling == "split" and steps:
        try:
            shown = sl.sea_level_trend(msl.monthly, datum_steps=steps, step_handling="split")
        except sl.SeaLevelError as exc:
            out["warnings"].append(f"The record could not be split at its datum steps ({exc}); the trend "
                                   "shown corrects them instead.")
    sea["trend"] = {
        "rate_mm_per_year": shown.rate_mm_per_year, "se_mm_per_year": shown.se_mm_per_year,
        "lower_mm_per_year": shown.lower_mm_per_year, "upper_mm_per_year": shown.upper_mm_per_year,
        "confidence": shown.confidence, "se_white_mm_per_year": shown.se_white_mm_per_year,
        "rho": shown.rho, "method": shown.method, "n_months": shown.n_months,
        "span_years": shown.span_years, "epoch": _iso(shown.epoch), "nodal": shown.nodal,
        "nodal_note": shown.nodal_note, "step_handling": shown.step_handling,
        "steps": [{"time": _iso(s["time"]), "offset_mm": s["offset_mm"], "se_mm": s["se_mm"]} for s in shown.steps],
        "segments": [{**s, "start": _iso(s["start"]), "end": _iso(s["end"])} for s in shown.segments],
        "step_note": shown.step_note, "notes": shown.notes}
    if shown is not trend:
        sea["trend"]["extremes_note"] = ("the return levels put the segments on one datum with the offsets "
                                         "of the corrected fit (a split record has none)")
    m = shown.monthly
    sea["monthly"] = {"month": [_iso(t) for t in m.index], "mean_m": m["mean"].round(4).tolist(),
                      "adjusted_m": m["adjusted"].round(4).tolist(), "trend_m": m["trend"].round(4).tolist()}
    return trend, shown


def _curve_rows(fit, periods, shift: float) -> list:
    rows = []
    for p in periods:
        r = fit.return_level(p)
        rows.append({"period": float(p), "level": r.level - shift, "lower": r.lower - shift,
                     "upper": r.upper - shift if math.isfinite(r.upper) else None, "warning": r.warning})
    return rows


def _all_periods(options: Options) -> list:
    return sorted({float(p) for p in (*CURVE_PERIODS, *options.periods)})


def _shift_se(trend, times) -> float:
    """The trend's and steps' own uncertainty as a shift of the fits' input [m]."""
    return sl.stationary_shift_se(trend, times) if trend is not None else 0.0


def _annual_route(sea_max: pd.Series, options: Options, shift: float, out: dict, trend=None) -> None:
    route: dict = {"method": "annual maxima of the hourly record, generalised extreme value distribution by "
                             "maximum likelihood, 95 % profile-likelihood intervals (Coles 2001, ch. 3) widened "
                             "by the trend's own uncertainty"}
    out["annual_maxima"] = route
    try:
        am = ex.annual_maxima(sea_max)
        fit = ex.fit_gev(am)
        fit.level_shift_se = _shift_se(trend, am["time"])
    except ex.ExtremesError as exc:
        route["error"] = str(exc)
        out["warnings"].append(f"Annual maxima: {exc}.")
        return
    route.update(location=fit.location - shift, scale=fit.scale, shape=fit.shape, years=len(am),
                 coverage_rule=f"a year counts when {ex.MIN_YEAR_COVERAGE:.0%} of its hours hold passed data "
                               "(common practice, no source)",
                 trend_shift_se_m=fit.level_shift_se,
                 maxima=[{"year": int(y), "time": _iso(r.time), "level": float(r.level) - shift}
                         for y, r in am.iterrows()],
                 curve=_curve_rows(fit, sorted({float(p) for p in options.periods}), shift))
    route["_fit"] = fit


def _joint_route(sea_max: pd.Series, model: Any, epoch, options: Options, shift: float, out: dict,
                 trend=None) -> None:
    route: dict = {"method": "skew surges of every tidal cycle declustered into storms (run length "
                             f"{options.run_length_h:g} h), generalised Pareto above a threshold, joined with "
                             "the predicted high waters of a nodal cycle (Batstone et al. 2013; Coles 2001, ch. 4)"}
    out["joint_probability"] = route
    if model is None:
        route["error"] = "no tide model for the station yet"
        out["warnings"].append("Skew-surge joint probability: no tide model for the station yet.")
        return
    tide = model.without_trend()
    try:
        turning = tide.high_low(sea_max.index[0] - pd.Timedelta(hours=13),
                                sea_max.index[-1] + pd.Timedelta(hours=13))
        surges = skew_surges(sea_max, turning, max_gap_s=2 * _HOUR + 1)
        if len(surges) < 200:
            raise ex.ExtremesError(f"only {len(surges)} complete tidal cycles in the record")
        times = pd.to_datetime(surges["hw_t"].to_numpy(dtype=np.int64), unit="s", utc=True)
        values = surges["skew_surge"].to_numpy(dtype=float)
        pot = ex.fit_peaks_over_threshold(times, values, options.threshold, f"{options.run_length_h:g}h")
        hw = ex.predicted_high_waters(tide, start=epoch)
        fit = ex.joint_probability(pot, hw, bootstrap=options.bootstrap)
        fit.level_shift_se = _shift_se(trend, times)
    except ex.ExtremesError as exc:
        route["error"] = str(exc)
        out["warnings"].append(f"Skew-surge joint probability: {exc}.")
        return
    route.update(threshold_m=pot.threshold, storms=pot.n_storms, storms_per_year=pot.rate,
                 extremal_index=pot.extremal_index, scale=pot.scale, shape=pot.shape,
                 cycles=int(len(values)), years=pot.record_years, band=fit.band_method,
                 level_extremal_index=fit.level_extremal_index, trend_shift_se_m=fit.level_shift_se,
                 storm_peaks=[{"time": _iso(t), "skew_surge": float(v)} for t, v in
                              zip(pd.to_datetime(pot.peak_times, unit="s", utc=True), pot.peaks)],
                 curve=_curve_rows(fit, _all_periods(options), shift))
    diag = ex.threshold_diagnostics(times, values, run_length=f"{options.run_length_h:g}h")
    out["threshold_diagnostics"] = {
        "note": ("above a good threshold the shape and the modified scale stay level within their intervals "
                 "and the storms' mean excess is a straight line (Coles 2001, sec. 4.3.1)"),
        "rows": json.loads(diag.to_json(orient="records"))}
    route["_fit"] = fit


def _events(record: StationRecord, out: dict) -> dict:
    """What the cache is keyed on: each year's highest passed hour and the storm peaks."""
    hm = record.hourly_max
    annual = hm.groupby(hm.index.year).max()
    jp = out.get("joint_probability", {})
    return {"annual_max": {str(int(y)): round(float(v), 4) for y, v in annual.items()},
            "storms": [p["time"] for p in jp.get("storm_peaks", [])],
            "threshold_m": jp.get("threshold_m"), "record_end": int(hm.index[-1].timestamp())}


# ============================================================================ asked levels
def period_of(result: dict, level_display: float) -> dict:
    """Return period of a level [m, display datum] by both routes, with their ranges.

    Uses the fitted models kept in ``result`` (the ``_fit`` entries of a fresh analysis).
    """
    shift = result["datum_offset_m"]
    out = {"level": level_display}
    for name in ("annual_maxima", "joint_probability"):
        fit = result.get(name, {}).get("_fit")
        if fit is None:
            continue
        rp = fit.return_period(level_display + shift)
        out[name] = {"period": _finite(rp.period), "lower": _finite(rp.lower), "upper": _finite(rp.upper),
                     "warning": rp.warning}
    return out


def event_level(record: StationRecord, result: dict, when: pd.Timestamp, hours: float = 24.0) -> dict:
    """The highest passed level within ``hours`` of ``when``, as recorded and on today's sea."""
    hm = record.hourly_max
    win = hm[(hm.index >= when - pd.Timedelta(hours=hours)) & (hm.index <= when + pd.Timedelta(hours=hours))]
    if win.empty:
        raise RecordError(f"--event {when:%Y-%m-%d %H:%MZ}: no QC-passed sample within {hours:g} h of it")
    t = win.idxmax()
    level = float(win.max())
    shift = result["datum_offset_m"]
    return {"time": _iso(t), "level": level - shift, "level_today": on_todays_sea(result, level, t) - shift}


def on_todays_sea(result: dict, level: float, t) -> float:
    """``level`` recorded at ``t`` as it would stand on the sea of the trend's epoch [m]: the
    trend taken out and the datum steps corrected (as the fits' input was;
    :func:`predictor.sealevel.stationary_levels`)."""
    trend = (result.get("sea_level") or {}).get("trend")
    if not trend:
        return float(level)
    t = pd.Timestamp(t)
    t = t.tz_localize("UTC") if t.tz is None else t
    epoch = pd.Timestamp(trend["epoch"])
    out = float(level) - 1e-3 * trend["rate_mm_per_year"] * ((t - epoch) / pd.Timedelta(days=365.25))
    for s in trend.get("steps", []):
        if t < pd.Timestamp(s["time"]):
            out += 1e-3 * s["offset_mm"]
    return out


# ============================================================================ cache
def ensure_schema(db: Any) -> None:
    """Create table ``extremes_cache`` if missing (declared in monitor.store.migrations, version 5;
    kept here for a bare database in tests)."""
    ensure_extremes_cache(db)


def last_options(store: Any, station_id: str) -> Options:
    """The options of the station's most recent analysis (so the report reads the curve the
    technician last asked for, datum steps from the station log included); defaults if none."""
    ensure_schema(store.conn)
    row = store.conn.execute(f"SELECT options_json FROM {TABLE} WHERE station = ? ORDER BY made_t DESC LIMIT 1",
                             (station_id,)).fetchone()
    return Options() if row is None else Options.from_json(row[0])


def _stored(result: dict) -> str:
    def clean(o):
        if isinstance(o, dict):
            return {k: clean(v) for k, v in o.items() if not k.startswith("_")}
        if isinstance(o, list):
            return [clean(v) for v in o]
        if isinstance(o, (np.floating, float)):
            return None if not math.isfinite(float(o)) else float(o)
        if isinstance(o, np.integer):
            return int(o)
        return o
    return json.dumps(clean(result))


def public(result: dict) -> dict:
    """The result without its fitted models (JSON-ready)."""
    return json.loads(_stored(result))


def cached_analysis(store: Any, station: Any, model: Any, options: Options = Options(),
                    qc_settings: Any = None, refresh: bool = False) -> tuple[dict, bool]:
    """The cached result when no new annual maximum or storm has come since; else a new one.

    Returns
    -------
    (result, fresh) : (dict, bool)
        The result (public form when from the cache) and whether it was computed now.
    """
    conn = store.conn
    ensure_schema(conn)
    key = options.key()
    row = conn.execute(f"SELECT record_end, events, result FROM {TABLE} WHERE station = ? AND options = ?",
                       (station.id, key)).fetchone()
    if row is not None and not refresh and not _new_events(store, station, model, json.loads(row[1])):
        return json.loads(row[2]), False
    record = read_record(store, station.id)
    result = analyse(record, model, station, options, qc_settings)
    with conn:
        conn.execute(f"INSERT OR REPLACE INTO {TABLE} (station, options, made_t, record_end, events, result, "
                     "options_json) VALUES (?, ?, ?, ?, ?, ?, ?)",
                     (station.id, key, int(_time.time()), result["events"]["record_end"],
                      json.dumps(result["events"]), _stored(result), options.to_json()))
    return result, True


def _new_events(store: Any, station: Any, model: Any, events: dict) -> bool:
    """A new annual maximum, or a skew surge above the cached threshold, after the cached end."""
    end = int(events["record_end"])
    tail = read_record(store, station.id, start_t=end)
    if tail.hourly_max.empty:
        return False
    hm = tail.hourly_max
    for year, v in hm.groupby(hm.index.year).max().items():
        old = events["annual_max"].get(str(int(year)))
        if old is None or v > old + 1e-9:
            return True
    u = events.get("threshold_m")
    if u is None or model is None:
        return False
    # the tail with a tidal cycle before it, so the first new cycle is complete
    ctx = read_record(store, station.id, start_t=end - 26 * _HOUR).hourly_max
    tide = model.without_trend()
    turning = tide.high_low(ctx.index[0] - pd.Timedelta(hours=13), ctx.index[-1] + pd.Timedelta(hours=13))
    ss = skew_surges(ctx, turning, max_gap_s=2 * _HOUR + 1)
    new = ss[ss["hw_t"] > end]
    return bool(len(new) and (new["skew_surge"] > u).any())


# ============================================================================ helpers
def _iso(t) -> str:
    return pd.Timestamp(t).tz_convert("UTC").strftime("%Y-%m-%dT%H:%M:%SZ")


def _finite(v: float) -> float | None:
    return float(v) if math.isfinite(v) else None



# ============================================================================ the curves of a result
def result_curves(result: dict) -> dict:
    """The return-level curves of a (cached) result at :data:`CURVE_PERIODS`, the route read
    first (joint probability) first: ``{route name: {"period", "level", "lower", "upper"}}``
    [year, m on the display datum]; an unbounded upper band is None, as stored."""
    curves = {}
    for key, name in (("joint_probability", "joint probability"), ("annual_maxima", "annual maxima")):
        rows = [r for r in result.get(key, {}).get("curve", []) if r["period"] in CURVE_PERIODS]
        if rows:
            curves[name] = {k: [r[k] for r in rows] for k in ("period", "level", "lower", "upper")}
    return curves


def readable_curve(curve: dict) -> dict:
    """A stored curve as :func:`predictor.rarity.rarity_words` reads it (None upper band: inf)."""
    return {**curve, "upper": [np.inf if v is None else v for v in curve["upper"]]}


# ============================================================================ the daily report
def report_section(store: Any, station: Any, model: Any, highest: float | None, at=None,
                   options: Options | None = None, qc_settings: Any = None):
    """The report's "how rare was today's water" part, from the cached analysis.

    Parameters
    ----------
    highest : float or None
        The day's highest QC-passed water [m, display datum].
    at : time-like, optional
        Its time (a past day's water is put on today's sea before it is read off the curve).
    options : Options, optional
        Default: those of the station's last analysis (:func:`last_options`).

    Returns
    -------
    alerts.reports.rarity.RaritySection
        With ``words`` None and a ``note`` saying why when the record cannot give a curve.
    """
    options = options or last_options(store, station.id)
    try:
        result, fresh = cached_analysis(store, station, model, options, qc_settings)
    except RecordError as exc:
        return RaritySection(words=None, note=f"No return levels yet: {exc}.", highest=highest)
    curves = result_curves(result)
    route = next(iter(curves), None)
    words = None
    today = None
    if route is not None and highest is not None:
        curve = readable_curve(curves[route])
        shift = result["datum_offset_m"]
        today = highest if at is None else on_todays_sea(result, highest + shift, at) - shift
        words = "today's highest water, " + rarity_words(today, curve, f"above {station.display_label}")
        if abs(today - highest) >= 0.005:
            words += f" (recorded {highest:.2f} m, on today's sea {today:.2f} m)"
    rec = result["record"]
    note = (f"From {rec['years_of_hours']:.0f} years of this station's QC-passed record "
            f"({rec['first'][:4]} to {rec['last'][:4]}), read from the {route or 'no'} curve "
            "on today's sea (the trend taken out to the record's end); "
            + ("computed now (the first time, or a new annual maximum or storm came)" if fresh else
               "unchanged since the last new annual maximum or storm")
            + ". " + " ".join(result.get("warnings", [])))
    tr = (result.get("sea_level") or {}).get("trend")
    trend_words = None
    if tr:
        trend_words = (f"Mean sea level here rises {tr['rate_mm_per_year']:.1f} +- {tr['se_mm_per_year']:.1f} mm "
                       f"a year (standard error; {tr['n_months']} monthly means over {tr['span_years']:.0f} years; "
                       f"GLS with AR(1) errors). {tr['nodal_note'][:1].upper() + tr['nodal_note'][1:]}. "
                       f"Datum steps: {tr['step_note']}.")
    monthly = (result.get("sea_level") or {}).get("monthly")
    return RaritySection(words=words, note=note.strip(), trend_words=trend_words, highest=highest,
                         curves=curves, monthly=monthly)
