"""High and low waters, and tidal datums, against independent references.

References: the tide is synthesised densely by tests/reference_tide.py, which shares no code
with predictor/ (pyerfa arguments, Schureman's V, Doodson's nodal series). High and low waters
are the turning points of the curve and tidal datums are computed straight from the definitions
of NOAA (2003), Computational Techniques for Tidal Datums Handbook, NOS CO-OPS 2: one high and
one low water per tidal cycle (the two peaks of a double high water are one high water, the
"relatively small depression" between them no low water; glossary), MHW the mean of the high
waters, MLW of the low waters, MTL their mean, MN their difference; MHHW/MLLW the mean of the
higher high/lower low water of each tidal day; MSL the mean level. The reference series and the
product differ by the truncation of the published nodal series (under a millimetre here).
"""
import numpy as np
import pandas as pd
import pytest

import reference_tide as ref
from predictor import TideModel
from predictor.datums import tidal_datums
from units import mm, second, minute, hour, day


# invented constants (mixed, mainly semidiurnal, with a shallow-water M4)
MIXED = {"mean": 2.2, "constituents": [
    {"name": "M2", "amplitude": 0.9, "phase": 312.0}, {"name": "S2", "amplitude": 0.3, "phase": 348.0},
    {"name": "N2", "amplitude": 0.18, "phase": 289.0}, {"name": "K1", "amplitude": 0.35, "phase": 78.0},
    {"name": "O1", "amplitude": 0.28, "phase": 331.0}, {"name": "M4", "amplitude": 0.06, "phase": 105.0},
    {"name": "MS4", "amplitude": 0.03, "phase": 150.0}, {"name": "Mf", "amplitude": 0.02, "phase": 10.0},
]}

# An invented shallow-water port with a double high water: M4, MS4 and MN4 in opposition to
# M2, S2 and N2 at high water, M6 deepening the dip (Pugh & Woodworth 2014, sec. 7.5, describe
# the mechanism). Its peaks come 2.8-3.3 h apart with dips of 1.5-18 cm in a 2.5 m range.
G2 = 100.0
DOUBLE_HIGH = {"M2": (1.2, G2), "S2": (0.35, G2 + 30), "N2": (0.22, G2 - 25), "K1": (0.08, 200.0),
               "O1": (0.06, 180.0), "M4": (0.30, (2 * G2 + 180) % 360),
               "MS4": (0.15, (2 * G2 + 30 + 180) % 360), "MN4": (0.08, (2 * G2 - 25 + 180) % 360),
               "M6": (0.10, (3 * G2 + 180) % 360)}
# An invented diurnal port: one high and one low water every tidal day, all year.
DIURNAL = {"K1": (0.50, 120.0), "O1": (0.25, 95.0), "P1": (0.10, 118.0), "Q1": (0.05, 80.0),
           "M2": (0.015, 200.0), "S2": (0.005, 230.0)}
YEAR_START = pd.Timestamp("2031-01-01", tz="UTC").timestamp()


def model_of(constants, mean=0.0):
    return TideModel(mean=mean, constituents=[{"name": n, "amplitude": a, "phase": g}
                                              for n, (a, g) in constants.items()])


def as_table(d):
    return {c["name"]: (c["amplitude"], c["phase"]) for c in d["constituents"]}


@pytest.fixture(scope="module")
def mixed():
    return TideModel.from_dict(MIXED)


@pytest.fixture(scope="module")
def dense():
    # the independent synthesis, one sample a second
    t = pd.Timestamp("2027-09-01", tz="UTC").timestamp() + np.arange(0.0, 3 * day, 1.0)
    return t, ref.tide(t, MIXED["mean"], as_table(MIXED))


@pytest.fixture(scope="module")
def events(mixed):
    return mixed.high_low("2027-09-01T01:00Z", "2027-09-03T23:00Z", step="30min")


def _dense_extreme(dense, t, kind):
    tt, y = dense
    i = np.searchsorted(tt, t)
    w = slice(i - 1800, i + 1800)  # half an hour either side
    j = np.argmax(y[w]) if kind == "high" else np.argmin(y[w])
    return tt[w][j], y[w][j]


def local_extrema(t, y):
    """Turning points of a dense series: (times, levels, is_high), by sign changes of its steps."""
    d = np.sign(np.diff(y))
    turn = np.flatnonzero(d[1:] != d[:-1]) + 1
    return t[turn], y[turn], d[turn - 1] > 0


def test_high_low_alternate_and_are_labelled(events):
    assert list(events.columns[:3]) == ["time", "level", "kind"]
    assert str(events["time"].dt.tz) == "UTC"
    kinds = events["kind"].tolist()
    assert all(a != b for a, b in zip(kinds, kinds[1:]))
    assert events["principal"].all()  # no stand at this port: every turning point is a tide
    assert 10 <= len(events) <= 12  # about 3 days of a semidiurnal tide


def test_high_low_times_match_an_independent_dense_synthesis(events, dense):
    # the nodal series' truncation moves a turning point by a few seconds at most
    for row in events.itertuples():
        t_ref, _ = _dense_extreme(dense, row.time.value / 1e9, row.kind)
        assert abs(t_ref - row.time.value / 1e9) < 10 * second


def test_high_low_levels_match_an_independent_dense_synthesis(events, dense):
    for row in events.itertuples():
        _, y_ref = _dense_extreme(dense, row.time.value / 1e9, row.kind)
        assert abs(y_ref - row.level) < 1 * mm


# ----------------------------------------------------------------- double high water


@pytest.fixture(scope="module")
def double_high_events():
    return model_of(DOUBLE_HIGH).high_low("2031-03-01T00:00Z", "2031-03-15T00:00Z", step="10min")


@pytest.fixture(scope="module")
def double_high_dense():
    t = pd.Timestamp("2031-03-01", tz="UTC").timestamp() + np.arange(0.0, 14 * day + 1, 10.0)
    return local_extrema(t, ref.tide(t, 0.0, DOUBLE_HIGH))


def test_both_peaks_of_a_double_high_water_are_listed_as_one_stand(double_high_events, double_high_dense):
    # NOAA (2003) glossary: two maxima separated by a relatively small depression are one high
    # water; the table shows both peaks, marked as one stand, and not the depression.
    tt, yy, hi = double_high_dense
    highs = double_high_events[double_high_events["kind"] == "high"]
    assert len(highs) == hi.sum()  # every maximum of the dense curve is listed
    for row in highs.itertuples():
        assert np.min(np.abs(tt[hi] - row.time.value / 1e9)) < 1 * minute
    sizes = highs.groupby("stand").size()
    assert (sizes == 2).sum() >= 20  # most high waters of these two weeks are double
    for _, stand in highs.groupby("stand"):
        assert stand["principal"].sum() == 1
        assert stand.loc[stand["principal"], "level"].iloc[0] == stand["level"].max()


def test_the_dip_of_a_double_high_water_is_not_a_low_water(double_high_events):
    # one low water per tidal cycle: lows and high-water stands alternate
    stands = double_high_events.groupby("stand")["kind"].first().tolist()
    assert all(a != b for a, b in zip(stands, stands[1:]))
    lows = double_high_events[double_high_events["kind"] == "low"]
    assert lows["level"].max() < -0.4  # every low listed is a real low water of this port


def _cycles(t, y, phase_cycles, edge):
    """Maximum (edge 0.5) or minimum (edge 0.0) of the dense series in every M2 cycle.

    The cycles run between the times when M2's own phase passes ``edge`` (in cycles; M2's high
    water at whole cycles), so each holds one high-water stand (or one low water) well inside
    it. A cycle cut by the record's ends counts when its extreme is not at the cut.
    """
    k = np.arange(np.ceil(phase_cycles[0] - edge), np.floor(phase_cycles[-1] - edge) + 1) + edge
    cuts = np.concatenate([[0], np.searchsorted(phase_cycles, k), [len(y)]])
    pick = np.argmax if edge == 0.5 else np.argmin
    out = []
    for i, j in zip(cuts[:-1], cuts[1:]):
        if j - i < 2:
            continue
        q = i + int(pick(y[i:j]))
        if 0 < q < len(y) - 1:
            out.append(y[q])
    return np.array(out)


def _tidal_days(y, phase_cycles, first_edge, pick):
    """``pick`` (max/min) of the series over tidal days starting where M2's phase passes
    ``first_edge`` + 2k cycles (two M2 cycles: one lunar day)."""
    k = np.arange(np.ceil((phase_cycles[0] - first_edge) / 2), np.floor((phase_cycles[-1] - first_edge) / 2) + 1)
    cuts = np.searchsorted(phase_cycles, 2 * k + first_edge)
    return np.array([pick(y[i:j]) for i, j in zip(cuts[:-1], cuts[1:])])


@pytest.fixture(scope="module")
def double_high_handbook():
    """Datums of the double-high-water port over 2031 straight from the definitions (NOAA 2003)."""
    t = YEAR_START + np.arange(0.0, 365.25 * day, 120.0)
    y = ref.tide(t, 0.0, DOUBLE_HIGH)
    a = ref.arguments(t)
    _, u = ref.nodal("M2", a["N"])
    phase = np.unwrap(np.radians(ref.SCHUREMAN_V["M2"][0](a) + u - G2)) / (2 * np.pi)
    highs, lows = _cycles(t, y, phase, 0.5), _cycles(t, y, phase, 0.0)
    # the tidal day can begin with either of two M2 cycles; the handbook ties it to the Moon's
    # transit at the station, which a tide model does not carry: both pairings bound MHHW, MLLW
    mhhw = [_tidal_days(y, phase, e, np.max).mean() for e in (0.5, 1.5)]
    mllw = [_tidal_days(y, phase, e, np.min).mean() for e in (0.0, 1.0)]
    return {"MHW": highs.mean(), "MLW": lows.mean(), "MTL": 0.5 * (highs.mean() + lows.mean()),
            "MN": highs.mean() - lows.mean(), "MSL": y.mean(), "HAT": y.max(), "LAT": y.min(),
            "MHHW": mhhw, "MLLW": mllw}


@pytest.fixture(scope="module")
def double_high_datums():
    return tidal_datums(model_of(DOUBLE_HIGH), start="2031-01-01", years=1.0)


@pytest.mark.parametrize("name", ["MHW", "MLW", "MTL", "MN", "MSL", "HAT", "LAT"])
def test_double_high_water_datums_follow_the_handbook_definitions(name, double_high_datums,
                                                                  double_high_handbook):
    assert double_high_datums[name] == pytest.approx(double_high_handbook[name], abs=2 * mm)


@pytest.mark.parametrize("name", ["MHHW", "MLLW"])
def test_double_high_water_higher_high_and_lower_low_lie_within_the_tidal_day_pairings(
        name, double_high_datums, double_high_handbook):
    lo, hi = sorted(double_high_handbook[name])
    assert lo - 2 * mm <= double_high_datums[name] <= hi + 2 * mm


# ----------------------------------------------------------------- diurnal port


@pytest.fixture(scope="module")
def diurnal_handbook():
    t = YEAR_START + np.arange(0.0, 365.25 * day, 120.0)
    y = ref.tide(t, 0.0, DIURNAL)
    tt, yy, hi = local_extrema(t, y)
    # a diurnal port: never two high (or low) waters in one tidal day
    assert np.min(np.diff(tt[hi])) > 18 * hour and np.min(np.diff(tt[~hi])) > 18 * hour
    return {"MHW": yy[hi].mean(), "MHHW": yy[hi].mean(), "MLW": yy[~hi].mean(), "MLLW": yy[~hi].mean(),
            "MSL": y.mean(), "HAT": y.max(), "LAT": y.min()}


@pytest.mark.parametrize("name", ["MHW", "MHHW", "MLW", "MLLW", "MSL", "HAT", "LAT"])
def test_diurnal_port_datums_follow_the_handbook_definitions(name, diurnal_handbook):
    # NOAA (2003): with one high water a tidal day, that high water is also the higher high
    got = tidal_datums(model_of(DIURNAL), start="2031-01-01", years=1.0)
    assert got[name] == pytest.approx(diurnal_handbook[name], abs=2 * mm)


# ----------------------------------------------------------------- mixed port


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
    # Analytic: the highs of f H cos(...) are mean + f H; averaged over the nodal cycle, with f from
    # Doodson's series (reference_tide, Pugh & Woodworth 2014 Table 4.3), not the product's formula.
    H = 1.0
    m = TideModel(mean=0.5, constituents=[{"name": "M2", "amplitude": H, "phase": 40.0}])
    d = tidal_datums(m, start="2001-01-01", step="30min")
    t = 978307200.0 + 86400.0 * np.arange(int(18.61 * 365.25))
    mean_f = ref.nodal("M2", ref.arguments(t)["N"])[0].mean()
    assert d["MHW"] - d["MSL"] == pytest.approx(H * mean_f, abs=0.3 * mm)
    assert d["MSL"] - d["MLW"] == pytest.approx(H * mean_f, abs=0.3 * mm)
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
