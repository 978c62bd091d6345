"""Invented day reports for the report tests (an invented port with invented numbers).

Not a test module: the report tests import it. The port, its levels and its tide are made up.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from alerts.reports.model import (

    AlertEpisodeRow, AlertLevel, BarometerPart, ConstantsInfo, ConstituentRow, DayReport, Delivery, Diagnostic, HighWaterForecast, QcEpisode, RejectRow, StaffCheck, TideRow, day_bounds, empty_samples,

)

# An invented port on a zone with daylight saving (UTC+00:00 in winter, UTC+01:00 in summer).
TZ = "Atlantic/Faroe"
HOUR = pd.Timedelta(hours=1)
M2_PERIOD = 12.4206012 * HOUR  # M2 period [h]: Schureman (1958) Table 2 speed 28.9841042 deg/h


def tide(times: pd.DatetimeIndex) -> np.ndarray:
    """The invented port's tide [m]: mean 2.10 m, one semidiurnal wave of 1.35 m."""
    phase = (times - pd.Timestamp("2024-01-01", tz="UTC")) / M2_PERIOD
    return 2.10 + 1.35 * np.cos(2 * np.pi * np.asarray(phase, dtype=float))


def sample_report(day: dt.date = dt.date(2024, 3, 12), *, tz: str = TZ, name: str = "Skerrin Quay",
                  note: str = "", gap: tuple[float, float] | None = None, empty: bool = False,
                  step_minutes: int = 6, extras: bool = True) -> DayReport:
    """A day with a small surge, a spike (failed), two suspect samples and one alert episode.

    With ``extras`` it also has a next high water forecast, a tide-staff session and a barometer.

    ``gap`` is (from, to) in hours after local midnight with no samples.
    """
    start, end = day_bounds(day, tz)
    times = pd.date_range(start, end, freq=f"{step_minutes}min", inclusive="left")
    hours = np.asarray((times - start) / HOUR, dtype=float)
    surge = 0.42 * np.exp(-(((hours - 15.0) / 3.5) ** 2))
    predicted = tide(times)
    observed = predicted + surge + 0.01 * np.sin(hours * 7.0)
    samples = pd.DataFrame({"observed": observed, "residual": observed - predicted,
                            "flag": np.ones(len(times), dtype=int)}, index=times.rename("time"))
    spike = times[len(times) // 3]
    samples.loc[spike, ["observed", "residual"]] = [9.87, 9.87 - tide(pd.DatetimeIndex([spike]))[0]]
    samples.loc[spike, "flag"] = 4
    samples.loc[times[len(times) // 2: len(times) // 2 + 2], "flag"] = 3
    if gap:
        keep = ~((hours >= gap[0]) & (hours < gap[1]))
        samples = samples[keep]
    if empty:
        samples = empty_samples()
    pred_times = pd.date_range(start - HOUR, end + HOUR, freq="10min")
    turning = _turning_points(start - 7 * HOUR, end + 7 * HOUR)
    tides = []
    for t, kind in turning:
        if not (start <= t < end):
            continue
        level = float(tide(pd.DatetimeIndex([t]))[0])
        window = samples[(samples.index > t - 6 * HOUR) & (samples.index < t + 6 * HOUR) & (samples["flag"] != 4)]
        if window.empty:
            tides.append(TideRow(kind, t, level))
            continue
        at = window["observed"].idxmax() if kind == "high" else window["observed"].idxmin()
        obs = float(window.loc[at, "observed"])
        if kind == "high":
            tides.append(TideRow(kind, t, level, at, obs, obs - level, partial=gap is not None))
        else:
            tides.append(TideRow(kind, t, level, at, obs, partial=gap is not None, low_departure=obs - level))
    levels = [AlertLevel("Quay apron wet", 3.60), AlertLevel("Sill depth short", 0.90, direction="below"),
              AlertLevel("Surge watch", 0.30, quantity="residual")]
    alerts = [] if empty else [AlertEpisodeRow(
        rule="residual above", level="Surge watch", started=start + 13.5 * HOUR,
        cleared=start + 16.8 * HOUR, peak=0.43,
        deliveries=(Delivery("raised", start + 13.6 * HOUR, start + 13.6 * HOUR + pd.Timedelta(seconds=40), 1, "", 3),
                    Delivery("all clear", start + 16.9 * HOUR, None, 4, "mail server refused: 451 try later", 3)))]
    weeks = pd.date_range(end - pd.Timedelta(weeks=8), end, freq="7D")
    return DayReport(
        station_id="skq", station_name=name, tz=tz, day=day, datum="chart datum", note=note,
        samples=samples, predicted=pd.Series(tide(pred_times), index=pred_times), sample_interval=60.0 * step_minutes,
        alert_levels=levels, tides=tides,
        rejected_lines=0 if empty else 3,
        rejects=() if empty else (RejectRow("primary-file", 1204, "level is not a number", "2024-03-12T04:06:00Z,#REF!"),),
        qc_counts={} if empty else {"gross": {1: len(samples) - 1, 4: 1}, "spike": {1: len(samples) - 1, 4: 1},
                                    "flat": {1: len(samples) - 2, 3: 2}, "multi": {2: len(samples)}},
        qc_episodes=() if empty else (QcEpisode("spike", 4, spike, spike, 1),
                                      QcEpisode("flat line", 3, times[len(times) // 2], times[len(times) // 2 + 1], 2)),
        diagnostics=(
            Diagnostic("Backup drift", "mm/day", 0.8, 0.2, pd.Series(np.linspace(0.1, 0.8, len(weeks)), index=weeks)),
            Diagnostic("Clock offset", "min", 1.5, 0.6, pd.Series(np.linspace(0.0, 1.5, len(weeks)), index=weeks),
                       "consistent across M2 and K1"),
            Diagnostic("Datum steps", "mm", None, None, note="none found"),
        ),
        alerts=alerts,
        constants=ConstantsInfo(
            source="fitted from this station's record", mean=2.10,
            constituents=(ConstituentRow("M2", 1.35, 118.2, 0.004, 9000.0), ConstituentRow("S2", 0.41, 152.7, 0.004, 800.0),
                          ConstituentRow("K1", 0.08, 201.4, 0.006, 120.0)),
            fitted_at=pd.Timestamp("2024-02-01", tz="UTC"), record_start=pd.Timestamp("2023-12-01", tz="UTC"),
            record_end=pd.Timestamp("2024-01-31", tz="UTC"), samples=14880, rms=0.071, variance_explained=0.987),
        generated_at=end + 6 * HOUR,
        forecast=sample_forecast(end + 6 * HOUR) if extras and not empty else None,
        staff=sample_staff(start + 8 * HOUR) if extras and not empty else None,
        barometer=BarometerPart(samples=len(samples), mean_ib=0.12, min_ib=0.05, max_ib=0.19, mean_residual=0.15,
                                variance_explained=0.62, correlation=0.79) if extras and not empty else None,
    )


def sample_forecast(made_at: pd.Timestamp) -> HighWaterForecast:
    """The next high water after ``made_at`` with a 0.12 m residual persisted (invented range)."""
    hw = next(t for t, kind in _turning_points(made_at, made_at + 14 * HOUR) if kind == "high")
    predicted = float(tide(pd.DatetimeIndex([hw]))[0])
    return HighWaterForecast(time=hw, predicted=predicted, residual_now=0.12, forecast=predicted + 0.12,
                             made_at=made_at, lower=predicted + 0.02, upper=predicted + 0.27, coverage=0.9,
                             note="90% range from how the residual changed over the lead time in 35 days of history")


def sample_staff(first: pd.Timestamp, offset: float = 0.014, scale: float = 0.004, lag_s: float = 150.0) -> StaffCheck:
    """A staff session of 13 half-hourly readings over a tide, with a gauge that reads
    ``offset`` [m] high, ``scale`` too large and ``lag_s`` late (invented)."""
    times = pd.date_range(first, periods=13, freq="30min")
    staff = tide(times)
    rate = np.gradient(staff, 1800.0)
    diff = offset + scale * (staff - staff.mean()) - lag_s * rate
    points = pd.DataFrame({"staff": staff, "difference": diff, "rate": rate}, index=times)
    return StaffCheck(start=times[0], end=times[-1], readings=len(times), sessions=3, offset_mm=offset * 1e3,
                      offset_se_mm=1.2, scale_error=scale, scale_se=0.0015, timing_s=lag_s, timing_se_s=20.0,
                      rms_mm=2.5, points=points,
                      history=pd.Series([12.0, 13.1, offset * 1e3], index=times[:1].append(times[:1]).append(times[:1])
                                        - pd.to_timedelta([14, 7, 0], unit="D")))


def _turning_points(start: pd.Timestamp, end: pd.Timestamp) -> list[tuple[pd.Timestamp, str]]:
    """High and low waters of :func:`tide` (cosine maxima at whole M2 periods from the epoch)."""
    epoch = pd.Timestamp("2024-01-01", tz="UTC")
    k0 = int(np.floor((start - epoch) / M2_PERIOD))
    out = []
    for k in range(k0, k0 + 8):
        for frac, kind in ((0.0, "high"), (0.5, "low")):
            t = epoch + (k + frac) * M2_PERIOD
            if start <= t < end:
                out.append((t.round("s"), kind))
    return sorted(out)
