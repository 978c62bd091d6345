"""A storm and a gap in the record of a fit: robust by default when the residual is
heavy-tailed, and long-period constituents the record cannot tell from its weather left out,
each with the reason.

The sea is synthesised by tests/reference_tide.py (no code shared with predictor/), the same
invented port as tests/test_short_records.py, with red noise (3 cm, 6 h memory). IRLS with
Cauchy weights: Leffler & Jay (2009). Rayleigh criterion: Godin (1972).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

import reference_tide as ref
from predictor import harmonic_fit
from test_short_records import MEAN, SEA, START
from units import hour, day

NOISE_SD = 0.03  # [m]
LONG_PERIOD = ("Sa", "Ssa", "Msm", "Mm", "MSf", "Mf", "Mtm", "MSqm")


def record(storm_m=1.2, seed=1):
    """45 days hourly, a 10-day outage from day 20, a storm surge on day 35 (Gaussian, 8 h)."""
    rng = np.random.default_rng(seed)
    t = START + np.arange(0.0, 45 * day, hour)
    phi = np.exp(-1.0 / 6.0)
    red = lfilter([1.0], [1.0, -phi], rng.normal(0.0, NOISE_SD * np.sqrt(1 - phi**2), t.size))
    storm = storm_m * np.exp(-0.5 * ((t - (START + 35 * day)) / (8 * hour)) ** 2)
    keep = ~((t > START + 20 * day) & (t < START + 30 * day))
    return t[keep], (ref.tide(t, MEAN, SEA) + red + storm)[keep]


def next_year_rms(model):
    t = START + 45 * day + np.arange(0.0, 365 * day, hour)
    return float(np.sqrt(np.mean((model.predict(t) - ref.tide(t, MEAN, SEA)) ** 2)))


@pytest.fixture(scope="module")
def stormy():
    t, y = record()
    return harmonic_fit(t, y)


def test_a_storm_in_a_gappy_record_is_fitted_robustly_by_default_and_says_why(stormy):
    assert stormy.metadata["method"].startswith("robust")
    assert "heavy-tailed" in stormy.metadata["robust_reason"]


def test_a_storm_in_a_gappy_record_leaves_no_spurious_long_period_tide(stormy):
    # the sea holds no long-period tide; ordinary least squares gave 0.14-0.25 m of Mm, Mf, Mtm
    # and MSqm here
    for c in stormy.constituents:
        if c["name"] in LONG_PERIOD:
            assert c["amplitude"] < 3 * NOISE_SD / 2, c["name"]


def test_a_storm_in_a_gappy_record_still_predicts_the_next_year_within_twice_the_noise(stormy):
    # ordinary least squares: 0.30 m RMS (ten times the noise)
    assert next_year_rms(stormy) < 2 * NOISE_SD


def test_a_calm_record_keeps_ordinary_least_squares_and_says_why():
    t, y = record(storm_m=0.0)
    model = harmonic_fit(t, y)
    assert model.metadata["method"] == "least squares"
    assert "close to Gaussian" in model.metadata["robust_reason"]


def test_weak_long_period_constituents_are_dropped_with_their_signal_to_noise_ratio(stormy):
    # what is left is significant; what is not is listed with its SNR and the reason
    kept = [c for c in stormy.constituents if c["name"] in LONG_PERIOD]
    assert all(c["snr"] >= 2.0 for c in kept)
    why = {d["name"]: d["reason"] for d in stormy.metadata["dropped"]}
    weak = [n for n, r in why.items() if "signal-to-noise" in r]
    assert weak and all(n in LONG_PERIOD and "weather" in why[n] for n in weak)


def test_asking_for_ordinary_least_squares_is_still_possible():
    t, y = record()
    model = harmonic_fit(t, y, robust=False, long_period_snr=0)
    assert model.metadata["method"] == "least squares"
    assert model.metadata["robust_reason"] == "not asked for"
