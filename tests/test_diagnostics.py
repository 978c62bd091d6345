"""Diagnostics on synthetic records with known faults: each found at the right time and size.

Injected values are ours (invented port); the physics checked against outside sources is
named beside each check.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.quality import diagnostics as dg
from monitor.quality.checks import QcSettings
from test_qc_synthetic import START, SynthModel, record
from units import mm, minute, hour, day


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


# IOC Manual Vol. IV asks for gauge timing good to one minute (from memory); a storm
# surge is weather, not a clock error, so a right clock must stay inside that minute.
@pytest.mark.parametrize("seed", [61, 62, 63])
def test_storm_surge_of_a_metre_is_not_taken_for_a_clock_error(seed):
    level, _ = record(days=7, seed=seed, surge_height=1.0, surge_width_h=6.0)
    res = dg.clock_offset(level, SynthModel())
    assert abs(res["offset_min"]) < 1.0


@pytest.mark.parametrize("seed", [61, 62, 63])
def test_six_minute_clock_error_found_under_a_metre_of_surge(seed):
    # Pugh & Woodworth (2014), Sea-Level Science, ch. 3: a timing error tau delays the
    # whole tidal curve by tau. Injected: the gauge record 6 minutes late. Background
    # noise of 1 cm (a calm week) so the 0.5-minute tolerance is over three standard
    # errors; the surge is the one of the right-clock test.
    level, _ = record(days=7, seed=seed, red_sigma=0.01, surge_height=1.0, surge_width_h=6.0,
                      model=SynthModel(shift_s=6 * minute))
    res = dg.clock_offset(level, SynthModel())
    assert res["offset_min"] == pytest.approx(6.0, abs=0.5)


def test_surge_moves_the_clock_estimate_by_seconds_only():
    # The same noisy record (3 cm red noise) with and without a 1 m surge, clock 6 min late.
    calm, _ = record(days=7, seed=61, model=SynthModel(shift_s=6 * minute))
    storm, _ = record(days=7, seed=61, surge_height=1.0, surge_width_h=6.0,
                      model=SynthModel(shift_s=6 * minute))
    a = dg.clock_offset(calm, SynthModel())["offset_s"]
    b = dg.clock_offset(storm, SynthModel())["offset_s"]
    assert abs(a - b) < 10


def test_clock_error_of_a_surge_record_covered_by_its_uncertainty():
    level, _ = record(days=7, seed=64, surge_height=1.0, surge_width_h=6.0,
                      model=SynthModel(shift_s=-4 * minute))
    res = dg.clock_offset(level, SynthModel())
    assert res["offset_min"] == pytest.approx(-4.0, abs=3 * res["offset_se_min"])
    assert 0 < res["offset_se_min"] < 0.5


def _two_band_record(m2_shift_s: float, k1_shift_s: float, seed: int = 70):
    """Semidiurnal and diurnal tides shifted separately (large diurnal so both bands count)."""
    semi = {"M2": 1.2, "S2": 0.4, "K1": 0.0, "O1": 0.0}
    diur = {"M2": 0.0, "S2": 0.0, "K1": 0.6, "O1": 0.4}
    idx = record(days=14, seed=seed)[0].index
    rng = np.random.default_rng(seed)
    level = (SynthModel(shift_s=m2_shift_s, amps=semi).predict(idx)
             + SynthModel(shift_s=k1_shift_s, amps=diur).predict(idx) - 2.5
             + rng.normal(0, 10 * mm, len(idx)))
    return pd.Series(level, index=idx), SynthModel(amps={**semi, **{k: v for k, v in diur.items() if v}})


def test_clock_error_is_the_same_time_shift_in_every_band():
    # Design notes and Pugh & Woodworth (2014), ch. 3: a clock error moves every
    # constituent by its speed times the same tau, so diurnal and semidiurnal agree.
    level, ref = _two_band_record(5 * minute, 5 * minute)
    res = dg.clock_offset(level, ref)
    assert res["consistent"] is True
    assert res["bands"]["semidiurnal"]["offset_min"] == pytest.approx(5.0, abs=0.2)
    assert res["bands"]["diurnal"]["offset_min"] == pytest.approx(5.0, abs=0.5)


def test_semidiurnal_phase_change_alone_is_flagged_inconsistent():
    # A change in the sea (M2 and S2 later by 10 minutes, diurnal tide unchanged) is
    # not a clock error: the bands disagree.
    level, ref = _two_band_record(10 * minute, 0.0)
    res = dg.clock_offset(level, ref)
    assert res["consistent"] is False
    assert res["bands"]["diurnal"]["offset_min"] == pytest.approx(0.0, abs=0.5)


def test_clock_offset_with_the_package_tide_model_and_gaps():
    # The real TideModel (analytic rate, predict_derivative) and a record with a 6-hour
    # gap and irregular 2-minute sampling; 3 minutes late.
    from predictor import TideModel
    from test_qc_synthetic import AMPS, MEAN, PHASES

    ref = TideModel(mean=MEAN, constituents=[{"name": k, "amplitude": AMPS[k], "phase": PHASES[k]}
                                             for k in AMPS])
    idx = pd.date_range("2024-03-01", periods=5 * 720, freq="2min", tz="UTC")
    rng = np.random.default_rng(71)
    idx = idx + pd.to_timedelta(rng.integers(-20, 20, len(idx)), unit="s")
    keep = (idx < pd.Timestamp("2024-03-03T00:00Z")) | (idx >= pd.Timestamp("2024-03-03T06:00Z"))
    idx = idx[keep]
    level = ref.predict(idx - pd.Timedelta(minutes=3)) + rng.normal(0, 5 * mm, len(idx))
    res = dg.clock_offset(pd.Series(level, index=idx), ref)
    assert res["offset_min"] == pytest.approx(3.0, abs=0.2)
    assert res["days"] == 5


def test_clock_offset_per_day_follows_a_clock_that_jumps():
    level, _ = record(days=6, seed=72)
    late, _ = record(days=6, seed=72, model=SynthModel(shift_s=8 * minute))
    level.iloc[3 * 1440:] = late.iloc[3 * 1440:]
    res = dg.clock_offset(level, SynthModel())
    per_day_min = res["per_day"].to_numpy() / 60
    assert len(per_day_min) == 6
    assert np.all(np.abs(per_day_min[:2]) < 1.5)
    assert np.all(np.abs(per_day_min[4:] - 8) < 1.5)


def test_clock_offset_of_too_short_a_record_is_nan():
    level, _ = record(days=0.01, seed=73)
    assert np.isnan(dg.clock_offset(level, SynthModel())["offset_min"])


def _backup_late(minutes: float, start_h: float, end_h: float, days: float = 4, seed: int = 80):
    """Primary and a backup whose clock is ``minutes`` late between the given hours.

    Only the tide moves with the clock here; the surge and the noise are the primary's,
    so the difference is the timing error alone plus 2 mm of sensor noise.
    """
    primary, _ = record(days=days, seed=seed, white_sigma=0.0, surge_height=1.0)
    elapsed_h = np.arange(len(primary)) / 60
    span = (elapsed_h >= start_h) & (elapsed_h < end_h)
    backup = primary.copy()
    backup[span] = primary[span] + (SynthModel(shift_s=-minutes * minute).predict(primary.index[span])
                                    - SynthModel().predict(primary.index[span]))
    rng = np.random.default_rng(seed + 1)
    return primary, backup + 0.02 + rng.normal(0, 2 * mm, len(backup))


def test_backup_timing_finds_a_late_clock_in_its_windows():
    # IOC Manual Vol. IV: a second sensor checks the first. Backup 4 minutes late
    # (its stamp T holds the sea of T + 4 min) from hour 36 to hour 72.
    primary, backup = _backup_late(4.0, 36, 72)
    timing = dg.sensor_timing(primary, backup)
    inside = timing[(timing["start"] >= START + pd.Timedelta(hours=36))
                    & (timing["end"] <= START + pd.Timedelta(hours=72))]
    outside = timing[timing["end"] <= START + pd.Timedelta(hours=36)]
    assert len(inside) >= 8
    assert np.allclose(inside["lag_min"], 4.0, atol=0.5)
    assert np.allclose(outside["lag_min"], 0.0, atol=0.5)


def test_clock_episodes_join_late_windows_into_one_span():
    primary, backup = _backup_late(4.0, 36, 72)
    (span,) = dg.clock_episodes(dg.sensor_timing(primary, backup))
    assert span["lag_min"] == pytest.approx(4.0, abs=0.5)
    assert abs(span["start"] - (START + pd.Timedelta(hours=36))) <= pd.Timedelta(hours=6)
    assert abs(span["end"] - (START + pd.Timedelta(hours=72))) <= pd.Timedelta(hours=6)


def test_sensor_timing_of_empty_input_is_an_empty_frame():
    empty = pd.Series(dtype=float, index=pd.DatetimeIndex([], tz="UTC"))
    out = dg.sensor_timing(empty, empty)
    assert out.empty and list(out.columns) == ["start", "end", "lag_min", "mad_mm"]
    assert dg.clock_episodes(out) == []


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


# --------------------------------------------------------------------------- datum steps without false alarms

def _ramp(idx, start_h: float, rise: float, hours: float) -> np.ndarray:
    """A raised-cosine rise of ``rise`` [m] over ``hours``, from ``start_h`` hours into ``idx``; it stays."""
    h = (idx - idx[0]).total_seconds().to_numpy() / hour
    x = np.clip((h - start_h) / hours, 0.0, 1.0)
    return rise * 0.5 * (1 - np.cos(np.pi * x))


def test_storm_surge_onset_is_not_a_datum_step():
    # A surge is weather, not a datum change: a smooth 1 m rise over 6 hours that stays
    # (design notes: a surge is not a spike; persistence rule: common practice, no source).
    level, pred = record(days=4, seed=90)
    resid = level - pred + _ramp(level.index, 40, 1.0, 6)
    assert dg.datum_steps(resid).empty


def test_stuck_sensor_flagged_by_qc_is_not_a_datum_step():
    # 70 minutes stuck at one value on a rising tide; flags from our own QC (flat line:
    # suspect, then fail). The stuck spell must not pass for a step at either edge.
    from monitor.quality import checks as qc
    level, pred = record(days=4, seed=91)
    at = 50 * 60
    level.iloc[at:at + 70] = level.iloc[at]
    flags = qc.run_tests(level, QcSettings(), predicted=pred)["flag"]
    assert (flags.iloc[at + 60:at + 70] == qc.FAIL).all()
    assert dg.datum_steps(level - pred, flags=flags).empty


def test_stuck_sensor_flagged_fail_is_never_used():
    level, pred = record(days=4, seed=92)
    at = 50 * 60
    level.iloc[at:at + 70] = level.iloc[at]
    flags = np.ones(len(level), dtype=int)
    flags[at:at + 70] = 4
    assert dg.datum_steps(level - pred, flags=flags).empty


def test_backup_step_found_in_the_difference_and_attributed_to_the_backup():
    # Design notes: the difference of two co-located sensors cancels sea and weather.
    # Injected: +40 mm in the backup only, during a 1 m surge, 2 mm sensor noise each.
    primary, _ = record(days=4, seed=93, surge_height=1.0, surge_width_h=6.0)
    rng = np.random.default_rng(94)
    backup = primary + 0.015 + rng.normal(0, 2 * mm, len(primary))
    at = 2 * 1440 + 200
    backup.iloc[at:] += 0.040
    steps = dg.sensor_steps(primary, backup, SynthModel())
    assert len(steps) == 1
    row = steps.iloc[0]
    assert row["time"] == primary.index[at]
    assert row["sensor"] == "backup"
    assert row["step_mm"] == pytest.approx(40, abs=3 * row["se_mm"] + 5)
    assert row["difference_mm"] == pytest.approx(-40, abs=3 * row["se_mm"])


def test_primary_step_attributed_to_the_primary():
    primary, _ = record(days=4, seed=95)
    rng = np.random.default_rng(96)
    backup = primary - 0.010 + rng.normal(0, 2 * mm, len(primary))
    at = 2 * 1440
    primary.iloc[at:] -= 0.050
    (row,) = dg.sensor_steps(primary, backup, SynthModel()).to_dict("records")
    assert row["sensor"] == "primary"
    assert row["step_mm"] == pytest.approx(-50, abs=10)


# --------------------------------------------------------------------------- clock in a storm week

# IOC Manual Vol. IV asks for gauge timing good to one minute (from memory): a right clock
# under a metre of storm surge must read inside that minute in every week of the trend.
@pytest.mark.parametrize("seed", [61, 64])
def test_weekly_clock_trend_of_a_right_clock_under_a_storm_stays_within_a_minute(seed):
    level, _ = record(days=14, seed=seed, surge_height=1.0, surge_width_h=6.0,
                      surge_peak=START + pd.Timedelta(days=10.5))
    ends = [START + pd.Timedelta(days=7), START + pd.Timedelta(days=14)]
    weekly = dg.clock_trend(level, SynthModel(), ends)
    assert len(weekly) == 2
    assert np.all(np.abs(weekly.to_numpy()) < 1.0)


def test_weekly_clock_trend_finds_a_late_clock():
    level, _ = record(days=14, seed=65, red_sigma=0.01, model=SynthModel(shift_s=5 * minute))
    weekly = dg.clock_trend(level, SynthModel(), [START + pd.Timedelta(days=7), START + pd.Timedelta(days=14)])
    assert np.allclose(weekly.to_numpy(), 5.0, atol=0.5)


def test_weekly_clock_trend_skips_fail_flagged_samples():
    # A 2-hour stretch with a 30-minute-late record flagged fail must not move the week.
    level, _ = record(days=7, seed=66, red_sigma=0.01)
    late, _ = record(days=7, seed=66, red_sigma=0.01, model=SynthModel(shift_s=30 * minute))
    bad = slice(3 * 1440, 3 * 1440 + 120)
    level.iloc[bad] = late.iloc[bad]
    flags = np.ones(len(level), dtype=int)
    flags[bad] = 4
    weekly = dg.clock_trend(level, SynthModel(), [START + pd.Timedelta(days=7)], flags=flags)
    assert abs(weekly.iloc[0]) < 0.3


def test_relative_clock_finds_the_backup_late_against_the_primary():
    # IOC Manual Vol. IV: a second sensor checks the first; backup 4 minutes late at the end.
    primary, backup = _backup_late(4.0, 60, 96)
    rel = dg.relative_clock(primary, backup)
    assert rel["sensor"] == "backup"
    assert rel["offset_min"] == pytest.approx(4.0, abs=0.5)
    (ep,) = rel["episodes"]
    assert ep["lag_min"] == pytest.approx(4.0, abs=0.5)


def test_backup_clock_slip_is_not_a_datum_step():
    # A clock that slips moves the difference by the slip times the tide's rate, not by a
    # constant (Pugh & Woodworth 2014, ch. 3): the backup 6 minutes late from hour 60.
    primary, backup = _backup_late(6.0, 60, 96)
    assert dg.sensor_steps(primary, backup, SynthModel()).empty
