"""Mean sea levels and their trend (predictor.sealevel) against outside references.

References named beside each check: statsmodels (GLS with a given error covariance, and
GLSAR, its iterated AR(1) regression) as a general-purpose reference sharing no code with the
fit; AR(1) series with known parameters drawn here with numpy; hand-made records for the
completeness rules (whose sources are in predictor.sealevel.COMPLETENESS_RULE).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from predictor import sealevel as sl
from predictor.astro import astronomical_arguments
from units import mm

mm_per_year = 1.0          # the trend's own unit


def months(start="1990-01", n=240):
    return pd.date_range(start, periods=n, freq="MS", tz="UTC")


def ar1(rng, n, rho, sd):
    """Stationary AR(1) with marginal standard deviation sd [m]."""
    e = rng.normal(0.0, sd * np.sqrt(1 - rho * rho), n)
    x = np.empty(n)
    x[0] = rng.normal(0.0, sd)
    for i in range(1, n):
        x[i] = rho * x[i - 1] + e[i]
    return x


def design(idx, steps=(), nodal=False):
    """The regression written out independently: mean, trend [m/year], seasonal, nodal, steps."""
    mid = idx + (idx + pd.offsets.MonthBegin(1) - idx) / 2
    epoch = idx[-1] + pd.offsets.MonthBegin(1)
    t = np.asarray((mid - epoch) / pd.Timedelta(days=365.25), dtype=float)
    cols = [np.ones_like(t), t]
    for k in (1, 2):
        cols += [np.cos(2 * np.pi * k * t), np.sin(2 * np.pi * k * t)]
    if nodal:
        secs = (idx + pd.Timedelta(days=15)).as_unit("s").asi8.astype(float)
        N = -np.radians(astronomical_arguments(secs)[:, 4])
        cols += [np.cos(N), np.sin(N)]
    for s in steps:
        cols.append(((idx + pd.Timedelta(days=15)) >= s).astype(float) - 1.0)
    return np.column_stack(cols)


# ----------------------------------------------------------------------------- means
def test_daily_mean_needs_all_24_hours():
    idx = pd.date_range("2020-01-01", "2020-01-03 23:00", freq="h", tz="UTC")
    s = pd.Series(1.0, index=idx)
    s = s.drop(pd.Timestamp("2020-01-02 05:00", tz="UTC"))
    m = sl.mean_sea_levels(s, min_days=1, min_months=1)
    assert list(m.daily.index.day) == [1, 3]
    assert (m.daily["hours"] == 24).all()


def test_daily_mean_of_minute_data_averages_each_hour_first():
    idx = pd.date_range("2020-01-01", periods=24 * 60, freq="min", tz="UTC")
    v = np.where(idx.hour == 0, 0.0, 1.0)
    v[:50] = 10.0                       # many samples in one hour weigh as one hour
    m = sl.mean_sea_levels(pd.Series(v, index=idx), min_days=1, min_months=1)
    hour0 = (50 * 10.0 + 10 * 0.0) / 60
    assert m.daily["mean"].iloc[0] == pytest.approx((hour0 + 23 * 1.0) / 24)


def test_a_pure_tide_of_whole_cycles_a_day_leaves_the_mean():
    idx = pd.date_range("2020-01-01", "2020-01-31 23:00", freq="h", tz="UTC")
    h = idx.hour.to_numpy()
    s = pd.Series(2.0 + np.cos(2 * np.pi * h / 12) + 0.3 * np.sin(2 * np.pi * h / 24), index=idx)
    m = sl.mean_sea_levels(s, min_months=1)
    assert np.allclose(m.daily["mean"], 2.0, atol=1e-9)
    assert m.monthly["mean"].iloc[0] == pytest.approx(2.0, abs=1e-9)


def test_month_needs_15_days_and_year_11_months():
    idx = pd.date_range("2021-01-01", "2021-12-31 23:00", freq="h", tz="UTC")
    s = pd.Series(1.0, index=idx)
    keep = ~((idx >= "2021-02-15") & (idx < "2021-03-01"))          # February: 14 days
    keep &= ~((idx >= "2021-04-16") & (idx < "2021-05-01"))          # April: 15 days
    m = sl.mean_sea_levels(s[keep])
    assert pd.Timestamp("2021-02-01", tz="UTC") not in m.monthly.index
    assert m.monthly.loc[pd.Timestamp("2021-04-01", tz="UTC"), "days"] == 15
    assert list(m.annual.index) == [2021] and m.annual.loc[2021, "months"] == 11
    keep &= ~((idx >= "2021-06-10") & (idx < "2021-07-01"))          # a third month lost
    assert sl.mean_sea_levels(s[keep]).annual.empty
    assert "15 of its days" in m.rule and "from memory" in m.rule


def test_bad_completeness_setting_is_refused():
    s = pd.Series(1.0, index=pd.date_range("2020-01-01", periods=48, freq="h", tz="UTC"))
    with pytest.raises(sl.SeaLevelError, match="min_hours"):
        sl.mean_sea_levels(s, min_hours=25)


# ----------------------------------------------------------------------------- GLS against statsmodels
@pytest.mark.parametrize("gaps", [False, True])
def test_gls_with_known_rho_is_statsmodels_gls(gaps):
    # statsmodels.GLS with the AR(1) correlation matrix R_ij = rho^|i - j| (months) is the
    # reference; with gaps the matrix uses the true month lags.
    rng = np.random.default_rng(1)
    idx = months(n=300)
    y = 7.0 + 0.003 * np.arange(300) / 12 + ar1(rng, 300, 0.6, 0.03)
    if gaps:
        keep = np.ones(300, bool)
        keep[[5, 6, 7, 100, 200, 201]] = False
        idx, y = idx[keep], y[keep]
    X = design(idx)
    m = np.asarray(idx.year * 12 + idx.month, dtype=float)
    R = 0.6 ** np.abs(m[:, None] - m[None, :])
    ref = sm.GLS(y, X, sigma=R).fit()
    got = sl._gls_ar1(X, y, np.diff(m), rho=0.6)
    assert np.allclose(got["beta"], ref.params, rtol=1e-9, atol=1e-12)
    assert np.allclose(got["se"], ref.bse, rtol=1e-9, atol=1e-12)


def test_trend_and_rho_agree_with_statsmodels_glsar():
    # statsmodels.GLSAR(rho=1).iterative_fit: Cochrane-Orcutt style, rho from residual
    # autocorrelation; ours is REML, so they agree to a fraction of a standard error.
    rng = np.random.default_rng(2)
    idx = months(n=480)
    y = 7.0 + 0.003 * np.arange(480) / 12 + ar1(rng, 480, 0.5, 0.03)
    res = sl.sea_level_trend(pd.Series(y, index=idx), nodal="none")
    ref = sm.GLSAR(y, design(idx), rho=1).iterative_fit(maxiter=50)
    assert res.rho == pytest.approx(ref.model.rho[0], abs=0.05)
    assert res.rate_mm_per_year == pytest.approx(1e3 * ref.params[1], abs=0.2 * res.se_mm_per_year)
    assert res.se_mm_per_year == pytest.approx(1e3 * ref.bse[1], rel=0.15)
    assert res.rate_mm_per_year == pytest.approx(3.0, abs=3 * res.se_mm_per_year)


def test_the_reported_fit_is_statsmodels_gls_at_the_reported_rho():
    rng = np.random.default_rng(3)
    idx = months(n=360)
    y = 7.0 + 0.002 * np.arange(360) / 12 + 0.02 * np.cos(2 * np.pi * idx.month / 12) \
        + ar1(rng, 360, 0.4, 0.03)
    res = sl.sea_level_trend(pd.Series(y, index=idx), nodal="none")
    m = np.arange(360, dtype=float)
    ref = sm.GLS(y, design(idx), sigma=res.rho ** np.abs(m[:, None] - m[None, :])).fit()
    assert res.rate_mm_per_year == pytest.approx(1e3 * ref.params[1], abs=1e-6)
    assert res.se_mm_per_year == pytest.approx(1e3 * ref.bse[1], rel=1e-6)
    tq = stats.t.ppf(0.975, ref.df_resid)
    assert res.upper_mm_per_year == pytest.approx(1e3 * (ref.params[1] + tq * ref.bse[1]), abs=1e-6)


def test_trend_interval_coverage_two_sided_on_ar1_series():
    # 300 AR(1) series (rho 0.6, 20 years) with a known trend: the 95 % interval misses about
    # 2.5 % on each side; the white-noise interval, which ignores the serial correlation,
    # misses far more (so this test can fail).
    rng = np.random.default_rng(4)
    idx = months(n=240)
    below = above = white_miss = 0
    for _ in range(300):
        y = 7.0 + 0.0025 * np.arange(240) / 12 + ar1(rng, 240, 0.6, 0.03)
        r = sl.sea_level_trend(pd.Series(y, index=idx), nodal="none")
        below += 2.5 < r.lower_mm_per_year
        above += 2.5 > r.upper_mm_per_year
        white_miss += abs(r.rate_mm_per_year - 2.5) > 1.97 * r.se_white_mm_per_year
    assert below <= 17 and above <= 17, (below, above)   # binomial(300, 0.025): P(> 17) < 0.001
    assert below + above <= 27                            # at most 9 % in all
    assert white_miss >= 45                               # white noise: about 25 % missed


# ----------------------------------------------------------------------------- nodal term, steps
def _node(idx):
    secs = (idx + pd.Timedelta(days=15)).as_unit("s").asi8.astype(float)
    return -np.radians(astronomical_arguments(secs)[:, 4])


def test_nodal_term_is_fitted_over_a_nodal_cycle_and_recovered():
    rng = np.random.default_rng(5)
    idx = months("1980-01", 480)
    y = 7.0 + 0.002 * np.arange(480) / 12 + 0.012 * np.cos(_node(idx) - np.radians(40)) \
        + ar1(rng, 480, 0.3, 0.01)
    r = sl.sea_level_trend(pd.Series(y, index=idx))
    assert r.nodal is not None and "fitted and removed" in r.nodal_note
    assert r.nodal["amplitude_mm"] == pytest.approx(12.0, abs=3 * r.nodal["amplitude_se_mm"])
    assert r.nodal["phase_deg"] == pytest.approx(40.0, abs=15.0)
    assert r.rate_mm_per_year == pytest.approx(2.0, abs=3 * r.se_mm_per_year)


def test_short_record_leaves_the_nodal_term_in_and_says_so():
    idx = months("2010-01", 120)
    y = 7.0 + 0.002 * np.arange(120) / 12 + np.random.default_rng(6).normal(0, 0.01, 120)
    r = sl.sea_level_trend(pd.Series(y, index=idx))
    assert r.nodal is None
    assert "left in" in r.nodal_note and "10.0 years" in r.nodal_note
    assert any("30 years" in n for n in r.notes)


def test_datum_step_corrected_by_an_estimated_offset():
    rng = np.random.default_rng(7)
    idx = months("1990-01", 360)
    step = pd.Timestamp("2001-06-17T10:00", tz="UTC")
    y = 7.0 + 0.003 * np.arange(360) / 12 + ar1(rng, 360, 0.5, 0.02)
    y = y + np.where(idx + pd.Timedelta(days=15) >= step, 0.0, -0.05)   # old datum 5 cm low
    r = sl.sea_level_trend(pd.Series(y, index=idx), datum_steps=[step], nodal="none")
    assert r.step_handling == "corrected" and "corrected" in r.step_note
    assert r.steps[0]["offset_mm"] == pytest.approx(50.0, abs=3 * r.steps[0]["se_mm"])
    assert r.rate_mm_per_year == pytest.approx(3.0, abs=3 * r.se_mm_per_year)
    assert r.n_months == 359                     # the month holding the step is left out
    naive = sl.sea_level_trend(pd.Series(y, index=idx), nodal="none")
    assert naive.rate_mm_per_year > r.rate_mm_per_year + 1.0   # the step inflates a naive trend


def test_datum_step_splits_the_record_when_asked():
    idx = months("1990-01", 240)
    step = pd.Timestamp("2000-01-01", tz="UTC")
    y = 7.0 + 0.003 * np.arange(240) / 12 + np.where(idx >= step, 0.1, 0.0)
    y = y + np.random.default_rng(8).normal(0, 0.005, 240)
    r = sl.sea_level_trend(pd.Series(y, index=idx), datum_steps=pd.DataFrame({"time": [step]}),
                           step_handling="split", nodal="none")
    assert r.step_handling == "split" and "split" in r.step_note
    assert len(r.segments) == 2
    for seg in r.segments:
        assert seg["rate_mm_per_year"] == pytest.approx(3.0, abs=4 * seg["se_mm_per_year"])
    with pytest.raises(sl.SeaLevelError, match="split"):
        sl.stationary_levels(pd.Series(y, index=idx), r)


def test_stationary_levels_remove_the_trend_and_the_step_exactly():
    idx = months("1990-01", 240)
    step = pd.Timestamp("2000-01-01", tz="UTC")
    hourly = pd.date_range("1990-01-01", "2009-12-31 23:00", freq="h", tz="UTC")
    yrs = np.asarray((hourly - pd.Timestamp("2010-01-01", tz="UTC")) / pd.Timedelta(days=365.25))
    level = 7.0 + 0.004 * yrs + np.where(hourly >= step, 0.0, -0.03)
    msl = sl.mean_sea_levels(pd.Series(level, index=hourly))
    r = sl.sea_level_trend(msl.monthly, datum_steps=[step], nodal="none")
    assert r.rate_mm_per_year == pytest.approx(4.0, abs=0.01)
    st = sl.stationary_levels(pd.Series(level, index=hourly), r)
    assert np.allclose(st.to_numpy(), 7.0, atol=0.5 * mm)
    assert r.level_at_epoch == pytest.approx(7.0, abs=0.5 * mm)
    assert len(idx) == 240


def test_too_few_months_give_no_trend():
    with pytest.raises(sl.SeaLevelError, match="at least 24"):
        sl.sea_level_trend(pd.Series(1.0, index=months(n=12)))


def test_unknown_step_handling_is_refused():
    with pytest.raises(sl.SeaLevelError, match="step_handling"):
        sl.sea_level_trend(pd.Series(1.0, index=months(n=30)), step_handling="ignore")
