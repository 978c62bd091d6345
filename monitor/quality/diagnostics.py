"""Gauge diagnostics for technicians, each a number with its uncertainty.

- :func:`sensor_drift`, :func:`sliding_sensor_drift`: offset and drift of the primary
  against the backup sensor (Theil-Sen slope, mm/day, with a confidence interval).
- :func:`van_de_casteele`, :func:`staff_sessions`: offset, scale error and timing error
  of the gauge against tide-staff readings.
- :func:`clock_offset`: time shift of the record against the predicted tide (minutes),
  band by band (diurnal, semidiurnal, shallow water) with a consistency check.
- :func:`clock_trend`: clock offset week by week, each week fitted as a whole.
- :func:`sensor_timing`, :func:`clock_episodes`, :func:`relative_clock`: timing of the
  backup against the primary in sliding windows, the spans where it is off, a summary.
- :func:`datum_steps`: sudden level steps that persist, in a residual or a difference (mm).
- :func:`sensor_steps`: steps in primary minus backup, attributed to the sensor that moved.
- :func:`monthly_constants`: month-by-month M2, S2, K1, O1 against the reference.
- :func:`equipment_faults`: fault conditions as plain data for the alerts engine.

All functions are pure: pandas Series on a UTC DatetimeIndex in, numbers and frames out.
Pass *usable* samples (see :func:`monitor.quality.checks.usable_mask`): spikes bias the estimates.

Sign conventions: ``lag`` [s] is positive when events appear in the gauge record later
than they happened (the gauge's clock runs fast, or its filter delays): the record
stamped T holds the sea level of T - lag.

The output is an automated, unofficial aid: official warnings and local emergency
authorities come first; defer to local codes and licensed practice.

References
----------
IOC (1985-2016). Manual on Sea Level Measurement and Interpretation, Vols I and IV
(Van de Casteele test). Sen, P. K. (1968). Estimates of the regression coefficient based
on Kendall's tau. JASA 63 (Theil-Sen slope; scipy.stats.theilslopes).
"""
from __future__ import annotations

import hashlib
import logging
import math
from dataclasses import dataclass
from typing import Any, Iterable

import numpy as np
import pandas as pd
from scipy import signal, stats

from monitor.quality.checks import USABLE_FLAGS, QcSettings, difference_at, difference_on_arrays
from predictor.constituents import get
from predictor.fit import harmonic_fit
from predictor.timeutil import index_seconds, utc_index, utc_timestamp

log = logging.getLogger(__name__)

DAY = 86400.0
MM = 1e-3


def _predict(model: Any, index) -> np.ndarray:
    if callable(model) and not hasattr(model, "predict"):
        return np.asarray(model(index), dtype=float)
    return np.asarray(model.predict(index), dtype=float)


def _ols(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """Coefficients, standard errors, residual sd and residuals of ordinary least squares."""
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    dof = max(len(y) - X.shape[1], 1)
    s2 = float(r @ r) / dof
    cov = s2 * np.linalg.pinv(X.T @ X)
    return beta, np.sqrt(np.clip(np.diag(cov), 0, None)), math.sqrt(s2), r


# --------------------------------------------------------------------------- two sensors

DRIFT_MAX_BINS = 744  # bins of the drift's Theil-Sen line at most (31 days of hours: the default 30-day window keeps hourly bins)


def sensor_drift(primary: pd.Series, backup: pd.Series, *, bin_seconds: float = 3600.0,
                 gap_limit: float = 300.0, confidence: float = 0.95, max_bins: int = DRIFT_MAX_BINS) -> dict:
    """Offset and drift of the primary sensor against the backup.

    The difference ``primary - backup`` (backup interpolated to the primary's times)
    is reduced to medians per ``bin_seconds`` bin (which keeps Theil-Sen's pairwise
    slopes affordable and resists spikes); the Theil-Sen line through the bin medians
    gives the drift, and its value at the window's centre the offset. The bins lie on a
    fixed grid in absolute time (bin ``k`` holds ``[k w, (k + 1) w)`` [Unix s]), so the
    bins of a record that grows are the same bins as before (the daemon keeps them
    between its hourly runs: :func:`drift_bins`, :func:`drift_line`). A record longer
    than about ``max_bins`` bins gets wider bins (a whole multiple of ``bin_seconds``,
    :func:`drift_bin_width`), so the pairwise slopes stay a fixed number and the cost
    grows with the record only through the binning (the default 30-day window keeps its
    hourly bins).

    Parameters
    ----------
    primary, backup : Series
        Usable levels [m] on UTC DatetimeIndexes.
    bin_seconds : float
        Width of the bins [s] (at least).
    gap_limit : float
        Longest gap of the backup bridged by interpolation [s].
    confidence : float
        Confidence level of the drift's interval [1].
    max_bins : int
        Bins at most.

    Returns
    -------
    dict
        ``offset_mm`` and ``offset_se_mm`` (at ``centre``), ``drift_mm_per_day`` with
        ``drift_low``/``drift_high`` (the ``confidence`` interval), ``bins``, ``start``,
        ``end``, ``centre`` (UTC Timestamps). NaN values when fewer than 3 bins.

    References
    ----------
    Sen (1968); Theil (1950), via scipy.stats.theilslopes. IOC Manual Vol. IV (use of a
    second sensor to check the first).
    """
    p, b = primary.dropna(), backup.dropna()
    tp, vp = index_seconds(p.index), p.to_numpy(dtype=float)
    tb, vb = index_seconds(b.index), b.to_numpy(dtype=float)
    d = difference_on_arrays(tp, vp, tb, vb, gap_limit)
    ok = np.isfinite(d)
    if not ok.any():
        return drift_line(drift_bins(tp, vp, tb, vb, gap_limit, bin_seconds), confidence)
    width = drift_bin_width(float(tp[ok][-1] - tp[ok][0]), bin_seconds, max_bins)
    return drift_line(drift_bins(tp, vp, tb, vb, gap_limit, width), confidence)


def drift_bin_width(span: float, bin_seconds: float = 3600.0, max_bins: int = DRIFT_MAX_BINS) -> float:
    """Width [s] of :func:`sensor_drift`'s bins for a difference spanning ``span`` [s]:
    ``bin_seconds``, or the least whole multiple of it that keeps the bins of the fixed
    grid within ``max_bins`` (a span may cut a bin at each end, hence ``max_bins - 2``)."""
    k = max(1, math.ceil(span / max(max_bins - 2, 1) / bin_seconds))
    return float(k * bin_seconds)


#: Columns of :func:`drift_bins`.
DRIFT_BIN_COLUMNS = ("t", "d", "first", "last")


def drift_bins(tp: np.ndarray, vp: np.ndarray, tb: np.ndarray, vb: np.ndarray, gap_limit: float,
               width: float) -> pd.DataFrame:
    """The difference ``primary - backup`` reduced to medians per bin of the fixed grid.

    The difference at a primary sample uses the backup's samples within ``gap_limit`` of
    it only (:func:`monitor.quality.checks.difference_at`), so a bin ``[b0, b1)`` depends
    on the primary's samples in it and the backup's in ``[b0 - gap_limit, b1 + gap_limit]``:
    a bin computed from any rows that include those equals the bin computed from the
    whole record.

    Parameters
    ----------
    tp, vp, tb, vb : ndarray
        Times [Unix s] and levels [m] of the primary's and the backup's usable samples,
        in time order, without NaN.
    gap_limit : float
        Longest gap of the backup bridged by interpolation [s].
    width : float
        Width of the bins [s] (:func:`drift_bin_width`).

    Returns
    -------
    DataFrame
        Indexed by bin number ``k`` (``floor(t / width)``), bins with a difference only:
        ``t`` and ``d`` (median time [Unix s] and median difference [m]), ``first`` and
        ``last`` (the bin's first and last time with a difference [Unix s]).
    """
    d = difference_on_arrays(tp, vp, tb, vb, gap_limit)
    ok = np.isfinite(d)
    t, d = tp[ok], d[ok]
    if len(t) > 1 and np.any(np.diff(t) < 0):
        order = np.argsort(t, kind="stable")
        t, d = t[order], d[order]
    b = np.floor(t / width).astype(np.int64)
    # bins are runs of one number in time order; a median is the mean of the middle two of
    # the bin's values sorted (one value twice when the bin holds an odd number)
    starts = np.flatnonzero(np.concatenate([[True], b[1:] != b[:-1]])) if len(b) else np.empty(0, np.int64)
    n = np.diff(np.concatenate([starts, [len(b)]]))
    lo, hi = starts + (n - 1) // 2, starts + n // 2
    ds = d[np.lexsort((d, b))]
    return pd.DataFrame({"t": (t[lo] + t[hi]) / 2, "d": (ds[lo] + ds[hi]) / 2, "first": t[starts],
                         "last": t[starts + n - 1]}, index=pd.Index(b[starts], dtype=np.int64))


def drift_line(bins: pd.DataFrame, confidence: float = 0.95) -> dict:
    """:func:`sensor_drift`'s result from its bins (:func:`drift_bins`, in bin order).

    Parameters
    ----------
    bins : DataFrame
        ``t`` [Unix s], ``d`` [m], ``first`` and ``last`` [Unix s] per bin.
    confidence : float
        Confidence level of the drift's interval [1].

    Returns
    -------
    dict
        As :func:`sensor_drift`.
    """
    out = {"offset_mm": np.nan, "offset_se_mm": np.nan, "drift_mm_per_day": np.nan, "drift_low": np.nan,
           "drift_high": np.nan, "bins": 0, "start": None, "end": None, "centre": None}
    if bins.empty:
        return out
    t0 = float(bins["first"].iloc[0])
    out.update(bins=len(bins), start=utc_timestamp(t0), end=utc_timestamp(float(bins["last"].iloc[-1])))
    if len(bins) < 3:
        return out
    x = (bins["t"].to_numpy() - t0) / DAY
    y = bins["d"].to_numpy() / MM
    res = stats.theilslopes(y, x, alpha=confidence)
    xc = 0.5 * (x[0] + x[-1])
    resid = y - res.slope * (x - xc)
    offset = float(np.median(resid))
    spread = 1.4826 * float(np.median(np.abs(resid - offset)))
    # Standard error of a median: 1.2533 sigma / sqrt(n) (normal errors; common practice).
    out.update(offset_mm=offset, offset_se_mm=1.2533 * spread / math.sqrt(len(y)),
               drift_mm_per_day=float(res.slope), drift_low=float(res.low_slope),
               drift_high=float(res.high_slope), centre=utc_timestamp(t0 + xc * DAY))
    return out


def sliding_sensor_drift(primary: pd.Series, backup: pd.Series, window_seconds: float = 30 * DAY,
                         step_seconds: float = DAY, **kw) -> pd.DataFrame:
    """:func:`sensor_drift` over windows of ``window_seconds`` ending every ``step_seconds``.

    Returns a DataFrame indexed by window end (UTC) with the columns of
    :func:`sensor_drift`.
    """
    if primary.empty:
        return pd.DataFrame()
    t = index_seconds(primary.index)
    ends = np.arange(t[0] + min(window_seconds, t[-1] - t[0]), t[-1] + step_seconds / 2, step_seconds)
    rows = []
    for e in ends:
        lo = utc_timestamp(e - window_seconds)
        hi = utc_timestamp(e)
        p = primary[(primary.index >= lo) & (primary.index <= hi)]
        q = backup[(backup.index >= lo) & (backup.index <= hi)]
        rows.append({"window_end": hi, **sensor_drift(p, q, **kw)})
    return pd.DataFrame(rows).set_index("window_end")


# --------------------------------------------------------------------------- staff

def _rate(gauge: pd.Series, at: np.ndarray, half: float) -> np.ndarray:
    """dh/dt of the gauge record at times ``at`` [Unix s], central difference over +-half [m/s]."""
    tg = index_seconds(gauge.index)
    v = gauge.to_numpy(dtype=float)
    return (np.interp(at + half, tg, v) - np.interp(at - half, tg, v)) / (2 * half)


def van_de_casteele(staff: pd.Series, gauge: pd.Series, *, rate_half_window: float = 600.0,
                    max_distance: float = 600.0) -> dict:
    """Offset, scale error and timing error of the gauge from tide-staff readings.

    Over (ideally) a full tidal cycle of staff readings ``s`` with the gauge ``g``
    interpolated to their times, fit by least squares::

        g - s = offset + scale * (s - mean(s)) + c * dh/dt

    ``dh/dt`` from the gauge record (central difference over
    ``+-rate_half_window`` [s]). A gauge lagging the sea by ``lag`` reads
    ``h(t - lag) ~ h - lag dh/dt``, so ``timing_error_s = lag = -c``.

    Parameters
    ----------
    staff : Series
        Staff readings [m, station datum] on a UTC DatetimeIndex.
    gauge : Series
        The gauge's usable levels [m] around those times.
    rate_half_window, max_distance : float
        [s]; staff readings with no gauge sample within ``max_distance`` are dropped.

    Returns
    -------
    dict
        ``offset_mm``, ``offset_se_mm``, ``scale_error`` [1] (``scale_se``; 0.01 means
        the gauge shows ranges 1 % too large), ``timing_error_s``, ``timing_se_s``,
        ``n``, ``rms_mm``, ``start``, ``end``, and ``points`` (DataFrame of ``staff``,
        ``difference`` [m] and ``rate`` [m/s] for the Van de Casteele diagram).

    References
    ----------
    IOC (1985). Manual on Sea Level Measurement and Interpretation, Vol. I, and
    Vol. IV (2006), the Van de Casteele test.
    """
    staff = staff.dropna()
    gauge = gauge.dropna()
    ts = index_seconds(staff.index)
    tg = index_seconds(gauge.index)
    out = {"offset_mm": np.nan, "offset_se_mm": np.nan, "scale_error": np.nan, "scale_se": np.nan,
           "timing_error_s": np.nan, "timing_se_s": np.nan, "n": 0, "rms_mm": np.nan,
           "start": None, "end": None, "points": pd.DataFrame(columns=["staff", "difference", "rate"])}
    if len(tg) < 3 or len(ts) == 0:
        return out
    j = np.clip(np.searchsorted(tg, ts), 1, len(tg) - 1)
    near = np.minimum(np.abs(tg[j] - ts), np.abs(tg[j - 1] - ts))
    keep = (near <= max_distance) & (ts >= tg[0]) & (ts <= tg[-1])
    ts, s = ts[keep], staff.to_numpy(dtype=float)[keep]
    g = np.interp(ts, tg, gauge.to_numpy(dtype=float))
    rate = _rate(gauge, ts, rate_half_window)
    pts = pd.DataFrame({"staff": s, "difference": g - s, "rate": rate}, index=utc_index(staff.index[keep]))
    out.update(points=pts, n=int(len(ts)))
    if len(ts) < 4:
        return out
    X = np.column_stack([np.ones_like(s), s - s.mean(), rate])
    beta, se, sd, _ = _ols(X, g - s)
    out.update(offset_mm=beta[0] / MM, offset_se_mm=se[0] / MM, scale_error=float(beta[1]),
               scale_se=float(se[1]), timing_error_s=float(-beta[2]), timing_se_s=float(se[2]),
               rms_mm=sd / MM, start=utc_timestamp(ts[0]), end=utc_timestamp(ts[-1]))
    return out


def staff_sessions(staff: pd.Series, gauge: pd.Series, *, session_gap: float = 6 * 3600.0,
                   min_readings: int = 6, **kw) -> pd.DataFrame:
    """Van de Casteele results per session of staff readings.

    Readings more than ``session_gap`` [s] apart start a new session; sessions with
    fewer than ``min_readings`` are skipped. Returns one row per session, indexed by
    the session's mean time (UTC), with the scalar columns of :func:`van_de_casteele`.
    """
    staff = staff.dropna().sort_index()
    if staff.empty:
        return pd.DataFrame()
    t = index_seconds(staff.index)
    sid = np.concatenate([[0], np.cumsum(np.diff(t) > session_gap)])
    rows = []
    for k in np.unique(sid):
        part = staff[sid == k]
        if len(part) < min_readings:
            continue
        lo, hi = part.index[0] - pd.Timedelta(hours=1), part.index[-1] + pd.Timedelta(hours=1)
        res = van_de_casteele(part, gauge[(gauge.index >= lo) & (gauge.index <= hi)], **kw)
        res.pop("points")
        rows.append({"time": utc_timestamp(float(np.mean(index_seconds(part.index)))), **res})
    return pd.DataFrame(rows).set_index("time") if rows else pd.DataFrame()


# --------------------------------------------------------------------------- clock

#: Tidal bands for the clock estimate [cycles/day]: (name, low, high). Long-period
#: frequencies are left out: there the surge, not the tide, holds the power.
CLOCK_BANDS = (("diurnal", 0.75, 1.25), ("semidiurnal", 1.75, 2.25), ("shallow", 2.75, 6.25))
_CPD = 1.0 / DAY


def _grid_eval(model: Any, t: np.ndarray, margin: float, step: float = 60.0):
    """Predicted level and rate on one uniform grid covering ``t`` +- ``margin`` [s].

    Returns (grid times [s], level [m], rate [m/s]). One prediction for the whole
    diagnostic; shifted values come from interpolation (linear interpolation at a
    one-minute step errs by A w^2 dt^2 / 8, about 0.01 mm for a 1 m M2).
    """
    g = np.arange(t[0] - margin - step, t[-1] + margin + 2 * step, step)
    idx = pd.to_datetime(g, unit="s", utc=True)
    p = _predict(model, idx)
    if hasattr(model, "predict_derivative"):
        dp = np.asarray(model.predict_derivative(idx), dtype=float)
    else:
        dp = np.gradient(p, step)
    return g, p, dp


def _running_mean(x: np.ndarray, m: np.ndarray, width: int) -> np.ndarray:
    """Centred running mean of ``x`` over the samples where ``m`` is set (``width`` samples)."""
    cx = np.concatenate([[0.0], np.cumsum(x * m)])
    cm = np.concatenate([[0.0], np.cumsum(m)])
    n = len(x)
    i = np.arange(n)
    lo = np.clip(i - width // 2, 0, n)
    hi = np.clip(i + width // 2 + 1, 0, n)
    cnt = cm[hi] - cm[lo]
    return np.where(cnt > 0, (cx[hi] - cx[lo]) / np.maximum(cnt, 1), 0.0)


def _band_filter(x: np.ndarray, dt: float, lo: float, hi: float, edge: float = 0.1) -> np.ndarray:
    """Band-pass [lo, hi] cycles/day with raised-cosine edges ``edge`` wide, zero-padded FFT."""
    n = len(x)
    nfft = _nfft(n)
    return np.fft.irfft(np.fft.rfft(x, nfft) * _band_weights(nfft, dt, lo, hi, edge), nfft)[:n]


def _nfft(n: int) -> int:
    """The zero-padded FFT length of :func:`_band_filter` for ``n`` samples."""
    return 1 << int(np.ceil(np.log2(2 * n)))


def _band_weights(nfft: int, dt: float, lo: float, hi: float, edge: float = 0.1) -> np.ndarray:
    """:func:`_band_filter`'s weights at the ``nfft``-point frequencies (``dt`` [s], band
    [cycles/day])."""
    f = np.fft.rfftfreq(nfft, dt) / _CPD
    w = np.clip(np.minimum(f - (lo - edge / 2), (hi + edge / 2) - f) / edge, 0.0, 1.0)
    return 0.5 - 0.5 * np.cos(np.pi * w)


def clock_offset(observed: pd.Series, model: Any, *, max_shift: float = 3600.0, day: float = DAY,
                 iterations: int = 8, bands=CLOCK_BANDS, smooth_hours: float = 25.0, flags=None) -> dict:
    """Time shift of the gauge record against the predicted tide, band by band.

    A record whose clock is wrong by ``lag`` holds ``h(t - lag) ~ h(t) - lag h'(t)``, so
    the residual ``r = obs - pred`` is ``-lag`` times the predicted rate ``h'`` plus the
    weather. The non-tidal part is removed first: a centred running mean over
    ``smooth_hours`` (25 h, about one diurnal and two semidiurnal periods) is
    subtracted from ``r`` and from ``h'`` alike, then both are split by the same
    band-pass filters into the diurnal, semidiurnal and shallow-water bands. In each
    band, least squares of ``r`` on ``-h'`` gives a shift with its standard error from
    the band's own residual power and bandwidth (coloured noise), so a storm surge,
    whose power sits at long periods and spills into the diurnal band, weighs that
    band down instead of biasing the result. The bands are combined by inverse
    variance; a clock error moves every constituent by its speed times the same
    ``lag``, so the band values must agree (``consistent``); when they do not, the
    uncertainty is widened by the Birge ratio. Gauss-Newton iterations re-evaluate at
    the shifted times (interpolated from one prediction on a one-minute grid) until
    the shift settles.

    Parameters
    ----------
    observed : Series
        Usable levels [m] on a UTC DatetimeIndex (any sampling, gaps allowed).
    model : TideModel or object with ``predict(times)`` (or a callable)
        The reference tide [m]; ``predict_derivative`` is used when present.
    flags : array or Series, optional
        Aggregate QARTOD flags of ``observed``; only usable samples (1, 2, 3) are used.
    max_shift : float
        Largest shift searched [s]; estimates are clipped to +-max_shift.
    day : float
        Length of the ``per_day`` pieces [s].
    iterations : int
        Gauss-Newton iterations at most.
    bands : sequence of (name, low, high)
        Frequency bands [cycles/day].
    smooth_hours : float
        Width of the running mean removed as the non-tidal part [h].

    Returns
    -------
    dict
        ``offset_min`` and ``offset_se_min`` (positive: the record lags the tide), the
        same in seconds (``offset_s``, ``offset_se_s``), ``days`` used, ``per_day``
        (Series of daily shifts [s], indexed by day start, UTC) and ``per_day_se`` (their
        standard errors [s], from each day's own band noise), ``bands`` (band name ->
        ``{"offset_min", "offset_se_min"}``) and ``consistent`` (bool: the bands agree
        within their uncertainties, chi-square test at 1 %).

    References
    ----------
    Pugh, D., Woodworth, P. (2014). Sea-Level Science, ch. 3 (a timing error shifts each
    constituent's phase by its speed times the error). IOC Manual on Sea Level
    Measurement and Interpretation, Vol. IV (timing accuracy of one minute). Munk &
    Cartwright (1966) and Godin (1972) for band-wise noise levels of tidal residuals.
    """
    obs = usable_only(observed, flags)
    out = {"offset_min": np.nan, "offset_se_min": np.nan, "offset_s": np.nan, "offset_se_s": np.nan,
           "days": 0, "per_day": pd.Series(dtype=float), "per_day_se": pd.Series(dtype=float),
           "bands": {}, "consistent": None}
    if len(obs) < 20:
        return out
    g = _clock_grid(obs, model, max_shift, smooth_hours)
    found = _converge(g, bands, max_shift, iterations)
    if found is None:
        return out
    lag, est, parts = found
    steps, se_s, consistent = _band_agreement(lag, est)
    per_day, per_day_se = _daily_shifts(g, parts, est, lag, day)
    out.update(offset_s=float(lag), offset_se_s=se_s, offset_min=float(lag) / 60, offset_se_min=se_s / 60,
               days=len(per_day), per_day=pd.Series(per_day, dtype=float),
               per_day_se=pd.Series(per_day_se, dtype=float),
               bands={b: {"offset_min": steps[b] / 60, "offset_se_min": math.sqrt(est[b][1]) / 60}
                      for b in est},
               consistent=consistent)
    return out


@dataclass
class _ClockGrid:
    """The record on its analysis grid: samples ``t`` [s] and ``y`` [m], the prediction's grid
    (``gt`` [s], level ``gp`` [m], rate ``gd`` [m/s]), the grid step ``dt`` [s], each sample's
    grid cell ``k``, ``n`` cells with ``cnt`` samples (``m``: any), the running-mean
    ``width`` [cells], the ``taper`` and the band weights last used."""

    t: np.ndarray
    y: np.ndarray
    gt: np.ndarray
    gp: np.ndarray
    gd: np.ndarray
    dt: float
    k: np.ndarray
    n: int
    cnt: np.ndarray
    m: np.ndarray
    width: int
    taper: np.ndarray
    weights: tuple | None = None  # (key, band weights) of the last _band_sums


def _clock_grid(obs: pd.Series, model: Any, max_shift: float, smooth_hours: float) -> _ClockGrid:
    t = index_seconds(obs.index)
    order = np.argsort(t, kind="stable")
    t, y = t[order], obs.to_numpy(dtype=float)[order]
    gt, gp, gd = _grid_eval(model, t, max_shift)
    # Analysis grid: the record's own step (at least a minute), samples binned to it.
    dt = max(60.0, float(np.median(np.diff(t))) if len(t) > 1 else 60.0)
    k = np.rint((t - t[0]) / dt).astype(np.int64)
    n = int(k[-1]) + 1
    cnt = np.bincount(k, minlength=n).astype(float)
    width = max(3, int(round(smooth_hours * 3600 / dt)) | 1)
    taper = signal.windows.tukey(n, min(1.0, 2 * DAY / max(n * dt, 1.0)))
    return _ClockGrid(t, y, gt, gp, gd, dt, k, n, cnt, cnt > 0, width, taper)


def _band_sums(g: _ClockGrid, lag: float, bands) -> list:
    """Per band: filtered residual and rate on the grid (observed points only), at ``lag`` [s]."""
    r = g.y - np.interp(g.t - lag, g.gt, g.gp)
    d = np.interp(g.t - lag, g.gt, g.gd)
    rg = np.bincount(g.k, r, g.n) / np.maximum(g.cnt, 1)
    dg_ = np.bincount(g.k, d, g.n) / np.maximum(g.cnt, 1)
    # The same taper on both keeps r = -lag h' exact while cutting the leakage of
    # the record's ends (and of a surge) from long periods into the tidal bands.
    rg = np.where(g.m, rg - _running_mean(rg, g.m, g.width), 0.0) * g.taper
    dg_ = np.where(g.m, dg_ - _running_mean(dg_, g.m, g.width), 0.0) * g.taper
    # each band as _band_filter gives it, from one transform of each series and one set of
    # weights per band (the same numbers, a third of the transforms)
    nfft = _nfft(g.n)
    spectra = np.fft.rfft(rg, nfft), np.fft.rfft(dg_, nfft)
    key = (nfft, g.dt, tuple(bands))
    if g.weights is None or g.weights[0] != key:
        g.weights = (key, [_band_weights(nfft, g.dt, lo, hi) for _, lo, hi in bands])
    return [(name, lo, hi, np.fft.irfft(spectra[0] * w, nfft)[:g.n], np.fft.irfft(spectra[1] * w, nfft)[:g.n])
            for (name, lo, hi), w in zip(bands, g.weights[1])]


def _band_shifts(parts: list, dt: float, sel=slice(None)) -> dict:
    """Band name -> (shift [s], its variance [s^2]) by least squares of r on -h'."""
    est = {}
    for name, lo, hi, rb, db in parts:
        sdd = float(db[sel] @ db[sel])
        if sdd <= 0 or not np.isfinite(sdd):
            continue
        tau = -float(rb[sel] @ db[sel]) / sdd
        e = rb[sel] + tau * db[sel]
        var_e = float(e @ e) / max(len(e), 1)
        # OLS variance inflated for band-limited noise: samples are independent only
        # every 1 / (2 B) seconds (B the bandwidth) -> factor 1 / (2 B dt).
        inflate = max(1.0, 1.0 / (2 * (hi - lo) * _CPD * dt))
        var = var_e / sdd * inflate
        if var > 0 and np.isfinite(var):
            est[name] = (tau, var)
    return est


def _converge(g: _ClockGrid, bands, max_shift: float, iterations: int):
    """Gauss-Newton on the shift: (lag [s], band estimates, band sums), or None when no band
    can be estimated."""
    lag = 0.0
    est: dict = {}
    parts: list = []
    for _ in range(max(1, iterations)):
        parts = _band_sums(g, lag, bands)
        est = _band_shifts(parts, g.dt)
        if not est:
            return None
        w = {b: 1.0 / v for b, (_, v) in est.items()}
        step = sum(w[b] * est[b][0] for b in est) / sum(w.values())
        new = float(np.clip(lag + step, -max_shift, max_shift))
        moved, lag = abs(new - lag), new
        if moved < 0.5:
            break
    return lag, est, parts


def _band_agreement(lag: float, est: dict) -> tuple[dict, float, bool]:
    """Each band's shift at the final lag [s], the combined standard error [s] (widened by the
    Birge ratio when the bands disagree) and whether they agree (chi-square at 1 %)."""
    # Band values at the final shift (the step is the remaining correction).
    wsum = sum(1.0 / v for _, v in est.values())
    se_s = math.sqrt(1.0 / wsum)
    steps = {b: lag - (sum(est[c][0] / est[c][1] for c in est) / wsum) + tau for b, (tau, _) in est.items()}
    chi2 = sum((steps[b] - lag) ** 2 / est[b][1] for b in est)
    dof = len(est) - 1
    consistent = True
    if dof > 0:
        consistent = bool(stats.chi2.sf(chi2, dof) > 0.01)
        se_s *= math.sqrt(max(1.0, chi2 / dof))  # Birge ratio
    return steps, se_s, consistent


def _daily_shifts(g: _ClockGrid, parts: list, est: dict, lag: float, day: float) -> tuple[dict, dict]:
    """Daily pieces from the same filtered series, bands weighted as in the whole: day start ->
    shift [s], and day start -> its standard error [s] from the day's own band noise."""
    grid_t = g.t[0] + np.arange(g.n) * g.dt
    day_id = np.floor((grid_t - g.t[0]) / day).astype(int)
    per_day: dict = {}
    per_day_se: dict = {}
    per_sample = max(1, int(0.5 * day / g.dt))
    for j in np.unique(day_id):
        sel = (day_id == j)
        if int(g.m[sel].sum()) < per_sample:
            continue
        ed = _band_shifts(parts, g.dt, sel)
        if not ed:
            continue
        wd = {b: 1.0 / est[b][1] for b in ed if b in est}
        if not wd:
            continue
        key = utc_timestamp(g.t[0] + j * day)
        per_day[key] = lag + sum(wd[b] * ed[b][0] for b in wd) / sum(wd.values())
        # The day's own uncertainty from its own band noise: a stormy day says so.
        wsum_d = sum(wd.values())
        per_day_se[key] = math.sqrt(sum(wd[b] ** 2 * ed[b][1] for b in wd)) / wsum_d
    return per_day, per_day_se


def clock_trend(observed: pd.Series, model: Any, ends: Iterable[pd.Timestamp], *, period: float = 7 * DAY,
                flags=None, **kw) -> pd.Series:
    """Clock offset against the predicted tide period by period [min], for a trend.

    Each period ``(end - period, end]`` gets its own :func:`clock_offset` over its whole
    record, so the band-wise noise weighting of that function sees the storm as noise
    in a week's spectrum. Averaging daily estimates instead lets the one or two storm
    days, each noisy and biased, pull the week (minutes, for a metre of surge).
    Periods with less than a day of usable record are NaN.

    Parameters
    ----------
    observed : Series
        Levels [m] on a UTC DatetimeIndex.
    model : TideModel or object with ``predict(times)``
        The reference tide [m].
    ends : iterable of Timestamp
        Ends of the periods (UTC).
    period : float
        Length of each period [s].
    flags : array or Series, optional
        Aggregate QARTOD flags; only usable samples (1, 2, 3) are used.

    Returns
    -------
    Series
        Offset [min] indexed by period end; positive: the record lags the tide.

    References
    ----------
    As :func:`clock_offset` (Pugh & Woodworth 2014, ch. 3; Munk & Cartwright 1966).
    """
    obs = usable_only(observed, flags)
    out = {}
    for end in ends:
        end = pd.Timestamp(end)
        part = obs[(obs.index > end - pd.Timedelta(seconds=period)) & (obs.index <= end)]
        if len(part) < 20 or (part.index[-1] - part.index[0]).total_seconds() < DAY:
            out[end] = np.nan
            continue
        out[end] = clock_offset(part, model, **kw)["offset_min"]
    return pd.Series(out, dtype=float)


def relative_clock(primary: pd.Series, backup: pd.Series, *, primary_flags=None, backup_flags=None,
                   limit_min: float = 1.5, **kw) -> dict:
    """Clock of the backup relative to the primary, from their difference (minutes).

    The two sensors see the same sea, so their timing is free of the surge that can
    bias a clock estimate against the predicted tide. :func:`sensor_timing` windows give
    the lag; the latest window's lag is the current offset, its uncertainty the
    spread (1.4826 MAD / sqrt(n)) of the windows around the median, no less than half
    the lag grid; :func:`clock_episodes` names the spans off by more than ``limit_min``.
    Other keywords go to :func:`sensor_timing` (among them ``cache``, a
    :class:`TimingWindows` kept between runs over a record that grows).

    Returns
    -------
    dict
        ``offset_min`` (latest window; positive: the backup's clock is late),
        ``offset_se_min``, ``median_min`` (all windows), ``windows``, ``episodes`` (list
        of dicts from :func:`clock_episodes`), ``timing`` (the windows' DataFrame) and
        ``sensor`` = ``"backup"``. NaN values when no window has enough samples.

    References
    ----------
    IOC (1985-2016), Manual on Sea Level Measurement and Interpretation, Vol. IV (a
    second sensor to check the first).
    """
    p, b = usable_only(primary, primary_flags), usable_only(backup, backup_flags)
    timing = sensor_timing(p, b, **kw)
    out = {"offset_min": np.nan, "offset_se_min": np.nan, "median_min": np.nan, "windows": len(timing),
           "episodes": [], "timing": timing, "sensor": "backup"}
    if timing.empty:
        return out
    lags = timing["lag_min"].to_numpy(dtype=float)
    med = float(np.median(lags))
    spread = 1.4826 * float(np.median(np.abs(lags - med)))
    grid_min = kw.get("lag_step_s", 15.0) / 60.0
    out.update(offset_min=float(lags[-1]), median_min=med,
               offset_se_min=max(spread / math.sqrt(len(lags)), 0.5 * grid_min),
               episodes=clock_episodes(timing, limit_min))
    return out


# --------------------------------------------------------------------------- backup timing

class TimingWindows:
    """:func:`sensor_timing`'s windows kept between runs over a record that grows.

    Each window is kept under its start [Unix s] with a digest (BLAKE2b, 128 bits) of
    exactly the arrays it was computed from: the backup's times and levels in the window
    and the primary's around it. A run over a record that grew recomputes only the windows
    that are new or whose samples changed (a late row, a flag changed by quality control
    or a technician, a value rewritten); every other window's lag is the one computed
    before from the same numbers, so the result equals a run without the cache. Windows
    that the record no longer holds are forgotten at each run, so the cache holds at most
    the windows of one record. Other window or lag settings clear it.

    Attributes
    ----------
    computed, reused : int
        Windows computed and taken from the cache by the last run.
    """

    def __init__(self) -> None:
        self.settings: tuple | None = None
        self.windows: dict[float, tuple[bytes, float, float]] = {}  # start -> (digest, lag [s], mad [m])
        self.computed = 0
        self.reused = 0

    def _begin(self, settings: tuple) -> None:
        if settings != self.settings:
            self.settings, self.windows = settings, {}
        self.computed = self.reused = 0


def _digest(*arrays: np.ndarray) -> bytes:
    h = hashlib.blake2b(digest_size=16)
    for a in arrays:
        h.update(np.int64(len(a)).tobytes())
        h.update(np.ascontiguousarray(a))
    return h.digest()


def sensor_timing(primary: pd.Series, backup: pd.Series, window_s: float = 6 * 3600.0,
                  step_s: float = 3 * 3600.0, max_lag_s: float = 900.0, lag_step_s: float = 15.0,
                  min_samples: int = 60, *, cache: TimingWindows | None = None) -> pd.DataFrame:
    """Timing of the backup sensor against the primary, window by window.

    In each window of ``window_s`` [s] the lag ``L`` on a grid of ``lag_step_s`` [s]
    within +-``max_lag_s`` [s] that makes ``backup(t) - primary(t + L)`` most nearly
    constant (smallest median absolute deviation) is taken. Both sensors see the same
    sea, so their difference cancels the tide and the weather (a surge included) and
    leaves offset, drift and timing; the median keeps spikes and a stuck spell from
    steering it. The windows start at whole multiples of ``step_s`` in absolute time
    (UTC; the first at or after both records' first sample, the last ending at or before
    both records' last sample), so a record that grows keeps its windows: with ``cache``
    only the windows that are new or whose samples changed are computed.

    Parameters
    ----------
    primary, backup : Series
        Usable levels [m] on UTC DatetimeIndexes.
    window_s, step_s, max_lag_s, lag_step_s : float
        Window length, window step, lag range and lag grid [s].
    min_samples : int
        Backup samples a window needs to be used.
    cache : TimingWindows, optional
        The windows of an earlier run over the same sensors, updated here.

    Returns
    -------
    DataFrame
        ``start``, ``end`` (UTC Timestamps), ``lag_min`` [min] (positive: the backup's
        stamp T holds the sea of T + L, its clock is late) and ``mad_mm`` [mm], one row
        per window.

    References
    ----------
    IOC (1985-2016), Manual on Sea Level Measurement and Interpretation, Vol. IV (a
    second sensor to check the first). Lag search by the median absolute deviation of
    the difference: common practice, no source.
    """
    cols = ["start", "end", "lag_min", "mad_mm"]
    if cache is not None:
        cache._begin((float(window_s), float(step_s), float(max_lag_s), float(lag_step_s), int(min_samples)))
    primary, backup = primary.dropna(), backup.dropna()
    if len(primary) < 2 or len(backup) < 2:
        if cache is not None:
            cache.windows = {}
        return pd.DataFrame(columns=cols)
    ps, pv = index_seconds(primary.index), primary.to_numpy(dtype=float)
    bs, bv = index_seconds(backup.index), backup.to_numpy(dtype=float)
    lags = np.arange(-max_lag_s, max_lag_s + lag_step_s / 2, lag_step_s)
    rows = []
    kept: dict[float, tuple[bytes, float, float]] = {}
    last = min(ps[-1], bs[-1])
    k = math.ceil(max(ps[0], bs[0]) / step_s)
    # each window's samples by binary search, and the primary only around the window: the
    # cost grows with the record, not with its square
    while k * step_s + window_s <= last:
        t0 = k * step_s
        k += 1
        i0, i1 = np.searchsorted(bs, [t0, t0 + window_s], side="left")
        if i1 - i0 < min_samples:
            continue
        tt, yy = bs[i0:i1], bv[i0:i1]
        j0 = max(int(np.searchsorted(ps, tt[0] - max_lag_s, side="left")) - 1, 0)
        j1 = int(np.searchsorted(ps, tt[-1] + max_lag_s, side="right")) + 1
        found = None
        if cache is not None:
            key = _digest(tt, yy, ps[j0:j1], pv[j0:j1])
            held = cache.windows.get(t0)
            if held is not None and held[0] == key:
                found, cache.reused = held[1:], cache.reused + 1
        if found is None:
            found = _window_lag(tt, yy, ps[j0:j1], pv[j0:j1], lags)
            if cache is not None:
                cache.computed += 1
        if cache is not None:
            kept[t0] = (key, *found)
        rows.append({"start": utc_timestamp(t0), "end": utc_timestamp(t0 + window_s), "lag_min": found[0] / 60,
                     "mad_mm": found[1] / MM})
    if cache is not None:
        cache.windows = kept
    return pd.DataFrame(rows, columns=cols)


def _window_lag(tt: np.ndarray, yy: np.ndarray, ps: np.ndarray, pv: np.ndarray,
                lags: np.ndarray) -> tuple[float, float]:
    """The lag [s] of one window (backup ``tt``, ``yy``; primary ``ps``, ``pv`` around it)
    with the smallest median absolute deviation of the difference, and that deviation [m]."""
    d = yy[None, :] - np.interp(tt[None, :] + lags[:, None], ps, pv)
    mad = np.median(np.abs(d - np.median(d, axis=1, keepdims=True)), axis=1)
    i = int(np.argmin(mad))
    return float(lags[i]), float(mad[i])


def clock_episodes(timing: pd.DataFrame, limit_min: float = 1.5) -> list[dict]:
    """Spans where the backup's timing (from :func:`sensor_timing`) is off by more than ``limit_min``.

    Consecutive windows past the limit [min] are joined into one span.

    Returns
    -------
    list of dict
        ``start``, ``end`` (UTC Timestamps), ``lag_min`` (median over the span's
        windows [min]) and ``windows`` (their number).

    References
    ----------
    The default limit is the one-minute timing accuracy of IOC Manual Vol. IV (from
    memory) plus half a minute for the lag grid and noise (our choice).
    """
    out: list[dict] = []
    cur: list = []
    for row in list(timing.itertuples()) + [None]:
        if row is not None and abs(row.lag_min) > limit_min:
            cur.append(row)
            continue
        if cur:
            out.append({"start": cur[0].start, "end": cur[-1].end,
                        "lag_min": float(np.median([r.lag_min for r in cur])), "windows": len(cur)})
            cur = []
    return out

# --------------------------------------------------------------------------- datum steps

def _edge_kernel(w: int) -> np.ndarray:
    """Weights giving a least-squares line's value at the window edge (x = 0) from w
    samples at x = 0.5, 1.5, ..., w - 0.5."""
    x = np.arange(w) + 0.5
    xm = x.mean()
    return 1.0 / w - xm * (x - xm) / np.sum((x - xm) ** 2)


def usable_only(series: pd.Series, flags=None) -> pd.Series:
    """The samples of ``series`` a diagnostic may use: flag 1, 2 or 3, never 4 or 9.

    ``flags`` (aggregate QARTOD flags aligned with ``series``, as an array or a Series
    reindexed to it; missing entries count as 9) may be None when the caller has
    already kept only usable samples. NaN values are dropped too.
    """
    s = series
    if flags is not None:
        f = flags.reindex(series.index).fillna(9).to_numpy() if isinstance(flags, pd.Series) else np.asarray(flags)
        if len(f) != len(series):
            raise ValueError("flags must have one entry per sample")
        s = series[np.isin(f, USABLE_FLAGS)]
    return s.dropna()


def _long_step(t: np.ndarray, v: np.ndarray, tb: float, persist: float, iterations: int = 6,
               rate: np.ndarray | None = None):
    """Size and standard error [m] of a step at ``tb`` that persists ``persist`` [s] each side.

    Over ``tb +- persist`` the record is fitted with a cubic in time plus a step at
    ``tb``: a smooth surge onset (any rise a cubic follows over the span) goes into the
    polynomial, a level that moves and stays goes into the step. Iteratively
    reweighted least squares with Cauchy weights on MAD-scaled residuals keeps a short
    spike or a stuck spell from steering it. With ``rate`` (the level's rate of change
    [m/s] at ``t``), the rate and its change at ``tb`` enter the fit too: a clock that
    slips by ``L`` moves a two-sensor difference by ``L`` times the rate, not by a
    constant, and is not taken for a step. Returns (nan, nan) when
    either side holds less than a third of the span's samples.
    """
    sel = (t >= tb - persist) & (t <= tb + persist)
    tt, y = t[sel], v[sel]
    after = tt >= tb
    n_side = persist / max(float(np.median(np.diff(t))) if len(t) > 1 else 60.0, 1.0)
    if min(after.sum(), (~after).sum()) < max(5, n_side / 3):
        return np.nan, np.nan
    x = (tt - tb) / persist
    cols = [np.ones_like(x), x, x ** 2, x ** 3]
    if rate is not None:
        r_ = np.nan_to_num(rate[sel]) * 60.0  # per minute, for conditioning
        cols += [r_, r_ * after]
    X = np.column_stack(cols + [after.astype(float)])
    w = np.ones_like(y)
    beta = np.zeros(X.shape[1])
    for _ in range(iterations):
        sw = np.sqrt(w)
        beta, *_ = np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)
        r = y - X @ beta
        scale = 1.4826 * float(np.median(np.abs(r - np.median(r)))) or 1e-6
        w = 1.0 / (1.0 + (r / (2.385 * scale)) ** 2)
    sw = np.sqrt(w)
    r = (y - X @ beta) * sw
    s2 = float(r @ r) / max(len(y) - X.shape[1], 1)
    cov = s2 * np.linalg.pinv((X * sw[:, None]).T @ (X * sw[:, None]))
    return float(beta[-1]), math.sqrt(max(float(cov[-1, -1]), 0.0))


def datum_steps(series: pd.Series, *, window: float = 600.0, k: float = 6.0, min_step: float = 0.02,
                gap_limit: float = 300.0, flags=None, persist: float | None = 3 * 3600.0,
                agree: float = 0.5, rate: pd.Series | None = None) -> pd.DataFrame:
    """Sudden steps in a residual (or a primary-backup difference) that persist.

    Candidates: on a regular grid (the median step; short gaps interpolated, windows
    across longer gaps skipped), a straight line is fitted on each side of every
    boundary over ``window`` [s]; the jump ``D`` between the two lines' values at the
    boundary is a step estimate that a smooth surge (a line locally) leaves near zero.
    Candidates are local maxima of ``|D|`` above ``max(k * sigma_D, min_step)`` [m],
    ``sigma_D`` the robust scale (1.4826 MAD) of ``D`` over the record, which is also
    the step's standard error.

    Persistence: a datum step moves the level and the level stays moved, where a spike,
    a stuck spell or the edge of a surge does not. Each candidate is re-measured over
    ``persist`` [s] either side by a robust fit of a cubic plus a step (see
    :func:`_long_step`); it is kept only when that step has the candidate's sign, is at
    least ``agree`` times its size and above ``min_step``. ``persist=None`` skips the
    check (a primary-backup difference, where sea and weather cancel, may use it too).

    Parameters
    ----------
    series : Series
        Residual or difference [m] on a UTC DatetimeIndex.
    flags : array or Series, optional
        Aggregate QARTOD flags of the samples; only usable ones (1, 2, 3) are used.
        Without it the caller must pass usable samples only.
    rate : Series, optional
        Rate of change of the sea level [m/s] (for a two-sensor difference): a clock
        slip, which moves the difference by the slip times the rate, is not a step.

    Returns
    -------
    DataFrame with ``time`` (UTC, first sample after the step), ``step_mm`` and
    ``se_mm``, in time order, and ``persistent_mm`` (the step over ``persist``).

    References
    ----------
    Two-sided local linear fits for change-point detection (e.g. Pugh & Woodworth 2014,
    ch. 2 on datum checks); 1.4826 MAD scale (Hampel 1974); Cauchy-weighted iteratively
    reweighted least squares (Holland & Welsch 1977). Thresholds, window lengths and the
    persistence rule: common practice, no source.
    """
    cols = ["time", "step_mm", "se_mm", "persistent_mm"]
    s = usable_only(series, flags)
    empty = pd.DataFrame(columns=cols)
    if len(s) < 10:
        return empty
    t = index_seconds(s.index)
    dt = float(np.median(np.diff(t)))
    w = max(3, int(round(window / dt)))
    if len(s) < 2 * w + 2:
        return empty
    vals = s.to_numpy(dtype=float)
    grid = np.arange(t[0], t[-1] + dt / 2, dt)
    v = np.interp(grid, t, vals)
    # Grid points farther than gap_limit from any sample are unknown.
    j = np.clip(np.searchsorted(t, grid), 1, len(t) - 1)
    dist = np.minimum(np.abs(t[j] - grid), np.abs(t[j - 1] - grid))
    bad = (dist > gap_limit).astype(float)
    kern = _edge_kernel(w)
    # Right window starts at boundary i: samples i .. i+w-1; left: i-1 down to i-w.
    right = np.correlate(v, kern, mode="valid")          # right[i] uses v[i:i+w]
    left = np.correlate(v[::-1], kern, mode="valid")[::-1]  # left[m] uses v[m:m+w] reversed, edge at m+w
    nb = len(v) - 2 * w + 1
    i = np.arange(w, w + nb)                               # boundaries with full windows both sides
    D = right[i] - left[i - w]
    badcount = np.convolve(bad, np.ones(2 * w), mode="valid")[:nb]
    D = np.where(badcount > 0, np.nan, D)
    a = np.abs(D)
    finite = np.isfinite(a)
    if not finite.any():
        return empty
    sigma = 1.4826 * float(np.nanmedian(np.abs(D[finite] - np.nanmedian(D[finite]))))
    thresh = max(k * sigma, min_step)
    over = finite & (a > thresh)
    rows = []
    if over.any():
        filled = np.where(finite, a, -np.inf)
        peak = pd.Series(filled).rolling(2 * w + 1, center=True, min_periods=1).max().to_numpy()
        cand = np.flatnonzero(over & (filled == peak))
        last = -10 * w
        for c in cand:
            if c - last <= w:
                continue
            last = c
            when = grid[i[c]]
            # First real sample at or after the boundary.
            tj = t[np.searchsorted(t, when - dt / 2)]
            long = np.nan
            if persist:
                rr = None if rate is None else np.interp(t, index_seconds(rate.index), rate.to_numpy(dtype=float))
                long, _ = _long_step(t, vals, tj - dt / 2, persist, rate=rr)
                if not (np.isfinite(long) and np.sign(long) == np.sign(D[c])
                        and abs(long) >= max(agree * abs(D[c]), min_step)):
                    continue
            rows.append({"time": utc_timestamp(tj), "step_mm": D[c] / MM, "se_mm": sigma / MM, "persistent_mm": long / MM})
    return pd.DataFrame(rows, columns=cols) if rows else empty


def sensor_steps(primary: pd.Series, backup: pd.Series, model: Any = None, *, gap_limit: float = 300.0,
                 min_step: float = 0.02, persist: float = 3 * 3600.0, primary_flags=None, backup_flags=None,
                 **kw) -> pd.DataFrame:
    """Datum steps of two co-located sensors, found in their difference and attributed.

    The difference ``primary - backup`` (backup interpolated to the primary's times)
    cancels the sea and the weather, so a surge cannot pass for a step there; steps are
    found in it with :func:`datum_steps` (persistence included). Each step is then
    measured across the same time in each sensor's own residual against ``model`` (or
    in its level when no model is given) with the robust persistent-step fit: the
    sensor whose record moved by the difference's step, while the other did not, is
    the one that stepped.

    Parameters
    ----------
    primary, backup : Series
        Levels [m] on UTC DatetimeIndexes (usable samples, or give the flags).
    model : TideModel or object with ``predict(times)``, optional
        Reference tide [m] for the per-sensor residuals.
    primary_flags, backup_flags : array or Series, optional
        Aggregate QARTOD flags; only usable samples (1, 2, 3) are used.

    Returns
    -------
    DataFrame
        ``time`` (UTC), ``difference_mm`` (step of primary - backup) and ``se_mm``,
        ``sensor`` (``"primary"``, ``"backup"`` or ``"undetermined"``), ``step_mm`` (the
        step of that sensor's own level; the difference's step when undetermined),
        ``primary_mm`` and ``backup_mm`` (each sensor's own step across the time).

    References
    ----------
    IOC (1985-2016), Manual on Sea Level Measurement and Interpretation, Vol. IV (a
    second sensor to check the first); attribution by each sensor's own step: common
    practice, no source.
    """
    cols = ["time", "difference_mm", "se_mm", "sensor", "step_mm", "primary_mm", "backup_mm"]
    p, b = usable_only(primary, primary_flags), usable_only(backup, backup_flags)
    if len(p) < 10 or len(b) < 10:
        return pd.DataFrame(columns=cols)
    diff = pd.Series(difference_at(p, b, gap_limit), index=utc_index(p.index))
    tp = index_seconds(p.index)
    rate = pd.Series(np.gradient(p.to_numpy(dtype=float), tp) if len(tp) > 1 else np.zeros(len(tp)),
                     index=p.index).rolling(15, center=True, min_periods=1).median()
    steps = datum_steps(diff, gap_limit=gap_limit, min_step=min_step, persist=persist, rate=rate, **kw)
    rows = []

    def own(series: pd.Series, tb: float) -> float:
        tt = index_seconds(series.index)
        vv = series.to_numpy(dtype=float)
        if model is not None:
            vv = vv - _predict(model, utc_index(series.index))
        return _long_step(tt, vv, tb, persist)[0]

    for r in steps.itertuples():
        tb = float(r.time.timestamp()) - 1.0
        sp, sb = own(p, tb) / MM, own(b, tb) / MM
        d = float(r.step_mm)
        sensor, size = "undetermined", d
        # The sensor that stepped moved by about the whole difference; the other stayed.
        if np.isfinite(sp) and np.isfinite(sb):
            if abs(sp - d) < abs(sb + d) and abs(sb) < 0.5 * abs(d) and abs(sp) > 0.5 * abs(d):
                sensor, size = "primary", sp
            elif abs(sb + d) < abs(sp - d) and abs(sp) < 0.5 * abs(d) and abs(sb) > 0.5 * abs(d):
                sensor, size = "backup", sb
        rows.append({"time": r.time, "difference_mm": d, "se_mm": float(r.se_mm), "sensor": sensor,
                     "step_mm": size, "primary_mm": sp, "backup_mm": sb})
    return pd.DataFrame(rows, columns=cols)


# --------------------------------------------------------------------------- constants

MAIN_CONSTITUENTS = ("M2", "S2", "K1", "O1")


def monthly_constants(observed: pd.Series, model: Any, names: Iterable[str] = MAIN_CONSTITUENTS,
                      min_days: float = 25.0) -> pd.DataFrame:
    """Month-by-month amplitude and phase of the main constituents against the reference.

    Each calendar month (UTC) with at least ``min_days`` of record is fitted with
    :func:`predictor.fit.harmonic_fit` on a fixed constituent list, and so is the
    reference prediction at the same times: comparing the two cancels what a month
    cannot resolve (K1 with P1, S2 with K2), leaving the gauge's own changes.

    Returns
    -------
    DataFrame with ``month`` (``YYYY-MM``), ``name``, ``amplitude`` [m],
    ``amplitude_ci`` [m], ``phase`` [deg], ``phase_ci`` [deg], ``ref_amplitude``,
    ``ref_phase``, ``d_amplitude_mm`` and ``d_phase_deg`` (observed minus reference,
    phase wrapped to +-180), and ``d_time_min`` (the phase difference as a time shift).

    References
    ----------
    Foreman (1977) least-squares analysis; Godin (1972) Rayleigh criterion; the fit is
    :func:`predictor.fit.harmonic_fit`.
    """
    names = list(names)
    obs = observed.dropna()
    cols = ["month", "name", "amplitude", "amplitude_ci", "phase", "phase_ci", "ref_amplitude", "ref_phase",
            "d_amplitude_mm", "d_phase_deg", "d_time_min"]
    if obs.empty:
        return pd.DataFrame(columns=cols)
    idx = utc_index(obs.index)
    months = idx.strftime("%Y-%m")
    rows = []
    for month in pd.unique(months):
        m = months == month
        ti = idx[m]
        if (ti[-1] - ti[0]).total_seconds() < min_days * DAY:
            continue
        try:
            fo = harmonic_fit(ti, obs.to_numpy()[m], constituents=names, confidence=0.95)
            fr = harmonic_fit(ti, _predict(model, ti), constituents=names, confidence=None)
        except (ValueError, np.linalg.LinAlgError) as exc:  # FitInputError among them:
            # a month that cannot be fitted is skipped, and said so in the log
            log.info("monthly constants: %s skipped (%s)", pd.Timestamp(ti[0]).strftime("%Y-%m"), exc)
            continue
        ref = {c["name"]: c for c in fr.constituents}
        for c in fo.constituents:
            r = ref.get(c["name"])
            if r is None:
                continue
            dph = (c["phase"] - r["phase"] + 180.0) % 360.0 - 180.0
            speed = get(c["name"]).speed  # deg/h
            rows.append({"month": month, "name": c["name"], "amplitude": c["amplitude"],
                         "amplitude_ci": c.get("amplitude_ci", np.nan), "phase": c["phase"],
                         "phase_ci": c.get("phase_ci", np.nan), "ref_amplitude": r["amplitude"],
                         "ref_phase": r["phase"], "d_amplitude_mm": (c["amplitude"] - r["amplitude"]) / MM,
                         "d_phase_deg": dph, "d_time_min": dph / speed * 60.0})
    return pd.DataFrame(rows, columns=cols)


# --------------------------------------------------------------------------- faults

def flat_since(flat_flags: pd.Series, at_least: int = 4) -> pd.Timestamp | None:
    """Start of the current flat-line run (the last samples flagged ``at_least``), or None."""
    if flat_flags.empty or flat_flags.iloc[-1] < at_least:
        return None
    f = flat_flags.to_numpy()
    below = np.flatnonzero(f < at_least)
    first = below[-1] + 1 if below.size else 0
    return utc_index(flat_flags.index)[first]


def equipment_faults(now: float, settings: QcSettings | None = None, *, station: str = "",
                     last_sample: dict[str, float | None] | None = None,
                     flat: dict[str, pd.Timestamp | float | None] | None = None,
                     drift: dict | None = None, clock: dict | None = None,
                     flat_run_seconds: dict[str, float] | None = None) -> list[dict]:
    """Equipment fault conditions as plain data for the alerts engine.

    Parameters
    ----------
    now : float
        Current time [Unix s].
    settings : QcSettings
        Limits: ``silent_after`` [s], ``flat_fail_after`` [s], ``drift_limit_mm_per_day``,
        ``clock_limit_min``.
    station : str
        Station id, copied into each fault.
    last_sample : dict
        Sensor -> time of its last sample [Unix s] (None: never).
    flat : dict
        Sensor -> start of its current flat-line failure (Timestamp or Unix s), or None.
    drift : dict
        Result of :func:`sensor_drift` (its ``start`` is used as ``since``).
    clock : dict
        Result of :func:`clock_offset` with an added ``since`` [Unix s] if known.

    Returns
    -------
    list of dict
        Each with ``kind`` (``"silent_feed"``, ``"stuck_sensor"``, ``"sensor_drift"``,
        ``"clock_offset"``), ``station``, ``sensor``, ``value`` and ``limit`` (in
        ``unit``), ``unit`` and ``since`` (Unix s, UTC, int or None).
    """
    s = settings or QcSettings()
    faults: list[dict] = []

    def ts(x) -> int | None:
        if x is None:
            return None
        if isinstance(x, pd.Timestamp):
            return int(x.timestamp())
        return int(x)

    for sensor, last in (last_sample or {}).items():
        silent = now - last if last is not None else math.inf
        if silent > s.silent_after:
            faults.append({"kind": "silent_feed", "station": station, "sensor": sensor,
                           "value": round(silent / 60, 1) if math.isfinite(silent) else None,
                           "limit": s.silent_after / 60, "unit": "min", "since": ts(last)})
    for sensor, since in (flat or {}).items():
        if since is None:
            continue
        dur = now - ts(since)
        faults.append({"kind": "stuck_sensor", "station": station, "sensor": sensor,
                       "value": round(dur / 60, 1), "limit": s.flat_fail_after / 60, "unit": "min",
                       "since": ts(since)})
    if drift and np.isfinite(drift.get("drift_mm_per_day", np.nan)):
        v = float(drift["drift_mm_per_day"])
        lo, hi = drift.get("drift_low", v), drift.get("drift_high", v)
        # Only when the whole confidence interval is past the limit.
        if min(abs(lo), abs(hi)) > s.drift_limit_mm_per_day and np.sign(lo) == np.sign(hi):
            faults.append({"kind": "sensor_drift", "station": station, "sensor": "primary-backup",
                           "value": round(v, 2), "limit": s.drift_limit_mm_per_day, "unit": "mm/day",
                           "since": ts(drift.get("start"))})
    if clock and np.isfinite(clock.get("offset_min", np.nan)):
        v = float(clock["offset_min"])
        se = float(clock.get("offset_se_min", 0.0) or 0.0)
        if abs(v) - 2 * se > s.clock_limit_min:
            faults.append({"kind": "clock_offset", "station": station, "sensor": clock.get("sensor", "primary"),
                           "value": round(v, 2), "limit": s.clock_limit_min, "unit": "min",
                           "since": ts(clock.get("since"))})
    return faults
