"""Real fast water is never failed; what no sea can do still is. QC aligned with QARTOD v2.1.

U.S. IOOS (2021), QARTOD water-level manual v2.1: Test 7 (rate of change) "no fail flag is
identified for this test"; its section on thresholds warns that surges, tsunamis and strong
winds move water quickly. Seiches and meteotsunamis at small ports: 0.3-1.0 m, periods of
10-20 minutes (Pugh & Woodworth 2014, ch. 8, from memory). The synthetic gauge records are
those of tests/test_qc_synthetic.py (an invented port).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import sqlite_utils

from alerts.engine import evaluate, list_episodes
from alerts.rules import StationView, rules_from_config
from monitor.quality import checks as qc
from test_qc_synthetic import record
from units import mm, minute, hour

FAIL, SUSPECT, PASS, NOT_EVALUATED, MISSING = qc.FAIL, qc.SUSPECT, qc.PASS, qc.NOT_EVALUATED, qc.MISSING


@pytest.fixture(scope="module")
def calm():
    """Three calm days at one-minute steps, and the index of a high water on the second."""
    level, pred = record(days=3, seed=11)
    hw = 1440 + int(np.argmax(pred[1440:1440 + 750]))
    return level, pred, hw


def seiche(index, centre, amplitude, period_min, width_h=1.0):
    """A seiche train [m]: a sine of the given period under a Gaussian envelope."""
    t = (index - index[centre]).total_seconds().to_numpy()
    return amplitude * np.exp(-0.5 * (t / (width_h * hour)) ** 2) * np.sin(2 * np.pi * t / (period_min * minute))


TRAINS = [(0.3, 12), (0.6, 15), (1.0, 12), (1.0, 20)]


@pytest.mark.parametrize("amplitude,period", TRAINS)
def test_a_seiche_train_at_high_water_is_never_failed(calm, amplitude, period):
    level, pred, hw = calm
    water = level + np.round(seiche(level.index, hw, amplitude, period) / mm) * mm
    out = qc.run_tests(water, None, pred)
    assert not (out[list(qc.TESTS) + ["flag"]] == FAIL).any().any()


@pytest.mark.parametrize("amplitude,period", TRAINS)
def test_the_crest_of_a_seiche_stays_usable(calm, amplitude, period):
    # the highest level the rules and fits may use is the crest itself, not a metre below it
    level, pred, hw = calm
    water = level + np.round(seiche(level.index, hw, amplitude, period) / mm) * mm
    out = qc.run_tests(water, None, pred)
    near = slice(hw - 120, hw + 120)
    usable = water.iloc[near][qc.usable_mask(out["flag"].iloc[near])]
    assert usable.max() == water.iloc[near].max()


def test_a_seiche_seen_by_the_backup_too_is_never_failed(calm):
    level, pred, hw = calm
    water = level + np.round(seiche(level.index, hw, 1.0, 12) / mm) * mm
    backup = water + np.random.default_rng(3).normal(0, 3 * mm, len(water))
    for a, b in ((water, backup), (backup, water)):
        out = qc.run_tests(a, None, pred, other=b)
        assert (out["flag"] != FAIL).all()


def test_a_fast_smooth_rise_is_at_most_suspect_on_rate_of_change(calm):
    # a meteotsunami front: 0.6 m in three minutes, then it stays (QARTOD v2.1 Test 7 has no
    # fail flag). Before, 0.2 m/min failed.
    level, pred, hw = calm
    water = level.copy()
    ramp = np.clip((np.arange(len(water)) - (hw - 3)) / 3.0, 0.0, 1.0) * 0.6
    water = water + ramp
    out = qc.run_tests(water, None, pred)
    assert (out["roc"] != FAIL).all()
    assert (out["flag"] != FAIL).all()
    assert (out["roc"] == SUSPECT).any()


def test_rate_of_change_settings_have_no_fail_key():
    _, errors = qc.qc_settings_from({"roc_fail_m_per_min": 0.2}, "stations[0].qc")
    assert len(errors) == 1 and errors[0].startswith("stations[0].qc.roc_fail_m_per_min: the rate-of-change")
    assert "no fail flag" in errors[0]


def test_a_lone_spike_still_fails_even_when_the_backup_repeats_it(calm):
    # no sea moves one minute's mean off its neighbours both ways; a shared logger's glitch
    # shows in both sensors
    level, pred, hw = calm
    water = level.copy()
    water.iloc[hw] += 0.35
    backup = water + 0.004
    out = qc.run_tests(water, None, pred, other=backup)
    assert out["flag"].iloc[hw] == FAIL


def test_a_one_sample_step_both_sensors_show_is_real_water(calm):
    # a bore or a tsunami front passing both gauges: suspect, not fail; in one sensor only it fails
    level, pred, hw = calm
    water = level.copy()
    water.iloc[hw:] += 0.30
    alone = qc.run_tests(water, None, pred, other=level)
    both = qc.run_tests(water, None, pred, other=water + 0.004)
    assert alone["flag"].iloc[hw] == FAIL
    assert both["flag"].iloc[hw] == SUSPECT


def test_a_seiche_crest_reaches_the_alert_rules(calm, tmp_path):
    # A quay level 0.5 m above this high water: only the seiche's crest (1 m, 12 min) crosses it,
    # for a few minutes. Its samples must reach the rules (design notes: samples flagged fail
    # never do), so a rule holding two minutes opens an episode at the crest.
    level, pred, hw = calm
    water = level + np.round(seiche(level.index, hw, 1.0, 12) / mm) * mm
    out = qc.run_tests(water, None, pred)
    quay = float(pred[hw]) + 0.5
    samples = pd.DataFrame({"observed": water.to_numpy(), "predicted": pred, "residual": water.to_numpy() - pred,
                            "smoothed": np.nan, "flag": out["flag"].to_numpy()}, index=water.index)
    view = StationView(id="harbour", name="Invented Harbour", tz="UTC", datums={"station": 0.0})
    rules, errors = rules_from_config([{"id": "quay", "when": "level_above", "datum": "station", "hold": "2min",
                                        "notify": ["duty@harbour.example"], "steps": [{"name": "quay wet",
                                                                                      "at": quay}]}],
                                      "stations[0].rules", view.datums)
    assert errors == []
    db = sqlite_utils.Database(tmp_path / "alerts.sqlite")
    evaluate(db, view, rules, samples.iloc[hw - 180:hw + 180], now=water.index[hw + 180])
    episodes = list_episodes(db, "harbour")
    assert len(episodes) >= 1


# ----------------------------------------------------------------- attenuated signal (Test 10)


def test_a_clogged_stilling_well_fails_the_attenuated_signal_test_after_a_tidal_day():
    # From day 2 the gauge shows 40 % of the tide's swing about its mean (a silted intake);
    # the record still looks like a tide. The test judges the last tidal day (24.84 h).
    level, pred = record(days=4, seed=31)
    damped = level.copy()
    start = 2 * 1440
    mean = float(np.mean(pred))
    damped.iloc[start:] = mean + 0.4 * (level.iloc[start:] - mean)
    out = qc.run_tests(damped, None, pred)
    atten = out["atten"]
    assert (atten.iloc[:start] != FAIL).all()
    assert (atten.iloc[start + 1500:] == FAIL).all()  # a tidal day into the fault, and on


def test_a_healthy_gauge_passes_the_attenuated_signal_test_in_a_storm():
    level, pred = record(days=4, seed=32, surge_height=0.8, surge_width_h=6.0)
    out = qc.run_tests(level, None, pred)
    evaluated = out["atten"][out["atten"] != NOT_EVALUATED]
    assert len(evaluated) > 2 * 1440 and (evaluated == PASS).all()


def test_attenuated_signal_needs_a_prediction_and_a_whole_tidal_day():
    level, pred = record(days=1.5, seed=33)
    assert (qc.run_tests(level)["atten"] == NOT_EVALUATED).all()
    out = qc.run_tests(level, None, pred)
    assert (out["atten"].iloc[:1400] == NOT_EVALUATED).all()


# ----------------------------------------------------------------- location (Test 3)


def test_a_valid_configured_position_passes_every_sample_and_none_is_not_evaluated(calm):
    level, pred, _ = calm
    assert (qc.run_tests(level, None, pred, position=(50.0, -5.0))["location"] == PASS).all()
    assert (qc.run_tests(level, None, pred)["location"] == NOT_EVALUATED).all()


def test_a_reported_position_away_from_the_gauge_is_suspect_and_an_impossible_one_fails(calm):
    level, _, _ = calm
    idx = level.index[:4]
    # 0.001 deg of latitude is 111 m (a sphere of 6371 km: 6371e3 * pi / 180 * 0.001)
    reported = pd.DataFrame({"latitude": [50.0, 50.0005, 50.0015, 95.0], "longitude": [-5.0, -5.0, -5.0, -5.0]},
                            index=idx)
    out = qc.location_test(idx, 50.0, -5.0, reported, radius_m=100.0)
    assert list(out) == [PASS, PASS, SUSPECT, FAIL]


# ----------------------------------------------------------------- numbering


def test_tests_are_cited_by_the_manuals_numbers():
    # QARTOD v2.1: 1 timing/gap, 2 syntax, 3 location, 4 gross range, 5 climatology, 6 spike,
    # 7 rate of change, 8 flat line, 10 attenuated signal, 11 neighbour
    assert qc.QARTOD_NUMBER == {"gap": 1, "syntax": 2, "location": 3, "gross": 4, "expected": 5, "spike": 6,
                                "roc": 7, "flat": 8, "multi": 11, "atten": 10, "resid": None}
    for name, number in (("gap_test", 1), ("location_test", 3), ("gross_range_test", 4),
                         ("expected_range_test", 5), ("spike_test", 6), ("rate_of_change_test", 7),
                         ("flat_line_test", 8), ("attenuation_test", 10), ("multi_sensor_test", 11)):
        assert f"Test {number} " in getattr(qc, name).__doc__, name


def test_the_neighbours_of_a_large_spike_are_not_failed_with_it(calm):
    # an 0.8 m spike makes its neighbours' curvature 0.4 m, past the fail threshold: they are
    # suspect, the spike alone fails (the sea exactly the predicted tide, so nothing else
    # curves them)
    level, pred, hw = calm
    water = pd.Series(pred.copy(), index=level.index)
    water.iloc[hw] += 0.8
    out = qc.run_tests(water, None, pred)
    assert out["flag"].iloc[hw] == FAIL
    assert out["flag"].iloc[hw - 1] == SUSPECT and out["flag"].iloc[hw + 1] == SUSPECT
