"""The next high water forecast conditioned on the storm now (monitor.surge.forecast).

Reference values here share no code with the module: the law of the invented data is
written out (normal errors whose spread grows with the storm), its quantiles come from
scipy.stats, and the rule of thumb is worked out by hand.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from monitor.surge import forecast as SF
from units import mm, hour
T0 = 1.7e9


def _grid(values, start=T0):
    return pd.Series(np.asarray(values, dtype=float),
                     index=pd.to_datetime(start + SF.GRID_S * np.arange(len(values)), unit="s", utc=True))


# --------------------------------------------------------------------------- conformal quantiles

def test_conformal_quantiles_are_the_finite_sample_order_statistics():
    # Lei et al. (2018), sec. 2.2: with n = 39 scores and a = 0.05 per tail the lower bound is
    # the floor(40 * 0.05) = 2nd smallest and the upper the ceil(40 * 0.95) = 38th smallest.
    z = np.arange(39.0)[::-1]
    assert SF.conformal_quantiles(z, 0.90) == (1.0, 37.0)


def test_too_few_scores_give_an_unbounded_side():
    # 18 scores cannot place a 95 % upper bound: ceil(19 * 0.95) = 19 > 18.
    lo, hi = SF.conformal_quantiles(np.arange(18.0), 0.90)
    assert hi == math.inf and lo == -math.inf


# --------------------------------------------------------------------------- conditioned coverage

def _invented_pairs(rng, n):
    """States with storms among calm, and what came: y = centre + spread * N(0, 1), the
    spread growing with the surge, its rate and the lead (an invented law)."""
    storm = rng.random(n) < 0.25
    r = np.where(storm, rng.uniform(0.3, 1.2, n), rng.normal(0, 0.08, n))
    rate = np.where(storm, rng.normal(0.05, 0.12, n), rng.normal(0, 0.02, n))
    lead = rng.uniform(0.2, 13.0, n)
    centre = -0.03 * r * lead + 0.6 * rate * np.minimum(lead, 4)
    spread = 0.02 + 0.02 * np.sqrt(lead) + 0.15 * np.abs(r) + 0.08 * np.abs(rate) * lead
    y = centre + spread * rng.standard_normal(n)
    hw = np.arange(n) // 20 * 45000.0  # twenty states per high water, one high water per 12.5 h
    return pd.DataFrame({"hw_t": hw, "lead_h": lead, "residual": r, "rate": rate,
                         "tendency": np.nan, "y": y}), centre, spread


@pytest.fixture(scope="module")
def fitted():
    rng = np.random.default_rng(11)
    train, _, _ = _invented_pairs(rng, 40_000)
    test, centre, spread = _invented_pairs(rng, 40_000)
    model = SF.fit_spread(train, pressure=False, coverage=0.90)
    lo, c, hi = model.predict(test["lead_h"], test["residual"], test["rate"])
    return test, centre, spread, lo, c, hi


@pytest.mark.parametrize("kind", ["storm", "calm"])
def test_ninety_percent_range_covers_from_both_sides(fitted, kind):
    test, _, _, lo, _, hi = fitted
    storm = SF.is_storm(test["residual"].to_numpy(), test["rate"].to_numpy())
    m = storm if kind == "storm" else ~storm
    y = test["y"].to_numpy()[m]
    below, above = np.mean(y < lo[m]), np.mean(y > hi[m])
    assert 0.03 <= below <= 0.07 and 0.03 <= above <= 0.07, (below, above)


def test_range_follows_the_true_spread_of_each_state(fitted):
    # The invented law's own 5 % and 95 % quantiles (scipy.stats.norm): the range's width tracks
    # them state by state, so a storm's range is wide and a calm one narrow.
    _, centre, spread, lo, _, hi = fitted
    true_width = 2 * stats.norm.ppf(0.95) * spread
    ratio = (hi - lo) / true_width
    assert 0.8 < np.median(ratio) < 1.25
    assert np.corrcoef(hi - lo, true_width)[0, 1] > 0.9


def test_storm_range_is_wider_than_a_calm_one_at_the_same_lead(fitted):
    test, _, _, lo, _, hi = fitted
    storm = SF.is_storm(test["residual"].to_numpy(), test["rate"].to_numpy())
    long = (test["lead_h"] > 5).to_numpy()
    assert np.mean((hi - lo)[storm & long]) > 2.5 * np.mean((hi - lo)[~storm & long])


# --------------------------------------------------------------------------- the wide rule of thumb

def test_too_few_storms_give_the_wide_rule_said_in_words():
    # A calm history: the residual wanders a few centimetres and never storms.
    rng = np.random.default_rng(3)
    n = 60 * 144
    hist = _grid(0.05 * np.sin(np.arange(n) * 2 * np.pi / 700) + rng.normal(0, 0.01, n))
    f = SF.SurgeForecaster.learn(hist, pd.DataFrame(columns=["hw_t", "skew_surge"]), min_storms=20)
    state = SF.StormState(t=T0 + 61 * 86400, residual=0.62, rate=0.12)
    fc = f.forecast(state, state.t + 5 * hour, 4.0)
    assert fc["method"] == "wide" and "WIDE RANGE" in fc["note"] and "only 0 storms" in fc["note"]
    # by hand: the history's own 5 %/95 % change over 5 h, widened by 0.5 * 0.62 + 0.12 * 5 = 0.91 m
    v = hist.to_numpy()
    d = v[30:] - v[:-30]
    q5, q95 = np.quantile(d, [0.05, 0.95])
    assert fc["forecast"] == pytest.approx(4.62, abs=0.1 * mm)
    assert fc["lower"] == pytest.approx(4.62 + q5 - 0.91, abs=0.1 * mm)
    assert fc["upper"] == pytest.approx(4.62 + q95 + 0.91, abs=0.1 * mm)


def test_no_history_at_all_still_gives_a_wide_range():
    f = SF.SurgeForecaster.learn(pd.Series(dtype=float), None)
    fc = f.forecast(SF.StormState(t=T0, residual=0.2, rate=-0.05), T0 + 2 * hour, 3.0)
    # +-0.25 m (rule of thumb) + 0.5 * 0.2 + 0.05 * 2 = 0.45 m either side of 3.2 m
    assert (fc["lower"], fc["upper"]) == pytest.approx((2.75, 3.65), abs=0.1 * mm)
    assert "too little history" in fc["note"]


def test_a_rising_surge_gives_the_keeps_rising_figure():
    f = SF.SurgeForecaster.learn(pd.Series(dtype=float), None)
    up = f.forecast(SF.StormState(t=T0, residual=0.5, rate=0.1), T0 + 4 * hour, 3.0)
    down = f.forecast(SF.StormState(t=T0, residual=0.5, rate=-0.1), T0 + 4 * hour, 3.0)
    assert up["rising"] == pytest.approx(3.0 + 0.5 + 0.4) and down["rising"] is None


# --------------------------------------------------------------------------- the state now

def test_state_rate_is_the_change_over_three_hours():
    r = _grid(0.05 * np.arange(30) / 6)   # rises 5 cm an hour
    st = SF.storm_state(r, T0 + 29 * SF.GRID_S)
    assert st.residual == pytest.approx(0.05 * 29 / 6) and st.rate == pytest.approx(0.05)


def test_barometer_gap_falls_back_to_no_pressure_and_says_so():
    r = _grid(np.full(30, 0.4))
    p = pd.Series([1000.0, 999.0], index=pd.to_datetime([T0, T0 + 600], unit="s", utc=True))
    st = SF.storm_state(r, T0 + 29 * SF.GRID_S, p, barometer=True)
    assert math.isnan(st.tendency)
    f = SF.SurgeForecaster.learn(pd.Series(dtype=float), None)
    fc = f.forecast(st, st.t + 3 * hour, 3.0)
    assert fc["pressure_note"].startswith("barometer silent since") and "without the pressure tendency" in fc["pressure_note"]


def test_pressure_tendency_over_three_hours():
    r = _grid(np.full(30, 0.4))
    t = T0 + SF.GRID_S * np.arange(30)
    p = pd.Series(1010.0 - 2.0 * (t - T0) / hour, index=pd.to_datetime(t, unit="s", utc=True))
    st = SF.storm_state(r, t[-1], p, barometer=True)
    assert st.tendency == pytest.approx(-2.0)
    assert SF.SurgeForecaster._pressure_note(st) == ""


def test_storms_are_counted_once_per_spell():
    v = np.zeros(12 * 144)                     # twelve calm days on the 10-minute grid
    for day, width in ((1, 12), (1.4, 12), (5, 30), (9, 3)):
        i = int(day * 144)
        v[i:i + width] = 0.5                   # two hours; two hours 9.6 h later; five hours; 30 minutes
    # the first two spells are less than a day apart (one storm); the last is under an hour (none)
    assert SF.count_storms(_grid(v)) == 2


# --------------------------------------------------------------------------- pairs from a history

def test_training_pairs_pair_each_state_with_what_came():
    r = _grid(np.linspace(0.0, 0.9, 10 * 6 + 1))   # ten hours, rising 9 cm an hour
    hw_t = T0 + 9.5 * hour
    pairs = SF.training_pairs(r, pd.DataFrame({"hw_t": [hw_t], "skew_surge": [1.0]}), max_lead_h=6)
    # grid times 9 h 20 min back to 3 h 30 min, every 10 minutes: 36 states
    assert len(pairs) == 36
    first = pairs.iloc[0]   # the last grid time before the high water: 9 h 20 min
    assert first["lead_h"] == pytest.approx(10 / 60)
    assert first["y"] == pytest.approx(1.0 - 0.09 * (9 + 20 / 60), abs=1 * mm)
    assert first["rate"] == pytest.approx(0.09, abs=0.1 * mm)
    assert pairs["lead_h"].max() <= 6.0 and (pairs["lead_h"] > 0).all()


def test_unconditioned_quantiles_are_todays_method():
    rng = np.random.default_rng(1)
    hist = _grid(np.cumsum(rng.normal(0, 0.01, 60 * 144)))
    d = hist.to_numpy()[12:] - hist.to_numpy()[:-12]
    lo, hi = np.quantile(d, [0.05, 0.95])  # numpy quantile, type 7 (Hyndman & Fan 1996)
    assert SF.unconditioned_quantiles(hist, 2 * hour) == pytest.approx((lo, hi), abs=0.01 * mm)
    assert SF.unconditioned_quantiles(hist.iloc[:13], 3 * hour) is None  # no pairs 3 h apart


def test_the_log_keeps_the_first_forecast_of_each_half_hour(tmp_path):
    import sqlite_utils

    db = sqlite_utils.Database(tmp_path / "s.db")
    SF.ensure_forecast_schema(db)
    base = {"hw_t": int(T0 + 6 * hour), "predicted_high": 3.0, "residual_now": 0.1, "lower": 2.9, "upper": 3.4}
    made = [int(T0), int(T0 + 60), int(T0 + 1800), int(T0 + 1860)]   # two passes in each of two half hours
    SF.log_forecasts(db.conn, "p", [{**base, "made_t": m, "forecast": 3.0 + i / 100} for i, m in enumerate(made)])
    got = SF.read_log(db, "p", T0 - 1, T0 + hour)
    assert list(got["made_t"]) == [int(T0), int(T0 + 1800)] and list(got["forecast"]) == [3.0, 3.02]


# --------------------------------------------------------------------------- what a learnt forecaster keeps

def _wandering_history(days, seed=8):
    """A residual wandering like a calm sea with gaps: a red-noise walk [m] on the grid, one bin
    in fifty missing."""
    rng = np.random.default_rng(seed)
    n = int(days * 86400 / SF.GRID_S)
    v = np.cumsum(rng.normal(0, 0.004, n))
    v -= np.convolve(v, np.ones(145) / 145, mode="same")
    v[rng.random(n) < 0.02] = np.nan
    return _grid(v)


@pytest.mark.parametrize("days", [40, 200])
def test_wide_spread_is_the_historys_own_at_every_lead(days):
    # Reference: numpy's type 7 quantiles (Hyndman & Fan 1996) of r(t + lead) - r(t) over the
    # history (kept as float32 by the forecaster), one lead at a time; with no surge and no
    # rate the wide rule adds nothing to them, so they must come out to the last bit.
    hist = _wandering_history(days)
    f = SF.SurgeForecaster.learn(hist, None, min_storms=10 ** 6)
    v = hist.to_numpy(dtype=np.float32).astype(float)
    steps = np.arange(0, int(SF.MAX_LEAD_H * hour / SF.GRID_S) + 1)
    lo, _, hi, conditioned, _ = f.ranges(steps * SF.GRID_S / hour, 0.0, 0.0)
    assert not conditioned.any()
    for k in steps:
        d = v[k:] - v[:len(v) - k] if k else np.zeros(np.isfinite(v).sum())
        expected = np.quantile(d[np.isfinite(d)], [(1 - 0.90) / 2, (1 + 0.90) / 2])
        assert (lo[k], hi[k]) == (expected[0], expected[1]), k


def test_wide_spread_is_kept_for_the_longest_lead_asked():
    hist = _wandering_history(40)
    f = SF.SurgeForecaster.learn(hist, None, min_storms=10 ** 6, max_lead_h=36.0)
    v = hist.to_numpy(dtype=np.float32).astype(float)
    k = int(36 * hour / SF.GRID_S)
    d = v[k:] - v[:-k]
    expected = np.quantile(d[np.isfinite(d)], [(1 - 0.90) / 2, (1 + 0.90) / 2])
    lo, _, hi, _, _ = f.ranges([36.0], 0.0, 0.0)
    assert (lo[0], hi[0]) == (expected[0], expected[1])


@pytest.mark.parametrize("n, nan_share, decimals", [(5_000, 0.0, None), (157_680, 0.02, None),
                                                    (60_000, 0.3, 3), (20_000, 0.0, 1)])
def test_type7_quantiles_are_numpys_to_the_bit(n, nan_share, decimals):
    # Reference: np.quantile on the finite values (type 7). Ties (rounded values), gaps and
    # heavy tails (Student t with 2 degrees of freedom) included; both tails and the ends.
    rng = np.random.default_rng(n)
    x = rng.standard_t(2, n)
    if decimals is not None:
        x = np.round(x, decimals)
    x[rng.random(n) < nan_share] = np.nan
    finite = np.isfinite(x)
    probs = ((1 - 0.90) / 2, (1 + 0.90) / 2, 0.0, 0.5, 1.0, 0.001, 0.123457, 0.876543, 0.31416)
    assert np.array_equal(SF.type7_quantiles(x, finite, probs), np.quantile(x[finite], probs))


# --------------------------------------------------------------------------- the fit's algebra

def _lstsq_reference(pairs, folds=5, coverage=0.90):
    """The location-scale fit and its out-of-fold quantiles written out with numpy's lstsq on
    the rows (the columns of the module's docstring: c on 1, L, r, r L, rate L; s on 1,
    sqrt L, |r|, |r| sqrt L, |rate| L; five contiguous blocks of high waters), no code shared."""
    L, r, q, y = (pairs[k].to_numpy(float) for k in ("lead_h", "residual", "rate", "y"))
    A = np.column_stack([np.ones_like(L), L, r, r * L, q * L])
    B = np.column_stack([np.ones_like(L), np.sqrt(L), np.abs(r), np.abs(r) * np.sqrt(L), np.abs(q) * L])
    hw = np.unique(pairs["hw_t"].to_numpy(float), return_inverse=True)[1]
    fold = np.minimum(hw * folds // (hw.max() + 1), folds - 1)

    def fit(m):
        c = np.linalg.lstsq(A[m], y[m], rcond=None)[0]
        return c, np.linalg.lstsq(B[m], np.abs(y[m] - A[m] @ c), rcond=None)[0]

    scores = np.empty(len(y))
    for f in range(folds):
        c, s = fit(fold != f)
        t = fold == f
        scores[t] = (y[t] - A[t] @ c) / np.maximum(B[t] @ s, 0.01)
    band = np.searchsorted([1.5, 2.5, 3.5, 4.5, 6.5, 9.5, 12.5, np.inf], L)
    storm = (np.abs(r) > 0.3) | (q > 0.1)
    quantiles = {}
    for b in range(8):
        for st in (False, True):
            z = np.sort(scores[(band == b) & (storm == st)])
            if len(z) >= 40:   # Lei et al. (2018), sec. 2.2: the floor((n+1)a)-th and ceil((n+1)(1-a))-th
                n, a = len(z), (1 - coverage) / 2
                quantiles[(b, st)] = (z[math.floor((n + 1) * a) - 1], z[math.ceil((n + 1) * (1 - a)) - 1])
    c, s = fit(np.ones(len(y), bool))
    return c, s, quantiles


def test_the_fold_fits_by_normal_equations_equal_least_squares_on_the_rows():
    # The fit sums each fold's normal equations once and takes a fold's complement as the total
    # minus the fold; numpy's lstsq on the rows of each complement is the reference.
    rng = np.random.default_rng(16)
    pairs, _, _ = _invented_pairs(rng, 12_000)
    model = SF.fit_spread(pairs, pressure=False, coverage=0.90)
    centre, scale, quantiles = _lstsq_reference(pairs)
    assert model.centre == pytest.approx(centre, abs=1e-9)
    assert model.scale == pytest.approx(scale, abs=1e-9)
    assert model.quantiles.keys() == quantiles.keys()
    for key, (lo, hi) in quantiles.items():
        assert model.quantiles[key] == pytest.approx((lo, hi), abs=1e-9)


# --------------------------------------------------------------------------- one high water at a time

def _forecast_by_arrays(f, state, hw_t, hw_level):
    """What SurgeForecaster.forecast gave before its one-state path: the dict made from
    ``ranges`` on one-element arrays (the array path, kept for many states at once)."""
    lead_h = max(0.0, float(hw_t) - float(state.t)) / 3600.0
    r = float(state.residual)
    persistence = float(hw_level) + r
    rising = persistence + state.rate * lead_h if math.isfinite(state.rate) and state.rate > 0 else None
    lo, c, hi, conditioned, used_p = f.ranges([lead_h], r, state.rate, state.tendency)
    storm = bool(SF.is_storm(np.array([state.residual]), np.array([state.rate]))[0])
    note = (f._conditioned_note(state, lead_h, bool(used_p[0])) if conditioned[0] else f._wide_note(state, lead_h))
    assert (f"a {'storm' if storm else 'calm'} state" in note) or not conditioned[0]
    return {"hw_t": int(round(hw_t)), "made_t": int(round(state.t)), "predicted_high": float(hw_level),
            "residual_now": r, "rate": SF._finite(state.rate), "tendency": SF._finite(state.tendency),
            "forecast": persistence + float(c[0]), "lower": persistence + float(lo[0]),
            "upper": persistence + float(hi[0]), "coverage": f.coverage, "persistence": persistence,
            "rising": rising, "method": "conditioned" if conditioned[0] else "wide", "note": note,
            "pressure_note": f._pressure_note(state)}


@pytest.fixture(scope="module")
def forecasters():
    """Forecasters of every kind: no history, a spread table with unknown leads, conditioned
    without pressure, conditioned with and without pressure."""
    rng = np.random.default_rng(5)
    pairs, _, _ = _invented_pairs(rng, 8_000)
    pairs["tendency"] = rng.normal(0, 1.0, len(pairs))
    pairs["y"] += 0.01 * pairs["tendency"] * pairs["lead_h"]
    plain = SF.fit_spread(pairs, pressure=False)
    with_p = SF.fit_spread(pairs, pressure=True)
    spread = np.sort(rng.normal(0, 0.1, (int(SF.MAX_LEAD_H * 6) + 1, 2)), axis=1)
    spread[rng.random(len(spread)) < 0.2] = np.nan
    make = lambda s, models, storms: SF.SurgeForecaster(  # noqa: E731
        spread=s, models=models, storms=storms, storms_with_pressure=storms // 2, min_storms=20,
        history_days=400.0 if s is not None else 3.0)
    return [make(None, {False: None, True: None}, 0),
            make(spread, {False: None, True: None}, 3),
            make(spread, {False: None, True: None}, 25),
            make(spread, {False: plain, True: None}, 60),
            make(spread, {False: plain, True: with_p}, 60)]


_floats = st.one_of(st.floats(-3.0, 3.0), st.just(math.nan))


@settings(max_examples=600, deadline=None)
@given(which=st.integers(0, 4), residual=st.floats(-2.0, 2.0), rate=_floats, tendency=_floats,
       lead_s=st.floats(-3600.0, 40 * 3600.0), level=st.floats(-2.0, 8.0),
       barometer=st.booleans(), since=st.one_of(st.none(), st.floats(-4 * 3600.0, 0.0)))
def test_one_forecast_is_the_array_paths_to_the_bit(forecasters, which, residual, rate, tendency, lead_s, level,
                                                     barometer, since):
    # Reference: SurgeForecaster.ranges (the array path) on one-element arrays, as the
    # forecast was made before its one-state path; every field equal, floats to the bit.
    f = forecasters[which]
    state = SF.StormState(t=float(T0), residual=residual, rate=rate, tendency=tendency, barometer=barometer,
                          pressure_since=None if since is None else T0 + since)
    got = f.forecast(state, T0 + lead_s, level)
    want = _forecast_by_arrays(f, state, T0 + lead_s, level)
    assert got.keys() == want.keys()
    for k in want:
        assert type(got[k]) is type(want[k]) and (got[k] == want[k] or got[k] != got[k] and want[k] != want[k]), k


def test_one_forecast_covers_each_path(forecasters):
    # the random states above reach the conditioned path with and without pressure, and the wide one
    state = SF.StormState(t=float(T0), residual=0.5, rate=0.05, tendency=-1.0)
    methods = [forecasters[k].forecast(state, T0 + 3 * hour, 3.0)["method"] for k in (1, 3, 4)]
    assert methods == ["wide", "conditioned", "conditioned"]
    assert "pressure falling" in forecasters[4].forecast(state, T0 + 3 * hour, 3.0)["note"]


@settings(max_examples=300, deadline=None)
@given(residual=st.one_of(st.floats(allow_nan=True), st.sampled_from([0.3, -0.3, 0.30000000000000004])),
       rate=st.one_of(st.floats(allow_nan=True), st.sampled_from([0.1, 0.10000000000000002, math.inf, -math.inf])))
def test_storm_of_one_state_is_is_storms(residual, rate):
    # Reference: is_storm on one-element arrays (numpy's nan_to_num for the rate)
    want = bool(SF.is_storm(np.array([residual]), np.array([rate]))[0])
    assert SF.StormState(t=0.0, residual=residual, rate=rate).storm is want


@settings(max_examples=300, deadline=None)
@given(now=st.one_of(st.integers(-SF.EXACT_SECONDS + 1, SF.EXACT_SECONDS - 1),
                     st.sampled_from([SF.EXACT_SECONDS - 1, -SF.EXACT_SECONDS + 1, 0, 1_760_000_000])))
def test_integral_seconds_are_pandas_seconds(now):
    # Reference: pandas' own conversion, as storm_state_arrays made it before
    want = pd.Timestamp(now, unit="s", tz="UTC").value / 1e9
    assert SF.as_seconds(now) == want and SF.as_seconds(np.int64(now)) == want
