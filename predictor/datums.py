"""Tidal datums from a prediction over the 18.61-year nodal cycle.

Definitions follow NOAA (2003): mean high water (MHW) is the mean of all high waters,
mean higher high water (MHHW) the mean of the higher high water of each tidal day
(24.84 h; a day with one high water counts it as its higher high), and likewise MLW
and MLLW. There is one high and one low water per tidal cycle: the two peaks of a
double high water are one high water, at the higher peak, and the "relatively small
depression" between them is no low water (handbook glossary); likewise for a double
low water (:func:`predictor.extrema.classify_stands` decides from the curve's shape).  The tidal days start where they split the fewest tides (not on a high or
low water); near each crossover of the diurnal inequality two equal pairings of
high waters remain possible, which can move MHHW or MLLW by up to about 1 cm for a
strongly mixed tide (the handbook ties the tidal day to the Moon's transit at the
station, whose longitude a model does not carry).
Mean sea level (MSL) is the mean of the (here 15-minute) heights; mean tide level
MTL = (MHW + MLW) / 2; the mean range (key ``MN``) is MHW minus MLW and the diurnal
range (key ``GT``) MHHW minus MLLW.  HAT and LAT are the highest and lowest predicted levels
over the whole period (IHO definition: highest/lowest astronomical tide).

The datums describe the astronomical tide: any trend in the model is left out, so
the heights are on the model's datum about its ``mean``.  They are computed from a
prediction, not from observations, and are an automated, unofficial aid: published
datums and local authorities come first.

References
----------
NOAA (2003). Computational Techniques for Tidal Datums Handbook. NOAA Special
Publication NOS CO-OPS 2.
Pugh, D., Woodworth, P. (2014). Sea-Level Science, ch. 4 (HAT/LAT over 18.61 years).
"""
from __future__ import annotations

import numpy as np

from predictor.extrema import classify_stands, turning_points
from predictor.model import SECONDS_PER_YEAR
from predictor.timeutil import iso_utc, parse_step, to_unix_seconds

__all__ = ["tidal_datums", "DATUM_ORDER", "DATUM_DESCRIPTIONS", "TIDAL_DAY_SECONDS"]

#: Mean lunar day [s]: two periods of M2 (360 / 28.9841042 deg/h, Schureman 1958).
TIDAL_DAY_SECONDS = 2 * 360.0 / 28.9841042 * 3600.0
NODAL_CYCLE_YEARS = 18.61

DATUM_ORDER = ("HAT", "MHHW", "MHW", "MTL", "MSL", "MLW", "MLLW", "LAT", "MN", "GT")
DATUM_DESCRIPTIONS = {
    "HAT": "highest astronomical tide",
    "MHHW": "mean higher high water",
    "MHW": "mean high water",
    "MTL": "mean tide level",
    "MSL": "mean sea level",
    "MLW": "mean low water",
    "MLLW": "mean lower low water",
    "LAT": "lowest astronomical tide",
    "MN": "mean range: mean high water minus mean low water (MHW minus MLW)",
    "GT": "diurnal range: mean higher high water minus mean lower low water (MHHW minus MLLW)",
}


def _tidal_day_offset(dt: np.ndarray, is_high: np.ndarray, trials: int = 48) -> float:
    """Start [s after the period's start] of the tidal days that split the fewest tides.

    Of ``trials`` starts spread over one tidal day, the one whose days most often hold
    the usual number of high and of low waters (two each for a semidiurnal or mixed tide,
    one each for a diurnal one); ties go to the earliest.
    """
    best, best_score = 0.0, None
    for off in TIDAL_DAY_SECONDS * np.arange(trials) / trials:
        day = np.floor((dt - off) / TIDAL_DAY_SECONDS).astype(np.int64)
        ok = day >= 0
        score = 0
        for sel in (is_high, ~is_high):
            counts = np.bincount(day[ok & sel])[:-1]  # the last day may be cut by the end
            if counts.size:
                score += int(np.sum(counts == np.bincount(counts).argmax()))
        if best_score is None or score > best_score:
            best, best_score = float(off), score
    return best


def tidal_datums(model, start=None, years: float = NODAL_CYCLE_YEARS, step="15min") -> dict:
    """Tidal datums from a long prediction.

    Parameters
    ----------
    model : TideModel
    start : time-like, optional
        Start of the period (UTC); default 2000-01-01T00:00Z so results repeat.
    years : float
        Length of the period [Julian years]; the nodal cycle by default.
    step : str or float
        Grid step for the mean and the search for turning points (refined below it).

    Returns
    -------
    dict
        ``HAT, MHHW, MHW, MTL, MSL, MLW, MLLW, LAT`` [m] on the model's datum, the
        ranges ``MN`` and ``GT`` [m], and ``start``, ``end`` (ISO 8601 UTC).

    References
    ----------
    NOAA (2003). Computational Techniques for Tidal Datums Handbook, NOS CO-OPS 2.
    """
    tide = model.without_trend()
    t0 = 946684800.0 if start is None else float(to_unix_seconds([start])[0])
    if not np.isfinite(t0):
        raise ValueError("start must be a time")
    if not years > 0:
        raise ValueError("years must be positive")
    t1 = t0 + years * SECONDS_PER_YEAR
    step_s = parse_step(step)

    n = int((t1 - t0) // step_s) + 1
    ns = np.int64(round(t0 * 1e9)) + np.arange(n, dtype=np.int64) * np.int64(round(step_s * 1e9))
    msl = float(np.mean(tide.predict(ns.astype("datetime64[ns]"))))

    # one high and one low water per tidal cycle: a stand's other peak and its dip are left
    # out; a day beyond each end lets a stand cut by the period's ends be told apart too
    t, level, is_high = turning_points(tide, t0 - 86400.0, t1 + 86400.0, step_s)
    _, principal, _ = classify_stands(t, level, is_high)
    keep = principal & (t >= t0) & (t <= t1)
    t, level, is_high = t[keep], level[keep], is_high[keep]
    if not is_high.any() or is_high.all():
        # no tide (no constituents): every datum is the mean level
        out = {k: msl for k in ("HAT", "MHHW", "MHW", "MTL", "MSL", "MLW", "MLLW", "LAT")}
        out.update(MN=0.0, GT=0.0, start=iso_utc(t0), end=iso_utc(t1))
        return out
    highs, lows = level[is_high], level[~is_high]
    mhw, mlw = float(highs.mean()), float(lows.mean())

    # Tidal days start where no high or low water is near: a boundary on a high water
    # would put one high in one day and three in the next, depending on the station's
    # phase only (up to 2 cm on MHHW for an ordinary mixed tide).
    d0 = t0 + _tidal_day_offset(t - t0, is_high)
    day = np.floor((t - d0) / TIDAL_DAY_SECONDS).astype(np.int64)
    ndays = int((t1 - d0) // TIDAL_DAY_SECONDS)  # complete tidal days only
    full = (day >= 0) & (day < ndays)
    hh = np.full(ndays, -np.inf)
    ll = np.full(ndays, np.inf)
    np.maximum.at(hh, day[full & is_high], level[full & is_high])
    np.minimum.at(ll, day[full & ~is_high], level[full & ~is_high])
    mhhw = float(hh[np.isfinite(hh)].mean())
    mllw = float(ll[np.isfinite(ll)].mean())

    return {
        "HAT": float(highs.max()),
        "MHHW": mhhw,
        "MHW": mhw,
        "MTL": 0.5 * (mhw + mlw),
        "MSL": msl,
        "MLW": mlw,
        "MLLW": mllw,
        "LAT": float(lows.min()),
        "MN": mhw - mlw,
        "GT": mhhw - mllw,
        "start": iso_utc(t0),
        "end": iso_utc(t1),
    }
