"""Return levels (predictor.extremes) against outside references.

References named beside each check: Coles, S. (2001), An Introduction to Statistical Modeling
of Extreme Values (formulas; worked examples typed from memory of the book); scipy.stats
(genextreme, genpareto and the generic scipy.stats.fit, whose differential-evolution optimiser
shares no code with the fits tested); samples drawn here by inverting the distribution
functions with numpy (parameters known by construction); Monte Carlo written out in the test.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from predictor import TideModel
from predictor import extremes as ex
from units import cm, mm, hour

year = 365.25 * 86400.0


def gev_sample(rng, n, mu, sigma, xi):
    """GEV by inversion of Coles (2001) eq. 3.2: z = mu + sigma/xi ((-log U)^-xi - 1)."""
    u = rng.random(n)
    return mu + sigma / xi * ((-np.log(u)) ** (-xi) - 1.0)


def gpd_sample(rng, n, sigma, xi):
    """GPD by inversion of Coles (2001) eq. 4.2: y = sigma/xi (U^-xi - 1)."""
    u = rng.random(n)
    return sigma / xi * (u ** (-xi) - 1.0)


def _global_optimiser(fun, bounds, **_):
    """scipy.optimize.differential_evolution, seeded (the optimiser of scipy.stats.fit)."""
    return optimize.differential_evolution(fun, bounds, seed=3, tol=1e-12, polish=True)


# ----------------------------------------------------------------------------- GEV
def test_gev_loglik_is_scipy_logpdf_sum():
    # scipy.stats.genextreme uses c = -xi (scipy documentation); Coles eq. 3.7 written out
    rng = np.random.default_rng(1)
    x = gev_sample(rng, 50, 4.0, 0.2, 0.1)
    for mu, s, xi in ((4.0, 0.2, 0.1), (3.9, 0.25, -0.2), (4.05, 0.18, 0.0)):
        ref = float(np.sum(stats.genextreme.logpdf(x, -xi, mu, s)))
        assert ex._gev_loglik(x, mu, s, xi) == pytest.approx(ref, rel=1e-9, abs=1e-9)


def test_gev_fit_reaches_the_likelihood_maximum_of_an_independent_optimiser():
    # Reference: scipy.stats.fit (differential evolution, then a local polish), a generic
    # optimiser that shares no code with genextreme.fit's Nelder-Mead start.
    rng = np.random.default_rng(2)
    x = gev_sample(rng, 60, 4.0, 0.2, -0.1)
    fit = ex.fit_gev(x)
    ref = stats.fit(stats.genextreme, x, bounds={"c": (-1, 1), "loc": (3, 5), "scale": (0.01, 1)},
                    optimizer=_global_optimiser)
    c, loc, scale = ref.params
    ref_ll = float(np.sum(stats.genextreme.logpdf(x, c, loc, scale)))
    assert fit.loglik >= ref_ll - 1e-6
    assert fit.location == pytest.approx(loc, abs=1 * mm)
    assert fit.scale == pytest.approx(scale, abs=1 * mm)
    assert fit.shape == pytest.approx(-c, abs=0.01)


def test_gev_recovers_parameters_known_by_construction():
    rng = np.random.default_rng(3)
    x = gev_sample(rng, 5000, 4.0, 0.2, -0.1)
    fit = ex.fit_gev(x)
    # asymptotic standard errors for n = 5000 are about 3 mm, 2 mm and 0.01 (Coles 2001, 3.3.1)
    assert fit.location == pytest.approx(4.0, abs=1 * cm)
    assert fit.scale == pytest.approx(0.2, abs=1 * cm)
    assert fit.shape == pytest.approx(-0.1, abs=0.04)


def test_gev_return_level_formula_port_pirie():
    # Coles (2001), sec. 3.4.1, Port Pirie annual maxima: (mu, sigma, xi) = (3.87, 0.198,
    # -0.050) give z_0.1 = 4.30 m and z_0.01 = 4.69 m (typed from memory of the book; the
    # parameters are printed rounded, hence a centimetre's tolerance).
    fit = ex.GevFit(3.87, 0.198, -0.050, 0.0, np.zeros(65), 65.0)
    assert fit._level(fit._theta, -math.log(1 - 0.1)) == pytest.approx(4.30, abs=1 * cm)
    assert fit._level(fit._theta, -math.log(1 - 0.01)) == pytest.approx(4.69, abs=1 * cm)


@pytest.mark.parametrize("xi", [-0.2, 0.0, 0.15])
def test_gev_return_level_is_scipy_isf(xi):
    # scipy.stats.genextreme.isf(1/T) is the level the annual maximum exceeds with probability 1/T
    fit = ex.GevFit(4.0, 0.2, xi, 0.0, np.zeros(30), 30.0)
    for T in (2, 10, 100, 1000):
        ref = stats.genextreme.isf(1.0 / T, -xi, 4.0, 0.2)
        assert fit._level(fit._theta, -math.log1p(-1.0 / T)) == pytest.approx(ref, abs=0.01 * mm)


def test_gev_profile_interval_ends_where_the_deviance_is_the_chi2_quantile():
    # Coles (2001), sec. 2.6.6: the 95 % profile interval ends where the deviance reaches
    # chi2_1(0.95) = 3.841. The profile here is recomputed independently: mu eliminated with
    # Coles eq. 3.4 and scipy.stats.genextreme.logpdf maximised over (sigma, xi) from a grid.
    rng = np.random.default_rng(4)
    x = gev_sample(rng, 40, 4.0, 0.2, 0.0 + 1e-9)
    fit = ex.fit_gev(x)
    T = 50.0
    rl = fit.return_level(T)
    yp = -math.log1p(-1.0 / T)

    def profile(z):
        def nll(p):
            s, xi = math.exp(p[0]), p[1]
            mu = z + s / xi * (1 - yp ** (-xi)) if abs(xi) > 1e-9 else z + s * math.log(yp)
            v = -np.sum(stats.genextreme.logpdf(x, -xi, mu, s))
            return v if np.isfinite(v) else 1e9
        grid = [(ls, xi) for ls in np.linspace(-3, 0, 13) for xi in np.linspace(-0.6, 0.8, 15)]
        start = min(grid, key=nll)
        return -optimize.minimize(nll, start, method="Nelder-Mead",
                                  options={"xatol": 1e-8, "fatol": 1e-10, "maxiter": 5000}).fun

    chi2 = stats.chi2.ppf(0.95, 1)
    assert 2 * (fit.loglik - profile(rl.lower)) == pytest.approx(chi2, abs=0.02)
    assert 2 * (fit.loglik - profile(rl.upper)) == pytest.approx(chi2, abs=0.02)
    assert rl.lower < rl.level < rl.upper


def test_return_period_is_the_return_level_read_backwards():
    rng = np.random.default_rng(5)
    fit = ex.fit_gev(gev_sample(rng, 40, 4.0, 0.2, -0.05))
    rl = fit.return_level(20.0)
    rp = fit.return_period(rl.level)
    assert rp.period == pytest.approx(20.0, rel=1e-4)
    # the range of the period of the band's upper end starts at 20 years (profile duality)
    assert fit.return_period(rl.upper).lower == pytest.approx(20.0, rel=0.01)
    assert fit.return_period(rl.lower).upper == pytest.approx(20.0, rel=0.01)


def test_return_period_beyond_a_bounded_tail_is_infinite():
    fit = ex.GevFit(4.0, 0.2, -0.5, 0.0, gev_sample(np.random.default_rng(6), 40, 4.0, 0.2, -0.5), 40.0)
    fit.loglik = fit._loglik(fit._theta)
    assert fit.upper_end == pytest.approx(4.4)
    assert math.isinf(fit.return_period(4.5).period)


@pytest.mark.slow
def test_gev_interval_coverage_two_sided():
    # 95 % intervals over repeated samples: each side misses about 2.5 % of the time.
    # 120 samples of 30 annual maxima; a side missing more than 8 fails (binomial: an honest
    # interval does so with probability 0.005; an 80 % interval passes with 0.06).
    rng = np.random.default_rng(7)
    mu, s, xi, T = 4.0, 0.2, -0.1, 50.0
    truth = mu + s / xi * ((-math.log(1 - 1 / T)) ** (-xi) - 1)
    below = above = 0
    for _ in range(120):
        rl = ex.fit_gev(gev_sample(rng, 30, mu, s, xi)).return_level(T)
        below += truth < rl.lower
        above += truth > rl.upper
    assert below <= 8 and above <= 8, (below, above)
    assert below + above >= 2  # an interval too wide to ever miss is no check either


def test_gev_refuses_too_few_maxima():
    with pytest.raises(ex.ExtremesError, match="at least 5"):
        ex.fit_gev([4.0, 4.1, 4.2])


@pytest.mark.parametrize("period", [1.0, 0.5, -3, float("inf"), "ten"])
def test_return_period_must_exceed_one_year(period):
    fit = ex.GevFit(4.0, 0.2, 0.0, 0.0, np.zeros(30), 30.0)
    with pytest.raises(ex.ExtremesError, match="return period"):
        fit.return_level(period)


# ----------------------------------------------------------------------------- annual maxima
def test_annual_maxima_keep_years_with_enough_hours():
    idx = pd.date_range("2001-01-01", "2003-12-31 23:00", freq="h", tz="UTC")
    s = pd.Series(np.arange(len(idx), dtype=float) % 100, index=idx)
    s.iloc[100] = 7.0                                          # 2001's maximum
    s = s[~((s.index >= "2002-03-01") & (s.index < "2002-07-01"))]   # 2002: 67 % of hours
    am = ex.annual_maxima(s)
    assert list(am.index) == [2001, 2003]
    assert am.loc[2001, "level"] == 99.0
    assert am.loc[2003, "coverage"] == pytest.approx(1.0)


def test_annual_maxima_water_years_keep_winters_whole():
    idx = pd.date_range("2000-07-01", "2002-06-30 23:00", freq="h", tz="UTC")
    s = pd.Series(0.0, index=idx)
    s["2001-01-15 03:00"] = 5.0                                 # winter 2000/01
    s["2001-12-20 03:00"] = 4.0                                 # winter 2001/02
    am = ex.annual_maxima(s, year_start_month=7)
    assert list(am.index) == [2000, 2001]
    assert list(am["level"]) == [5.0, 4.0]


# ----------------------------------------------------------------------------- declustering
def _t(hours):
    return pd.Timestamp("2020-01-01", tz="UTC").timestamp() + np.asarray(hours, float) * hour


def test_decluster_separates_storms_by_the_run_length():
    # hand-made: cycles every 12 h; storm A over three cycles, a lull of 5 days, storm B of two
    h = np.arange(20) * 12.0
    v = np.zeros(20)
    v[[2, 3, 4]] = [0.5, 0.9, 0.6]
    v[[15, 16]] = [0.7, 0.4]
    c = ex.decluster(_t(h), v, 0.3, "48h")
    assert list(c["peak"]) == [0.9, 0.7]
    assert list(c["exceedances"]) == [3, 2]
    assert c["time"].iloc[0] == pd.Timestamp(_t(36.0), unit="s", tz="UTC")
    assert c["start"].iloc[1] == pd.Timestamp(_t(180.0), unit="s", tz="UTC")


def test_decluster_joins_exceedances_closer_than_the_run_length():
    h = np.arange(10) * 12.0
    v = np.array([0, 0.5, 0, 0, 0.8, 0, 0, 0, 0, 0.6])     # gaps of 36 h then 60 h
    assert len(ex.decluster(_t(h), v, 0.3, "48h")) == 2
    assert len(ex.decluster(_t(h), v, 0.3, "36h")) == 2     # a gap equal to the run length joins
    assert len(ex.decluster(_t(h), v, 0.3, "35h")) == 3
    assert len(ex.decluster(_t(h), v, 0.3, "60h")) == 1


def test_decluster_takes_the_first_of_equal_peaks_and_any_order():
    h = np.array([36.0, 0.0, 12.0, 24.0])
    v = np.array([0.4, 0.5, 0.9, 0.9])
    c = ex.decluster(_t(h), v, 0.3, "24h")
    assert len(c) == 1 and c["peak"].iloc[0] == 0.9
    assert c["time"].iloc[0] == pd.Timestamp(_t(12.0), unit="s", tz="UTC")


def test_decluster_with_nothing_above_is_empty():
    assert ex.decluster(_t([0, 12]), [0.1, 0.2], 0.3).empty


def test_decluster_refuses_mismatched_lengths():
    with pytest.raises(ex.ExtremesError, match="differ in length"):
        ex.decluster(_t([0, 12, 24]), [0.1, 0.2], 0.0)


# ----------------------------------------------------------------------------- GPD / POT
def _independent_peaks(rng, n, sigma, xi, u=0.2):
    """Values 30 days apart (every exceedance its own storm) with GPD excesses over u."""
    t = np.arange(n) * 30 * 86400.0
    v = np.where(rng.random(n) < 0.5, u + gpd_sample(rng, n, sigma, xi), u - rng.random(n) * 0.1)
    return t, v


def test_gpd_fit_reaches_the_likelihood_maximum_of_an_independent_optimiser():
    rng = np.random.default_rng(8)
    t, v = _independent_peaks(rng, 400, 0.15, 0.1)
    fit = ex.fit_peaks_over_threshold(t, v, threshold=0.2, run_length="1d")
    exc = fit.peaks - 0.2
    ref = stats.fit(stats.genpareto, exc, bounds={"c": (-1, 1), "loc": (0, 0), "scale": (0.01, 2)},
                    optimizer=_global_optimiser)
    c, _, scale = ref.params
    ll_ref = float(np.sum(stats.genpareto.logpdf(exc, c, 0, scale)))
    assert ex._gpd_loglik(exc, fit.scale, fit.shape) >= ll_ref - 1e-6
    assert ex._gpd_loglik(exc, fit.scale, fit.shape) == pytest.approx(
        float(np.sum(stats.genpareto.logpdf(exc, fit.shape, 0, fit.scale))), rel=1e-9)
    assert fit.scale == pytest.approx(scale, abs=1 * mm)
    assert fit.shape == pytest.approx(c, abs=0.01)


def test_gpd_recovers_parameters_known_by_construction():
    rng = np.random.default_rng(9)
    t, v = _independent_peaks(rng, 8000, 0.15, -0.1)
    fit = ex.fit_peaks_over_threshold(t, v, threshold=0.2, run_length="1d", record_years=8000 * 30 / 365.25)
    assert fit.scale == pytest.approx(0.15, abs=5 * mm)
    assert fit.shape == pytest.approx(-0.1, abs=0.03)
    assert fit.extremal_index == 1.0
    assert fit.rate == pytest.approx(fit.n_storms / (8000 * 30 / 365.25))


def test_gpd_return_level_formula_rainfall_example():
    # Coles (2001), sec. 4.4.1, daily rainfall: u = 30 mm, sigma = 7.44, xi = 0.184,
    # zeta_u = 152/17531, 365 observations a year: the 100-year level is 106.3 mm (typed from
    # memory of the book). Coles' N-year level is exceeded once in N years on average, a rate
    # of 1/N (eq. 4.13), which is the rate given here.
    rate = 152 / 17531 * 365.0
    fit = ex.PotFit(threshold=30.0, scale=7.44, shape=0.184, rate=rate, extremal_index=1.0,
                    record_years=48.0, peaks=np.array([31.0]), values=np.array([0.0, 31.0]),
                    run_length=86400.0)
    assert fit._level(fit._theta, 1.0 / 100) == pytest.approx(106.3, abs=0.2)


def test_joint_probability_with_a_single_high_water_is_that_water_plus_the_surge_level():
    rng = np.random.default_rng(10)
    t, v = _independent_peaks(rng, 600, 0.15, -0.05)
    pot = ex.fit_peaks_over_threshold(t, v, threshold=0.2, run_length="1d")
    jp = ex.joint_probability(pot, np.full(200, 4.0))
    for T in (5, 50):
        assert jp.return_level(T).level == pytest.approx(4.0 + pot.return_level(T).level, abs=0.01 * mm)


def test_joint_probability_matches_a_monte_carlo_of_storms_meeting_random_high_waters():
    # Storms arrive as a Poisson process (5 a year) with peak skew surge u + GPD, each meeting
    # one of two high waters with equal chance; the annual maximum is simulated directly
    # (numpy only) and its exceedance frequency compared with the method's 1/T.
    rate, u, sigma, xi = 5.0, 0.3, 0.12, -0.05
    hws = np.array([3.6, 4.0])
    t = np.arange(20) * 30 * 86400.0
    pot = ex.PotFit(threshold=u, scale=sigma, shape=xi, rate=rate, extremal_index=1.0,
                    record_years=40.0, peaks=np.full(20, 0.5), values=np.full(20, 0.5), run_length=1.0)
    jp = ex.joint_probability(pot, np.repeat(hws, 100))
    rng = np.random.default_rng(11)
    n_years = 400_000
    counts = rng.poisson(rate, n_years)
    storm_year = np.repeat(np.arange(n_years), counts)
    level = rng.choice(hws, storm_year.size) + u + gpd_sample(rng, storm_year.size, sigma, xi)
    annual = np.full(n_years, -np.inf)
    np.maximum.at(annual, storm_year, level)
    for T in (2, 10, 50):
        z = jp._level(jp._theta, -math.log1p(-1.0 / T))
        freq = np.mean(annual > z)
        se = math.sqrt((1 / T) * (1 - 1 / T) / n_years)
        assert abs(freq - 1 / T) < 4 * se, (T, freq)
    assert len(t) == 20


def test_predicted_high_waters_count_one_per_cycle_and_merge_a_double_high_water():
    # M2 with a strong M4 in the phase that makes a double high water (two peaks about two
    # hours apart each cycle): one stand per tidal cycle, 705.8 a year (365.25 d / 12.42 h).
    model = TideModel(0.0, [{"name": "M2", "amplitude": 1.0, "phase": 0.0},
                            {"name": "M4", "amplitude": 0.3, "phase": 180.0}])
    raw = model.high_low("2000-01-01", "2001-01-01")
    hw = ex.predicted_high_waters(model, years=1.0)
    assert (raw["kind"] == "high").sum() > 1.8 * len(hw)
    assert len(hw) == pytest.approx(365.25 * 24 / 12.4206, abs=2)
    assert hw.max() == pytest.approx(raw.loc[raw["kind"] == "high", "level"].max(), abs=0.1 * mm)


def test_predicted_high_waters_move_with_the_mean_asked():
    model = TideModel(1.0, [{"name": "M2", "amplitude": 1.0, "phase": 0.0}])
    a = ex.predicted_high_waters(model, years=0.1)
    b = ex.predicted_high_waters(model, years=0.1, mean=1.25)
    assert np.allclose(b.to_numpy() - a.to_numpy(), 0.25)


# ----------------------------------------------------------------------------- diagnostics
def test_mean_excess_of_a_gpd_is_linear_with_slope_xi_over_one_minus_xi():
    # Coles (2001), eq. 4.9: E(X - u | X > u) = (sigma_u0 + xi u) / (1 - xi) above u0.
    rng = np.random.default_rng(12)
    xi, sigma = 0.1, 0.2
    x = gpd_sample(rng, 200_000, sigma, xi)
    me = ex.mean_excess(x, [0.0, 0.1, 0.2, 0.3])
    slope = np.polyfit(me["threshold"], me["mean_excess"], 1)[0]
    assert slope == pytest.approx(xi / (1 - xi), abs=0.02)
    assert me["mean_excess"].iloc[0] == pytest.approx(sigma / (1 - xi), abs=2 * mm)
    assert (me["lower"] < me["mean_excess"]).all() and (me["mean_excess"] < me["upper"]).all()


def test_parameter_stability_above_a_valid_threshold():
    # For GPD data every threshold is valid: shape and modified scale sigma* = sigma_u - xi u
    # stay at their true values (Coles 2001, sec. 4.3.1), inside their intervals (99.7 %
    # ones, as three thresholds are checked at once).
    rng = np.random.default_rng(13)
    n = 6000
    t = np.arange(n) * 30 * 86400.0
    v = gpd_sample(rng, n, 0.2, -0.1)
    d = ex.threshold_diagnostics(t, v, thresholds=[0.05, 0.15, 0.25], run_length="1d",
                                 confidence=0.997)
    assert (d["shape_lower"] < -0.1).all() and (-0.1 < d["shape_upper"]).all()
    assert (d["modified_scale_lower"] < 0.2).all() and (0.2 < d["modified_scale_upper"]).all()
    assert list(d["storms"]) == sorted(d["storms"], reverse=True)


# ----------------------------------------------------------------------------- warnings
def test_a_short_record_gets_a_plain_warning_with_its_width():
    rng = np.random.default_rng(14)
    fit = ex.fit_gev(gev_sample(rng, 8, 4.0, 0.2, 0.0 + 1e-9))
    rl = fit.return_level(100)
    assert rl.warning is not None
    assert "100-year level from 8 years" in rl.warning
    assert f"{rl.upper - rl.lower:.2f} m wide" in rl.warning or "no upper end" in rl.warning
    assert "8 annual maxima" in rl.warning
    assert fit.return_level(20).warning is None          # within 4 times the record


def test_record_warning_is_silent_within_the_record():
    assert ex.record_warning(50, 40, 1.0, 2.0, "40 annual maxima") is None
    assert "no upper end" in ex.record_warning(500, 40, 1.0, math.inf, "40 annual maxima")
