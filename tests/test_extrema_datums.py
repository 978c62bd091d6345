"""High and low waters, and tidal datums.

References: turning points checked against a dense 1-second direct evaluation of the
same model (the definition of high/low water as the curve's turning points, NOAA 2003);
datum definitions and ordering from NOAA (2003), Computational Techniques for Tidal
Datums Handbook, NOS CO-OPS 2; the pure-M2 relation MHW - MSL = H * mean(f) follows
from the prediction formula (Foreman 1977) and is analytic.
"""
import numpy as np
import pytest

from predictor import TideModel
from predictor.datums import tidal_datums
from predictor.nodal import nodal_factors

mm = 1e-3
second = 1.0

# invented constants (mixed, mainly semidiurnal, with a shallow-water M4)
MIXED = {"mean": 2.2, "constituents": [
    {"name": "M2", "amplitude": 0.9, "phase": 312.0}, {"name": "S2", "amplitude": 0.3, "phase": 348.0},
    {"name": "N2", "amplitude": 0.18, "phase": 289.0}, {"name": "K1", "amplitude": 0.35, "phase": 78.0},
    {"name": "O1", "amplitude": 0.28, "phase": 331.0}, {"name": "M4", "amplitude": 0.06, "phase": 105.0},
    {"name": "MS4", "amplitude": 0.03, "phase": 150.0}, {"name": "Mf", "amplitude": 0.02, "phase": 10.0},
]}


@pytest.fixture(scope="module")
def mixed():
    return TideModel.from_dict(MIXED)


@pytest.fixture(scope="module")
def dense(mixed):
    times = np.arange(np.datetime64("2027-09-01T00:00"), np.datetime64("2027-09-04T00:00"),
                      np.timedelta64(1, "s"))
    return times.astype("datetime64[ns]").astype(np.int64) / 1e9, mixed.predict(times)


@pytest.fixture(scope="module")
def events(mixed):
    return mixed.high_low("2027-09-01T01:00Z", "2027-09-03T23:00Z", step="30min")


def _dense_extreme(dense, t, kind):
    tt, y = dense
    i = np.searchsorted(tt, t)
    w = slice(i - 1800, i + 1800)  # half an hour either side
    j = np.argmax(y[w]) if kind == "high" else np.argmin(y[w])
    return tt[w][j], y[w][j]


def test_high_low_alternate_and_are_labelled(events):
    assert list(events.columns) == ["time", "level", "kind"]
    assert str(events["time"].dt.tz) == "UTC"
    kinds = events["kind"].tolist()
    assert all(a != b for a, b in zip(kinds, kinds[1:]))
    assert 10 <= len(events) <= 12  # about 3 days of a semidiurnal tide


def test_high_low_times_match_dense_evaluation(events, dense):
    for row in events.itertuples():
        t_ref, _ = _dense_extreme(dense, row.time.value / 1e9, row.kind)
        assert abs(t_ref - row.time.value / 1e9) < 2 * second


def test_high_low_levels_match_dense_evaluation(events, dense):
    for row in events.itertuples():
        _, y_ref = _dense_extreme(dense, row.time.value / 1e9, row.kind)
        assert abs(y_ref - row.level) < 0.1 * mm


@pytest.fixture(scope="module")
def datums(mixed):
    return tidal_datums(mixed)


def test_datums_are_ordered(datums):
    # NOAA (2003): HAT > MHHW >= MHW > MTL > MLW >= MLLW > LAT
    d = datums
    assert d["HAT"] > d["MHHW"] >= d["MHW"] > d["MTL"] > d["MLW"] >= d["MLLW"] > d["LAT"]


def test_mixed_tide_has_diurnal_inequality(datums):
    assert datums["MHHW"] - datums["MHW"] > 0.05
    assert datums["MSL"] == pytest.approx(2.2, abs=1 * mm)


def test_ranges_are_differences(datums):
    assert datums["MN"] == pytest.approx(datums["MHW"] - datums["MLW"])
    assert datums["GT"] == pytest.approx(datums["MHHW"] - datums["MLLW"])


def test_pure_m2_mean_high_water_is_amplitude_times_mean_f():
    # Analytic: highs of f H cos(...) are mean + f H; averaged over the nodal cycle.
    H = 1.0
    m = TideModel(mean=0.5, constituents=[{"name": "M2", "amplitude": H, "phase": 40.0}])
    d = tidal_datums(m, start="2001-01-01", step="30min")
    t = 978307200.0 + 86400.0 * np.arange(int(18.61 * 365.25))
    mean_f = nodal_factors(t, ["M2"], daily=False)[0].mean()
    assert d["MHW"] - d["MSL"] == pytest.approx(H * mean_f, abs=0.2 * mm)
    assert d["MSL"] - d["MLW"] == pytest.approx(H * mean_f, abs=0.2 * mm)
    # HAT of pure M2 is the largest f: 1.038 (Schureman's range, from memory)
    assert d["HAT"] - d["MSL"] == pytest.approx(1.038 * H, abs=1 * mm)


def test_trend_is_left_out_of_datums(mixed):
    with_trend = TideModel.from_dict(dict(MIXED, trend=0.01))
    a = tidal_datums(mixed, years=1.0)
    b = tidal_datums(with_trend, years=1.0)
    assert b["MHW"] == pytest.approx(a["MHW"], abs=1e-9)


def _shifted(constants, hours):
    # the same tide `hours` later: every phase lag grows by speed x hours (Foreman 1977)
    from predictor.constituents import speeds
    return TideModel(mean=0.0, constituents=[
        {"name": n, "amplitude": a, "phase": (g + speeds([n])[0] * hours) % 360.0} for n, a, g in constants])


def test_lower_low_water_does_not_depend_on_where_tidal_days_start():
    # NOAA (2003): MLLW is the mean of the lower low water of each tidal day; moving the whole
    # tide by a few hours must not change it. Tidal days that began on a low water once put one
    # low in one day and three in the next (2 cm off for this invented mixed tide).
    tide = [("M2", 1.0, 0.0), ("S2", 0.35, 30.0), ("N2", 0.2, 340.0), ("K1", 0.3, 90.0), ("O1", 0.25, 270.0)]
    a = tidal_datums(_shifted(tide, 0.0), years=2.0)
    b = tidal_datums(_shifted(tide, 10.0), years=2.0)
    assert b["MLLW"] == pytest.approx(a["MLLW"], abs=1 * mm)


def test_higher_high_water_does_not_depend_on_where_tidal_days_start():
    # NOAA (2003): MHHW, the mean of the higher high water of each tidal day, is a property of the
    # tide, not of the hour the computation starts.
    tide = [("M2", 1.0, 0.0), ("S2", 0.35, 30.0), ("N2", 0.2, 340.0), ("K1", 0.3, 100.0), ("O1", 0.25, 80.0)]
    a = tidal_datums(_shifted(tide, 0.0), years=2.0)
    b = tidal_datums(_shifted(tide, 4.0), years=2.0)
    assert b["MHHW"] == pytest.approx(a["MHHW"], abs=1 * mm)
