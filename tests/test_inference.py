"""Inference of unresolved constituents from a resolved neighbour (equilibrium ratios).

Method: Foreman (1977), sec. 2.3; Godin (1972); Pugh & Woodworth (2014), sec. 4.2.4. The
record is 45 days, far short of the 182.6 days that separate K1 from P1 and S2 from K2 by
the Rayleigh criterion (360 / 0.0821 deg/h; Godin 1972). Equilibrium amplitudes are the
Cartwright & Tayler (1971) / Cartwright & Edden (1973) values quoted from memory in
predictor.constituents and checked against pyerfa in tests/test_equilibrium.py.
Synthetic records of an invented port by tests/reference_tide.py, which shares no code with
predictor/ (pyerfa arguments, Schureman's V, Doodson's nodal series).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import reference_tide as ref
from predictor.constituents import EQUILIBRIUM_AMPLITUDE
from predictor.fit import FitInputError, equilibrium_inference, harmonic_fit
from units import mm, hour, day, degree

START = pd.Timestamp("2031-02-01", tz="UTC").timestamp()

R_P1 = EQUILIBRIUM_AMPLITUDE["P1"] / EQUILIBRIUM_AMPLITUDE["K1"]   # about 0.331
R_K2 = EQUILIBRIUM_AMPLITUDE["K2"] / EQUILIBRIUM_AMPLITUDE["S2"]   # about 0.272
# Invented port: amplitude [m], Greenwich phase lag [deg]; P1 and K2 in equilibrium ratio
# and phase with K1 and S2.
PORT = {"M2": (1.05, 110.0), "S2": (0.36, 150.0), "K1": (0.15, 210.0), "O1": (0.10, 195.0),
        "P1": (0.15 * R_P1, 210.0), "K2": (0.36 * R_K2, 150.0)}
FITTED = ["M2", "S2", "K1", "O1"]


def synthesise(t, constants):
    return ref.tide(t, 1.8, constants)


def by_name(model):
    return {c["name"]: c for c in model.constituents}


def wrap(d):
    return (d + 180.0) % 360.0 - 180.0


@pytest.fixture(scope="module")
def record():
    t = START + np.arange(0.0, 45 * day, hour)
    return t, synthesise(t, PORT)


def vector_error(c, name):
    H, g = PORT[name]
    return abs(c["amplitude"] * np.exp(1j * np.radians(c["phase"])) - H * np.exp(1j * np.radians(g)))


def test_equilibrium_ratios_of_the_usual_pairs():
    # Cartwright & Tayler (1971) amplitudes (from memory): P1/K1 = 0.0468/0.1416,
    # K2/S2 = 0.0307/0.1128, NU2/N2 = 0.0088/0.0464; same phase in the equilibrium tide.
    assert equilibrium_inference("P1", "K1") == pytest.approx((0.331, 0.0), abs=0.001)
    assert equilibrium_inference("K2", "S2") == pytest.approx((0.272, 0.0), abs=0.001)
    assert equilibrium_inference("NU2", "N2") == pytest.approx((0.190, 0.0), abs=0.001)


def test_with_inference_k1_and_s2_come_out_within_a_few_millimetres(record):
    t, y = record
    got = by_name(harmonic_fit(t, y, constituents=FITTED, infer="equilibrium", confidence=None))
    assert vector_error(got["K1"], "K1") < 2 * mm
    assert vector_error(got["S2"], "S2") < 2 * mm


def test_without_inference_the_neighbours_bias_k1_and_s2(record):
    # The unresolved neighbour beats with its reference over 182.6 days; in 45 days a fit
    # without it takes a good part of the neighbour's amplitude into K1 and S2.
    t, y = record
    got = by_name(harmonic_fit(t, y, constituents=FITTED, infer=None, confidence=None))
    assert vector_error(got["K1"], "K1") > 10 * mm
    assert vector_error(got["S2"], "S2") > 20 * mm


def test_inferred_constituents_are_marked_and_follow_their_reference(record):
    t, y = record
    model = harmonic_fit(t, y, constituents=FITTED, infer="equilibrium")
    got = by_name(model)
    assert got["P1"]["inferred_from"] == "K1" and got["K2"]["inferred_from"] == "S2"
    assert "inferred_from" not in got["K1"]
    assert got["P1"]["amplitude"] == pytest.approx(R_P1 * got["K1"]["amplitude"], rel=1e-12)
    assert wrap(got["K2"]["phase"] - got["S2"]["phase"]) == pytest.approx(0.0, abs=1e-9)
    assert got["P1"]["amplitude_ci"] == pytest.approx(R_P1 * got["K1"]["amplitude_ci"], rel=1e-12)
    assert {d["name"] for d in model.metadata["inferred"]} == {"P1", "K2"}


def test_model_with_inferred_constituents_predicts_the_record(record):
    # The inferred constants enter the prediction like any other: the record is reproduced.
    t, y = record
    model = harmonic_fit(t, y, constituents=FITTED, infer="equilibrium", confidence=None)
    np.testing.assert_allclose(model.predict(t.astype("datetime64[s]")), y, atol=2 * mm)


def test_auto_selection_infers_p1_and_k2_and_no_longer_lists_them_as_dropped(record):
    t, y = record
    model = harmonic_fit(t, y, infer="auto", confidence=None)
    got = by_name(model)
    assert got["P1"]["inferred_from"] == "K1" and got["K2"]["inferred_from"] == "S2"
    assert not {"P1", "K2"} & {d["name"] for d in model.metadata["dropped"]}
    assert vector_error(got["K1"], "K1") < 3 * mm


def test_a_record_long_enough_infers_nothing():
    # 210 days resolve K1-P1 and S2-K2 (182.6 days) and NU2-N2 (205 days; Rayleigh).
    t = START + np.arange(0.0, 210 * day, 2 * hour)
    model = harmonic_fit(t, synthesise(t, PORT), infer="auto", confidence=None)
    assert "inferred" not in model.metadata
    assert not any("inferred_from" in c for c in model.constituents)


def test_explicit_ratio_and_phase_difference_are_used(record):
    # A port whose P1 is 0.25 of K1 and lags it by 10 deg, known from a long record nearby.
    t, _ = record
    port = dict(PORT, P1=(0.15 * 0.25, 220.0))
    y = synthesise(t, port)
    got = by_name(harmonic_fit(t, y, constituents=FITTED, confidence=None,
                               infer={"P1": ("K1", 0.25, 10.0), "K2": "S2"}))
    assert vector_error(got["K1"], "K1") < 2 * mm
    assert got["P1"]["amplitude"] == pytest.approx(0.15 * 0.25, abs=1 * mm)
    assert wrap(got["P1"]["phase"] - 220.0) == pytest.approx(0.0, abs=1 * degree)


@pytest.mark.parametrize("infer,match", [
    ({"P1": ("XX9", 0.3, 0.0)}, "XX9"),
    ({"P1": ("M2", 0.3, 0.0)}, "M2 is not among the fitted"),
    ({"K1": ("O1", 0.3, 0.0)}, "fitted in its own right"),
    ({"P1": ("K1", -1.0, 0.0)}, "non-negative"),
    ("sometimes", "infer must be"),
])
def test_bad_inference_requests_are_refused_with_the_reason(record, infer, match):
    t, y = record
    fitted = ["S2", "K1", "O1"] if "M2 is not" in match else FITTED
    with pytest.raises(FitInputError, match=match):
        harmonic_fit(t, y, constituents=fitted, infer=infer, confidence=None)
