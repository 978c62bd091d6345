"""The next high water forecast, with a range conditioned on the storm now.

The forecast of a high water is its predicted level plus a forecast of what the weather will
add to it: the *skew surge*, the highest observed level of the tidal cycle minus the
predicted high water (Williams et al. 2016), which is what a reader compares the forecast
with afterwards. From the state now (the smoothed residual ``r``, its rate over the last
three hours, and where a barometer reports, the pressure tendency over the same three
hours) and the lead time ``L``, the change ``y = skew surge - r`` is forecast by a
location-scale regression with a range from *locally weighted (normalised) split conformal
prediction* (Lei et al. 2018, sec. 5.2; Papadopoulos et al. 2008):

- centre ``c(x)``: least squares of ``y`` on ``1, L, r, r L, rate L`` (and ``tendency L``);
- scale ``s(x)``: least squares of ``|y - c(x)|`` on ``1, sqrt(L), |r|, |r| sqrt(L), |rate| L``
  (and ``|tendency| L``), floored at 1 cm;
- the range: ``c(x) + q_lo s(x)`` to ``c(x) + q_hi s(x)``, where ``q_lo``, ``q_hi`` are the
  finite-sample conformal quantiles of the scores ``(y - c) / s`` computed out of fold
  (five contiguous blocks of the history, each scored by a fit to the others). The scores
  are taken separately for storm and calm states and for bands of lead time, so the range
  is calibrated *in storm conditions*, not only on average (Mondrian conformal prediction,
  Vovk et al. 2005, ch. 4).

A state is a storm state when ``|r| > 0.3 m`` or the residual rises faster than 0.1 m/h.
With fewer storms in the history than asked for (``residual.forecast_min_storms``) the
spread cannot be learnt: the range is then a deliberately wide rule of thumb (today's
unconditioned spread widened by half the surge and by its 3-hour rate kept for the whole
lead time, both ways), and the forecast says so in words. ``benchmarks/bench_forecast.py``
measures both on invented storms against the unconditioned method.

Pure functions on numpy/pandas (UTC times, metres, hPa); the daemon reads the store and
calls these (the store glue is at the end of this module).

References
----------
Lei, J., G'Sell, M., Rinaldo, A., Tibshirani, R. J., Wasserman, L. (2018). Distribution-free
predictive inference for regression. J. Am. Stat. Assoc. 113(523), 1094-1111.
Papadopoulos, H., Gammerman, A., Vovk, V. (2008). Normalized nonconformity measures for
regression conformal prediction. Proc. IASTED AIA 2008, 64-69.
Vovk, V., Gammerman, A., Shafer, G. (2005). Algorithmic Learning in a Random World. Springer.
Williams, J., Horsburgh, K. J., Williams, J. A., Proctor, R. N. F. (2016). Tide and skew surge
independence: new insights for flood risk. Geophys. Res. Lett. 43.
Hyndman, R. J., Fan, Y. (1996). Sample quantiles in statistical packages. Am. Stat. 50
(type 7, numpy's default: the unconditioned method's quantiles).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from predictor.timeutil import index_seconds

#: Storm conditions: a residual this large either way [m] ...
STORM_RESIDUAL = 0.30
#: ... or rising faster than this [m/h] (the issue's definition, used by the benchmark too).
STORM_RISE = 0.10
#: Window of the residual's rate and of the pressure tendency [h]. The barometric tendency is
#: the change over the last three hours in synoptic practice (WMO Manual on Codes, from memory).
RATE_HOURS = 3.0
#: Grid of the residual history [s].
GRID_S = 600
#: Longest lead time learnt [h] (a diurnal tide's next high water is up to 25 h away).
MAX_LEAD_H = 25.0
#: Upper edges of the lead-time bands whose scores are taken apart [h].
LEAD_BANDS = (1.5, 2.5, 3.5, 4.5, 6.5, 9.5, 12.5, math.inf)
#: Contiguous blocks of the history scored out of fold.
FOLDS = 5
#: Fewest scores in a (band, storm/calm) cell for its conformal quantiles.
MIN_SCORES = 40
#: Smallest scale [m]: a quiet night's spread never collapses below a centimetre.
MIN_SCALE = 0.01
#: Storm spells closer than this [s] are one storm.
STORM_JOIN_S = 24 * 3600
#: The wide rule of thumb: half-width added = K_RESIDUAL |r| + |rate| L (common practice, no
#: source; checked on the invented storms of benchmarks/bench_forecast.py, where it covers
#: about 98 % of storm cases) ...
K_RESIDUAL = 0.5
#: ... and, with no history at all, the unconditioned part is +-0.25 m (a rule of thumb).
NO_HISTORY_HALF_WIDTH = 0.25
#: Rate assumed when the rate is unknown (a gap) in the wide rule [m/h].
UNKNOWN_RATE = STORM_RISE

METHOD_CITATION = "locally weighted conformal prediction, Lei et al. 2018"


# --------------------------------------------------------------------------- the state now

@dataclass(frozen=True)
class StormState:
    """The storm now, as the forecast sees it.

    Attributes
    ----------
    t : float
        Time of the state [Unix s].
    residual : float
        Smoothed residual [m].
    rate : float
        Its change over the last ``RATE_HOURS`` per hour [m/h]; NaN when unknown.
    tendency : float
        Pressure change over the last ``RATE_HOURS`` per hour [hPa/h]; NaN without a barometer
        reading now and three hours ago.
    barometer : bool
        The station has a barometer (so a missing tendency is a gap, said in words).
    pressure_since : float or None
        Time of the last pressure reading at or before ``t`` [Unix s]; None without one.
    """

    t: float
    residual: float
    rate: float = math.nan
    tendency: float = math.nan
    barometer: bool = False
    pressure_since: float | None = None

    @property
    def storm(self) -> bool:
        """Storm conditions now: :func:`is_storm` of the one state, in plain floats."""
        return _is_storm_one(float(self.residual), float(self.rate))


def is_storm(residual: np.ndarray, rate: np.ndarray) -> np.ndarray:
    """Storm conditions: ``|residual| > 0.3 m`` or ``rate > 0.1 m/h`` (NaN rate: by size only)."""
    r = np.asarray(residual, dtype=float)
    q = np.asarray(rate, dtype=float)
    return (np.abs(r) > STORM_RESIDUAL) | (np.nan_to_num(q, nan=-np.inf) > STORM_RISE)


def _is_storm_one(residual: float, rate: float) -> bool:
    """:func:`is_storm` of one state [m, m/h] without arrays: a NaN rate never counts (numpy's
    ``nan_to_num(nan=-inf)``), an infinite one compares as its sign says there."""
    return abs(residual) > STORM_RESIDUAL or (not math.isnan(rate) and rate > STORM_RISE)


#: Integral Unix seconds below this size [s] are their own float exactly through
#: ``pd.Timestamp(now, unit="s").value / 1e9``: ``now * 10**9 = now * 5**9 * 2**9`` needs at most
#: 53 bits while ``|now| * 5**9 < 2**53``. Larger ones (past 2115) take the pandas path.
EXACT_SECONDS = 2 ** 53 // 5 ** 9


def as_seconds(now: float) -> float:
    """``pd.Timestamp(now, unit="s", tz="UTC").value / 1e9`` [Unix s], with no pandas object
    made for the integral times the daemon asks with."""
    if isinstance(now, (int, np.integer)) and -EXACT_SECONDS < now < EXACT_SECONDS:
        return float(now)
    return pd.Timestamp(now, unit="s", tz="UTC").value / 1e9


def on_grid(series: pd.Series | None, start: float | None = None, end: float | None = None) -> pd.Series:
    """Means over ``GRID_S`` bins on a regular UTC grid (NaN where empty)."""
    if series is None:
        return pd.Series(dtype=float)
    s = series.dropna()
    if s.empty:
        return pd.Series(dtype=float)
    g = s.resample(f"{GRID_S}s", origin="epoch").mean()
    if start is not None or end is not None:
        lo = g.index[0] if start is None else pd.Timestamp(int(start // GRID_S * GRID_S), unit="s", tz="UTC")
        hi = g.index[-1] if end is None else pd.Timestamp(int(end // GRID_S * GRID_S), unit="s", tz="UTC")
        g = g.reindex(pd.date_range(lo, hi, freq=f"{GRID_S}s"))
    return g


def rates(grid: pd.Series, hours: float = RATE_HOURS) -> np.ndarray:
    """Change over the last ``hours`` per hour of a regular grid series (NaN without both ends)."""
    v = grid.to_numpy(dtype=float)
    k = int(round(hours * 3600 / GRID_S))
    out = np.full(len(v), np.nan)
    if len(v) > k:
        out[k:] = (v[k:] - v[:-k]) / hours
    return out


def storm_state(residual: pd.Series, now: float, pressure: pd.Series | None = None,
                barometer: bool = False, max_age_s: float = 1800.0) -> StormState:
    """The state at ``now`` from the recent smoothed residual and barometer readings.

    Parameters
    ----------
    residual : Series
        Smoothed residual [m], UTC index, at least the last ``RATE_HOURS`` (plus a bin).
    now : float
        Time of the forecast [Unix s]; the latest residual at or before it is the state's.
    pressure : Series, optional
        Barometer readings [hPa], UTC index.
    barometer : bool
        Whether the station has a barometer (a missing tendency is then a gap).
    max_age_s : float
        A grid bin this far from its target time does not count [s].
    """
    r = residual.dropna()
    p = None
    if pressure is not None:
        pp = pressure.dropna()
        p = (index_seconds(pd.DatetimeIndex(pp.index)), pp.to_numpy(dtype=float))
    return storm_state_arrays(index_seconds(pd.DatetimeIndex(r.index)), r.to_numpy(dtype=float), now, p, barometer, max_age_s)


def storm_state_arrays(t: np.ndarray, residual: np.ndarray, now: float,
                       pressure: tuple[np.ndarray, np.ndarray] | None = None, barometer: bool = False,
                       max_age_s: float = 1800.0) -> StormState:
    """:func:`storm_state` on plain arrays: smoothed residual ``residual`` [m] at times ``t``
    [Unix s, increasing], and barometer readings as (times [Unix s], readings [hPa]); NaN
    values are left out."""
    t = np.asarray(t, dtype=float)
    v = np.asarray(residual, dtype=float)
    now_s = as_seconds(now)
    keep = np.isfinite(v) & (t <= now_s)
    t, v = t[keep], v[keep]
    if len(t) == 0:
        return StormState(t=now, residual=math.nan, barometer=barometer)
    t_now, r_now = float(t[-1]), float(v[-1])
    rate = _change(t, v, t_now, r_now, max_age_s)
    tendency, since = math.nan, None
    if pressure is not None:
        pt, pv = np.asarray(pressure[0], dtype=float), np.asarray(pressure[1], dtype=float)
        keep = np.isfinite(pv) & (pt <= now_s)
        pt, pv = pt[keep], pv[keep]
        if len(pt):
            since = float(pt[-1])
            if t_now - since <= max_age_s:
                tendency = _change(pt, pv, since, float(pv[-1]), max_age_s)
    return StormState(t=t_now, residual=r_now, rate=rate, tendency=tendency, barometer=barometer,
                      pressure_since=since)


def _change(t: np.ndarray, v: np.ndarray, t_now: float, v_now: float, max_age_s: float) -> float:
    """Change per hour over the last RATE_HOURS, from the sample nearest RATE_HOURS back."""
    back = t_now - RATE_HOURS * 3600
    j = int(np.argmin(np.abs(t - back)))
    if abs(t[j] - back) > max_age_s:
        return math.nan
    return (v_now - float(v[j])) / ((t_now - t[j]) / 3600.0)


def count_storms(residual_grid: pd.Series, mask: np.ndarray | None = None) -> int:
    """Storms in a residual history: spells of storm conditions at least an hour long,
    spells less than a day apart counted once (common practice, no source)."""
    if residual_grid.empty:
        return 0
    st = is_storm(residual_grid.to_numpy(dtype=float), rates(residual_grid))
    if mask is not None:
        st &= np.asarray(mask, dtype=bool)
    if not st.any():
        return 0
    idx = np.flatnonzero(st)
    breaks = np.flatnonzero(np.diff(idx) * GRID_S > STORM_JOIN_S)
    starts = np.concatenate([[idx[0]], idx[breaks + 1]])
    ends = np.concatenate([idx[breaks], [idx[-1]]])
    counts = np.array([st[a:b + 1].sum() for a, b in zip(starts, ends)])
    return int((counts * GRID_S >= 3600).sum())


# --------------------------------------------------------------------------- learning

def training_pairs(residual_grid: pd.Series, skew: pd.DataFrame, pressure_grid: pd.Series | None = None,
                   max_lead_h: float = MAX_LEAD_H) -> pd.DataFrame:
    """Every (state, outcome) pair of a history: for each high water with a skew surge and
    each grid time up to ``max_lead_h`` before it, the state then and what came.

    Parameters
    ----------
    residual_grid : Series
        Smoothed residual on the regular ``GRID_S`` grid [m] (:func:`on_grid`).
    skew : DataFrame
        ``hw_t`` [Unix s] and ``skew_surge`` [m] of completed tidal cycles.
    pressure_grid : Series, optional
        Pressure on the same grid [hPa].

    Returns
    -------
    DataFrame
        ``hw_t`` [s], ``lead_h`` [h], ``residual`` [m], ``rate`` [m/h], ``tendency`` [hPa/h]
        and ``y`` = skew surge - residual then [m]; rows with an unknown residual or rate left out.
    """
    cols = ["hw_t", "lead_h", "residual", "rate", "tendency", "y"]
    if residual_grid.empty or skew is None or len(skew) == 0:
        return pd.DataFrame(columns=cols)
    t0 = residual_grid.index[0].timestamp()
    n = len(residual_grid)
    r = residual_grid.to_numpy(dtype=float)
    rate = rates(residual_grid)
    if pressure_grid is not None and len(pressure_grid):
        p = pressure_grid.reindex(residual_grid.index)
        tend = rates(p)
    else:
        tend = np.full(n, np.nan)
    hw_t = skew["hw_t"].to_numpy(dtype=float)
    ss = skew["skew_surge"].to_numpy(dtype=float)
    ok = np.isfinite(ss)
    hw_t, ss = hw_t[ok], ss[ok]
    steps = int(max_lead_h * 3600 // GRID_S)
    last = np.floor((hw_t - t0) / GRID_S).astype(np.int64)       # grid index at or before the high water
    last = np.where(t0 + last * GRID_S >= hw_t, last - 1, last)   # the forecast is made before it
    k = np.repeat(np.arange(len(hw_t)), steps)
    i = np.repeat(last, steps) - np.tile(np.arange(steps), len(hw_t))
    keep = (i >= 0) & (i < n)
    k, i = k[keep], i[keep]
    lead = (hw_t[k] - (t0 + i * GRID_S)) / 3600.0
    out = pd.DataFrame({"hw_t": hw_t[k], "lead_h": lead, "residual": r[i], "rate": rate[i],
                        "tendency": tend[i], "y": ss[k] - r[i]})
    return out[np.isfinite(out["residual"]) & np.isfinite(out["rate"])].reset_index(drop=True)


def _centre_design(lead, r, rate, tend, pressure: bool) -> np.ndarray:
    cols = [np.ones_like(lead), lead, r, r * lead, rate * lead]
    if pressure:
        cols.append(tend * lead)
    return np.column_stack(cols)


def _scale_design(lead, r, rate, tend, pressure: bool) -> np.ndarray:
    sl = np.sqrt(lead)
    cols = [np.ones_like(lead), sl, np.abs(r), np.abs(r) * sl, np.abs(rate) * lead]
    if pressure:
        cols.append(np.abs(tend) * lead)
    return np.column_stack(cols)


def _band(lead: np.ndarray) -> np.ndarray:
    return np.searchsorted(np.asarray(LEAD_BANDS), np.asarray(lead, dtype=float), side="left")


def conformal_quantiles(scores: np.ndarray, coverage: float) -> tuple[float, float]:
    """Lower and upper finite-sample conformal quantiles of scores for a central ``coverage``:
    the ``floor((n+1) a)``-th and ``ceil((n+1)(1-a))``-th smallest, ``a = (1-coverage)/2``
    (Lei et al. 2018, sec. 2.2, applied to each tail). +-inf when n is too small for them."""
    z = np.sort(np.asarray(scores, dtype=float))
    z = z[np.isfinite(z)]
    n = len(z)
    a = (1.0 - coverage) / 2.0
    k_lo = int(math.floor((n + 1) * a + 1e-9))          # 1e-9: 40 * 0.95 is 38.00000000000001
    k_hi = int(math.ceil((n + 1) * (1.0 - a) - 1e-9))
    lo = z[k_lo - 1] if k_lo >= 1 else -math.inf
    hi = z[k_hi - 1] if k_hi <= n else math.inf
    return float(lo), float(hi)


@dataclass
class SpreadModel:
    """A fitted location-scale model of ``y = skew surge - residual`` with conformal scores.

    ``quantiles[(band, storm)]`` holds the (lower, upper) score quantiles of each lead band
    and state kind; a missing cell means too few scores there.
    """

    pressure: bool
    centre: np.ndarray
    scale: np.ndarray
    quantiles: dict = field(default_factory=dict)
    coverage: float = 0.90
    pairs: int = 0

    def predict(self, lead_h, residual, rate, tendency=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Lower, centre and upper forecast of ``y`` [m] (NaN where a cell has no quantiles)."""
        lead = np.atleast_1d(np.asarray(lead_h, dtype=float))
        r = np.broadcast_to(np.asarray(residual, dtype=float), lead.shape)
        q = np.broadcast_to(np.asarray(rate, dtype=float), lead.shape)
        tn = np.broadcast_to(np.asarray(np.nan if tendency is None else tendency, dtype=float), lead.shape)
        c = _centre_design(lead, r, q, tn, self.pressure) @ self.centre
        s = np.maximum(_scale_design(lead, r, q, tn, self.pressure) @ self.scale, MIN_SCALE)
        band = _band(lead)
        storm = is_storm(r, q)
        lo = np.full(lead.shape, np.nan)
        hi = np.full(lead.shape, np.nan)
        for key, (ql, qh) in self.quantiles.items():
            m = (band == key[0]) & (storm == key[1])
            lo[m] = c[m] + ql * s[m]
            hi[m] = c[m] + qh * s[m]
        return np.fmin(lo, c), c, np.fmax(hi, c)


def fit_spread(pairs: pd.DataFrame, pressure: bool = False, coverage: float = 0.90,
               folds: int = FOLDS) -> SpreadModel | None:
    """Fit the location-scale model and its out-of-fold conformal scores.

    The history is cut into ``folds`` contiguous blocks of high waters; each block is scored
    by a model fitted to the others (cross-conformal, Vovk 2015), then the model is fitted
    to all of it. Scores are kept apart by lead band and by storm/calm state.

    Returns None with too few pairs to fit.

    References
    ----------
    Lei et al. (2018), sec. 5.2 (locally weighted conformal); Vovk, V. (2015). Cross-conformal
    predictors. Ann. Math. Artif. Intell. 74, 9-28.
    """
    d = pairs
    if pressure:
        d = d[np.isfinite(d["tendency"])]
    if len(d) < 200:
        return None
    lead, r = d["lead_h"].to_numpy(float), d["residual"].to_numpy(float)
    q, tn, y = d["rate"].to_numpy(float), d["tendency"].to_numpy(float), d["y"].to_numpy(float)
    A = _centre_design(lead, r, q, tn, pressure)
    B = _scale_design(lead, r, q, tn, pressure)
    order = np.unique(d["hw_t"].to_numpy(float), return_inverse=True)[1]
    n_hw = order.max() + 1
    fold = np.minimum(order * folds // max(n_hw, 1), folds - 1)
    bc, bs, scored = _fold_fits(A, B, y, fold, folds)
    scores = np.full(len(y), np.nan)
    for f, (fc, fs) in scored.items():
        test = fold == f
        scores[test] = (y[test] - A[test] @ fc) / np.maximum(B[test] @ fs, MIN_SCALE)
    band, storm = _band(lead), is_storm(r, q)
    quantiles = {}
    for b in range(len(LEAD_BANDS)):
        for st in (False, True):
            z = scores[(band == b) & (storm == st)]
            z = z[np.isfinite(z)]
            if len(z) >= MIN_SCORES:
                quantiles[(b, st)] = conformal_quantiles(z, coverage)
    return SpreadModel(pressure=pressure, centre=bc, scale=bs, quantiles=quantiles, coverage=coverage, pairs=len(y))


def _fold_fits(A: np.ndarray, B: np.ndarray, y: np.ndarray, fold: np.ndarray,
               folds: int) -> tuple[np.ndarray, np.ndarray, dict]:
    """The location-scale fit to all rows and to each fold's complement, by normal equations.

    Each fold's sums (``A'A``, ``A'y``, ``B'B`` and ``B'|y - A c|`` for every centre ``c``)
    are taken once; a complement's fit is the total minus its fold's, so the cost is one pass
    over the rows, not one least-squares problem per fold (the same solutions as
    ``np.linalg.lstsq`` on the rows, to rounding: ``tests/test_surge_forecast.py`` checks
    them against it).

    Returns
    -------
    centre, scale : ndarray
        The fit to all rows.
    scored : dict
        ``{fold: (centre, scale)}`` of the fits to each fold's complement, for the folds
        with a complement of at least 100 rows and rows of their own.
    """
    members = [fold == f for f in range(folds)]
    gram_a = np.array([A[m].T @ A[m] for m in members])
    rhs_a = np.array([A[m].T @ y[m] for m in members])
    gram_b = np.array([B[m].T @ B[m] for m in members])
    sizes = np.array([int(m.sum()) for m in members])
    fitted = [f for f in range(folds) if len(y) - sizes[f] >= 100 and sizes[f] > 0]
    centres = [_solve(gram_a.sum(0) - gram_a[f], rhs_a.sum(0) - rhs_a[f]) for f in fitted]
    centres.append(_solve(gram_a.sum(0), rhs_a.sum(0)))
    spread = np.abs(y[:, None] - A @ np.column_stack(centres))      # |y - A c| for every centre
    rhs_b = np.array([B[m].T @ spread[m] for m in members])         # (folds, columns of B, centres)
    scored = {}
    for j, f in enumerate(fitted):
        scale = _solve(gram_b.sum(0) - gram_b[f], rhs_b[:, :, j].sum(0) - rhs_b[f, :, j])
        scored[f] = (centres[j], scale)
    return centres[-1], _solve(gram_b.sum(0), rhs_b[:, :, -1].sum(0)), scored


#: Largest condition number of a normal-equations matrix solved directly (about 1e-4 of the
#: float64 precision left); above it the minimum-norm solution is taken.
_MAX_CONDITION = 1e12


def _solve(gram: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """The least-squares coefficients from the normal equations ``gram x = rhs`` (the
    minimum-norm solution where the columns are dependent, as ``lstsq`` on the rows)."""
    if np.linalg.cond(gram) < _MAX_CONDITION:
        return np.linalg.solve(gram, rhs)
    return np.linalg.lstsq(gram, rhs, rcond=None)[0]


def unconditioned_quantiles(residual_grid: pd.Series, lead_s: float, coverage: float = 0.90) -> tuple | None:
    """Today's unconditioned spread: the ``(1 -+ coverage)/2`` quantiles of ``r(t + lead) - r(t)``
    over every t of the history [m], or None with fewer than 100 such pairs.

    References
    ----------
    Hyndman & Fan (1996), type 7 quantiles (numpy's default).
    """
    vals = np.asarray(residual_grid, dtype=float)
    steps = int(round(max(0.0, lead_s) / GRID_S))
    if steps >= len(vals):
        return None
    diff = vals[steps:] - vals[:len(vals) - steps] if steps > 0 else np.zeros(np.isfinite(vals).sum())
    finite = np.isfinite(diff)
    if np.count_nonzero(finite) < 100:
        return None
    q = type7_quantiles(diff, finite, ((1 - coverage) / 2, (1 + coverage) / 2))
    return float(q[0]), float(q[1])


def spread_table(residual_grid: pd.Series | np.ndarray, steps: int, coverage: float = 0.90) -> np.ndarray:
    """:func:`unconditioned_quantiles` at every lead of ``0 .. steps`` grid steps.

    Returns
    -------
    ndarray, shape (steps + 1, 2)
        Row k: the lower and upper quantile [m] at a lead of ``k * GRID_S`` seconds; NaN
        where the history holds fewer than 100 pairs that far apart.
    """
    vals = np.asarray(residual_grid, dtype=float)
    table = np.full((steps + 1, 2), np.nan)
    for k in range(steps + 1):
        q = unconditioned_quantiles(vals, k * GRID_S, coverage)
        if q is not None:
            table[k] = q
    return table


#: Below this many values :func:`type7_quantiles` hands them straight to numpy.
_SELECT_MIN = 4096
#: Every how many values the pre-filter's sample takes one, and the margin of probability
#: [1] either side of each quantile that its window of candidates spans.
_SELECT_SAMPLE, _SELECT_MARGIN = 64, 0.02


def type7_quantiles(values: np.ndarray, finite: np.ndarray, probs: tuple[float, ...]) -> np.ndarray:
    """``np.quantile(values[finite], probs)`` (linear interpolation, Hyndman & Fan type 7),
    the same to the last bit, at a fraction of its cost on long arrays.

    Each quantile interpolates two neighbouring order statistics. They are found among the
    few values inside a window around the quantile, bounded by quantiles of a regular
    sample of one value in ``_SELECT_SAMPLE`` widened by ``_SELECT_MARGIN``; the window is
    checked to hold both, else numpy runs on all values. The interpolation is numpy's own,
    on the two order statistics: ``np.quantile([a, b], g)`` with ``g`` the fraction of the
    position ``(n - 1) p`` (numpy's virtual index for two values is ``g`` itself, so its
    weights are the same).

    Parameters
    ----------
    values : ndarray
        Values [any unit], NaN allowed where ``finite`` is False.
    finite : ndarray of bool
        Which values count.
    probs : tuple of float
        Probabilities [1] in [0, 1].
    """
    n = int(np.count_nonzero(finite))
    sample = values[::_SELECT_SAMPLE]
    sample = sample[np.isfinite(sample)]
    if n < _SELECT_MIN or len(sample) < _SELECT_MIN // _SELECT_SAMPLE or np.isinf(values).any():
        return np.quantile(values[finite], probs)
    edges = np.quantile(sample, [min(max(p + m, 0.0), 1.0) for p in probs for m in (-_SELECT_MARGIN, _SELECT_MARGIN)])
    out = np.empty(len(probs))
    for i, p in enumerate(probs):
        out[i] = _type7_in_window(values, finite, n, p, edges[2 * i], edges[2 * i + 1])
    return out


def _type7_in_window(values: np.ndarray, finite: np.ndarray, n: int, p: float, low: float, high: float) -> float:
    """One type 7 quantile from the candidates between ``low`` and ``high`` (see
    :func:`type7_quantiles`), or numpy on every value when they do not hold it."""
    position = (n - 1) * p
    j = int(math.floor(position))
    below = int(np.count_nonzero(values < low))
    inside = values[(values >= low) & (values <= high)]
    if not (below <= j and j + 1 < below + len(inside)) or j + 1 >= n:
        return float(np.quantile(values[finite], p))
    pair = np.partition(inside, (j - below, j + 1 - below))[[j - below, j + 1 - below]]
    return float(np.quantile(pair, position - math.floor(position)))


# --------------------------------------------------------------------------- when to learn again

#: Least data time between two learns [s] (the daemon's ``HISTORY_REFRESH`` passes its own).
RELEARN_MIN_S = 6 * 3600
#: In calm weather a learnt forecaster stands for this much data time per year of history it
#: learnt from [s]: the data new since then is at most 1/365 of what it learnt from.
RELEARN_PER_YEAR_S = 86400


def relearn_due(forecaster: "SurgeForecaster", since_s: float, storm_seen: bool,
                least_s: float = RELEARN_MIN_S) -> bool:
    """Whether a learnt forecaster should learn again from the history.

    A learn reads and fits the whole history (three years: about 1.5 s of CPU, two thirds of
    it the store's read), so it comes after more than ``least_s`` of new data at the soonest,
    and in calm weather once the new data reaches a day per year of history
    (:data:`RELEARN_PER_YEAR_S`). What it would change is bounded by that share: the new high
    waters are 1/365 of those learnt from, so a conformal quantile moves by about that share
    of its order statistics (about 0.3 percentage point of coverage; more in the storm cells,
    which hold fewer scores, when the new days held a storm) plus what the new pairs move the
    coefficients by (``tests/test_forecast_relearn.py`` measures it with a storm in the new
    days, against a learn on all the data).

    A storm in progress on a station that has not yet learnt a conditioned model (too few
    storms) brings the learn back every ``least_s``: this storm may be the one that makes up
    the count, and its skew surges should enter at once.

    Parameters
    ----------
    forecaster : SurgeForecaster
        The forecaster in use.
    since_s : float
        Data time since it learnt [s].
    storm_seen : bool
        Storm conditions were seen since it learnt.
    least_s : float
        Least data time between two learns [s].
    """
    if since_s <= least_s:
        return False
    if storm_seen and forecaster.models.get(False) is None:
        return True
    return since_s >= forecaster.history_days / 365.25 * RELEARN_PER_YEAR_S


# --------------------------------------------------------------------------- forecasting

@dataclass
class SurgeForecaster:
    """What the station's history teaches about how its surges change.

    Build it with :meth:`learn` from the history; :meth:`forecast` then forecasts a high water.
    ``models[False]`` ignores pressure, ``models[True]`` uses the pressure tendency; either is
    None when the history holds fewer than ``min_storms`` storms (with a barometer, for the
    second), and then the wide rule of thumb gives the range.

    It keeps what its forecasts use and no history: the two fitted models and, for the wide
    rule, ``spread``, the unconditioned quantiles of the residual's change at each lead
    (:func:`spread_table`, from the history's residual rounded to float32 as the grid was
    kept before, so the forecasts are the same). A daemon following hundreds of stations
    keeps one per station: with three years of history the full grid was 0.6 MiB of it,
    the table is 2.4 KiB (``benchmarks/bench_forecast.py`` measures it).
    """

    spread: np.ndarray | None
    models: dict
    storms: int
    storms_with_pressure: int
    min_storms: int
    history_days: float
    coverage: float = 0.90
    min_history_days: float = 14.0

    @classmethod
    def learn(cls, residual_grid: pd.Series, skew: pd.DataFrame | None, pressure_grid: pd.Series | None = None,
              min_storms: int = 20, coverage: float = 0.90, min_history_days: float = 14.0,
              max_lead_h: float = MAX_LEAD_H) -> "SurgeForecaster":
        """Learn from a history: smoothed residual on the grid [m], skew surges of its cycles,
        pressure on the grid [hPa] (optional).

        ``max_lead_h`` [h] is the longest lead the wide rule's spread is kept for (at least
        ``MAX_LEAD_H``); a longer lead takes the spread of the longest kept.
        """
        g = residual_grid
        days = 0.0 if len(g.dropna()) < 2 else (g.dropna().index[-1] - g.dropna().index[0]).total_seconds() / 86400
        storms = count_storms(g)
        with_p = 0
        if pressure_grid is not None and len(pressure_grid.dropna()):
            with_p = count_storms(g, np.isfinite(pressure_grid.reindex(g.index).to_numpy(dtype=float)))
        models = {False: None, True: None}
        if storms >= min_storms and skew is not None and len(skew):
            pairs = training_pairs(g, skew, pressure_grid)
            models[False] = fit_spread(pairs, pressure=False, coverage=coverage)
            if with_p >= min_storms:
                models[True] = fit_spread(pairs, pressure=True, coverage=coverage)
        spread = None
        if days >= min_history_days:
            steps = int(math.ceil(max(max_lead_h, MAX_LEAD_H) * 3600 / GRID_S))
            spread = spread_table(g.to_numpy(dtype=np.float32), steps, coverage)
        return cls(spread=spread, models=models, storms=storms, storms_with_pressure=with_p,
                   min_storms=min_storms, history_days=days, coverage=coverage, min_history_days=min_history_days)

    def ranges(self, lead_h, residual, rate, tendency=None) -> tuple:
        """The forecast change ``y = skew surge - residual now`` for many states at once.

        Returns
        -------
        lower, centre, upper : arrays [m]
            Add them to the persistence forecast (predicted high water + residual now).
        conditioned : array of bool
            True where the conditioned method gave the range, False where the wide rule did.
        pressure : array of bool
            True where the pressure tendency was used.
        """
        lead = np.atleast_1d(np.asarray(lead_h, dtype=float))
        r = np.broadcast_to(np.asarray(residual, dtype=float), lead.shape).copy()
        q = np.broadcast_to(np.asarray(rate, dtype=float), lead.shape).copy()
        tn = np.broadcast_to(np.asarray(np.nan if tendency is None else tendency, dtype=float), lead.shape).copy()
        lo = np.full(lead.shape, np.nan)
        hi = lo.copy()
        c = np.zeros(lead.shape)
        with_p = np.isfinite(tn) & (self.models.get(True) is not None)
        for use_p in (False, True):
            model = self.models.get(use_p)
            m = (with_p == use_p) & np.isfinite(q)
            if model is None or not m.any():
                continue
            lo[m], c[m], hi[m] = model.predict(lead[m], r[m], q[m], tn[m] if use_p else None)
        conditioned = np.isfinite(lo) & np.isfinite(hi)
        c[~conditioned] = 0.0
        wide = ~conditioned
        if wide.any():
            base_lo, base_hi = self._base(lead[wide])
            w = K_RESIDUAL * np.abs(r[wide]) + np.where(np.isfinite(q[wide]), np.abs(q[wide]), UNKNOWN_RATE) * lead[wide]
            lo[wide], hi[wide] = base_lo - w, base_hi + w
        return lo, c, hi, conditioned, with_p & conditioned

    def _base(self, lead_h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Today's unconditioned spread at each lead (the nearest grid step's, from
        ``spread``), or the fixed rule-of-thumb spread without enough history."""
        if self.spread is None:
            return (np.full(len(lead_h), -NO_HISTORY_HALF_WIDTH), np.full(len(lead_h), NO_HISTORY_HALF_WIDTH))
        keys = np.rint(np.asarray(lead_h) * 3600 / GRID_S).astype(int)
        rows = self.spread[np.minimum(np.maximum(keys, 0), len(self.spread) - 1)]
        known = np.isfinite(rows).all(axis=1)
        lo = np.where(known, rows[:, 0], -NO_HISTORY_HALF_WIDTH)
        hi = np.where(known, rows[:, 1], NO_HISTORY_HALF_WIDTH)
        return lo, hi

    def forecast(self, state: StormState, hw_t: float, hw_level: float) -> dict:
        """Forecast one high water from the state now.

        Parameters
        ----------
        state : StormState
        hw_t, hw_level : float
            Time [Unix s] and level [m, station datum] of the predicted high water.

        Returns
        -------
        dict
            ``hw_t, made_t, predicted_high, residual_now, rate, tendency, forecast, lower, upper,
            coverage, persistence, rising, method, note, pressure_note``: levels [m, station
            datum]; ``forecast`` the centre; ``persistence`` the predicted high water plus the
            residual now; ``rising`` the same with the residual rising at its current rate
            until the high water (None unless rising); ``method`` ``"conditioned"`` or ``"wide"``.
        """
        lead_h = max(0.0, float(hw_t) - float(state.t)) / 3600.0
        r = float(state.residual)
        persistence = float(hw_level) + r
        rising = persistence + state.rate * lead_h if math.isfinite(state.rate) and state.rate > 0 else None
        lo, c, hi, conditioned, used_p = self._range_one(lead_h, r, float(state.rate), float(state.tendency))
        if conditioned:
            note = self._conditioned_note(state, lead_h, used_p)
        else:
            note = self._wide_note(state, lead_h)
        return {"hw_t": int(round(hw_t)), "made_t": int(round(state.t)), "predicted_high": float(hw_level),
                "residual_now": r, "rate": _finite(state.rate), "tendency": _finite(state.tendency),
                "forecast": persistence + c, "lower": persistence + lo,
                "upper": persistence + hi, "coverage": self.coverage, "persistence": persistence,
                "rising": rising, "method": "conditioned" if conditioned else "wide", "note": note,
                "pressure_note": self._pressure_note(state)}

    def _range_one(self, lead_h: float, r: float, rate: float,
                   tendency: float) -> tuple[float, float, float, bool, bool]:
        """:meth:`ranges` of one state at one lead, the same floats: the daemon forecasts one
        high water at a time, and :meth:`ranges` on one-element arrays is mostly numpy's
        overhead. A conditioned model is asked as :meth:`ranges` asks it (one-element arrays,
        its matrix products unchanged); the wide rule's arithmetic is elementwise, so plain
        floats give numpy's results to the bit (``tests/test_surge_forecast.py`` compares
        the two on random states).

        Returns
        -------
        lower, centre, upper : float [m]
        conditioned, pressure : bool
        """
        use_p = math.isfinite(tendency) and self.models.get(True) is not None
        model = self.models.get(use_p)
        if model is not None and math.isfinite(rate):
            lo, c, hi = model.predict(np.array([lead_h]), np.array([r]), np.array([rate]),
                                      np.array([tendency]) if use_p else None)
            lo0, c0, hi0 = float(lo[0]), float(c[0]), float(hi[0])
            if math.isfinite(lo0) and math.isfinite(hi0):
                return lo0, c0, hi0, True, use_p
        base_lo, base_hi = self._base_one(lead_h)
        w = K_RESIDUAL * abs(r) + (abs(rate) if math.isfinite(rate) else UNKNOWN_RATE) * lead_h
        return base_lo - w, 0.0, base_hi + w, False, False

    def _base_one(self, lead_h: float) -> tuple[float, float]:
        """:meth:`_base` at one lead [h] (``round`` rounds half to even as ``np.rint``)."""
        if self.spread is None:
            return -NO_HISTORY_HALF_WIDTH, NO_HISTORY_HALF_WIDTH
        if not math.isfinite(lead_h):  # no lead in the table's terms: numpy's own casting
            lo, hi = self._base(np.array([lead_h]))
            return float(lo[0]), float(hi[0])
        key = min(max(round(lead_h * 3600 / GRID_S), 0), len(self.spread) - 1)
        lo, hi = self.spread[key].tolist()
        if math.isfinite(lo) and math.isfinite(hi):
            return lo, hi
        return -NO_HISTORY_HALF_WIDTH, NO_HISTORY_HALF_WIDTH

    def _wide_note(self, state: StormState, lead_h: float) -> str:
        if self.storms < self.min_storms:
            why = (f"only {self.storms} storm{'s' if self.storms != 1 else ''} in {self.history_days:.0f} days "
                   f"of this station's history ({self.min_storms} needed to learn how its surges change)")
        elif not math.isfinite(state.rate):
            why = "the residual's rate over the last 3 h is unknown (a gap in the record)"
        else:
            why = "too few past cases like this one (lead time and storm state) in the history"
        enough = self.history_days >= self.min_history_days
        spread = ("the usual spread of the residual's change over this lead time" if enough else
                  f"+-{NO_HISTORY_HALF_WIDTH:.2f} m (too little history for its usual spread)")
        return (f"WIDE RANGE, a rule of thumb and not a measured one: {why}. The range is {spread}, widened "
                f"both ways by half the surge now plus its 3-hour rate kept for the whole {lead_h:.1f} h; "
                f"centre = predicted high water + the surge now, held")

    def _conditioned_note(self, state: StormState, lead_h: float, use_p: bool) -> str:
        parts = [f"surge {state.residual:+.2f} m", f"{'rising' if state.rate >= 0 else 'falling'} "
                 f"{abs(state.rate):.2f} m/h over 3 h"]
        if use_p:
            parts.append(f"pressure {'falling' if state.tendency < 0 else 'rising'} {abs(state.tendency):.1f} hPa/h")
        kind = "storm" if state.storm else "calm"
        return (f"{self.coverage:.0%} range for a {lead_h:.1f} h lead, conditioned on the state now "
                f"({', '.join(parts)}; a {kind} state): {METHOD_CITATION}, calibrated on "
                f"{self.storms_with_pressure if use_p else self.storms} storms in {self.history_days:.0f} days "
                f"of this station's history")

    @staticmethod
    def _pressure_note(state: StormState) -> str:
        """Said when the station has a barometer but the forecast went without its tendency."""
        if not state.barometer or math.isfinite(state.tendency):
            return ""
        if state.pressure_since is None:
            return "no barometer reading at all: forecast made without the pressure tendency"
        when = pd.Timestamp(state.pressure_since, unit="s", tz="UTC").strftime("%Y-%m-%d %H:%M UTC")
        if state.t - state.pressure_since > 1800:
            return f"barometer silent since {when}: forecast made without the pressure tendency"
        return "no barometer reading from 3 hours ago: forecast made without the pressure tendency"


def _finite(v: float) -> float | None:
    return float(v) if v is not None and math.isfinite(v) else None


# --------------------------------------------------------------------------- store glue

#: Forecasts kept per high water: the first issued in each half-hour of issue time (the
#: daemon issues one at each half hour), so a report can show what was forecast 1, 3 and
#: 6 h before each high water of its day without keeping every pass's forecast.
LOG_SLOT_S = 1800
LOG_COLUMNS = ("hw_t", "made_t", "predicted_high", "residual_now", "rate", "tendency", "forecast", "lower",
               "upper", "coverage", "persistence", "rising", "method", "note", "pressure_note")


def ensure_forecast_schema(db) -> None:
    """Create ``hw_forecast_log`` (every forecast kept, one per high water and half-hour slot)."""
    if "hw_forecast_log" not in db.table_names():
        db["hw_forecast_log"].create({
            "station": str, "hw_t": int, "slot": int, "made_t": int, "predicted_high": float,
            "residual_now": float, "rate": float, "tendency": float, "forecast": float, "lower": float,
            "upper": float, "coverage": float, "persistence": float, "rising": float, "method": str,
            "note": str, "pressure_note": str,
        }, pk=("station", "hw_t", "slot"), if_not_exists=True)
        db["hw_forecast_log"].create_index(["station", "made_t"], if_not_exists=True)


def log_key(fc: dict) -> tuple[int, int]:
    """A forecast's key in ``hw_forecast_log``: (its high water's time [Unix s], the
    half-hour slot it was made in)."""
    return int(fc["hw_t"]), int(fc["made_t"]) // LOG_SLOT_S


def log_forecasts(conn, station: str, forecasts: list[dict]) -> None:
    """Keep forecasts in ``hw_forecast_log`` (the first of each half-hour slot per high water)."""
    rows = [(station, *log_key(fc), *[fc.get(k) for k in LOG_COLUMNS[1:]]) for fc in forecasts]
    if rows:
        conn.executemany(f"INSERT OR IGNORE INTO hw_forecast_log (station, hw_t, slot, {', '.join(LOG_COLUMNS[1:])}) "
                         f"VALUES ({', '.join('?' * (len(LOG_COLUMNS) + 2))})", rows)


def read_log(db, station: str, made_from: int, made_to: int) -> pd.DataFrame:
    """Forecasts issued between two times [Unix s] (inclusive), oldest first."""
    if "hw_forecast_log" not in db.table_names():
        return pd.DataFrame(columns=list(LOG_COLUMNS))
    return pd.read_sql_query(
        f"SELECT {', '.join(LOG_COLUMNS)} FROM hw_forecast_log WHERE station = ? AND made_t BETWEEN ? AND ? "
        "ORDER BY made_t, hw_t", db.conn, params=(station, int(made_from), int(made_to)))


#: The ``GRID_S`` bin of a time column ``t`` [Unix s] in SQL: its start, rounded down (also
#: before 1970, where SQLite's integer division would round towards zero).
_BIN_SQL = f"(t - ((t % {GRID_S}) + {GRID_S}) % {GRID_S})"


#: The kept ten-minute means of the forecaster's history: table -> (the table of the rows they
#: are the means of, the column averaged, which rows count).
_KEPT = {
    "residual_bins": ("derived", "smoothed", "smoothed IS NOT NULL"),
    "pressure_bins": ("observations", "value", "sensor = 'barometer' AND (flag IS NULL OR flag NOT IN (4, 9))"),
}


def ensure_history_bins(db) -> None:
    """Create ``residual_bins`` and ``pressure_bins`` (station, b): the mean smoothed residual
    [m] of each ``GRID_S`` bin starting at ``b`` [Unix s] with a smoothed value in ``derived``,
    and the mean barometer reading [hPa] of each with a usable one (flag not 4 or 9) in
    ``observations``. Each write of those rows makes their bins again in its transaction
    (:func:`rebin_residual`, :func:`rebin_pressure`), so :func:`read_history` reads three
    years as 160,000 kept means, not 1.6 million rows to group. ``db``: a
    ``sqlite_utils.Database`` or a ``sqlite3.Connection``."""
    for table in _KEPT:
        db.execute(f"CREATE TABLE IF NOT EXISTS {table} (station TEXT NOT NULL, b INTEGER NOT NULL, "
                   "mean REAL NOT NULL, PRIMARY KEY (station, b)) WITHOUT ROWID")


def rebin_all(conn) -> None:
    """Make ``residual_bins`` and ``pressure_bins`` again for every station from the rows
    stored (:data:`monitor.store.migrations.MIGRATIONS` 6, and the first open by a daemon
    after a store was upgraded by another program: see :meth:`Store._migrate
    <monitor.store.database.Store._migrate>`).

    Parameters
    ----------
    conn : sqlite3.Connection
        The store, inside the caller's write transaction.
    """
    for (station,) in conn.execute("SELECT DISTINCT station FROM derived").fetchall():
        rebin_residual(conn, station)
    for (station,) in conn.execute("SELECT DISTINCT station FROM observations WHERE sensor = 'barometer'").fetchall():
        rebin_pressure(conn, station)


def rebin_residual(conn, station: str, t_lo: int | None = None, t_hi: int | None = None,
                   emptied: bool = True) -> None:
    """Make ``residual_bins`` again for every bin holding a time in ``[t_lo, t_hi]`` [Unix s]
    (all of the station's without bounds) from the ``derived`` rows as stored now: the
    caller's transaction writes them with the rows (:meth:`Store.write_derived_rows
    <monitor.store.database.Store.write_derived_rows>`, the one writer of ``derived`` in this
    program).

    Parameters
    ----------
    conn : sqlite3.Connection
        The store, inside the transaction that wrote the rows.
    station : str
        The station's id.
    t_lo, t_hi : int or None
        The first and last time written [Unix s]; None: every bin of the station.
    emptied : bool
        False when the rows just written all have a smoothed value, so no bin of theirs is
        left without one (none is deleted, the bins are upserted).
    """
    _rebin(conn, "residual_bins", station, t_lo, t_hi, emptied)


def rebin_pressure(conn, station: str, t_lo: int | None = None, t_hi: int | None = None) -> None:
    """Make ``pressure_bins`` again for every bin holding a time in ``[t_lo, t_hi]`` [Unix s]
    (all of the station's without bounds) from the barometer's rows as stored now, in the
    caller's transaction: called by every writer of a barometer's values or flags
    (:meth:`Store.write_batch <monitor.store.database.Store.write_batch>`,
    :func:`monitor.quality.records.set_override`, and :func:`monitor.quality.records.write_rows`
    should quality control ever judge a barometer: today it judges the level sensors only).

    Parameters
    ----------
    conn : sqlite3.Connection
        The store, inside the transaction that wrote the readings or their flags.
    station : str
        The station's id.
    t_lo, t_hi : int or None
        The first and last time written [Unix s]; None: every bin of the station.
    """
    _rebin(conn, "pressure_bins", station, t_lo, t_hi, True)


def _rebin(conn, table: str, station: str, t_lo: int | None, t_hi: int | None, emptied: bool) -> None:
    source, column, usable = _KEPT[table]
    span_b = span_t = ""
    args: tuple = (station,)
    if t_lo is not None and t_hi is not None:  # the bins holding a time in [t_lo, t_hi], whole
        g = GRID_S
        span_b, span_t = " AND b BETWEEN ? AND ?", " AND t BETWEEN ? AND ?"
        args = (station, int(t_lo) // g * g, int(t_hi) // g * g + g - 1)
    if emptied:
        conn.execute(f"DELETE FROM {table} WHERE station = ?{span_b}", args)
    conn.execute(f"INSERT OR REPLACE INTO {table} (station, b, mean) SELECT station, {_BIN_SQL} AS b, avg({column}) "
                 f"FROM {source} WHERE station = ? AND {usable}{span_t} GROUP BY b", args)


def read_history(conn, station: str, start: int, end: int, barometer: bool = False) -> tuple:
    """The forecaster's history from the store: the smoothed residual and (with a barometer)
    the usable pressure readings as ``GRID_S`` means on one regular grid, and the skew surges.

    Parameters
    ----------
    conn : sqlite3.Connection
        The store.
    station : str
        The station's id.
    start, end : int
        The history's first and last times [Unix s], both included (a bin cut by either
        holds the means of its times inside).
    barometer : bool
        Whether to read the barometer's pressure [hPa] too.

    Returns
    -------
    tuple
        The smoothed residual [m] on the grid (NaN where a bin has none), the skew surges
        (``hw_t`` [Unix s], ``skew_surge`` [m]) and the pressure on the same grid (None
        without a barometer or readings).

    Notes
    -----
    The whole bins are the means kept in ``residual_bins`` and ``pressure_bins``; the two
    bins cut by ``start`` and ``end`` are grouped from the rows.
    """
    g = GRID_S
    own = not conn.in_transaction  # the reads of one snapshot: no other writer's commit between them
    if own:
        conn.execute("BEGIN")
    try:
        resid = _series(_kept_means(conn, "residual_bins", station, int(start), int(end)))
        skew = pd.DataFrame(conn.execute("SELECT hw_t, skew_surge FROM skew_surges WHERE station = ? AND hw_t "
                                         "BETWEEN ? AND ? ORDER BY hw_t", (station, int(start), int(end))).fetchall(),
                            columns=["hw_t", "skew_surge"])
        p = _series(_kept_means(conn, "pressure_bins", station, int(start), int(end))) if barometer else None
    finally:
        if own and conn.in_transaction:
            conn.execute("COMMIT")
    if resid.empty:
        return resid, skew, None
    grid = pd.date_range(resid.index[0], resid.index[-1], freq=f"{g}s")
    resid = resid.reindex(grid)
    pressure = p.reindex(grid) if p is not None and len(p) else None
    return resid, skew, pressure


def _kept_means(conn, table: str, station: str, start: int, end: int) -> list[tuple]:
    """(bin start [Unix s], mean) of every bin of ``table``'s series with a value in
    ``[start, end]``, in time order: the whole bins as kept, the cut ones grouped."""
    g = GRID_S
    source, column, usable = _KEPT[table]
    first, last = -(-start // g) * g, (end + 1) // g * g - g  # the first and last whole bins
    cut = (f"SELECT {_BIN_SQL} AS b, avg({column}) FROM {source} WHERE station = ? AND {usable} "
           "AND t BETWEEN ? AND ? GROUP BY b ORDER BY b")
    if first > last:
        return conn.execute(cut, (station, start, end)).fetchall()
    rows = conn.execute(cut, (station, start, first - 1)).fetchall() if start < first else []
    rows += conn.execute(f"SELECT b, mean FROM {table} WHERE station = ? AND b BETWEEN ? AND ? ORDER BY b",
                         (station, first, last)).fetchall()
    if last + g <= end:
        rows += conn.execute(cut, (station, last + g, end)).fetchall()
    return rows


def _series(rows: list[tuple]) -> pd.Series:
    """(bin start [Unix s], mean) rows as a Series on UTC times."""
    if not rows:
        return pd.Series(dtype=float)
    t = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
    v = np.fromiter((r[1] for r in rows), dtype=float, count=len(rows))
    return pd.Series(v, index=pd.to_datetime(t, unit="s", utc=True))
