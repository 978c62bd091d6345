"""Diagnostics on synthetic records with known faults: each found at the right time and size.

Injected values are ours (invented port); the physics checked against outside sources is
named beside each check.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor import diagnostics as dg
from monitor.qc import QcSettings
from test_qc_synthetic import START, SynthModel, day, hour, minute, mm, record


@pytest.fixture(scope="module")
def ten_days():
    return record(days=10, seed=31, surge_height=0.8, surge_width_h=6.0)


def test_primary_backup_drift_recovered_in_mm_per_day():
    primary, _ = record(days=30, seed=32)
    rng = np.random.default_rng(33)
    elapsed_days = np.arange(len(primary)) / 1440
    backup = primary + 0.012 - 1.5 * mm * elapsed_days + rng.normal(0, 3 * mm, len(primary))
    res = dg.sensor_drift(primary, backup)
    assert res["drift_mm_per_day"] == pytest.approx(1.5, abs=0.05)
    assert res["drift_low"] < 1.5 < res["drift_high"]
    # Offset at the window centre (day 15): -12 mm + 1.5 mm/day * 15 days.
    assert res["offset_mm"] == pytest.approx(-12 + 1.5 * 15, abs=1.0)


def test_sliding_drift_has_one_row_per_step():
    primary, _ = record(days=6, seed=34)
    out = dg.sliding_sensor_drift(primary, primary + 0.01, window_seconds=2 * day, step_seconds=day)
    assert len(out) == 5
    assert np.allclose(out["offset_mm"], -10.0, atol=0.01)


def _staff_day(gauge_model: SynthModel, offset: float, seed: int, start=START, every=30):
    """A day of gauge record from ``gauge_model`` plus offset, and staff readings every
    ``every`` minutes over 13 hours read from the true sea (5 mm reading error)."""
    truth, _ = record(days=1, seed=seed, start=start, white_sigma=0.0)
    gauge, _ = record(days=1, seed=seed, start=start, white_sigma=0.0, model=gauge_model)
    rng = np.random.default_rng(seed + 100)
    staff = truth.iloc[: 13 * 60 : every]
    staff = staff + rng.normal(0, 5 * mm, len(staff))
    return staff, gauge + offset


def test_van_de_casteele_recovers_offset_scale_and_timing():
    # IOC Manual Vol. IV: intercept = offset, slope on (s - mean s) = scale error,
    # slope on dh/dt = timing error. Injected: +15 mm, 2 % scale, gauge 3 minutes late.
    staff, gauge = _staff_day(SynthModel(shift_s=3 * minute, scale=1.02), 0.015, seed=35, every=15)
    res = dg.van_de_casteele(staff, gauge)
    assert res["n"] == 52
    # Offset measured at mean staff: the scale error about the model mean moves it by
    # 0.02 * (mean staff - MEAN); the tolerance allows that and three standard errors.
    assert res["offset_mm"] == pytest.approx(15, abs=3 * res["offset_se_mm"] + 2)
    assert res["scale_error"] == pytest.approx(0.02, abs=3 * res["scale_se"])
    assert res["timing_error_s"] == pytest.approx(3 * minute, abs=3 * res["timing_se_s"])
    assert res["timing_se_s"] < 30


def test_drift_against_staff_readings_over_sessions():
    # Five sessions, a week apart; the gauge sinks 0.5 mm/day against the staff.
    frames = []
    gauges = []
    for k in range(5):
        start = START + pd.Timedelta(days=7 * k)
        s, g = _staff_day(SynthModel(), -0.5 * mm * 7 * k, seed=40 + k, start=start)
        frames.append(s)
        gauges.append(g)
    staff, gauge = pd.concat(frames), pd.concat(gauges)
    sessions = dg.staff_sessions(staff, gauge)
    assert len(sessions) == 5
    drift = dg.offset_drift(sessions)
    assert drift["drift_mm_per_day"] == pytest.approx(-0.5, abs=0.1)


def test_clock_offset_of_several_minutes_found(ten_days):
    level, _ = record(days=10, seed=31, surge_height=0.8, surge_width_h=6.0,
                      model=SynthModel(shift_s=7 * minute))
    res = dg.clock_offset(level, SynthModel())
    assert res["offset_min"] == pytest.approx(7.0, abs=max(3 * res["offset_se_min"], 0.1))
    assert res["offset_se_min"] < 1.0


def test_clock_offset_zero_on_a_right_clock(ten_days):
    level, _ = ten_days
    res = dg.clock_offset(level, SynthModel())
    assert abs(res["offset_min"]) < 3 * res["offset_se_min"] + 0.05


def test_datum_step_found_at_its_time_with_its_size(ten_days):
    level, pred = ten_days
    resid = level - pred
    at = 6000
    resid.iloc[at:] += 0.060
    steps = dg.datum_steps(resid)
    assert len(steps) == 1
    assert steps.loc[0, "time"] == level.index[at]
    assert steps.loc[0, "step_mm"] == pytest.approx(60, abs=3 * steps.loc[0, "se_mm"])


def test_no_datum_step_in_a_clean_record_with_a_surge(ten_days):
    level, pred = ten_days
    assert dg.datum_steps(level - pred).empty


def test_monthly_constants_show_a_clock_error_as_the_same_time_shift():
    # Pugh & Woodworth (2014), Sea-Level Science, ch. 3: a timing error tau shifts each
    # constituent's phase lag by its speed times tau, the same time for M2 and K1.
    from predictor import TideModel
    from test_qc_synthetic import AMPS, MEAN, PHASES

    ref = TideModel(mean=MEAN, constituents=[{"name": k, "amplitude": AMPS[k], "phase": PHASES[k]}
                                             for k in AMPS])
    idx = pd.date_range("2024-01-01", "2024-03-01", freq="10min", tz="UTC", inclusive="left")
    obs = ref.predict(idx)
    late = idx >= pd.Timestamp("2024-02-01", tz="UTC")
    obs[late] = ref.predict(idx[late] - pd.Timedelta(minutes=6))
    rng = np.random.default_rng(50)
    out = dg.monthly_constants(pd.Series(obs + rng.normal(0, 5 * mm, len(idx)), index=idx), ref)
    jan = out[out["month"] == "2024-01"].set_index("name")
    feb = out[out["month"] == "2024-02"].set_index("name")
    assert set(jan.index) == {"M2", "S2", "K1", "O1"}
    assert np.allclose(jan["d_time_min"], 0, atol=0.5)
    assert feb.loc["M2", "d_time_min"] == pytest.approx(6, abs=0.2)
    assert feb.loc["K1", "d_time_min"] == pytest.approx(6, abs=1.0)
    assert np.allclose(feb["d_amplitude_mm"], 0, atol=2)


def test_equipment_faults_are_plain_data_with_kind_value_limit_since():
    s = QcSettings()
    now = 2_000_000_000
    faults = dg.equipment_faults(
        now, s, station="harbour",
        last_sample={"primary": now - 3 * hour, "backup": now - 30},
        flat={"primary": None, "backup": pd.Timestamp(now - 2 * hour, unit="s", tz="UTC")},
        drift={"drift_mm_per_day": 2.5, "drift_low": 2.0, "drift_high": 3.0, "start": now - 30 * day},
        clock={"offset_min": 4.0, "offset_se_min": 0.2, "since": now - day})
    kinds = {f["kind"]: f for f in faults}
    assert set(kinds) == {"silent_feed", "stuck_sensor", "sensor_drift", "clock_offset"}
    assert kinds["silent_feed"]["sensor"] == "primary" and kinds["silent_feed"]["value"] == 180
    assert kinds["stuck_sensor"]["since"] == now - 2 * hour
    assert kinds["sensor_drift"]["limit"] == s.drift_limit_mm_per_day
    assert all(set(f) >= {"kind", "value", "limit", "since", "unit", "station"} for f in faults)


def test_drift_within_its_uncertainty_of_the_limit_is_not_a_fault():
    faults = dg.equipment_faults(0, QcSettings(), drift={"drift_mm_per_day": 1.2, "drift_low": 0.6,
                                                         "drift_high": 1.8})
    assert faults == []
