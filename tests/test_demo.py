"""The demo scenario (sample_feeds/generate.py, demo/port.toml) and the demo run (monitor.demo).

The scenario is invented; the checks of its science name their outside sources.
"""
from __future__ import annotations

import importlib.util
import sys
import tomllib
from pathlib import Path

import erfa
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
mm = 1e-3
cm = 1e-2
minute = 60
hour = 3600
degree = 1.0


def _load_generator():
    spec = importlib.util.spec_from_file_location("sample_feeds_generate", ROOT / "sample_feeds" / "generate.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = mod
    spec.loader.exec_module(mod)
    return mod


gen = _load_generator()


@pytest.fixture(scope="module")
def port():
    with open(ROOT / "demo" / "port.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="module")
def scenario(port):
    return gen.build(port)


def _wrap(deg):
    return (np.asarray(deg) + 180.0) % 360.0 - 180.0


# --------------------------------------------------------------------------- the scenario's science


def test_astronomical_arguments_match_erfa():
    # Reference: IERS Conventions 2003 fundamental arguments as implemented by ERFA (pyerfa):
    # s = F + Omega, h = s - D, p = s - l, N = Omega.
    t = np.arange(np.datetime64("2025-08-25T00:00"), np.datetime64("2025-10-27T00:00"), np.timedelta64(7, "h"))
    a = gen.astro_arguments(t)
    T = (gen.unix_seconds(t) / 86400.0 + 2440587.5 - 2451545.0) / 36525.0
    F, Om = np.degrees(erfa.faf03(T)), np.degrees(erfa.faom03(T))
    l, D = np.degrees(erfa.fal03(T)), np.degrees(erfa.fad03(T))
    s = F + Om
    np.testing.assert_allclose(_wrap(a["s"] - s), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["h"] - (s - D)), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["p"] - (s - l)), 0, atol=0.01 * degree)
    np.testing.assert_allclose(_wrap(a["N"] - Om), 0, atol=0.01 * degree)


def test_k1_argument_is_the_sidereal_angle_less_90_degrees():
    # K1's equilibrium argument is the Greenwich sidereal angle - 90 deg (Schureman 1958,
    # Table 2: T + h - 90 with T = 180 + 15 UT); sidereal angle from ERFA's gmst06 (UT1 and
    # TT taken as UTC, which moves it by far less than the tolerance).
    t = np.arange(np.datetime64("2025-08-25T00:00"), np.datetime64("2025-10-27T00:00"), np.timedelta64(5, "h"))
    a = gen.astro_arguments(t)
    jd = gen.unix_seconds(t) / 86400.0 + 2440587.5
    gmst = np.degrees(erfa.gmst06(jd, 0.0, jd, 0.0))
    v_k1 = a["tau"] + a["s"] + 90.0
    np.testing.assert_allclose(_wrap(v_k1 - (gmst - 90.0)), 0, atol=0.01 * degree)


def test_m2_speed_is_the_published_value():
    # M2 speed 28.9841042 deg/h (Schureman 1958, Table 2; Foreman 1977, Table 1).
    t = np.array(["2025-10-01T00:00", "2025-10-01T01:00"], dtype="datetime64[s]")
    a = gen.astro_arguments(t)
    speed = 2 * (a["tau"][1] - a["tau"][0])
    assert speed == pytest.approx(28.9841042, abs=1e-6)


def test_port_is_mixed_mainly_semidiurnal(port):
    # Form factor F = (K1 + O1) / (M2 + S2); 0.25 < F <= 1.5 is "mixed, mainly semidiurnal"
    # (Courtier 1938 classification as given by Pugh and Woodworth 2014, sec. 4.2; from memory).
    amp = {c["name"]: c["amplitude"] for c in port["tide"]["constituents"]}
    F = (amp["K1"] + amp["O1"]) / (amp["M2"] + amp["S2"])
    assert 0.25 < F <= 1.5


def test_inverse_barometer_explains_the_pressure_part_of_the_surge(scenario):
    # Inverse barometer: about 1 cm of sea level per hPa (Pugh and Woodworth 2014, sec. 7.2).
    truth = scenario["truth"]
    assert truth["storm"]["inverse_barometer_m_per_hpa"] == pytest.approx(1 * cm)
    drop = 1013.0 - truth["storm"]["min_pressure_hpa"]
    assert 0.3 < drop * 1 * cm < truth["storm"]["main_peak"]["surge"]


# --------------------------------------------------------------------------- the scenario's story


def test_first_surge_peak_meets_low_water_and_the_second_high_water(scenario):
    s = scenario["truth"]["storm"]
    assert s["first_peak"]["near"] == "low water" and s["main_peak"]["near"] == "high water"
    assert 0.8 <= s["first_peak"]["surge"] <= 1.2
    assert 0.8 <= s["main_peak"]["surge"] <= 1.2


def test_only_the_storm_high_water_crosses_the_quay_levels(scenario):
    s = scenario["truth"]["storm"]
    first = np.datetime64(s["boards_out_crossed"]["first"].rstrip("Z"))
    last = np.datetime64(s["boards_out_crossed"]["last"].rstrip("Z"))
    peak = np.datetime64(s["main_peak"]["time"].rstrip("Z"))
    assert first < peak < last
    assert (last - first) < np.timedelta64(6, "h")  # one high water, not two
    assert s["quay_top_crossed"] is not None


def test_first_spike_alone_would_cross_the_boards_out_level(scenario):
    t = scenario["truth"]
    spike = t["faults"]["spikes"][0]
    assert spike["level_with_spike"] > t["datums"]["boards_out_sd"]
    assert spike["level_with_spike"] - spike["size"] < t["datums"]["boards_out_sd"] - 10 * cm


def test_faults_lie_inside_the_short_window(scenario):
    t = scenario["truth"]
    lo, hi = t["short_window"]["start"], t["short_window"]["end"]
    f = t["faults"]
    times = [s["time"] for s in f["spikes"]] + [f["flat_line"]["start"], f["flat_line"]["end"],
                                                 f["gap"]["start"], f["gap"]["end"],
                                                 f["clock_offset"]["start"], f["clock_offset"]["end"]]
    assert all(lo <= x <= hi for x in times)  # ISO 8601 UTC strings sort as times


def test_fit_to_the_history_recovers_the_invented_constants(port):
    # The history is synthesised here from the invented constants with Schureman's and
    # Foreman's arguments; predictor.harmonic_fit must find them again. 190 days resolve
    # K1 from P1 and S2 from K2 (Rayleigh criterion, 182.6 days); Sa needs a year and is
    # left out. Tolerances (our choice): 1 cm and 3 deg against 4.5 cm of red weather noise.
    import pandas as pd

    from predictor import harmonic_fit

    df = pd.read_csv(ROOT / "sample_feeds" / "history.csv")
    model = harmonic_fit(pd.DatetimeIndex(pd.to_datetime(df["time"], utc=True)), df["level"].to_numpy())
    got = {c["name"]: c for c in model.constituents}
    for want in port["tide"]["constituents"]:
        if want["amplitude"] < 0.1:
            continue
        c = got[want["name"]]
        assert c["amplitude"] == pytest.approx(want["amplitude"], abs=1 * cm), want["name"]
        assert abs(_wrap(c["phase"] - want["phase"])) < 3 * degree, want["name"]


def test_committed_feeds_are_what_the_generator_writes(tmp_path):
    gen.write_all(tmp_path)
    for name in ("history.csv", "storm/primary.csv", "storm/backup.txt", "storm/barometer.csv", "truth.json"):
        assert (tmp_path / name).read_bytes() == (ROOT / "sample_feeds" / name).read_bytes(), name


def test_sample_feeds_stay_small():
    total = sum(p.stat().st_size for p in (ROOT / "sample_feeds").rglob("*") if p.is_file())
    assert total < 15e6
