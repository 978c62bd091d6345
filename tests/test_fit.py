"""Harmonic fit and its confidence intervals.

Synthetic records are made by tests/reference_tide.py, which shares no code with predictor/
(pyerfa arguments, Schureman's V, Doodson's published nodal series), from a hand-made set of
constants for an invented port; the fit must recover them, within the published series'
truncation (reference_tide.tolerance) where there is no noise. External facts are named beside
each check.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest

import reference_tide as ref
from predictor import confidence as ci
from predictor.fit import (FitInputError, RecordTooShortError, harmonic_fit, required_days,
                           select_constituents, to_unix_seconds)
from units import mm, hour, day, degree


# Hand-made constants for an invented port: amplitude [m], Greenwich phase lag [deg].
CONSTANTS = {
    "M2": (1.10, 95.0), "S2": (0.38, 128.0), "N2": (0.22, 80.0), "K2": (0.10, 125.0),
    "K1": (0.12, 205.0), "O1": (0.09, 350.0), "P1": (0.04, 200.0), "Q1": (0.025, 330.0),
    "M4": (0.06, 40.0), "MS4": (0.035, 100.0), "NU2": (0.045, 70.0), "MU2": (0.03, 60.0),
}
# The main part of it, resolvable by the Rayleigh criterion in 28 days (N2-M2 need 27.55).
SHORT = {n: CONSTANTS[n] for n in ("M2", "S2", "N2", "K1", "O1", "M4")}
MEAN = 2.45  # [m] above the invented chart datum
START = pd.Timestamp("2031-01-01", tz="UTC").timestamp()


def synthesise(t, constants=CONSTANTS, mean=MEAN):
    """Tide at Unix times t [s] from constants, by the independent evaluation."""
    return ref.tide(t, mean, constants)


def series_tol(name, H):
    """What the published series' truncation leaves between the two evaluations [m]."""
    return H * ref.tolerance(name)


def hourly(days, start=START):
    return start + np.arange(0.0, days * day, hour)


def by_name(model):
    return {c["name"]: c for c in model.constituents}


def phase_diff(a, b):
    return (a - b + 180.0) % 360.0 - 180.0


def ar1(n, phi, sd, rng):
    """Red noise: x[i] = phi x[i-1] + e[i], innovations N(0, sd)."""
    e = rng.normal(0.0, sd, n)
    x = np.empty(n)
    x[0] = e[0] / np.sqrt(1 - phi**2)
    for i in range(1, n):
        x[i] = phi * x[i - 1] + e[i]
    return x


@pytest.fixture(scope="module")
def year_with_gaps():
    t = hourly(365)
    rng = np.random.default_rng(20310101)
    keep = rng.random(t.size) > 0.05                       # 5 % scattered dropouts
    keep &= ~((t > START + 150 * day) & (t < START + 170 * day))  # a 20-day outage
    return t[keep]


# ----------------------------------------------------------------- exact recovery


def test_noise_free_record_with_gaps_recovers_constants(year_with_gaps):
    # Least squares on noise-free data returns the generating constants (Foreman 1977, sec. 2),
    # here to within what the published nodal series leave (0.1 mm more for the fit itself).
    t = year_with_gaps
    model = harmonic_fit(t.astype("datetime64[s]"), synthesise(t))
    got = by_name(model)
    assert model.mean == pytest.approx(MEAN, abs=0.1 * mm)
    for name, (H, g) in CONSTANTS.items():
        tol = series_tol(name, H) + 0.1 * mm
        assert got[name]["amplitude"] == pytest.approx(H, abs=tol), name
        # a phase error dg moves the curve by at most H dg
        assert abs(np.radians(phase_diff(got[name]["phase"], g))) * H < tol, name


def test_irregular_sampling_recovers_constants():
    # Irregular times are fine for least squares (Foreman 1977, sec. 2: no uniform grid needed).
    rng = np.random.default_rng(7)
    t = np.sort(START + rng.uniform(0.0, 60 * day, 3000))
    model = harmonic_fit(t, synthesise(t), constituents=list(CONSTANTS))
    got = by_name(model)
    for name, (H, g) in CONSTANTS.items():
        assert got[name]["amplitude"] == pytest.approx(H, abs=series_tol(name, H) + 0.1 * mm), name


def test_chunked_and_unchunked_normal_equations_agree():
    # Sums of X'X over row blocks equal X'X of the whole matrix (plain linear algebra).
    t = hourly(40)
    y = synthesise(t) + np.random.default_rng(3).normal(0, 0.05, t.size)
    a = by_name(harmonic_fit(t, y, chunk_size=97, confidence=None))
    b = by_name(harmonic_fit(t, y, chunk_size=None, confidence=None))
    assert a.keys() == b.keys()
    for name in a:
        assert a[name]["amplitude"] == pytest.approx(b[name]["amplitude"], abs=1e-6 * mm)


def test_nan_levels_are_dropped():
    t = hourly(30)
    y = synthesise(t, SHORT)
    y_gappy = y.copy()
    y_gappy[::7] = np.nan
    # this sea holds no P1, K2 or NU2: nothing to infer (infer=None fits what the record resolves)
    got = by_name(harmonic_fit(t, y_gappy, infer=None))
    H = CONSTANTS["M2"][0]
    assert got["M2"]["amplitude"] == pytest.approx(H, abs=series_tol("M2", H) + 0.1 * mm)


def test_tz_aware_times_are_converted_to_utc():
    # The same instants written in a zone with a summer offset give the same constants.
    t = hourly(30)
    y = synthesise(t, SHORT)
    local = pd.DatetimeIndex(pd.to_datetime(t, unit="s", utc=True)).tz_convert("Europe/Lisbon")
    np.testing.assert_allclose(to_unix_seconds(local), t)
    got = by_name(harmonic_fit(local, y, infer=None))  # nothing unresolved in this sea to infer
    utc = by_name(harmonic_fit(t, y, infer=None))
    assert phase_diff(got["M2"]["phase"], utc["M2"]["phase"]) == pytest.approx(0.0, abs=1e-6 * degree)
    # and both are the sea's: a wrong offset would move M2 by 29 deg an hour
    assert phase_diff(got["M2"]["phase"], CONSTANTS["M2"][1]) == pytest.approx(0.0, abs=0.05 * degree)


def test_unknown_constituent_name_is_refused():
    t = hourly(30)
    with pytest.raises(FitInputError, match="XYZ9"):
        harmonic_fit(t, synthesise(t), constituents=["M2", "XYZ9"])


# ----------------------------------------------------------------- selection


def test_k1_and_p1_separate_only_beyond_their_synodic_period():
    # K1 15.0410686 and P1 14.9589314 deg/h (Schureman 1958, Table 2, from memory):
    # 360 / 0.0821372 h = 182.62 days, half a tropical year.
    assert required_days(15.0410686, 14.9589314) == pytest.approx(182.62, abs=0.01)
    short, dropped = select_constituents(180 * 24.0, 1.0)
    long_, _ = select_constituents(186 * 24.0, 1.0)
    assert "K1" in short and "P1" not in short
    assert any(d["name"] == "P1" and "K1" in d["reason"] for d in dropped)
    assert "K1" in long_ and "P1" in long_


def test_nyquist_drops_constituents_faster_than_half_the_sampling_rate():
    # Sampling theorem: with 3-hour steps nothing faster than 180/3 = 60 deg/h is resolvable.
    # M4 57.97 deg/h stays, M6 86.95 deg/h goes (speeds from memory, Schureman 1958).
    chosen, dropped = select_constituents(60 * 24.0, 3.0)
    assert "M4" in chosen and "M6" not in chosen
    assert any(d["name"] == "M6" and "Nyquist" in d["reason"] for d in dropped)


def test_one_day_record_is_too_short_and_says_what_is_needed():
    # Needed lengths by the Rayleigh criterion 360/dw (Godin 1972): M2 alone 12.42 h = 0.52 d;
    # K1-O1 beat 13.66 d (half the tropical month); S2-K2 beat 182.62 d (half a tropical year);
    # values from memory, Pugh & Woodworth (2014) ch. 4.
    t = hourly(1)
    with pytest.raises(RecordTooShortError) as err:
        harmonic_fit(t, synthesise(t))
    msg = str(err.value)
    assert "0.52 days for M2 alone" in msg
    assert "13.66 days to separate K1 from O1" in msg
    assert "182.62 days to separate S2 from K2" in msg


def test_metadata_reports_record_and_residual():
    t = hourly(60)
    rng = np.random.default_rng(11)
    sd = 0.04
    # this sea holds no NU2: nothing to infer from N2 (infer=None fits what the record resolves)
    model = harmonic_fit(t, synthesise(t, SHORT) + rng.normal(0.0, sd, t.size), infer=None)
    meta = model.metadata
    assert meta["n_samples"] == t.size
    assert meta["record_start"] == "2031-01-01T00:00:00Z"
    assert meta["rayleigh"] == 1.0
    # the residual of white noise after fitting p of n parameters has RMS sd sqrt(1 - p/n)
    assert meta["rms"] == pytest.approx(sd, rel=0.1)
    assert 0.99 < meta["variance_explained"] < 1.0
    assert {"name", "reason"} <= set(meta["dropped"][0])


# ----------------------------------------------------------------- noise, storms, intervals


@pytest.fixture(scope="module")
def noisy_year(year_with_gaps):
    t = year_with_gaps
    rng = np.random.default_rng(2031)
    # red noise on the full hourly grid, then sampled where the gauge reported
    grid = hourly(365)
    red = ar1(grid.size, 0.9, 0.03, rng)
    noise = np.interp(t, grid, red)
    storm = 0.8 * np.exp(-0.5 * ((t - (START + 290 * day)) / (18 * hour)) ** 2)
    return t, synthesise(t) + noise + storm


def test_constants_fall_within_their_own_95_percent_intervals(noisy_year):
    # Coloured-noise intervals (Munk & Cartwright 1966; band noise as in predictor.confidence): about 95 % coverage
    # expected; we ask for at least 85 % of the amplitude and phase checks together.
    t, y = noisy_year
    got = by_name(harmonic_fit(t, y, confidence=0.95))
    inside = []
    for name, (H, g) in CONSTANTS.items():
        c = got[name]
        inside.append(abs(c["amplitude"] - H) <= c["amplitude_ci"])
        inside.append(abs(phase_diff(c["phase"], g)) <= c["phase_ci"])
    assert np.mean(inside) >= 0.85


def test_robust_fit_is_biased_less_by_a_storm_than_ordinary_least_squares():
    # IRLS with Cauchy weights (Leffler & Jay 2009) down-weights the surge.
    t = hourly(45)
    rng = np.random.default_rng(5)
    storm = 1.2 * np.exp(-0.5 * ((t - (START + 20 * day)) / (8 * hour)) ** 2)
    y = synthesise(t, SHORT) + rng.normal(0.0, 0.01, t.size) + storm
    names = list(SHORT)

    def error(model):
        got = by_name(model)
        return sum(abs(got[n]["amplitude"] * np.exp(1j * np.radians(got[n]["phase"]))
                       - CONSTANTS[n][0] * np.exp(1j * np.radians(CONSTANTS[n][1]))) for n in names)

    ols = harmonic_fit(t, y, constituents=names, confidence=None, robust=False)
    rob = harmonic_fit(t, y, constituents=names, confidence=None, robust=True)
    assert error(rob) < 0.5 * error(ols)
    assert rob.metadata["robust_iterations"] >= 1


def test_ill_conditioned_fit_warns_and_still_returns():
    # Two constituents of the same speed (MO3 and 2MK3, Foreman 1977) cannot be separated.
    t = hourly(30)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        model = harmonic_fit(t, synthesise(t, SHORT), constituents=list(SHORT) + ["MO3", "2MK3"],
                             confidence=None)
    assert any("ill-conditioned" in str(w.message) for w in caught)
    H = CONSTANTS["M2"][0]
    assert by_name(model)["M2"]["amplitude"] == pytest.approx(H, abs=series_tol("M2", H) + 0.1 * mm)


def test_white_noise_coefficient_variance_is_two_sigma_squared_over_n():
    # For white noise of variance s^2, least-squares cosine/sine coefficients from N samples
    # have variance 2 s^2 / N (classical least-squares regression result, white case).
    rng = np.random.default_rng(1)
    # four years, so that each band averages some 500 spectral lines (about 6 % scatter)
    t = hourly(4 * 365)
    n, s = t.size, 0.05
    spec = ci.residual_band_spectrum(t, rng.normal(0.0, s, n))
    var_a, var_b = ci.coefficient_variance(spec, [28.984, 15.041, 1.0])
    np.testing.assert_allclose(var_a, 2 * s**2 / n, rtol=0.15)


def test_gaps_do_not_change_the_white_noise_density():
    rng = np.random.default_rng(2)
    t = hourly(365)
    keep = rng.random(t.size) > 0.3
    spec = ci.residual_band_spectrum(t[keep], rng.normal(0.0, 0.05, keep.sum()))
    # one-sided white density = 2 s^2 dt [m^2 h] (definition of the one-sided PSD)
    assert spec.band_mean(2) == pytest.approx(2 * 0.05**2 * 1.0, rel=0.15)


def test_periodogram_matches_scipy():
    # Reference library: scipy.signal.periodogram with a Hann window, density scaling.
    signal = pytest.importorskip("scipy.signal")
    x = np.random.default_rng(4).normal(size=1001)
    f_ref, p_ref = signal.periodogram(x, fs=1.0, window="hann", detrend="constant", scaling="density")
    f, p = ci._hann_periodogram(x, 1.0)
    np.testing.assert_allclose(f, f_ref)
    np.testing.assert_allclose(p, p_ref, rtol=1e-10, atol=1e-14)


def test_linearised_intervals_use_the_normal_quantile():
    # z(0.975) = 1.959964 (standard normal tables, from memory).
    amp_ci, ph_ci, snr = ci.amplitude_phase_intervals([0.3], [0.4], [1e-4], confidence=0.95)
    assert amp_ci[0] == pytest.approx(1.959964 * 0.01, rel=1e-6)
    assert ph_ci[0] == pytest.approx(np.degrees(1.959964 * 0.01 / 0.5), rel=1e-6)
    assert snr[0] == pytest.approx(0.25 / 1e-4)


def test_phase_interval_of_a_noise_constituent_is_capped_at_180_degrees():
    _, ph_ci, snr = ci.amplitude_phase_intervals([1e-4], [0.0], [1e-4], confidence=0.95)
    assert ph_ci[0] == 180.0 and snr[0] < 1


def test_fitted_model_predicts_the_record():
    # Conventions of fit and prediction agree: TideModel.predict reproduces noise-free data
    # (to what the published series leave between the two evaluations).
    t = hourly(60)
    y = synthesise(t, SHORT)
    model = harmonic_fit(t.astype("datetime64[s]"), y, constituents=list(SHORT))
    tol = sum(series_tol(n, H) for n, (H, _) in SHORT.items()) + 0.1 * mm
    np.testing.assert_allclose(model.predict(t.astype("datetime64[s]")), y, atol=tol)


def test_linear_trend_is_recovered_and_predicted():
    # 3 mm/year, a typical modern rate of relative sea-level rise (common practice, no source).
    t = hourly(3 * 365)[::3]
    rate = 3.0 * mm  # per Julian year
    y = synthesise(t, SHORT) + rate * (t - t[0]) / (365.25 * day)
    model = harmonic_fit(t, y, constituents=list(SHORT), trend=True, confidence=None)
    assert model.trend == pytest.approx(rate, abs=0.05 * mm)
    tol = sum(series_tol(n, H) for n, (H, _) in SHORT.items()) + 0.1 * mm
    np.testing.assert_allclose(model.predict(t.astype("datetime64[s]")), y, atol=tol)


@pytest.fixture(scope="module")
def coverage_runs():
    """A year with 5 % dropouts and a 22-day outage mid-record, red AR(1) noise, 24 seeds."""
    grid = hourly(365)
    clean = synthesise(grid)
    runs = []
    for seed in range(24):
        rng = np.random.default_rng(1000 + seed)
        noise = ar1(grid.size, 0.9, 0.03, rng)
        keep = rng.random(grid.size) > 0.05
        keep &= ~((grid > START + 150 * day) & (grid < START + 172 * day))
        runs.append((grid[keep], (clean + noise)[keep]))
    return runs


@pytest.mark.parametrize("level,low,high", [(0.95, 0.92, 0.98), (0.50, 0.42, 0.58)])
def test_interval_coverage_over_seeds_is_nominal_from_both_sides(coverage_runs, level, low, high):
    # Coloured-noise intervals (Munk & Cartwright 1966; band noise as in predictor.confidence)
    # must hold the true constants at their nominal rate: too narrow misleads, and too wide
    # hides real changes, so both sides are checked. 24 seeds x 12 constituents x (amplitude,
    # phase) = 576 checks, whose binomial standard error is 0.9 % at 95 % and 2.1 % at 50 %;
    # the bounds are about 3.5 standard errors either side. The 50 % level is the sharper test
    # of width: intervals 30 % too wide would hold 62 % there.
    names = list(CONSTANTS)
    inside = []
    for t, y in coverage_runs:
        got = by_name(harmonic_fit(t, y, constituents=names, confidence=level))
        for name, (H, g) in CONSTANTS.items():
            c = got[name]
            inside.append(abs(c["amplitude"] - H) <= c["amplitude_ci"])
            inside.append(abs(phase_diff(c["phase"], g)) <= c["phase_ci"])
    assert low <= np.mean(inside) <= high
