"""Live residual, smoothing, skew surge, forecast and inverse barometer (monitor.surge.residual)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.surge import residual as R
from units import mm, minute, hour
M2_PERIOD = 12.4206012 * hour  # 360 / 28.9841042 deg/h (Schureman 1958, table 2)


def _index(n, step_min=1, start="2025-01-01"):
    return pd.date_range(start, periods=n, freq=f"{step_min}min", tz="UTC")


def test_inverse_barometer_is_minus_one_centimetre_per_hectopascal():
    # Pugh & Woodworth (2014), ch. 7: about -1 cm per hPa above the reference
    assert R.inverse_barometer(1023.25) == pytest.approx(-0.10, abs=0.01 * mm)
    assert R.inverse_barometer(1003.25) == pytest.approx(+0.10, abs=0.01 * mm)


def test_inverse_barometer_agrees_with_hydrostatic_balance():
    # 1 / (rho g) with rho = 1025 kg/m^3 (sea water) and g = 9.80665 m/s^2 (standard gravity):
    # 100 Pa / (1025 * 9.80665) = 9.95 mm per hPa; our 10 mm/hPa is within 0.1 mm/hPa
    hydro = 100 / (1025 * 9.80665)
    assert -R.inverse_barometer(1014.25) == pytest.approx(hydro, abs=0.1 * mm)


def test_residual_is_observed_minus_predicted():
    assert R.residual([3.0, 2.5], [2.75, 2.75]) == pytest.approx([0.25, -0.25])


def test_smoothing_removes_a_single_sample_spike():
    r = pd.Series(0.2, index=_index(120))
    r.iloc[60] = 3.0
    sm = R.smooth_residual(r, 30, 10)
    assert sm.max() == pytest.approx(0.2, abs=0.1 * mm)


def test_smoothing_follows_a_step_after_its_windows():
    r = pd.Series(np.r_[np.zeros(60), np.full(120, 0.5)], index=_index(180))
    sm = R.smooth_residual(r, 30, 10)
    assert sm.iloc[59] == pytest.approx(0.0) and sm.iloc[60 + 15 + 10 + 1] == pytest.approx(0.5)


def test_smoothing_is_causal():
    r = pd.Series(np.sin(np.arange(200) / 7.0), index=_index(200))
    full = R.smooth_residual(r, 30, 10)
    part = R.smooth_residual(r.iloc[:100], 30, 10)
    assert np.allclose(full.iloc[:100], part)


def test_failed_samples_do_not_enter_the_smoothed_residual():
    r = pd.Series(0.1, index=_index(60))
    r.iloc[30:40] = 5.0
    usable = np.ones(60, bool)
    usable[30:40] = False
    assert R.smooth_residual(r, 30, 10, usable).max() == pytest.approx(0.1)


def _tide(t_s, amp=1.0):
    return amp * np.cos(2 * np.pi * t_s / M2_PERIOD)


def _extremes(t0, t1):
    k = np.arange(np.ceil(t0 / (M2_PERIOD / 2)), np.floor(t1 / (M2_PERIOD / 2)) + 1)
    t = k * M2_PERIOD / 2
    return pd.DataFrame({"time": pd.to_datetime(t, unit="s", utc=True), "level": np.where(k % 2 == 0, 1.0, -1.0),
                         "kind": np.where(k % 2 == 0, "high", "low")})


def test_skew_surge_of_a_shifted_raised_tide():
    # Definition (Williams et al. 2016): highest observed level in the cycle minus predicted high water,
    # whatever the timing. A tide raised by 0.3 m and 40 min late has a skew surge of 0.3 m.
    t = np.arange(0, 3 * M2_PERIOD, 60.0)
    obs = pd.Series(_tide(t - 40 * minute) + 0.3, index=pd.to_datetime(t, unit="s", utc=True))
    ss = R.skew_surges(obs, _extremes(0, 3 * M2_PERIOD))
    assert len(ss) >= 1
    assert ss["skew_surge"].to_numpy() == pytest.approx(0.3, abs=1 * mm)


def test_incomplete_cycle_has_no_skew_surge():
    t = np.arange(0, M2_PERIOD * 1.2, 60.0)  # ends before the low water that closes the second cycle
    obs = pd.Series(_tide(t), index=pd.to_datetime(t, unit="s", utc=True))
    ss = R.skew_surges(obs, _extremes(0, 3 * M2_PERIOD))
    assert all(ss["hw_t"] < M2_PERIOD)


def test_cycle_with_a_long_gap_has_no_skew_surge():
    t = np.arange(0, 3 * M2_PERIOD, 60.0)
    keep = (t < M2_PERIOD - 2 * hour) | (t > M2_PERIOD + 2 * hour)
    obs = pd.Series(_tide(t[keep]), index=pd.to_datetime(t[keep], unit="s", utc=True))
    ss = R.skew_surges(obs, _extremes(0, 3 * M2_PERIOD))
    assert not np.any(np.isclose(ss["hw_t"], round(2 * M2_PERIOD / 2)))


def test_pressure_is_interpolated_and_not_carried_across_gaps():
    p = pd.Series([1000.0, 1010.0, 1020.0], index=pd.DatetimeIndex(["2025-01-01T00:00Z", "2025-01-01T00:30Z",
                                                                     "2025-01-01T06:00Z"]))
    got = R.pressure_at(_index(2, 15), p)
    assert got == pytest.approx([1000.0, 1005.0])
    assert np.isnan(R.pressure_at(pd.DatetimeIndex(["2025-01-01T03:00Z"]), p))[0]


def _turning(points):
    t = np.array([p[0] for p in points]) * hour
    return pd.DataFrame({"time": pd.to_datetime(t, unit="s", utc=True), "level": [p[1] for p in points],
                         "kind": [p[2] for p in points]})


def _through(points, t, lag=0.0, raise_by=0.0):
    # observed: the predicted turning points joined by straight lines, later by `lag` and raised
    return pd.Series(np.interp(t - lag, [p[0] * hour for p in points], [p[1] for p in points]) + raise_by,
                     index=pd.to_datetime(t, unit="s", utc=True))


DOUBLE_HIGH = [(0, -1.0, "low"), (5, 1.0, "high"), (6, 0.9, "low"), (7, 1.05, "high"), (12.5, -1.0, "low"),
               (17.5, 1.0, "high"), (18.5, 0.9, "low"), (19.5, 1.05, "high"), (25, -1.0, "low")]


def test_double_high_water_is_one_tidal_cycle():
    # Williams et al. (2016): one skew surge per tidal cycle, against the cycle's predicted high water
    # (the higher of a double high water, 1.05 m here), whenever the observed maximum occurs.
    t = np.arange(0, 25 * hour + 1, 60.0)
    ss = R.skew_surges(_through(DOUBLE_HIGH, t, lag=30 * minute, raise_by=0.3), _turning(DOUBLE_HIGH))
    assert ss["hw_t"].tolist() == [7 * hour, int(19.5 * hour)]
    assert ss["predicted_high"].to_numpy() == pytest.approx(1.05)
    assert ss["skew_surge"].to_numpy() == pytest.approx(0.3, abs=1 * mm)


DOUBLE_LOW = [(0, -1.0, "low"), (6, 1.0, "high"), (11.5, -1.0, "low"), (12.5, -0.9, "high"), (13.5, -1.05, "low"),
              (19.5, 1.0, "high"), (25, -1.0, "low")]


def test_rise_inside_a_double_low_water_has_no_skew_surge():
    # the small rise between the two lows of a double low water is not a high water of its own
    t = np.arange(0, 25 * hour + 1, 60.0)
    ss = R.skew_surges(_through(DOUBLE_LOW, t, raise_by=0.2), _turning(DOUBLE_LOW))
    assert ss["hw_t"].tolist() == [6 * hour, int(19.5 * hour)]
    assert ss["skew_surge"].to_numpy() == pytest.approx(0.2, abs=1 * mm)


def test_next_high_water_at_a_double_high_water_is_the_higher_peak():
    # Two predicted highs 2 h apart are one stand (a double high water); the quay meets the
    # higher one, whichever comes first (common practice, no source).
    t = pd.to_datetime(["2025-10-20T02:00Z", "2025-10-20T08:00Z", "2025-10-20T10:00Z",
                        "2025-10-20T14:30Z", "2025-10-20T20:30Z"])
    ext = pd.DataFrame({"time": t, "level": [0.5, 3.1, 3.3, 0.6, 3.2],
                        "kind": ["low", "high", "high", "low", "high"]})
    hw = R.next_high_water(ext, pd.Timestamp("2025-10-20T03:00Z"))
    assert hw["time"] == t[2] and hw["level"] == pytest.approx(3.3)
    assert R.next_high_water(ext, pd.Timestamp("2025-10-20T21:00Z")) is None


# peaks 3.3 h apart with a shallow dip in a 12.2 h cycle: one stand (NOAA 2003 glossary, double
# high water), the higher peak first
WIDE_DOUBLE_HIGH = [(0, -1.0, "low"), (4.45, 1.05, "high"), (6.1, 0.92, "low"), (7.75, 1.0, "high"),
                    (12.2, -1.0, "low"), (16.65, 1.05, "high"), (18.3, 0.92, "low"), (19.95, 1.0, "high"),
                    (24.4, -1.0, "low")]


def test_double_high_water_with_peaks_3_h_apart_is_one_cycle_with_the_surge_on_its_second_peak():
    # The stand is told by its shape (a dip of 8-13 cm in a 2 m range), not by the time between
    # its peaks: a 0.5 m surge on the lower second peak makes the cycle's skew surge 0.45 m, the
    # highest observed level less the predicted high water (Williams et al. 2016); no cycle is
    # lost. A fixed quarter-period rule split each stand into two cycles under 6.21 h and
    # dropped both.
    t = np.arange(0, 24.4 * hour + 1, 60.0)
    surge = sum(0.5 * np.exp(-0.5 * ((t - c * hour) / (40 * minute)) ** 2) for c in (7.75, 19.95))
    obs = _through(WIDE_DOUBLE_HIGH, t) + pd.Series(surge, index=pd.to_datetime(t, unit="s", utc=True))
    ss = R.skew_surges(obs, _turning(WIDE_DOUBLE_HIGH))
    assert ss["hw_t"].tolist() == [round(4.45 * hour), round(16.65 * hour)]
    assert ss["predicted_high"].to_numpy() == pytest.approx(1.05)
    assert ss["skew_surge"].to_numpy() == pytest.approx(0.45, abs=1 * mm)


def test_skew_surge_at_a_double_high_water_port_from_the_predicted_stands():
    # The extremes as the predictor makes them (both peaks listed, the dip left out) for an
    # invented double-high-water port whose peaks come 2.8-3.3 h apart; the observed sea is the
    # tide synthesised independently (tests/reference_tide.py) plus 0.4 m on every second peak.
    import reference_tide as ref
    from predictor import TideModel

    g2 = 100.0
    port = {"M2": (1.2, g2), "S2": (0.35, g2 + 30), "M4": (0.30, 2 * g2 + 180), "MS4": (0.15, 2 * g2 + 210),
            "M6": (0.10, (3 * g2 + 180) % 360)}
    model = TideModel(mean=0.0, constituents=[{"name": n, "amplitude": a, "phase": g % 360}
                                              for n, (a, g) in port.items()])
    start = pd.Timestamp("2031-03-06T00:00Z")
    ext = model.high_low(start - pd.Timedelta(hours=14), start + pd.Timedelta(days=4))
    second = ext[(ext["kind"] == "high") & (ext.groupby("stand").cumcount() == 1)]
    assert len(second) >= 6  # double high waters these days
    t = start.timestamp() + np.arange(0, 3.5 * 86400, 60.0)
    bump = sum(0.4 * np.exp(-0.5 * ((t - s.timestamp()) / (30 * minute)) ** 2) for s in second["time"])
    obs = pd.Series(ref.tide(t, 0.0, port) + bump, index=pd.to_datetime(t, unit="s", utc=True))
    ss = R.skew_surges(obs, ext)
    stands = ext[(ext["kind"] == "high") & ext["principal"]]
    inside = stands[(stands["time"] > start + pd.Timedelta(hours=7)) & (stands["time"] < start + pd.Timedelta(days=3))]
    assert set(int(round(x.timestamp())) for x in inside["time"]) <= set(ss["hw_t"])  # no cycle lost
    doubles = ss[ss["hw_t"].isin([int(round(x.timestamp())) for x in
                                   ext.loc[ext["stand"].isin(second["stand"]) & ext["principal"], "time"]])]
    # a 0.4 m bump on a peak no higher than the stand's high water: the skew surge is 0.4 m
    # less what the second peak stands below the first (at most 0.16 m here), never millimetres
    assert (doubles["skew_surge"] > 0.2).all() and len(doubles) >= 5
def test_high_waters_within_a_horizon_one_per_stand():
    # the double high water counts once, at its higher peak; the next one always comes back
    t = pd.to_datetime(["2025-10-20T02:00Z", "2025-10-20T08:00Z", "2025-10-20T10:00Z",
                        "2025-10-20T14:30Z", "2025-10-20T20:30Z", "2025-10-21T09:00Z"])
    ext = pd.DataFrame({"time": t, "level": [0.5, 3.1, 3.3, 0.6, 3.2, 3.0],
                        "kind": ["low", "high", "high", "low", "high", "high"]})
    now = pd.Timestamp("2025-10-20T03:00Z")
    got = R.high_waters_within(ext, now, now + pd.Timedelta(hours=18))
    assert list(got["time"]) == [t[2], t[4]] and list(got["level"]) == [3.3, 3.2]
    got = R.high_waters_within(ext, now, now + pd.Timedelta(hours=1))
    assert list(got["time"]) == [t[2]]


def test_smoothing_on_arrays_equals_pandas_rolling_windows():
    # the daemon's numpy smoother against pandas' own rolling median and mean (time windows,
    # closed on the right): irregular steps, a gap past the staleness limit, failed samples
    rng = np.random.default_rng(16)
    step = rng.choice([30, 60, 60, 90, 120], size=400)
    t = 1_760_000_000 + np.cumsum(step)
    t[200:] += 50 * minute  # a silence longer than the median window
    r = 0.3 * np.sin(t / 5000.0) + rng.normal(0, 0.02, len(t))
    r[rng.integers(0, len(t), 15)] = np.nan
    usable = rng.random(len(t)) > 0.1
    idx = pd.to_datetime(t, unit="s", utc=True)
    for med, mean in ((30, 10), (7.5, 0), (15, 20)):
        want = R.smooth_residual(pd.Series(r, index=idx), med, mean, usable).to_numpy()
        got = R.smooth_residual_arrays(t * 1_000_000_000, r, usable, med, mean)
        assert np.array_equal(np.isnan(got), np.isnan(want))
        ok = ~np.isnan(want)
        assert np.abs(got[ok] - want[ok]).max() < 1e-9 * mm


def _high_waters_by_groupby(ext, after, until):
    # reference: pandas' groupby over the stands (the way high_waters_within was first written)
    highs = ext[(ext["kind"] == "high") & (ext["time"] > after)]
    out = highs.loc[highs.groupby("stand", sort=False)["level"].idxmax(), ["time", "level"]]
    out = out.sort_values("time").reset_index(drop=True)
    keep = (out["time"] <= until).to_numpy().copy()
    keep[:1] = True
    return out[keep]


def test_high_waters_within_equals_a_groupby_over_the_stands():
    # many horizons over a table with double high waters
    t = pd.date_range("2025-10-20T02:00Z", periods=40, freq="185min")
    kinds = np.where(np.arange(40) % 3 == 0, "low", "high")
    level = 2.0 + np.sin(np.arange(40)) + np.where(kinds == "low", -2.0, 0.0)
    ext = R.tide_stands(pd.DataFrame({"time": t, "level": level, "kind": kinds}))
    assert ext.groupby("stand").size().max() > 1  # double high waters present
    for hours in range(0, 80, 3):
        now = t[0] + pd.Timedelta(hours=hours, minutes=7)
        want = _high_waters_by_groupby(ext, now, now + pd.Timedelta(hours=13))
        got = R.high_waters_within(ext, now, now + pd.Timedelta(hours=13))
        assert list(got["time"]) == list(want["time"]) and list(got["level"]) == list(want["level"])
