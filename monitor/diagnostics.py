"""Gauge diagnostics for technicians, each a number with its uncertainty.

- :func:`sensor_drift`, :func:`sliding_sensor_drift`: offset and drift of the primary
  against the backup sensor (Theil-Sen slope, mm/day, with a confidence interval).
- :func:`van_de_casteele`, :func:`staff_sessions`: offset, scale error and timing error
  of the gauge against tide-staff readings.
- :func:`clock_offset`: time shift of the record against the predicted tide (minutes).
- :func:`datum_steps`: sudden level steps in a residual or a sensor difference (mm).
- :func:`monthly_constants`: month-by-month M2, S2, K1, O1 against the reference.
- :func:`equipment_faults`: fault conditions as plain data for the alerts engine.

All functions are pure: pandas Series on a UTC DatetimeIndex in, numbers and frames out.
Pass *usable* samples (see :func:`monitor.qc.usable_mask`): spikes bias the estimates.

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

import math
from typing import Any, Iterable

import numpy as np
import pandas as pd
from scipy import stats

from monitor.qc import QcSettings, difference_at, seconds, utc_index

DAY = 86400.0
MM = 1e-3


def _predict(model: Any, index) -> np.ndarray:
    if callable(model) and not hasattr(model, "predict"):
        return np.asarray(model(index), dtype=float)
    return np.asarray(model.predict(index), dtype=float)


def _iso(t: float) -> pd.Timestamp:
    return pd.Timestamp(t, unit="s", tz="UTC")


def _ols(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """Coefficients, standard errors, residual sd and residuals of ordinary least squares."""
    beta, *_ = np.linalg.lstsq(X, y, rcond=None)
    r = y - X @ beta
    dof = max(len(y) - X.shape[1], 1)
    s2 = float(r @ r) / dof
    cov = s2 * np.linalg.pinv(X.T @ X)
    return beta, np.sqrt(np.clip(np.diag(cov), 0, None)), math.sqrt(s2), r


# --------------------------------------------------------------------------- two sensors

def sensor_drift(primary: pd.Series, backup: pd.Series, *, bin_seconds: float = 3600.0,
                 gap_limit: float = 300.0, confidence: float = 0.95) -> dict:
    """Offset and drift of the primary sensor against the backup.

    The difference ``primary - backup`` (backup interpolated to the primary's times)
    is reduced to medians per ``bin_seconds`` bin (which keeps Theil-Sen's pairwise
    slopes affordable and resists spikes); the Theil-Sen line through the bin medians
    gives the drift, and its value at the window's centre the offset.

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
    d = pd.Series(difference_at(primary, backup, gap_limit), index=utc_index(primary.index)).dropna()
    out = {"offset_mm": np.nan, "offset_se_mm": np.nan, "drift_mm_per_day": np.nan, "drift_low": np.nan,
           "drift_high": np.nan, "bins": 0, "start": None, "end": None, "centre": None}
    if d.empty:
        return out
    t = seconds(d.index)
    b = np.floor((t - t[0]) / bin_seconds)
    g = pd.DataFrame({"t": t, "d": d.to_numpy(), "b": b}).groupby("b").median()
    out.update(bins=len(g), start=d.index[0], end=d.index[-1])
    if len(g) < 3:
        return out
    x = (g["t"].to_numpy() - t[0]) / DAY
    y = g["d"].to_numpy() / MM
    res = stats.theilslopes(y, x, alpha=confidence)
    xc = 0.5 * (x[0] + x[-1])
    resid = y - res.slope * (x - xc)
    offset = float(np.median(resid))
    spread = 1.4826 * float(np.median(np.abs(resid - offset)))
    # Standard error of a median: 1.2533 sigma / sqrt(n) (normal errors; common practice).
    out.update(offset_mm=offset, offset_se_mm=1.2533 * spread / math.sqrt(len(y)),
               drift_mm_per_day=float(res.slope), drift_low=float(res.low_slope),
               drift_high=float(res.high_slope), centre=_iso(t[0] + xc * DAY))
    return out


def sliding_sensor_drift(primary: pd.Series, backup: pd.Series, window_seconds: float = 30 * DAY,
                         step_seconds: float = DAY, **kw) -> pd.DataFrame:
    """:func:`sensor_drift` over windows of ``window_seconds`` ending every ``step_seconds``.

    Returns a DataFrame indexed by window end (UTC) with the columns of
    :func:`sensor_drift`.
    """
    if primary.empty:
        return pd.DataFrame()
    t = seconds(primary.index)
    ends = np.arange(t[0] + min(window_seconds, t[-1] - t[0]), t[-1] + step_seconds / 2, step_seconds)
    rows = []
    for e in ends:
        lo = _iso(e - window_seconds)
        hi = _iso(e)
        p = primary[(primary.index >= lo) & (primary.index <= hi)]
        q = backup[(backup.index >= lo) & (backup.index <= hi)]
        rows.append({"window_end": hi, **sensor_drift(p, q, **kw)})
    return pd.DataFrame(rows).set_index("window_end")


# --------------------------------------------------------------------------- staff

def _rate(gauge: pd.Series, at: np.ndarray, half: float) -> np.ndarray:
    """dh/dt of the gauge record at times ``at`` [Unix s], central difference over +-half [m/s]."""
    tg = seconds(gauge.index)
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
    ts = seconds(staff.index)
    tg = seconds(gauge.index)
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
               rms_mm=sd / MM, start=_iso(ts[0]), end=_iso(ts[-1]))
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
    t = seconds(staff.index)
    sid = np.concatenate([[0], np.cumsum(np.diff(t) > session_gap)])
    rows = []
    for k in np.unique(sid):
        part = staff[sid == k]
        if len(part) < min_readings:
            continue
        lo, hi = part.index[0] - pd.Timedelta(hours=1), part.index[-1] + pd.Timedelta(hours=1)
        res = van_de_casteele(part, gauge[(gauge.index >= lo) & (gauge.index <= hi)], **kw)
        res.pop("points")
        rows.append({"time": _iso(float(np.mean(seconds(part.index)))), **res})
    return pd.DataFrame(rows).set_index("time") if rows else pd.DataFrame()


def offset_drift(sessions: pd.DataFrame, confidence: float = 0.95) -> dict:
    """Drift of the gauge against the staff: Theil-Sen slope of the session offsets.

    Returns ``drift_mm_per_day`` with ``drift_low``/``drift_high`` and ``sessions``;
    NaN with fewer than 3 sessions.
    """
    ok = sessions.dropna(subset=["offset_mm"]) if not sessions.empty else sessions
    if len(ok) < 3:
        return {"drift_mm_per_day": np.nan, "drift_low": np.nan, "drift_high": np.nan, "sessions": len(ok)}
    x = seconds(ok.index) / DAY
    res = stats.theilslopes(ok["offset_mm"].to_numpy(), x - x[0], alpha=confidence)
    return {"drift_mm_per_day": float(res.slope), "drift_low": float(res.low_slope),
            "drift_high": float(res.high_slope), "sessions": len(ok)}


# --------------------------------------------------------------------------- clock

def clock_offset(observed: pd.Series, model: Any, *, max_shift: float = 3600.0, day: float = DAY,
                 iterations: int = 5) -> dict:
    """Time shift of the gauge record against the predicted tide.

    A coarse search over ``+-max_shift`` [s] (2-minute steps, least squares of the
    high-passed residual) gives a start; Gauss-Newton then solves, per day,
    ``obs - pred(t - lag) = a + b x + c x^2 - dlag * pred'(t - lag)`` (the quadratic
    absorbs the day's surge) until the shift settles. A clock error shifts every
    constituent by its speed times the lag, which this fits directly.

    Returns
    -------
    dict
        ``offset_min`` and ``offset_se_min`` (positive: the record lags the tide), the
        same in seconds (``offset_s``, ``offset_se_s``), ``days`` used, and
        ``per_day`` (Series of daily shifts [s]). The uncertainty is the standard error
        of the daily values (3 days or more), else the least-squares error inflated
        for the residual's lag-one autocorrelation.

    References
    ----------
    Pugh & Woodworth (2014), Sea-Level Science, ch. 3 (timing errors as phase shifts);
    IOC Manual Vol. IV (timing accuracy). Gauss-Newton least squares (common practice).
    """
    obs = observed.dropna()
    out = {"offset_min": np.nan, "offset_se_min": np.nan, "offset_s": np.nan, "offset_se_s": np.nan,
           "days": 0, "per_day": pd.Series(dtype=float)}
    if len(obs) < 20:
        return out
    t = seconds(obs.index)
    y = obs.to_numpy(dtype=float)
    # Coarse search on a thinned record.
    step = max(1, int(len(t) // 20000))
    tc, yc = t[::step], y[::step]
    best, best_cost = 0.0, np.inf
    for lag in np.arange(-max_shift, max_shift + 1, 120.0):
        r = yc - _predict(model, pd.to_datetime(tc - lag, unit="s", utc=True))
        r = r - pd.Series(r).rolling(max(3, int(3 * 3600 / max(np.median(np.diff(tc)), 1))), center=True,
                                     min_periods=1).mean().to_numpy()
        cost = float(np.nanmean(r ** 2))
        if cost < best_cost:
            best, best_cost = lag, cost
    lag = best
    day_id = np.floor((t - t[0]) / day).astype(int)
    h = 30.0
    for _ in range(iterations):
        ts = pd.to_datetime(t - lag, unit="s", utc=True)
        p = _predict(model, ts)
        dp = (_predict(model, pd.to_datetime(t - lag + h, unit="s", utc=True))
              - _predict(model, pd.to_datetime(t - lag - h, unit="s", utc=True))) / (2 * h)
        r = y - p
        cols = [-dp]
        for k in np.unique(day_id):
            m = (day_id == k).astype(float)
            x = np.where(day_id == k, (t - t[0]) / day - k - 0.5, 0.0)
            cols += [m, m * x, m * x * x]
        X = np.column_stack(cols)
        beta, se, sd, res = _ols(X, r)
        lag += beta[0]
        if abs(beta[0]) < 0.01:
            break
    # Daily estimates at the common solution.
    per_day = {}
    for k in np.unique(day_id):
        m = day_id == k
        if m.sum() < 0.5 * day / max(np.median(np.diff(t)), 1):
            continue
        x = (t[m] - t[0]) / day - k - 0.5
        Xd = np.column_stack([-dp[m], np.ones(m.sum()), x, x * x])
        bd, *_ = _ols(Xd, r[m])
        per_day[_iso(t[0] + k * day)] = lag - beta[0] + bd[0]
    pdays = pd.Series(per_day, dtype=float)
    if len(pdays) >= 3:
        se_s = float(pdays.std(ddof=1) / math.sqrt(len(pdays)))
    else:
        rho = float(np.corrcoef(res[:-1], res[1:])[0, 1]) if len(res) > 3 else 0.0
        rho = min(max(rho, 0.0), 0.999)
        se_s = float(se[0] * math.sqrt((1 + rho) / (1 - rho)))
    out.update(offset_s=float(lag), offset_se_s=se_s, offset_min=float(lag) / 60, offset_se_min=se_s / 60,
               days=len(pdays), per_day=pdays)
    return out


# --------------------------------------------------------------------------- datum steps

def _edge_kernel(w: int) -> np.ndarray:
    """Weights giving a least-squares line's value at the window edge (x = 0) from w
    samples at x = 0.5, 1.5, ..., w - 0.5."""
    x = np.arange(w) + 0.5
    xm = x.mean()
    return 1.0 / w - xm * (x - xm) / np.sum((x - xm) ** 2)


def datum_steps(series: pd.Series, *, window: float = 600.0, k: float = 6.0, min_step: float = 0.02,
                gap_limit: float = 300.0) -> pd.DataFrame:
    """Sudden steps in a residual (or a primary-backup difference).

    On a regular grid (the median step; short gaps interpolated, windows across
    longer gaps skipped), a straight line is fitted on each side of every boundary
    over ``window`` [s]; the jump ``D`` between the two lines' values at the boundary
    is a step estimate that a smooth surge (a line locally) leaves near zero. Steps
    are local maxima of ``|D|`` above ``max(k * sigma_D, min_step)`` [m], ``sigma_D``
    the robust scale (1.4826 MAD) of ``D`` over the record, which is also the step's
    standard error.

    Returns
    -------
    DataFrame with ``time`` (UTC, first sample after the step), ``step_mm`` and
    ``se_mm``, in time order.

    References
    ----------
    Two-sided local linear fits for change-point detection (e.g. Pugh & Woodworth 2014,
    ch. 2 on datum checks); 1.4826 MAD scale (Hampel 1974). Thresholds: common
    practice, no source.
    """
    s = series.dropna()
    empty = pd.DataFrame(columns=["time", "step_mm", "se_mm"])
    if len(s) < 10:
        return empty
    t = seconds(s.index)
    dt = float(np.median(np.diff(t)))
    w = max(3, int(round(window / dt)))
    if len(s) < 2 * w + 2:
        return empty
    grid = np.arange(t[0], t[-1] + dt / 2, dt)
    v = np.interp(grid, t, s.to_numpy(dtype=float))
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
            rows.append({"time": _iso(tj), "step_mm": D[c] / MM, "se_mm": sigma / MM})
    return pd.DataFrame(rows, columns=["time", "step_mm", "se_mm"]) if rows else empty


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
    from predictor.fit import harmonic_fit
    from predictor.constituents import get

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
        except Exception:  # a month that cannot be fitted is skipped, not fatal
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
