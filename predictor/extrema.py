"""High and low waters: turning points of the predicted tide, refined below the step.

The analytic time derivative of the prediction is evaluated on a uniform grid (the
fast path of :meth:`predictor.model.TideModel.predict_derivative`); each sign change
brackets one turning point, which Newton steps on the derivative (with the analytic
second derivative, kept inside the bracket) locate to well under a second.

References
----------
Foreman, M. G. G. (1977). Pacific Marine Science Report 77-10 (prediction).
NOAA (2003). Computational Techniques for Tidal Datums Handbook, NOS CO-OPS 2
(high and low waters as the turning points of the tide curve).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from predictor.timeutil import parse_step

__all__ = ["turning_points", "high_low"]

_NEWTON_STEPS = 3


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
        ``kind`` (``"high"`` or ``"low"``), in time order.

    References
    ----------
    NOAA (2003). Tidal Datums Handbook, NOS CO-OPS 2.
    """
    from predictor.model import to_unix_seconds

    t0 = float(to_unix_seconds([start])[0])
    t1 = float(to_unix_seconds([end])[0])
    if not (np.isfinite(t0) and np.isfinite(t1)):
        raise ValueError("start and end must be times")
    if t1 < t0:
        raise ValueError("start is after end")
    t, level, is_high = turning_points(model, t0, t1, parse_step(step))
    times = pd.to_datetime(np.round(t * 1e3).astype(np.int64), unit="ms", utc=True)
    return pd.DataFrame({
        "time": times,
        "level": level,
        "kind": np.where(is_high, "high", "low"),
    })
