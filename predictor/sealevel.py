"""Is the sea rising here: mean sea levels and their linear trend from a station's own record.

- :func:`mean_sea_levels`: daily, monthly and annual means from quality-controlled samples, each
  only from enough data (the rule is in :data:`COMPLETENESS_RULE`, with its source).
- :func:`sea_level_trend`: the linear trend of the monthly means in mm/year, with a standard
  error that accounts for their serial correlation: generalised least squares with AR(1)
  errors whose correlation is estimated by restricted maximum likelihood. The seasonal cycle
  (annual and semiannual) is fitted alongside; the 18.61-year nodal term is fitted (and so
  removed from the trend, and shown) when the record spans a nodal cycle, and otherwise left in
  with a note; known datum steps are either corrected (an offset per step estimated in the same
  fit) or split the record into segments with a trend each, and the result says which.
- :func:`stationary_levels`: levels with the trend taken out and the datum steps corrected, as
  the sea would have stood at one epoch: the input the extreme-value fits need
  (:mod:`predictor.extremes`).

Pure functions on pandas Series with a UTC DatetimeIndex (naive taken as UTC), levels in metres.
The output is an automated, unofficial aid: published sea-level assessments and the local
authorities come first.

References
----------
Pugh, D., Woodworth, P. (2014). Sea-Level Science. Cambridge University Press, ch. 10 (mean sea
level, the nodal term, trends) and ch. 3 (datum control).
Prais, S. J., Winsten, C. B. (1954). Trend estimators and serial correlation. Cowles Commission
Discussion Paper 383 (the AR(1) transform, here generalised to gaps with phi = rho^lag).
Patterson, H. D., Thompson, R. (1971). Recovery of inter-block information when block sizes are
unequal. Biometrika 58 (restricted maximum likelihood).
Zervas, C. (2009). Sea Level Variations of the United States 1854-2006. NOAA Technical Report
NOS CO-OPS 053 (monthly mean trends with an AR(1) error model; from memory).
Holgate, S. J., et al. (2013). New data systems and products at the Permanent Service for Mean
Sea Level. Journal of Coastal Research 29 (monthly and annual means; completeness, from memory).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import optimize, stats

from predictor.astro import astronomical_arguments
from predictor.errors import PredictorError

__all__ = [
    "SeaLevelError", "MeanSeaLevels", "TrendResult", "mean_sea_levels", "sea_level_trend",
    "stationary_levels", "stationary_shift_se", "COMPLETENESS_RULE", "NODAL_PERIOD_YEARS",
]

SECONDS_PER_YEAR = 365.25 * 86400.0
NODAL_PERIOD_YEARS = 18.61
#: Hours of a UTC day that must hold a QC-passed sample for the day to count.
MIN_HOURS = 24
#: Days of a month that must count for the month to count.
MIN_DAYS = 15
#: Months of a year that must count for the year to count.
MIN_MONTHS = 11
#: Monthly means fewer than this give no trend.
MIN_MONTHS_FOR_TREND = 24
#: A trend over fewer years than this gets a note (decadal variability, common practice).
SHORT_TREND_YEARS = 30.0

COMPLETENESS_RULE = (
    "A day counts when each of its 24 UTC hours holds at least one QC-passed sample (its mean is "
    "the mean of the 24 hourly means: a missing hour would bias a day's mean by the tide of that "
    "hour; common practice, no source). A month counts when at least 15 of its days count, its "
    "mean the mean of those days (the Permanent Service for Mean Sea Level's rule as remembered, "
    "Holgate et al. 2013; from memory). A year counts when at least 11 of its months count, its "
    "mean the mean of those months (common practice, no source)."
)


class SeaLevelError(PredictorError):
    """Input the sea-level functions cannot use; the message says what is wrong."""


# ============================================================================ means
@dataclass
class MeanSeaLevels:
    """Daily, monthly and annual means.

    Attributes
    ----------
    daily : pandas.DataFrame
        Index: day (UTC midnight); ``mean`` [m], ``hours`` (hours with data).
    monthly : pandas.DataFrame
        Index: month start (UTC); ``mean`` [m], ``days`` (days that count).
    annual : pandas.DataFrame
        Index: year; ``mean`` [m], ``months`` (months that count).
    rule : str
        The completeness rule in words, with its sources.
    """

    daily: pd.DataFrame
    monthly: pd.DataFrame
    annual: pd.DataFrame
    rule: str


def mean_sea_levels(levels: pd.Series, min_hours: int = MIN_HOURS, min_days: int = MIN_DAYS,
                    min_months: int = MIN_MONTHS) -> MeanSeaLevels:
    """Daily, monthly and annual means from days with enough QC-passed data.

    Parameters
    ----------
    levels : pandas.Series
        QC-passed levels [m] (leave out samples flagged fail or missing), UTC DatetimeIndex,
        any sampling step (minutes or hours).
    min_hours, min_days, min_months : int
        Completeness rule (see :data:`COMPLETENESS_RULE`): hours of a day [h], days of a month
        and months of a year that must count.

    Returns
    -------
    MeanSeaLevels

    References
    ----------
    Pugh & Woodworth (2014), ch. 10 (mean sea level from hourly values); Holgate et al. (2013)
    (monthly means from at least 15 days; from memory).
    """
    s = _series(levels)
    for name, v, top in (("min_hours", min_hours, 24), ("min_days", min_days, 28),
                         ("min_months", min_months, 12)):
        if not (isinstance(v, (int, np.integer)) and 1 <= v <= top):
            raise SeaLevelError(f"{name} must be a whole number from 1 to {top}, got {v!r}")
    hourly = s.groupby(s.index.floor("h")).mean()
    day = hourly.index.floor("D")
    daily = pd.DataFrame({"mean": hourly.groupby(day).mean(), "hours": hourly.groupby(day).size()})
    daily = daily[daily["hours"] >= min_hours]
    month = _month_start(daily.index)
    monthly = pd.DataFrame({"mean": daily["mean"].groupby(month).mean(),
                            "days": daily["mean"].groupby(month).size()})
    monthly = monthly[monthly["days"] >= min_days]
    year = pd.Index(monthly.index.year, name="year")
    annual = pd.DataFrame({"mean": monthly["mean"].groupby(year).mean(),
                           "months": monthly["mean"].groupby(year).size()})
    annual = annual[annual["months"] >= min_months]
    rule = COMPLETENESS_RULE
    if (min_hours, min_days, min_months) != (MIN_HOURS, MIN_DAYS, MIN_MONTHS):
        rule = (f"A day counts with {min_hours} of 24 hours, a month with {min_days} days, a year "
                f"with {min_months} months (set by the user; the defaults: {COMPLETENESS_RULE})")
    daily.index.name, monthly.index.name = "day", "month"
    return MeanSeaLevels(daily=daily, monthly=monthly, annual=annual, rule=rule)


# ============================================================================ trend
@dataclass
class TrendResult:
    """The linear trend of monthly mean sea level.

    Attributes
    ----------
    rate_mm_per_year, se_mm_per_year : float
        Trend and its standard error (AR(1) generalised least squares) [mm/year].
    lower_mm_per_year, upper_mm_per_year : float
        Confidence interval of the trend [mm/year] (Student t on n - p degrees of freedom).
    confidence : float
        Its coverage [1].
    se_white_mm_per_year : float
        The standard error ordinary least squares would give (white noise) [mm/year], to
        show what serial correlation does.
    rho : float
        Lag-one (one month) autocorrelation of the monthly means' residual [1].
    method : str
        The method in words.
    n_months : int
        Monthly means used.
    start, end : pandas.Timestamp
        First and last month used (month starts, UTC).
    span_years : float
        [year]
    epoch : pandas.Timestamp
        Time at which ``level_at_epoch`` applies (end of the last month, UTC).
    level_at_epoch : float
        Trend line at the epoch [m], on the datum of the last segment.
    nodal : dict or None
        When fitted: ``amplitude_mm``, ``amplitude_se_mm`` and ``phase_deg`` (the term is
        ``A cos(N - phase)``, N the longitude of the Moon's ascending node).
    nodal_note : str
        Whether the nodal term was fitted and removed, or left in, and why.
    step_handling : str
        ``"none"``, ``"corrected"`` or ``"split"``.
    steps : list of dict
        Corrected: ``time``, ``offset_mm`` (the jump up at the step), ``se_mm``.
    segments : list of dict
        Split: ``start``, ``end``, ``rate_mm_per_year``, ``se_mm_per_year``, ``n_months``.
    step_note : str
    notes : list of str
        Everything a reader should know, in words.
    monthly : pandas.DataFrame
        For the chart, index month start: ``mean`` (as given), ``adjusted`` (steps corrected,
        seasonal cycle removed), ``trend`` (the trend line, plus the nodal term when fitted)
        [m].
    covariance : numpy.ndarray or None
        Covariance of (rate [m/year], offset of each step [m]) from the GLS fit (one trend
        with its steps corrected; None for a split record): what
        :func:`stationary_shift_se` propagates.
    """

    rate_mm_per_year: float
    se_mm_per_year: float
    lower_mm_per_year: float
    upper_mm_per_year: float
    confidence: float
    se_white_mm_per_year: float
    rho: float
    method: str
    n_months: int
    start: pd.Timestamp
    end: pd.Timestamp
    span_years: float
    epoch: pd.Timestamp
    level_at_epoch: float
    nodal: dict | None
    nodal_note: str
    step_handling: str
    steps: list = field(default_factory=list)
    segments: list = field(default_factory=list)
    step_note: str = ""
    notes: list = field(default_factory=list)
    monthly: pd.DataFrame | None = field(default=None, repr=False)
    covariance: np.ndarray | None = field(default=None, repr=False)


METHOD = ("generalised least squares with AR(1) errors between monthly means (correlation "
          "rho^lag for months lag apart, so gaps are allowed; Prais & Winsten 1954), rho by "
          "restricted maximum likelihood (Patterson & Thompson 1971); annual and semiannual "
          "cycles fitted alongside")


def sea_level_trend(monthly, datum_steps=(), step_handling: str = "correct", nodal: str = "auto",
                    confidence: float = 0.95) -> TrendResult:
    """Linear trend of monthly mean sea level, with a standard error for serial correlation.

    Parameters
    ----------
    monthly : pandas.Series or DataFrame
        Monthly means [m] indexed by month (a timestamp in the month; ``mean_sea_levels(...)
        .monthly`` or its ``mean`` column).
    datum_steps : sequence of time-like, or DataFrame with a ``time`` column
        Times at which the gauge's datum is known to have stepped (for example the steps
        ``monitor.quality.diagnostics.datum_steps`` found). A step inside a month leaves that month out.
    step_handling : {"correct", "split"}
        ``"correct"``: one trend over the whole record with an offset per step estimated in the
        same fit. ``"split"``: a trend per segment between steps (segments of fewer than 24
        months are left out), and the inverse-variance weighted mean of them.
    nodal : {"auto", "fit", "none"}
        ``"auto"`` fits the 18.61-year nodal term when the record spans at least one nodal
        cycle; ``"fit"`` always; ``"none"`` never.
    confidence : float
        Coverage of the trend's interval [1].

    Returns
    -------
    TrendResult

    References
    ----------
    Prais & Winsten (1954); Patterson & Thompson (1971); Pugh & Woodworth (2014), ch. 10 (the
    nodal term; trends); Zervas (2009) (AR(1) errors for monthly means; from memory).
    """
    y = _monthly_series(monthly)
    if step_handling not in ("correct", "split"):
        raise SeaLevelError(f"step_handling must be 'correct' or 'split', got {step_handling!r}")
    if nodal not in ("auto", "fit", "none"):
        raise SeaLevelError(f"nodal must be 'auto', 'fit' or 'none', got {nodal!r}")
    if not 0.0 < confidence < 1.0:
        raise SeaLevelError(f"confidence must be between 0 and 1, got {confidence!r}")
    steps = _step_times(datum_steps)
    y = _drop_step_months(y, steps)
    if len(y) < MIN_MONTHS_FOR_TREND:
        raise SeaLevelError(f"a trend needs at least {MIN_MONTHS_FOR_TREND} monthly means, got {len(y)}")
    steps = [s for s in steps if y.index[0] < s <= y.index[-1] + pd.offsets.MonthBegin(1)]
    if step_handling == "split" and steps:
        return _split_trend(y, steps, nodal, confidence)
    return _one_trend(y, steps, nodal, confidence)


def _one_trend(y: pd.Series, steps: list, nodal: str, confidence: float) -> TrendResult:
    """One GLS fit: trend, seasonal cycle, optional nodal term, an offset per step."""
    t_mid, epoch, lags = _month_times(y.index)
    span = (t_mid[-1] - t_mid[0]) + 1.0 / 12.0
    fit_nodal = nodal == "fit" or (nodal == "auto" and span >= NODAL_PERIOD_YEARS)
    X, names = _design(y.index, t_mid, steps, fit_nodal)
    g = _gls_ar1(X, y.to_numpy(), lags)
    k = names.index("trend")
    tq = stats.t.ppf(0.5 + confidence / 2.0, g["dof"])
    rate, se = 1e3 * g["beta"][k], 1e3 * g["se"][k]
    res = TrendResult(
        rate_mm_per_year=rate, se_mm_per_year=se, lower_mm_per_year=rate - tq * se,
        upper_mm_per_year=rate + tq * se, confidence=confidence,
        se_white_mm_per_year=1e3 * g["se_white"][k], rho=g["rho"], method=METHOD,
        n_months=len(y), start=y.index[0], end=y.index[-1], span_years=span, epoch=epoch,
        level_at_epoch=float(g["beta"][0]), nodal=None, nodal_note="",
        step_handling="corrected" if steps else "none")
    res.nodal_note = _nodal_result(res, g, names, fit_nodal, span, nodal)
    for j, s in enumerate(steps):
        i = names.index(f"step{j}")
        res.steps.append({"time": s, "offset_mm": 1e3 * g["beta"][i], "se_mm": 1e3 * g["se"][i]})
    idx = [k] + [names.index(f"step{j}") for j in range(len(steps))]
    res.covariance = g["cov"][np.ix_(idx, idx)]
    res.step_note = ("no datum steps given" if not steps else
                     f"corrected: {len(steps)} datum step(s) given; each offset estimated in the trend fit "
                     "and the whole record used on the datum of the last segment")
    res.monthly = _chart_frame(y, X, names, g["beta"], fit_nodal)
    res.notes = _notes(res)
    return res


def _split_trend(y: pd.Series, steps: list, nodal: str, confidence: float) -> TrendResult:
    """A trend per segment between steps, and their inverse-variance weighted mean."""
    edges = [y.index[0] - pd.Timedelta(days=1)] + steps + [y.index[-1] + pd.Timedelta(days=1)]
    parts, skipped = [], []
    for a, b in zip(edges[:-1], edges[1:]):
        seg = y[(y.index >= a) & (y.index < b)]
        if len(seg) < MIN_MONTHS_FOR_TREND:
            skipped.append((a, b, len(seg)))
            continue
        parts.append(_one_trend(seg, [], nodal, confidence))
    if not parts:
        raise SeaLevelError("no segment between the datum steps holds 24 monthly means: no trend")
    w = np.array([1.0 / p.se_mm_per_year ** 2 for p in parts])
    rate = float(np.sum(w * [p.rate_mm_per_year for p in parts]) / w.sum())
    se = float(1.0 / math.sqrt(w.sum()))
    dof = sum(p.n_months for p in parts) - 6 * len(parts)
    tq = stats.t.ppf(0.5 + confidence / 2.0, max(dof, 1))
    last = parts[-1]
    res = TrendResult(
        rate_mm_per_year=rate, se_mm_per_year=se, lower_mm_per_year=rate - tq * se,
        upper_mm_per_year=rate + tq * se, confidence=confidence,
        se_white_mm_per_year=float(1.0 / math.sqrt(sum(1.0 / p.se_white_mm_per_year ** 2 for p in parts))),
        rho=float(np.mean([p.rho for p in parts])), method=METHOD + "; per segment, then weighted",
        n_months=sum(p.n_months for p in parts), start=parts[0].start, end=last.end,
        span_years=sum(p.span_years for p in parts), epoch=last.epoch,
        level_at_epoch=last.level_at_epoch, nodal=last.nodal if len(parts) == 1 else None,
        nodal_note="; ".join(f"segment {p.start:%Y-%m} to {p.end:%Y-%m}: {p.nodal_note}" for p in parts),
        step_handling="split")
    res.segments = [{"start": p.start, "end": p.end, "rate_mm_per_year": p.rate_mm_per_year,
                     "se_mm_per_year": p.se_mm_per_year, "n_months": p.n_months} for p in parts]
    res.step_note = (f"split: the record is cut at {len(steps)} datum step(s) and a trend fitted to each "
                     f"of {len(parts)} segment(s); the rate is their inverse-variance weighted mean")
    if skipped:
        res.step_note += "; left out, too short: " + ", ".join(f"{n} months" for *_, n in skipped)
    res.monthly = pd.concat([p.monthly for p in parts])
    res.notes = _notes(res)
    return res


def _design(index: pd.DatetimeIndex, t: np.ndarray, steps: list, fit_nodal: bool):
    """Design matrix: mean, trend [m/year], annual and semiannual cycles, nodal, steps."""
    cols = [np.ones_like(t), t]
    names = ["mean", "trend"]
    for k, nm in ((1, "annual"), (2, "semiannual")):
        cols += [np.cos(2 * np.pi * k * t), np.sin(2 * np.pi * k * t)]
        names += [f"{nm}_cos", f"{nm}_sin"]
    if fit_nodal:
        N = _node_longitude(index)
        cols += [np.cos(N), np.sin(N)]
        names += ["nodal_cos", "nodal_sin"]
    mid = index + pd.Timedelta(days=15)
    for j, s in enumerate(steps):
        # 1 after the step; levels after it are on the last datum, so offsets are jumps up
        cols.append((mid >= s).astype(float))
        names.append(f"step{j}")
    X = np.column_stack(cols)
    # the intercept at the epoch on the last datum: step columns measured from the end
    for j in range(len(steps)):
        X[:, names.index(f"step{j}")] -= 1.0
    return X, names


def _gls_ar1(X: np.ndarray, y: np.ndarray, lags: np.ndarray, rho: float | None = None) -> dict:
    """GLS with AR(1) errors for irregularly spaced months; rho by REML unless given.

    The transform e_1 = x_1, e_i = (x_i - phi_i x_(i-1)) / sqrt(1 - phi_i^2), phi_i =
    rho^lag_i, whitens a stationary AR(1) sampled at whole months (exactly, gaps included),
    so GLS is ordinary least squares on the transformed rows. The scale is the transformed
    residual sum of squares over n - p, as for any weighted regression.

    Returns dict with ``beta``, ``se``, ``cov``, ``se_white``, ``rho``, ``dof``.
    """
    n, p = X.shape
    if n <= p + 2:
        raise SeaLevelError(f"too few monthly means ({n}) for {p} terms")
    if np.linalg.matrix_rank(X) < p:
        raise SeaLevelError("the trend terms cannot be separated (a segment between steps holds no "
                            "month, or the record is too short for the terms asked)")

    def whiten(r):
        phi = r ** lags
        scale = np.sqrt(1.0 - phi * phi)
        Xw = np.vstack([X[:1], (X[1:] - phi[:, None] * X[:-1]) / scale[:, None]])
        yw = np.concatenate([y[:1], (y[1:] - phi * y[:-1]) / scale])
        return Xw, yw, 2.0 * np.sum(np.log(scale))

    def reml(r):
        Xw, yw, logdet = whiten(r)
        beta, *_ = np.linalg.lstsq(Xw, yw, rcond=None)
        rss = float(np.sum((yw - Xw @ beta) ** 2))
        _, logdet_x = np.linalg.slogdet(Xw.T @ Xw)
        return (n - p) * math.log(rss / (n - p)) + logdet + logdet_x

    if rho is None:
        rho = float(optimize.minimize_scalar(reml, bounds=(-0.9, 0.995), method="bounded",
                                             options={"xatol": 1e-6}).x)
    Xw, yw, _ = whiten(rho)
    beta, *_ = np.linalg.lstsq(Xw, yw, rcond=None)
    dof = n - p
    scale = float(np.sum((yw - Xw @ beta) ** 2)) / dof
    cov = scale * np.linalg.inv(Xw.T @ Xw)
    b_ols, *_ = np.linalg.lstsq(X, y, rcond=None)
    cov_ols = float(np.sum((y - X @ b_ols) ** 2)) / dof * np.linalg.inv(X.T @ X)
    return {"beta": beta, "se": np.sqrt(np.diag(cov)), "cov": cov,
            "se_white": np.sqrt(np.diag(cov_ols)), "rho": rho, "dof": dof}


def _nodal_result(res: TrendResult, g: dict, names: list, fitted: bool, span: float, nodal: str) -> str:
    if not fitted:
        if nodal == "none":
            return "nodal term not fitted (asked not to); its few millimetres stay in the trend"
        return (f"nodal term left in: the record spans {span:.1f} years, less than one nodal cycle "
                f"({NODAL_PERIOD_YEARS} years), so the 18.61-year term cannot be told from the trend; "
                "it can bias a short trend by up to about 2 pi A / 18.61 per year for an amplitude A")
    i, j = names.index("nodal_cos"), names.index("nodal_sin")
    a, b = g["beta"][i], g["beta"][j]
    amp = math.hypot(a, b)
    grad = np.array([a, b]) / amp if amp > 0 else np.zeros(2)
    cov = g["cov"][np.ix_([i, j], [i, j])]
    res.nodal = {"amplitude_mm": 1e3 * amp, "amplitude_se_mm": 1e3 * math.sqrt(grad @ cov @ grad),
                 "phase_deg": math.degrees(math.atan2(b, a)) % 360.0}
    return (f"nodal term fitted and removed from the trend: the record spans {span:.1f} years "
            f"(at least one nodal cycle, {NODAL_PERIOD_YEARS} years); amplitude "
            f"{res.nodal['amplitude_mm']:.1f} +- {res.nodal['amplitude_se_mm']:.1f} mm")


def _chart_frame(y, X, names, beta, fit_nodal) -> pd.DataFrame:
    seasonal = [i for i, n in enumerate(names) if n.startswith(("annual", "semiannual"))]
    stepcols = [i for i, n in enumerate(names) if n.startswith("step")]
    adjusted = y.to_numpy() - X[:, seasonal] @ beta[seasonal] - X[:, stepcols] @ beta[stepcols]
    keep = [names.index("mean"), names.index("trend")]
    if fit_nodal:
        keep += [names.index("nodal_cos"), names.index("nodal_sin")]
    return pd.DataFrame({"mean": y.to_numpy(), "adjusted": adjusted, "trend": X[:, keep] @ beta[keep]},
                        index=y.index)


def _notes(res: TrendResult) -> list:
    notes = [f"Trend {res.rate_mm_per_year:.2f} +- {res.se_mm_per_year:.2f} mm/year (standard error), "
             f"{res.confidence:.0%} interval {res.lower_mm_per_year:.2f} to {res.upper_mm_per_year:.2f} "
             f"mm/year, from {res.n_months} monthly means over {res.span_years:.1f} years.",
             f"Method: {res.method}; lag-one correlation of monthly means {res.rho:.2f} (white noise "
             f"would claim +- {res.se_white_mm_per_year:.2f} mm/year).",
             res.nodal_note, res.step_note]
    if res.span_years < SHORT_TREND_YEARS:
        notes.append(f"The record spans {res.span_years:.1f} years: a trend over fewer than about "
                     f"{SHORT_TREND_YEARS:.0f} years carries decadal variability that an AR(1) error "
                     "model does not represent, so its real uncertainty is larger (common practice, no source).")
    return notes


# ============================================================================ stationary levels
def stationary_levels(levels: pd.Series, trend: TrendResult, epoch=None) -> pd.Series:
    """Levels as the sea would have stood at ``epoch``: trend removed, datum steps corrected.

    Parameters
    ----------
    levels : pandas.Series
        Levels [m], UTC DatetimeIndex (for example the hourly record for annual maxima).
    trend : TrendResult
        From :func:`sea_level_trend` with the steps corrected (a split record has no offsets
        between its segments and is refused).
    epoch : time-like, optional
        Default the trend's epoch (the end of its record).

    Returns
    -------
    pandas.Series
        ``levels - rate (t - epoch) + (offsets of the steps after t)`` [m], on the datum of the
        last segment; seasonal and nodal variations are kept (they are part of the sea's
        natural range).

    References
    ----------
    Coles (2001), sec. 6.1 (a trend in extremes taken out before a stationary fit); Pugh &
    Woodworth (2014), ch. 7 and 10.
    """
    if trend.step_handling == "split":
        raise SeaLevelError("the trend was fitted with the record split at its datum steps: there is "
                            "no offset to put the segments on one datum; fit it with step_handling='correct'")
    s = _series(levels)
    ep = trend.epoch if epoch is None else _utc(pd.Timestamp(epoch))
    dt = (s.index - ep) / pd.Timedelta(seconds=SECONDS_PER_YEAR)
    out = s.to_numpy() - 1e-3 * trend.rate_mm_per_year * np.asarray(dt, dtype=float)
    for st in trend.steps:
        out = out + np.where(s.index < st["time"], 1e-3 * st["offset_mm"], 0.0)
    return pd.Series(out, index=s.index, name=levels.name)


def stationary_shift_se(trend: TrendResult, times) -> float:
    """Standard error [m] of the mean shift :func:`stationary_levels` gives ``times``.

    An error in the fitted rate, or in a step's offset, moves every stationary level of the
    record together (by ``-d_rate (t - epoch) + d_offset`` before a step); averaged over the
    record's times that is one shift of the whole sample, whose variance is ``a' C a`` with
    ``a`` the mean of those coefficients and C the fit's covariance (the delta method, Coles
    2001, sec. 2.6.4). The extreme-value fits take their input as exact: this is the part of a
    return level's uncertainty they do not see.

    Parameters
    ----------
    trend : TrendResult
        With its ``covariance`` (one trend, steps corrected).
    times : DatetimeIndex or array_like of datetime64
        The times whose levels enter the extreme-value fit (e.g. each tidal cycle's).

    Returns
    -------
    float
        [m]; 0 when the trend has no covariance (a split record).

    References
    ----------
    Coles, S. (2001), sec. 2.6.4 (delta method).
    """
    if trend.covariance is None:
        return 0.0
    idx = pd.DatetimeIndex(times)
    idx = idx.tz_localize("UTC") if idx.tz is None else idx.tz_convert("UTC")
    if len(idx) == 0:
        return 0.0
    dt = np.asarray((idx - trend.epoch) / pd.Timedelta(seconds=SECONDS_PER_YEAR), dtype=float)
    a = [-float(np.mean(dt))] + [float(np.mean(idx < st["time"])) for st in trend.steps]
    a = np.asarray(a)
    return float(math.sqrt(max(a @ trend.covariance @ a, 0.0)))


# ============================================================================ helpers
def _utc(ts: pd.Timestamp) -> pd.Timestamp:
    return ts.tz_localize("UTC") if ts.tz is None else ts.tz_convert("UTC")


def _series(levels) -> pd.Series:
    if not isinstance(levels, pd.Series):
        raise SeaLevelError("levels must be a pandas Series on a DatetimeIndex")
    if not isinstance(levels.index, pd.DatetimeIndex):
        raise SeaLevelError("levels must be indexed by time (a DatetimeIndex)")
    s = levels.astype(float).dropna()
    if s.empty:
        raise SeaLevelError("levels hold no values")
    idx = s.index.tz_localize("UTC") if s.index.tz is None else s.index.tz_convert("UTC")
    return pd.Series(s.to_numpy(), index=idx, name=levels.name).sort_index()


def _month_start(idx: pd.DatetimeIndex) -> pd.DatetimeIndex:
    return pd.DatetimeIndex(idx.tz_localize(None).to_period("M").to_timestamp()).tz_localize("UTC")


def _monthly_series(monthly) -> pd.Series:
    if isinstance(monthly, pd.DataFrame):
        if "mean" not in monthly:
            raise SeaLevelError("monthly means must be a Series, or a DataFrame with a 'mean' column")
        monthly = monthly["mean"]
    s = _series(monthly)
    s.index = _month_start(s.index)
    if s.index.has_duplicates:
        raise SeaLevelError("more than one monthly mean for a month")
    return s


def _step_times(steps) -> list:
    if steps is None:
        return []
    if isinstance(steps, pd.DataFrame):
        if "time" not in steps:
            raise SeaLevelError("datum steps given as a table need a 'time' column")
        steps = steps["time"]
    out = []
    for s in steps:
        try:
            ts = pd.Timestamp(s) if not isinstance(s, (int, float, np.number)) else \
                pd.Timestamp(float(s), unit="s")
        except (TypeError, ValueError):
            raise SeaLevelError(f"datum step time not understood: {s!r}") from None
        out.append(_utc(ts))
    return sorted(out)


def _drop_step_months(y: pd.Series, steps: list) -> pd.Series:
    """Leave out months that a step falls inside (their mean mixes two datums)."""
    if not steps:
        return y
    starts = y.index
    ends = starts + pd.offsets.MonthBegin(1)
    inside = np.zeros(len(y), bool)
    for s in steps:
        inside |= (starts < s) & (s < ends)
    return y[~inside]


def _month_times(index: pd.DatetimeIndex):
    """Mid-month times [year from the epoch], the epoch (end of the last month), lags [month]."""
    mid = index + (index + pd.offsets.MonthBegin(1) - index) / 2
    epoch = index[-1] + pd.offsets.MonthBegin(1)
    t = np.asarray((mid - epoch) / pd.Timedelta(seconds=SECONDS_PER_YEAR), dtype=float)
    m = index.year * 12 + index.month
    lags = np.diff(np.asarray(m, dtype=float))
    return t, epoch, lags


def _node_longitude(index: pd.DatetimeIndex) -> np.ndarray:
    """Longitude of the Moon's ascending node N [rad] at mid-month (N = -N', Meeus 1998)."""
    mid = index + pd.Timedelta(days=15)
    secs = mid.as_unit("s").asi8.astype(float)
    return -np.radians(astronomical_arguments(secs)[..., 4])
