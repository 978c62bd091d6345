"""The live residual: observed minus predicted tide, its smoothed form, skew surge,
the coming high waters, and the inverse-barometer part of the residual (the next high
water forecast itself is :mod:`monitor.surge.forecast`).

Pure functions on numpy/pandas (UTC DatetimeIndex, metres); the daemon reads the store,
calls these, and writes table ``derived`` (plus ``skew_surges`` and ``hw_forecasts``).
"""
from __future__ import annotations

import functools

import numpy as np
import pandas as pd

from predictor.extrema import classify_stands
from predictor.timeutil import index_seconds, utc_index

# QARTOD flags (U.S. IOOS 2021): 4 fail and 9 missing never enter the smoothed residual.
_UNUSABLE = (4, 9)
#: Inverse-barometer response [m/hPa]: about 1 cm of sea level per hPa (Pugh & Woodworth 2014,
#: ch. 7); the hydrostatic value 1/(rho g) with rho = 1025 kg/m^3 is 0.0099 m/hPa.
IB_M_PER_HPA = 0.01
#: Standard sea-level pressure [hPa] (ICAO standard atmosphere), the default reference.
REFERENCE_HPA = 1013.25
#: Half the M2 period [s] (12.4206 h / 2): the half-width of a tidal cycle when a
#: neighbouring low water is not known.
HALF_M2 = 12.420601 * 3600 / 2


def residual(observed: np.ndarray, predicted: np.ndarray) -> np.ndarray:
    """Residual = observed - predicted [m].

    References
    ----------
    Pugh, D., Woodworth, P. (2014). Sea-Level Science, ch. 6 (non-tidal residual).
    """
    return np.asarray(observed, dtype=float) - np.asarray(predicted, dtype=float)


def carry_minutes(median_minutes: float = 30.0) -> float:
    """How long the smoothed residual is carried forward over unusable samples before it
    goes stale [min]: the running median's window, at least a minute."""
    return max(median_minutes, 1.0)


def smooth_residual(resid: pd.Series, median_minutes: float = 30.0, mean_minutes: float = 10.0,
                    usable: np.ndarray | None = None) -> pd.Series:
    """Smoothed residual for alerting: a trailing running median, then a trailing running mean.

    Trailing (causal) windows, so a live value never waits for future samples: the median
    over the last ``median_minutes`` removes single-sample spikes, the mean over the last
    ``mean_minutes`` of those medians removes the remaining sensor noise. A step change
    shows fully after about ``median_minutes / 2 + mean_minutes``.

    Parameters
    ----------
    resid : Series
        Residual [m], UTC DatetimeIndex in time order.
    median_minutes, mean_minutes : float
        Window lengths [min]; ``mean_minutes = 0`` skips the mean.
    usable : array of bool, optional
        Samples that may enter (QC flag not fail or missing); others are ignored and get
        the smoothed value of the usable samples before them.

    Returns
    -------
    Series
        Smoothed residual [m] on the same index (NaN before the first usable sample).

    References
    ----------
    Tukey, J. W. (1977). Exploratory Data Analysis (running medians); common practice for
    de-spiking tide-gauge residuals, no single source.
    """
    if resid.empty:
        return resid.astype(float)
    r = resid.astype(float)
    if usable is not None:
        r = r.where(np.asarray(usable, dtype=bool))
    valid = r.dropna()
    if valid.empty:
        return pd.Series(np.nan, index=resid.index, name="smoothed")
    med = valid.rolling(pd.Timedelta(minutes=median_minutes), min_periods=1).median()
    if mean_minutes > 0:
        med = med.rolling(pd.Timedelta(minutes=mean_minutes), min_periods=1).mean()
    out = med.reindex(resid.index.union(med.index)).ffill().reindex(resid.index)
    # a value carried forward over a long gap is not a live value
    last_t = pd.Series(valid.index, index=valid.index).reindex(resid.index.union(valid.index)).ffill()
    last_t = last_t.reindex(resid.index)
    stale = (resid.index - pd.DatetimeIndex(last_t)) > pd.Timedelta(minutes=carry_minutes(median_minutes))
    out[np.asarray(stale, dtype=bool)] = np.nan
    out.name = "smoothed"
    return out


def inverse_barometer(pressure_hpa: np.ndarray, reference_hpa: float = REFERENCE_HPA,
                      m_per_hpa: float = IB_M_PER_HPA) -> np.ndarray:
    """Inverse-barometer sea level [m]: -m_per_hpa x (pressure - reference).

    Parameters
    ----------
    pressure_hpa : array
        Air pressure at sea level [hPa].
    reference_hpa : float
        Reference pressure [hPa] (default 1013.25, the standard atmosphere).
    m_per_hpa : float
        Response [m/hPa] (default 0.01: about -1 cm per hPa).

    References
    ----------
    Pugh, D., Woodworth, P. (2014). Sea-Level Science, Cambridge University Press, ch. 7
    (the inverted barometer effect).
    """
    return -m_per_hpa * (np.asarray(pressure_hpa, dtype=float) - reference_hpa)


def pressure_at(times: pd.DatetimeIndex, pressure: pd.Series, max_gap_s: float = 3600.0) -> np.ndarray:
    """Pressure [hPa] linearly interpolated to ``times``; NaN farther than ``max_gap_s``
    from a barometer sample or outside the barometer record."""
    if pressure is None or pressure.empty or len(times) == 0:
        return np.full(len(times), np.nan)
    p = pressure.dropna()
    return pressure_at_seconds(index_seconds(pd.DatetimeIndex(times)), index_seconds(p.index), p.to_numpy(dtype=float), max_gap_s)


def pressure_at_seconds(tt: np.ndarray, tp: np.ndarray, pv: np.ndarray, max_gap_s: float = 3600.0) -> np.ndarray:
    """:func:`pressure_at` on plain arrays: times ``tt`` [Unix s] from barometer readings
    ``pv`` [hPa] at times ``tp`` [Unix s, increasing, NaN readings left out] [hPa]."""
    tt = np.asarray(tt, dtype=float)
    if len(tp) == 0 or len(tt) == 0:
        return np.full(len(tt), np.nan)
    tp = np.asarray(tp, dtype=float)
    out = np.interp(tt, tp, np.asarray(pv, dtype=float), left=np.nan, right=np.nan)
    j = np.searchsorted(tp, tt)
    left = tp[np.maximum(j - 1, 0)]  # (searchsorted's j is within 0..len: no np.clip needed)
    right = tp[np.minimum(j, len(tp) - 1)]
    exact = right == tt
    out[(right - left > max_gap_s) & ~exact] = np.nan
    return out


def derive(observed: pd.DataFrame, predicted: np.ndarray | None, pressure: pd.Series | None = None,
           median_minutes: float = 30.0, mean_minutes: float = 10.0,
           reference_hpa: float = REFERENCE_HPA) -> pd.DataFrame:
    """The derived series of a station's primary sensor.

    Parameters
    ----------
    observed : DataFrame
        Index UTC times; ``value`` [m, station datum] and ``flag`` (aggregate QARTOD).
    predicted : array or None
        Predicted tide at the same times [m, station datum]; None without a model.
    pressure : Series, optional
        Barometer [hPa], UTC index.

    Returns
    -------
    DataFrame
        ``observed, predicted, residual, smoothed, barometric`` [m] and ``flag``.
    """
    idx = observed.index
    obs = observed["value"].to_numpy(dtype=float)
    flag = observed["flag"].to_numpy() if "flag" in observed else np.full(len(idx), 2)
    pred = np.full(len(idx), np.nan) if predicted is None else np.asarray(predicted, dtype=float)
    res = residual(obs, pred)
    usable = ~np.isin(flag, _UNUSABLE) & np.isfinite(res)
    sm = smooth_residual(pd.Series(res, index=idx), median_minutes, mean_minutes, usable)
    ib = inverse_barometer(pressure_at(idx, pressure), reference_hpa) if pressure is not None \
        else np.full(len(idx), np.nan)
    return pd.DataFrame({"observed": obs, "predicted": pred, "residual": res, "smoothed": sm.to_numpy(),
                         "barometric": ib, "flag": flag}, index=idx)


def smooth_residual_arrays(t_ns: np.ndarray, resid: np.ndarray, usable: np.ndarray,
                           median_minutes: float = 30.0, mean_minutes: float = 10.0, first: int = 0) -> np.ndarray:
    """:func:`smooth_residual` on plain arrays, for the daemon's pass over a few hours.

    The same trailing windows (a sample's window holds the usable samples after
    ``t - width`` up to ``t``), the same carrying forward and staleness, computed with
    numpy over a small window instead of pandas' rolling machinery. The running mean is
    summed per window, oldest value last, so it may differ from pandas' running sums in
    the last bits (around 1e-16 m); each row's value depends only on the samples of its
    windows, never on which other rows are computed with it.

    Parameters
    ----------
    t_ns : array of int64
        Sample times [ns since 1970, UTC], increasing.
    resid : array
        Residual [m].
    usable : array of bool
        Samples that may enter (QC flag not fail or missing).
    median_minutes, mean_minutes : float
        Window lengths [min]; ``mean_minutes = 0`` skips the mean.
    first : int
        The first row computed [index]: the rows before it are left NaN, the rows from it
        on get what a computation of every row gives them (bit for bit).

    Returns
    -------
    array
        Smoothed residual [m] (NaN before the first usable sample and when stale).
    """
    t_ns = np.asarray(t_ns, dtype=np.int64)
    r = np.asarray(resid, dtype=float)
    out = np.full(len(r), np.nan)
    valid = np.asarray(usable, dtype=bool) & np.isfinite(r)
    if not valid.any() or first >= len(r):
        return out
    tv, rv = t_ns[valid], r[valid]
    last = tv.searchsorted(t_ns[first:], side="right") - 1  # each row's newest usable sample
    seen = last >= 0
    if not seen.any():
        return out
    k0 = int(last[seen][0])  # the oldest usable sample whose smoothed value the rows take
    smoothed = _smoothed_from(tv, rv, k0, median_minutes, mean_minutes)
    rows = out[first:]
    rows[seen] = smoothed[last[seen] - k0]
    stale = seen & (t_ns[first:] - tv[np.maximum(last, 0)] > _minutes_ns(carry_minutes(median_minutes)))
    rows[stale] = np.nan
    return out


def smoothing_span_s(median_minutes: float = 30.0, mean_minutes: float = 10.0) -> int:
    """How far before a row the samples that decide its smoothed value can lie [s]: the
    median's and the mean's windows of the usable sample whose value it takes, and the
    longest it is carried forward over unusable samples (``max(median_minutes, 1)``)."""
    return int((median_minutes + mean_minutes + carry_minutes(median_minutes)) * 60)


def _smoothed_from(tv: np.ndarray, rv: np.ndarray, k0: int, median_minutes: float,
                   mean_minutes: float) -> np.ndarray:
    """The smoothed value at each usable sample from the ``k0``-th on (times ``tv`` [ns],
    residuals ``rv`` [m] of the usable samples): the running median, then the running mean
    of the medians, each over its trailing window; the medians computed only from the
    first one the means of ``k0`` on read."""
    if len(tv) - k0 <= _FEW:
        mean_ns = _minutes_ns(mean_minutes) if mean_minutes > 0 else 0
        return _smoothed_few(tv, rv, k0, _minutes_ns(median_minutes), mean_ns)
    if mean_minutes <= 0:
        return _trailing(tv, rv, _minutes_ns(median_minutes), _window_median, k0)
    mean_ns = _minutes_ns(mean_minutes)
    k1 = int(tv.searchsorted(tv[k0] - mean_ns, side="right"))  # the mean of k0 reads medians from k1
    med = _trailing(tv, rv, _minutes_ns(median_minutes), _window_median, k1)
    return _trailing(tv[k1:], med, mean_ns, _window_mean, k0 - k1)


#: at most this many samples' smoothed values are made in Python floats (a steady pass's new
#: sample), where a few numpy calls per window would cost more than the arithmetic
_FEW = 3


def _smoothed_few(tv: np.ndarray, rv: np.ndarray, k0: int, median_ns: int, mean_ns: int) -> np.ndarray:
    """:func:`_smoothed_from` in Python floats for the few samples from ``k0`` on: the same
    windows, the same median (the middle values' mean) and the same additions in the same
    order (newest first, then divided by the count), so the same bits."""
    k1 = int(tv.searchsorted(tv[k0] - mean_ns, side="right")) if mean_ns else k0
    a = int(tv.searchsorted(tv[k1] - median_ns, side="right"))
    t, r = tv[a:].tolist(), rv[a:].tolist()
    medians, lo = [], 0
    for j in range(k1 - a, len(t)):
        while t[lo] <= t[j] - median_ns:
            lo += 1
        w = sorted(r[lo:j + 1])
        medians.append((w[(len(w) - 1) // 2] + w[len(w) // 2]) / 2)
    if not mean_ns:
        return np.array(medians, dtype=float)
    tm, out, lo = t[k1 - a:], [], 0
    for k in range(k0 - k1, len(tm)):
        while tm[lo] <= tm[k] - mean_ns:
            lo += 1
        total = medians[k]
        for j in range(k - 1, lo - 1, -1):
            total += medians[j]
        out.append(total / (k - lo + 1))
    return np.array(out, dtype=float)


def _trailing(t_ns: np.ndarray, v: np.ndarray, width_ns: int, reduce, first: int = 0) -> np.ndarray:
    """``reduce`` over the trailing window ``(t - width, t]`` of each sample from the
    ``first``-th on, all windows at once: the rows of a matrix holding each window's
    values, newest first (whatever after them; ``reduce`` is told which are outside)."""
    i = np.arange(first, len(v))
    n = i - t_ns.searchsorted(t_ns[first:] - width_ns, side="right") + 1
    j = i[:, None] - np.arange(int(n.max()))[None, :]
    outside = j < (i - n + 1)[:, None]
    m = v[np.maximum(j, 0)]
    return reduce(m, outside, n)


@functools.lru_cache(maxsize=16)
def _minutes_ns(minutes: float) -> int:
    """A window length in minutes as pandas makes it [ns]."""
    return int(pd.Timedelta(minutes=minutes).value)


def _window_median(m: np.ndarray, outside: np.ndarray, n: np.ndarray) -> np.ndarray:
    m[outside] = np.inf  # sorts last
    m.sort(axis=1)
    rows = np.arange(len(n))
    return (m[rows, (n - 1) // 2] + m[rows, n // 2]) / 2


def _window_mean(m: np.ndarray, outside: np.ndarray, n: np.ndarray) -> np.ndarray:
    # a running sum along each row (one addition after another: the same bits whatever the
    # matrix's width or rows, unlike a pairwise sum), read at the window's last value
    return np.cumsum(m, axis=1)[np.arange(len(n)), n - 1] / n


def derive_arrays(t: np.ndarray, observed: np.ndarray, flag: np.ndarray, predicted: np.ndarray,
                  pressure: tuple[np.ndarray, np.ndarray] | None = None, median_minutes: float = 30.0,
                  mean_minutes: float = 10.0, reference_hpa: float = REFERENCE_HPA) -> dict[str, np.ndarray]:
    """:func:`derive` on plain arrays, every row computed (the reference the daemon's steady
    pass, :func:`derive_arrays_again`, is held to).

    Parameters
    ----------
    t : array of int
        Sample times [Unix s], increasing.
    observed, flag, predicted : arrays
        Level [m, station datum], aggregate QARTOD flag, predicted tide [m].
    pressure : (times [Unix s], readings [hPa]), optional
        Barometer readings, NaN readings left out.

    Returns
    -------
    dict
        ``observed, predicted, residual, smoothed, barometric`` [m] and ``flag``, arrays.
    """
    d = _unsmoothed(t, observed, flag, predicted, pressure, reference_hpa)
    d["smoothed"] = smooth_residual_arrays(d.pop("t") * 1_000_000_000, d["residual"], d.pop("usable"),
                                           median_minutes, mean_minutes)
    return d


def _unsmoothed(t: np.ndarray, observed: np.ndarray, flag: np.ndarray, predicted: np.ndarray,
                pressure: tuple[np.ndarray, np.ndarray] | None, reference_hpa: float) -> dict[str, np.ndarray]:
    """:func:`derive_arrays`' columns but the smoothed residual, with ``t`` [Unix s, int64]
    and ``usable`` (the samples the smoothing takes)."""
    t = np.asarray(t, dtype=np.int64)
    obs = np.asarray(observed, dtype=float)
    pred = np.asarray(predicted, dtype=float)
    res = residual(obs, pred)
    flag = np.asarray(flag)
    usable = (flag != _UNUSABLE[0]) & (flag != _UNUSABLE[1]) & np.isfinite(res)
    ib = inverse_barometer(pressure_at_seconds(t.astype(float), *pressure), reference_hpa) \
        if pressure is not None else np.full(len(t), np.nan)
    return {"t": t, "usable": usable, "observed": obs, "predicted": pred, "residual": res, "barometric": ib,
            "flag": flag}


class DerivedMemo:
    """What :func:`derive_arrays_again` keeps of one computation for the next: the rows'
    times [Unix s], the inputs that decide each row's derived values (observed and
    predicted level [m], whether the smoothing takes it, the barometric part [m]), the
    smoothed residual [m] of the rows from ``since`` [Unix s] on, and the settings."""

    __slots__ = ("t", "observed", "predicted", "usable", "barometric", "smoothed", "since", "settings")

    def __init__(self, d: dict[str, np.ndarray], since: int, settings: tuple):
        # copies of what may be the caller's arrays (changed in place, they would hide a revision)
        self.t, self.observed, self.predicted = d["t"].copy(), d["observed"].copy(), d["predicted"].copy()
        self.usable, self.barometric, self.smoothed = d["usable"], d["barometric"], d["smoothed"]
        self.since, self.settings = int(since), settings


def derive_arrays_again(memo: DerivedMemo | None, t: np.ndarray, observed: np.ndarray, flag: np.ndarray,
                        predicted: np.ndarray, pressure: tuple[np.ndarray, np.ndarray] | None = None,
                        median_minutes: float = 30.0, mean_minutes: float = 10.0,
                        reference_hpa: float = REFERENCE_HPA,
                        first: int = 0) -> tuple[dict[str, np.ndarray], int, DerivedMemo]:
    """:func:`derive_arrays` of the rows from ``first`` on, the smoothed residual made
    again only from the first row whose inputs differ from the last computation's.

    With trailing windows a row's smoothed value depends on the rows up to it only, so the
    rows before the first new or changed one (its time, level, prediction, whether the
    smoothing takes it, its barometric part) keep the smoothed value ``memo`` holds.

    Parameters
    ----------
    memo : DerivedMemo or None
        What the last call returned (None: every row from ``first`` is computed).
    t, observed, flag, predicted, pressure, median_minutes, mean_minutes, reference_hpa
        As :func:`derive_arrays`; ``t`` must hold the windows' samples before ``first``.
    first : int
        The first row wanted [index]; ``t[first]`` [Unix s] must not be before the
        ``first`` of the call that made ``memo`` (else every row is computed).

    Returns
    -------
    derived : dict
        As :func:`derive_arrays`, bit for bit, from ``first`` on (``smoothed`` NaN before).
    changed : int
        The first row [index, >= ``first``] whose derived values may differ from those
        ``memo`` holds at its time; the rows from ``first`` up to it have equal values.
    memo : DerivedMemo
        For the next call.
    """
    settings = (float(median_minutes), float(mean_minutes), float(reference_hpa))
    d = _unsmoothed(t, observed, flag, predicted, pressure, reference_hpa)
    t = d["t"]
    changed = max(first, _first_changed(memo, d, settings, int(t[first]) if first < len(t) else None))
    sm = smooth_residual_arrays(t * 1_000_000_000, d["residual"], d["usable"], median_minutes, mean_minutes,
                                first=changed)
    if changed > first:
        o = int(memo.t.searchsorted(t[0]))  # rows equal up to ``changed``: memo's row o is row 0
        sm[first:changed] = memo.smoothed[o + first:o + changed]
    d["smoothed"] = sm
    new_memo = DerivedMemo(d, int(t[first]) if first < len(t) else 2 ** 62, settings)
    del d["t"], d["usable"]
    return d, changed, new_memo


def _first_changed(memo: DerivedMemo | None, d: dict[str, np.ndarray], settings: tuple, since: int | None) -> int:
    """The first row of ``d`` (from :func:`_unsmoothed`) that ``memo`` does not hold with
    the same bits of time, level, prediction, usability and barometric part (0 when
    ``memo`` cannot say: none, other settings, or its smoothed values start later)."""
    t = d["t"]
    if memo is None or memo.settings != settings or since is None or since < memo.since or not len(t):
        return 0
    o = int(memo.t.searchsorted(t[0]))
    n = min(len(memo.t) - o, len(t))
    if n <= 0:
        return 0
    same = memo.t[o:o + n] == t[:n]
    same &= memo.usable[o:o + n] == d["usable"][:n]
    for c in ("observed", "predicted", "barometric"):  # bit for bit (a NaN is the same NaN)
        same &= getattr(memo, c)[o:o + n].view(np.int64) == d[c][:n].view(np.int64)
    return n if same.all() else int(same.argmin())


def skew_surges(observed: pd.Series, extremes: pd.DataFrame, max_gap_s: float = 3600.0) -> pd.DataFrame:
    """Skew surge of every complete tidal cycle.

    A cycle runs from the predicted low water before a predicted high-water stand to the one
    after it (half an M2 period either side when a low water is not given). It is complete
    when the observations reach its end, start within ``max_gap_s`` of its start, and have
    no gap longer than ``max_gap_s`` inside it. Skew surge = highest observed level within
    the cycle - the predicted high water (whatever their times). A double high water is one
    stand, one cycle, and its predicted high water is the higher peak; the small rise inside
    a double low water is no cycle. Stands come from the shape of the predicted curve (the
    ``stand`` and ``principal`` columns of :func:`predictor.extrema.high_low`, or, for a
    table without them, :func:`predictor.extrema.classify_stands` on its turning points),
    never from a fixed time gap between peaks.

    Parameters
    ----------
    observed : Series
        Usable observed levels [m], UTC index (fail and missing samples removed).
    extremes : DataFrame
        Predicted turning points: ``time`` (UTC), ``level`` [m], ``kind`` ('high'/'low'),
        optionally ``stand`` and ``principal``.

    Returns
    -------
    DataFrame
        ``hw_t`` [s], ``predicted_high`` [m], ``observed_high`` [m], ``observed_t`` [s],
        ``skew_surge`` [m]; one row per complete cycle.

    References
    ----------
    Williams, J., Horsburgh, K. J., Williams, J. A., Proctor, R. N. F. (2016). Tide and skew
    surge independence: new insights for flood risk. Geophys. Res. Lett. 43.
    NOAA (2003). Computational Techniques for Tidal Datums Handbook (glossary: double high water).
    """
    cols = ["hw_t", "predicted_high", "observed_high", "observed_t", "skew_surge"]
    obs = observed.dropna()
    if obs.empty or extremes is None or extremes.empty:
        return pd.DataFrame(columns=cols)
    t_obs = index_seconds(obs.index)
    v_obs = obs.to_numpy(dtype=float)
    ext = tide_stands(extremes)
    lows = ext.loc[(ext["kind"] == "low") & ext["principal"], "t"].to_numpy()
    # per stand, as arrays (a pandas group per cycle took most of a minute on 40 years)
    highs = ext[ext["kind"] == "high"].sort_values(["stand", "t"], kind="stable")
    stand = highs["stand"].to_numpy()
    t_hi = highs["t"].to_numpy(dtype=float)
    lv_hi = highs["level"].to_numpy(dtype=float)
    _, first_i, n_in = np.unique(stand, return_index=True, return_counts=True)
    if first_i.size == 0:
        return pd.DataFrame(columns=cols)
    first = t_hi[first_i]
    last = t_hi[first_i + n_in - 1]
    princ = highs["principal"].to_numpy(dtype=bool)
    # the stand's first principal row (the high water of record)
    pidx = np.flatnonzero(princ)
    top = pidx[np.searchsorted(pidx, first_i)]
    tk, lv = t_hi[top], lv_hi[top]
    jb = np.searchsorted(lows, first, side="left")          # lows strictly before ``first``
    before = np.where(jb > 0, lows[np.maximum(jb - 1, 0)], -np.inf)
    ja = np.searchsorted(lows, last, side="right")          # lows strictly after ``last``
    after = np.where(ja < lows.size, lows[np.minimum(ja, max(lows.size - 1, 0))], np.inf) \
        if lows.size else np.full(first.size, np.inf)
    start = np.where(first - before < 2 * HALF_M2, before, first - HALF_M2)
    end = np.where(after - last < 2 * HALF_M2, after, last + HALF_M2)
    i0 = np.searchsorted(t_obs, start, side="left")
    i1 = np.searchsorted(t_obs, end, side="right")
    rows = []
    for c in np.flatnonzero((i1 - i0 >= 2) & (t_obs[-1] >= end)):
        a, b = i0[c], i1[c]
        seg = t_obs[a:b]
        if max(seg[0] - start[c], end[c] - seg[-1], np.max(np.diff(seg)) if b - a > 1 else 0.0) > max_gap_s:
            continue
        k = a + int(np.argmax(v_obs[a:b]))
        rows.append((int(round(tk[c])), float(lv[c]), float(v_obs[k]), int(t_obs[k]), float(v_obs[k] - lv[c])))
    return pd.DataFrame(rows, columns=cols)


def tide_stands(extremes: pd.DataFrame) -> pd.DataFrame:
    """Predicted turning points as high- and low-water stands, in time order.

    Returns a copy with ``t`` [s, Unix], ``stand`` (the peaks of a double high water share one)
    and ``principal`` (the stand's high or low water of record); the dip inside a double high
    water (the rise inside a double low water) is dropped. A table from
    :func:`predictor.extrema.high_low` already carries ``stand`` and ``principal``; for any other
    table of alternating turning points they are decided here from its levels.

    References
    ----------
    NOAA (2003). Computational Techniques for Tidal Datums Handbook (glossary: double high water).
    """
    ext = extremes.copy()
    ext["t"] = index_seconds(pd.DatetimeIndex(ext["time"]))
    ext = ext.sort_values("t", kind="stable").reset_index(drop=True)
    if "stand" not in ext.columns or "principal" not in ext.columns:
        # rows of one kind in a row are one stand already (a table that left the dip out)
        high = (ext["kind"] == "high").to_numpy()
        level = ext["level"].to_numpy(dtype=float)
        run = np.concatenate([[0], np.cumsum(high[1:] != high[:-1])]) if len(ext) else np.zeros(0, int)
        key = np.where(high, level, -level)
        rep = pd.Series(key).groupby(run).idxmax().to_numpy()
        stand, principal, dip = classify_stands(ext["t"].to_numpy()[rep], level[rep], high[rep])
        ext["stand"] = stand[run]
        ext["principal"] = np.isin(np.arange(len(ext)), rep[principal])
        ext = ext[~dip[run]].reset_index(drop=True)
    ext["principal"] = ext["principal"].astype(bool)
    return ext


def next_high_water(extremes: pd.DataFrame, after: pd.Timestamp) -> pd.Series | None:
    """The next predicted high water after ``after``: a row of ``extremes`` (``time``, ``level``).

    At a double high water the stand's higher peak is the one that matters at the quay, so the
    peaks of one stand (see :func:`tide_stands`) count as one, at the higher of the peaks still
    to come. ``extremes`` must reach past the stand's last peak.
    """
    ext = tide_stands(extremes)
    after_t = index_seconds(pd.DatetimeIndex([pd.Timestamp(after)]))[0]
    highs = ext[(ext["kind"] == "high") & (ext["t"] > after_t)]
    if highs.empty:
        return None
    stand = highs[highs["stand"] == highs["stand"].iloc[0]]
    return stand.loc[stand["level"].idxmax()].drop(labels=["t"])


def high_waters_within(extremes: pd.DataFrame, after: pd.Timestamp, until: pd.Timestamp) -> pd.DataFrame:
    """The predicted high waters after ``after`` and up to ``until``, one per stand (the
    higher peak still to come of a double high water, as :func:`next_high_water`); at least
    the next one even when it falls after ``until``. Columns ``time``, ``level``; empty when
    none."""
    ext = tide_stands(extremes)
    after_t = index_seconds(pd.DatetimeIndex([pd.Timestamp(after)]))[0]
    rows = high_water_rows(ext["t"].to_numpy(dtype=float), utc_index(pd.DatetimeIndex(ext["time"])).as_unit("ns").asi8, (ext["kind"] == "high").to_numpy(),
                           ext["stand"].to_numpy(), ext["level"].to_numpy(dtype=float), after_t,
                           pd.Timestamp(until).as_unit("ns").value)
    if len(rows) == 0:
        return pd.DataFrame({"time": pd.DatetimeIndex([], tz="UTC"), "level": np.zeros(0)})
    return ext.loc[rows, ["time", "level"]].reset_index(drop=True)


def high_water_rows(t: np.ndarray, t_ns: np.ndarray, high: np.ndarray, stand: np.ndarray, level: np.ndarray,
                    after_t: float, until_ns: int) -> np.ndarray:
    """:func:`high_waters_within` on the arrays of :func:`tide_stands` (its ``t`` [Unix s],
    ``time`` as [ns], high or not, ``stand``, ``level``, in time order, so the peaks of a
    stand come one after the other): the positions of the high waters after ``after_t``
    [Unix s] up to ``until_ns`` [ns] (at least the next), in time order."""
    cand = np.flatnonzero(high & (t > after_t))
    if len(cand) == 0:
        return cand
    # the stands in time order; only those starting by ``until`` (and the next) can be kept
    s = stand[cand]
    starts = np.concatenate([[0], np.flatnonzero(s[1:] != s[:-1]) + 1])
    n = max(1, int(np.searchsorted(t_ns[cand[starts]], until_ns, side="right")))
    ends = np.append(starts[1:], len(cand))
    best = np.array([cand[a + int(np.argmax(level[cand[a:b]]))] for a, b in zip(starts[:n], ends[:n])])
    keep = t_ns[best] <= until_ns
    keep[0] = True
    return best[keep]
