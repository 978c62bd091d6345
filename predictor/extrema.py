"""High and low waters: turning points of the predicted tide, refined below the step,
and grouped into stands.

The analytic time derivative of the prediction is evaluated on a uniform grid (the
fast path of :meth:`predictor.model.TideModel.predict_derivative`); each sign change
brackets one turning point, which Newton steps on the derivative (with the analytic
second derivative, kept inside the bracket) locate to well under a second.

Not every turning point is a high or low water. NOAA (2003) defines a double high water
as "a high water consisting of two maxima of nearly the same height separated by a
relatively small depression", and a double low water likewise: the depression (or the
small rise inside a double low water) is no low (high) water, and the stand counts as
one high (low) water, at its higher (lower) peak. :func:`classify_stands` decides this
from the shape of the curve, never from a fixed time gap: an inner turning point is the
dip of a stand when both its swings are far below the swings of the tide around it (:data:`STAND_DEPTH_RATIO`) and the peaks either side of it are close together
(:data:`STAND_MAX_SPAN_S`).

References
----------
Foreman, M. G. G. (1977). Pacific Marine Science Report 77-10 (prediction).
NOAA (2003). Computational Techniques for Tidal Datums Handbook, NOS CO-OPS 2
(high and low waters as the turning points of the tide curve; glossary: double high
water, double low water).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from predictor.timeutil import parse_step, to_unix_seconds

__all__ = ["turning_points", "high_low", "classify_stands", "STAND_DEPTH_RATIO", "STAND_MAX_SPAN_S"]

_NEWTON_STEPS = 3

#: An inner turning point is the dip (or rise) of a stand when both its swings (to the peak
#: before and to the peak after) are below this share of the larger swing of the tide into and
#: out of the stand. The handbook's
#: "relatively small depression" has no number (NOAA 2003, glossary); a third keeps every
#: semidiurnal or mixed tide's real low water (its swings are comparable to the range) and takes
#: the dips of shallow-water double high waters, which are centimetres to a few decimetres in a
#: range of metres (Pugh & Woodworth 2014, sec. 7.5; the third itself: common practice, no source).
STAND_DEPTH_RATIO = 1.0 / 3.0
#: The peaks of one stand are closer together than this [s] (0.4 of the M2 period, 4.97 h): the
#: two high waters of a mixed tide's tidal day are ten hours or more apart even when the lower
#: one is small, while the peaks of a double high water come 2-4 h apart (Pugh & Woodworth 2014,
#: sec. 7.5, from memory; the bound: common practice, no source).
STAND_MAX_SPAN_S = 0.4 * 12.420601 * 3600.0


def turning_points(model, t_start: float, t_end: float, step_s: float = 600.0):
    """Times, levels and kinds of the turning points in ``[t_start, t_end]``.

    Parameters
    ----------
    model : TideModel
    t_start, t_end : float
        Unix seconds [s], UTC.
    step_s : float
        Search grid step [s]; turning points closer together than about one step
        (a double high water of a few minutes) may be missed.

    Returns
    -------
    t : numpy.ndarray
        Unix seconds [s] of each turning point.
    level : numpy.ndarray
        Predicted level [m].
    is_high : numpy.ndarray of bool
        True for high water, False for low water.

    References
    ----------
    NOAA (2003). Tidal Datums Handbook, NOS CO-OPS 2.
    """
    n = int(np.ceil((t_end - t_start) / step_s)) + 3
    grid0 = t_start - step_s
    ns0 = np.int64(round(grid0 * 1e9))
    grid_ns = ns0 + np.arange(n, dtype=np.int64) * np.int64(round(step_s * 1e9))
    d = model.predict_derivative(grid_ns.astype("datetime64[ns]"))
    tg = grid_ns / 1e9
    pos, neg = d > 0, d < 0
    high = pos[:-1] & (d[1:] <= 0)
    low = neg[:-1] & (d[1:] >= 0)
    idx = np.flatnonzero(high | low)
    if idx.size == 0:
        return np.empty(0), np.empty(0), np.empty(0, dtype=bool)
    is_high = high[idx]
    a, b = tg[idx], tg[idx + 1]
    da, db = d[idx], d[idx + 1]
    # start from the linear interpolation of the derivative's zero
    t = a + (b - a) * da / (da - db)
    for _ in range(_NEWTON_STEPS):
        d1, d2 = model.evaluate_orders(t, (1, 2))
        with np.errstate(divide="ignore", invalid="ignore"):
            nt = t - d1 / d2
        bad = ~np.isfinite(nt) | (nt < a) | (nt > b)
        # a step that leaves the bracket falls back to bisection toward the sign change
        left = d1 * da > 0
        nt[bad] = np.where(left[bad], 0.5 * (t[bad] + b[bad]), 0.5 * (a[bad] + t[bad]))
        a = np.where(left & bad, t, a)
        b = np.where(~left & bad, t, b)
        t = nt
    keep = (t >= t_start) & (t <= t_end)
    t, is_high = t[keep], is_high[keep]
    return t, model.evaluate_orders(t, (0,))[0], is_high


def classify_stands(t: np.ndarray, level: np.ndarray, is_high: np.ndarray,
                    depth_ratio: float = STAND_DEPTH_RATIO, max_span_s: float = STAND_MAX_SPAN_S):
    """Group alternating turning points into high- and low-water stands.

    Parameters
    ----------
    t : numpy.ndarray
        Times [s] of alternating turning points, in order.
    level : numpy.ndarray
        Their levels [m].
    is_high : numpy.ndarray of bool
        True for a maximum, False for a minimum.
    depth_ratio : float
        See :data:`STAND_DEPTH_RATIO` [1].
    max_span_s : float
        See :data:`STAND_MAX_SPAN_S` [s].

    Returns
    -------
    stand : numpy.ndarray of int
        Number of the stand each turning point belongs to (0, 1, ... in time order); the peaks
        of a double high water and the dip between them share one number.
    principal : numpy.ndarray of bool
        True for the high or low water of record of each stand: its highest maximum (lowest
        minimum). These are the high and low waters of NOAA (2003), one of each per tidal cycle.
    dip : numpy.ndarray of bool
        True for the depression inside a double high water (or the rise inside a double low
        water): a turning point that is neither a high nor a low water.

    Notes
    -----
    For an inner turning point k, its swing is the larger of ``|level[k] - level[k-1]|`` and
    ``|level[k] - level[k+1]|`` (so both peaks stand only a little above the dip: "two maxima of
    nearly the same height"), the tide's swing the larger of ``|level[k-1] - level[k-2]|`` and
    ``|level[k+1] - level[k+2]|`` (into and out of the would-be stand). It is a dip when its
    swing is below ``depth_ratio`` times the tide's and ``t[k+1] - t[k-1] < max_span_s``.
    Candidates are taken shallowest first; a candidate next to one already taken is left (its
    neighbour is a peak of that stand, not a dip).

    References
    ----------
    NOAA (2003). Computational Techniques for Tidal Datums Handbook, NOS CO-OPS 2 (glossary:
    double high water, double low water; one high and one low water per tidal cycle).
    """
    t = np.asarray(t, dtype=float)
    level = np.asarray(level, dtype=float)
    is_high = np.asarray(is_high, dtype=bool)
    n = t.size
    dip = np.zeros(n, dtype=bool)
    if n >= 3:
        k = np.arange(1, n - 1)
        own = np.maximum(np.abs(level[k] - level[k - 1]), np.abs(level[k] - level[k + 1]))
        before = np.where(k >= 2, np.abs(level[k - 1] - level[np.maximum(k - 2, 0)]), np.nan)
        after = np.where(k <= n - 3, np.abs(level[k + 1] - level[np.minimum(k + 2, n - 1)]), np.nan)
        tide = np.fmax(before, after)  # NaN only when neither exists
        with np.errstate(invalid="ignore"):
            ratio = own / tide
        cand = np.isfinite(ratio) & (ratio < depth_ratio) & (t[k + 1] - t[k - 1] < max_span_s)
        for j in np.argsort(np.where(cand, ratio, np.inf), kind="stable")[:int(cand.sum())]:
            i = j + 1
            if not (dip[i - 1] or dip[i + 1]):
                dip[i] = True
    # a stand: a maximal run of turning points joined through dips
    starts = np.ones(n, dtype=bool)
    starts[1:] = ~(dip[1:] | dip[:-1])
    stand = np.cumsum(starts) - 1
    principal = np.zeros(n, dtype=bool)
    if n:
        # within a stand the peaks are those of the stand's kind; take the extreme one
        key = np.where(dip, np.nan, np.where(is_high, level, -level))
        order = np.lexsort((-np.nan_to_num(key, nan=-np.inf), stand))
        first = np.ones(n, dtype=bool)
        first[1:] = stand[order][1:] != stand[order][:-1]
        principal[order[first]] = True
        principal &= ~dip
    return stand, principal, dip


def high_low(model, start, end, step="10min") -> pd.DataFrame:
    """High and low waters between ``start`` and ``end``.

    Parameters
    ----------
    model : TideModel
    start, end : time-like
        Anything pandas reads as a time (naive is UTC), or Unix seconds.
    step : str or float
        Search grid step (``"10min"``, ``"1h"`` or seconds).

    Returns
    -------
    pandas.DataFrame
        Columns ``time`` (UTC, tz-aware, rounded to the second), ``level`` [m],
        ``kind`` (``"high"`` or ``"low"``), ``stand`` (int: the peaks of a double high water,
        or the troughs of a double low water, share one number) and ``principal`` (bool: the
        stand's high or low water of record, its higher peak or lower trough), in time order.
        Both peaks of a double high water are listed; the depression between them is no low
        water and is left out (NOAA 2003, glossary), as is the rise inside a double low water.
        Stands are judged on the turning points found in ``[start, end]`` widened by a day on
        each side, so a stand at either end is told apart like any other.

    References
    ----------
    NOAA (2003). Tidal Datums Handbook, NOS CO-OPS 2.
    """
    t0 = float(to_unix_seconds([start])[0])
    t1 = float(to_unix_seconds([end])[0])
    if not (np.isfinite(t0) and np.isfinite(t1)):
        raise ValueError("start and end must be times")
    if t1 < t0:
        raise ValueError("start is after end")
    margin = 86400.0
    t, level, is_high = turning_points(model, t0 - margin, t1 + margin, parse_step(step))
    stand, principal, dip = classify_stands(t, level, is_high)
    keep = (t >= t0) & (t <= t1) & ~dip
    t, level, is_high, stand, principal = t[keep], level[keep], is_high[keep], stand[keep], principal[keep]
    if stand.size:
        stand = stand - stand[0]
    times = pd.to_datetime(np.round(t * 1e3).astype(np.int64), unit="ms", utc=True)
    return pd.DataFrame({
        "time": times,
        "level": level,
        "kind": np.where(is_high, "high", "low"),
        "stand": stand.astype(np.int64),
        "principal": principal,
    })
