"""QC settings: validation messages, and the defaults against published guidance."""
from __future__ import annotations

import math

from dataclasses import fields

from hypothesis import given, settings, strategies as st

from monitor.quality import checks as qc
from monitor.quality.checks import QcSettings, qc_settings_from
from units import minute, hour

KP = "stations[0].qc"


def test_empty_table_gives_defaults_without_errors():
    s, errors = qc_settings_from({}, KP)
    assert errors == [] and s == QcSettings()


def test_durations_accept_text_and_seconds():
    s, errors = qc_settings_from({"gap_limit": "10min", "roc_window": 3600}, KP)
    assert errors == []
    assert s.gap_limit == 10 * minute and s.roc_window == hour


def test_unknown_key_names_its_path_and_a_near_match():
    _, errors = qc_settings_from({"spike_suspekt": 0.1}, KP)
    assert errors == [f"{KP}.spike_suspekt: unknown key (did you mean 'spike_suspect'?)"]


def test_bad_value_message_starts_with_key_path():
    _, errors = qc_settings_from({"spike_fail": "high", "flat_fail_after": "soon", "roc_n_dev": -1}, KP)
    assert len(errors) == 3
    assert all(e.startswith(f"{KP}.") for e in errors)


def test_suspect_threshold_above_fail_is_refused():
    _, errors = qc_settings_from({"spike_suspect": 0.3, "spike_fail": 0.2}, KP)
    assert any(e.startswith(f"{KP}.spike_fail:") and "below" in e for e in errors)


def test_operator_range_outside_sensor_range_is_refused():
    _, errors = qc_settings_from({"gross_fail_max": 8.0, "gross_suspect_max": 9.0}, KP)
    assert any("gross_suspect_max" in e for e in errors)


_values = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6), st.floats(allow_nan=True),
                    st.text(max_size=12), st.lists(st.integers(), max_size=2))
_keys = st.one_of(st.sampled_from([f.name for f in fields(QcSettings)]), st.text(max_size=10))


@settings(max_examples=200, deadline=None)
@given(st.dictionaries(_keys, _values, max_size=6))
def test_any_table_gives_settings_and_messages_with_the_key_path(raw):
    s, errors = qc_settings_from(raw, KP)
    assert isinstance(s, QcSettings)
    assert all(isinstance(e, str) and e.startswith(f"{KP}.") for e in errors)
    # Whatever was accepted keeps the thresholds ordered.
    assert s.spike_suspect < s.spike_fail and s.flat_suspect_after < s.flat_fail_after


# Defaults against published guidance -------------------------------------------------

def test_flag_scale_is_qartods():
    # U.S. IOOS QARTOD water level manual v2.1 (2021), flag table: 1 pass, 2 not
    # evaluated, 3 suspect, 4 fail, 9 missing (from memory; the scale is common to all
    # QARTOD manuals).
    assert (qc.PASS, qc.NOT_EVALUATED, qc.SUSPECT, qc.FAIL, qc.MISSING) == (1, 2, 3, 4, 9)


def test_rate_of_change_default_is_three_deviations_over_25_hours():
    # QARTOD water level manual v2.1, Test 7 (rate of change) example: N_DEV = 3 standard deviations,
    # TIM_DEV = 25 hours (from memory).
    s = QcSettings()
    assert s.roc_n_dev == 3.0
    assert s.roc_window == 25 * hour


def test_spike_defaults_have_a_lower_suspect_and_higher_fail_threshold():
    # QARTOD Test 6 takes SPIKE_THRSHLD_LOW (suspect) < SPIKE_THRSHLD_HIGH (fail), values
    # left to the operator (from memory). Ours: 8 cm / 20 cm, common practice, no source;
    # both must sit below the 30 cm single-sample jump the issue requires to fail.
    s = QcSettings()
    assert 0 < s.spike_suspect < s.spike_fail < 0.30


def test_flat_line_suspect_comes_before_fail_and_tolerance_below_resolution():
    # QARTOD Test 8 (flat line): REP_CNT_SUSPECT < REP_CNT_FAIL and a tolerance EPS (from memory).
    # Gauge loggers commonly report to 1 mm (common practice, no source): EPS below it.
    s = QcSettings()
    assert s.flat_suspect_after < s.flat_fail_after
    assert s.flat_tolerance < 0.001


def test_timing_limit_matches_ioc_one_minute():
    # IOC Manual on Sea Level Measurement and Interpretation, Vol. IV: timing to within
    # one minute (from memory).
    assert QcSettings().clock_limit_min == 1.0


def test_context_covers_the_longest_window():
    s = QcSettings()
    assert s.context_seconds() >= max(s.roc_window, s.flat_fail_after, s.resid_noise_window / 2, s.atten_window)
    assert math.isfinite(s.context_seconds())
