"""TideModel: prediction against an independent evaluation; the fast path; constants file.

Accuracy is checked against tests/reference_tide.py, which shares no code with predictor/:
arguments from pyerfa (IERS 2003 fundamental arguments), V in Schureman's (1958, Table 2)
T-form, f and u from Doodson's published series (Pugh & Woodworth 2014, Table 4.3). The two
differ by the truncation of those series (see the tolerances). The block-phasor fast path is
further checked, at a thousandth of a millimetre, against the product's own sample-by-sample
evaluation of the same formulas (an internal consistency check of the fast algorithm only).
"""
import numpy as np
import pandas as pd
import pytest

import reference_tide as ref
from predictor import TideModel
from predictor.constituents import CATALOGUE
from predictor.model import SECONDS_PER_YEAR, ConstantsFileError
from predictor.nodal import arguments
from units import mm, second, minute


@pytest.fixture(scope="module")
def model():
    # every catalogue constituent, invented amplitudes up to 0.5 m
    rng = np.random.default_rng(7)
    cons = [{"name": n, "amplitude": float(rng.uniform(0.002, 0.5)), "phase": float(rng.uniform(0, 360))}
            for n in CATALOGUE]
    return TideModel(mean=1.7, constituents=cons, trend=0.004, trend_epoch="2020-01-01T00:00:00Z")


def _series_tol(name):
    # how far the published series may stand from the closed forms (reference_tide.SERIES_TOL)
    return ref.tolerance(name)


# one sample every 3 days for a whole nodal cycle, and a day at 10-minute steps
NODAL_CYCLE = 1.5e9 + np.arange(0.0, 18.7 * 365.25 * 86400, 3 * 86400.0)
DENSE_DAY = 1.9e9 + np.arange(0.0, 86400.0, 600.0)


@pytest.mark.parametrize("name", sorted(ref.SCHUREMAN_V))
def test_each_constituent_matches_an_independent_evaluation_over_a_nodal_cycle(name):
    m = TideModel(mean=0.0, constituents=[{"name": name, "amplitude": 1.0, "phase": 57.0}])
    for t in (NODAL_CYCLE, DENSE_DAY):
        got = m.predict(t)
        want = ref.tide(t, 0.0, {name: (1.0, 57.0)})
        assert np.max(np.abs(got - want)) < _series_tol(name), name


# an invented port: amplitude [m], Greenwich phase lag [deg]
PORT = {"M2": (1.05, 312.0), "S2": (0.34, 348.0), "N2": (0.2, 289.0), "K2": (0.09, 345.0),
        "K1": (0.31, 78.0), "O1": (0.24, 331.0), "P1": (0.1, 75.0), "Q1": (0.05, 310.0),
        "M4": (0.05, 105.0), "MS4": (0.03, 150.0), "Mf": (0.02, 10.0), "Sa": (0.06, 200.0)}


@pytest.mark.parametrize("start", ["2001-03-01", "2026-07-15", "2044-11-30"])
def test_uniform_prediction_of_a_port_matches_an_independent_evaluation(start):
    # three epochs spread over the nodal cycle; one-minute steps through six weeks
    m = TideModel(mean=2.2, constituents=[{"name": n, "amplitude": a, "phase": g} for n, (a, g) in PORT.items()])
    times = pd.date_range(start, periods=6 * 7 * 1440, freq="1min", tz="UTC")
    t = times.as_unit("ns").asi8 / 1e9
    tol = sum(a * _series_tol(n) / 1.0 for n, (a, _) in PORT.items())
    assert np.max(np.abs(m.predict(times) - ref.tide(t, 2.2, PORT))) < tol


def _direct(model, t):
    """The product's own formulas sample by sample: a check of the fast path only."""
    vu, f = arguments(t, model.names, daily=False)
    H = np.array([c["amplitude"] for c in model.constituents])
    g = np.array([c["phase"] for c in model.constituents])
    level = model.mean + model.trend * (t - model.trend_epoch) / SECONDS_PER_YEAR
    for k in range(len(H)):
        level = level + f[:, k] * H[k] * np.cos(np.radians(vu[:, k] - g[k]))
    return level


def _unix(times):
    return np.asarray(times).astype("datetime64[ns]").astype(np.int64) / 1e9


def test_uniform_times_match_direct_evaluation_across_many_blocks(model):
    times = np.arange(np.datetime64("2033-02-20T03:00"), np.datetime64("2033-03-15T00:00"),
                      np.timedelta64(7, "m"))
    assert np.max(np.abs(model.predict(times) - _direct(model, _unix(times)))) < 0.005 * mm


def test_irregular_times_match_direct_evaluation(model):
    rng = np.random.default_rng(3)
    t = np.sort(1.9e9 + rng.uniform(0, 40 * 86400, 3000))
    times = (t * 1e9).astype(np.int64).astype("datetime64[ns]")
    assert np.max(np.abs(model.predict(times) - _direct(model, t))) < 0.005 * mm


def test_uniform_fast_path_equals_general_path(model):
    times = pd.date_range("2026-01-01", periods=5000, freq="1min", tz="UTC")
    fast = model.predict(times)
    general = model.predict(times[::-1])[::-1]  # descending times take the general path
    assert np.max(np.abs(fast - general)) < 0.001 * mm


def test_uniform_rate_equals_general_path(model):
    times = pd.date_range("2026-01-01", periods=5000, freq="1min", tz="UTC")
    fast = model.predict_derivative(times)
    general = model.predict_derivative(times[::-1])[::-1]
    assert np.max(np.abs(fast - general)) < 0.001 * mm / minute


def test_calendar_frequency_index_matches_direct_evaluation(model):
    # month starts are not equally spaced: the index must not take the uniform path
    times = pd.date_range("2026-01-01", periods=80, freq="MS", tz="UTC")
    t = times.as_unit("ns").asi8 / 1e9
    assert np.max(np.abs(model.predict(times) - _direct(model, t))) < 0.005 * mm


def test_tz_aware_index_is_converted_and_naive_is_utc(model):
    local = pd.date_range("2026-06-01 12:00", periods=100, freq="10min", tz="Europe/Dublin")
    naive_utc = local.tz_convert("UTC").tz_localize(None)
    assert np.allclose(model.predict(local), model.predict(naive_utc), atol=1e-12)


def test_derivative_matches_finite_difference(model):
    t = np.array([1.8e9, 1.8e9 + 3333.0])
    h = 1.0 * second
    fd = (_direct(model, t + h) - _direct(model, t - h)) / (2 * h)
    assert np.allclose(model.predict_derivative(t), fd, atol=1e-9)


def test_nat_gives_nan(model):
    times = np.array(["2026-01-01T00:00", "NaT"], dtype="datetime64[ns]")
    out = model.predict(times)
    assert np.isfinite(out[0]) and np.isnan(out[1])


HAND_TYPED = """\
# constants typed by hand from a (here invented) station sheet
mean = 2.2

[[constituents]]
name = "M2"
amplitude = 0.9
phase = 312

[[constituents]]
name = "k1"          # any case
amplitude = 0.35
phase = 78.0
note = "kept as given"
"""


def test_hand_typed_file_loads(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text(HAND_TYPED)
    m = TideModel.load(path)
    assert m.mean == 2.2
    assert m.names == ["M2", "K1"]
    assert m.constituents[1]["note"] == "kept as given"


def test_save_then_load_round_trips(tmp_path, model):
    m = TideModel(mean=1.0, constituents=model.constituents[:5], trend=0.002,
                  trend_epoch="2010-01-01T00:00:00Z", metadata={"rms": 0.05, "dropped": [{"name": "S2"}]})
    m.save(tmp_path / "c.toml")
    back = TideModel.load(tmp_path / "c.toml")
    t = np.array([1.6e9, 1.7e9])
    assert np.allclose(back.predict(t), m.predict(t), atol=1e-12)
    assert back.metadata["rms"] == 0.05


def test_the_datum_of_the_mean_is_recorded_in_the_file(tmp_path, model):
    m = TideModel(mean=1.0, constituents=model.constituents[:3], datum="chart")
    m.save(tmp_path / "c.toml")
    assert 'datum = "chart"' in (tmp_path / "c.toml").read_text()
    assert TideModel.load(tmp_path / "c.toml").datum == "chart"


def test_a_file_without_datum_says_none():
    assert TideModel.from_dict({"mean": 1.0, "constituents": []}).datum is None


def test_referred_to_moves_the_mean_and_names_the_datum(model):
    m = TideModel(mean=2.2, constituents=model.constituents[:3], datum="chart")
    s = m.referred_to("station", 1.0)
    t = np.array([1.6e9, 1.7e9])
    assert s.datum == "station" and np.allclose(s.predict(t), m.predict(t) + 1.0, atol=1e-12)
    assert m.mean == 2.2  # the original is untouched


def test_unknown_constituent_names_file_and_entry(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text('mean = 0.0\n[[constituents]]\nname = "M22"\namplitude = 0.1\nphase = 0\n')
    with pytest.raises(ConstantsFileError, match=r"bad\.toml: constituents\[0\].*M22.*did you mean M2"):
        TideModel.load(path)


@pytest.mark.parametrize("text,needle", [
    ('[[constituents]]\nname = "M2"\namplitude = 0.1\nphase = 0\n', "missing top-level key 'mean'"),
    ('mean = 0\n[[constituents]]\nname = "M2"\nphase = 0\n', "'amplitude' must be a number"),
    ('mean = 0\n[[constituents]]\nname = "M2"\namplitude = 0.1\nphase = 0\n'
     '[[constituents]]\nname = "m2"\namplitude = 0.1\nphase = 0\n', "listed twice"),
    ("mean = = 1\n", "not valid TOML"),
    ('mean = 0\ndatum = 3\n', "'datum' must name the datum"),
])
def test_bad_files_give_clear_errors(tmp_path, text, needle):
    path = tmp_path / "c.toml"
    path.write_text(text)
    with pytest.raises(ConstantsFileError, match=needle):
        TideModel.load(path)
