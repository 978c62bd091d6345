"""Per-sample QC tests on synthetic records with known, injected faults.

Each fault must be flagged at the sample where it was injected and nowhere else that
matters; a clean record with coloured noise and a storm surge must stay clean.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.quality import checks as qc
from monitor.quality import tail as qc_tail
from test_qc_synthetic import record
from units import mm, minute, hour

FAIL, SUSPECT, PASS, NOT_EVALUATED, MISSING = qc.FAIL, qc.SUSPECT, qc.PASS, qc.NOT_EVALUATED, qc.MISSING


@pytest.fixture(scope="module")
def calm():
    """Five calm days at one-minute steps: (level, predicted)."""
    return record(days=5, seed=11)


def flagged(out: pd.DataFrame, column: str = "flag", at_least: int = SUSPECT) -> pd.DatetimeIndex:
    f = out[column]
    return f.index[(f >= at_least) & (f != MISSING)]


def test_single_sample_spike_of_30_cm_fails_at_its_time(calm):
    level, pred = calm
    level = level.copy()
    at = level.index[3000]
    level.loc[at] += 0.30
    out = qc.run_tests(level, None, pred)
    assert list(flagged(out, at_least=FAIL)) == [at]


def test_one_sample_jump_of_30_cm_fails_at_the_jump(calm):
    # A step (the level jumps and stays): the sample after the jump fails on rate of change.
    level, pred = calm
    level = level.copy()
    level.iloc[3000:] += 0.30
    out = qc.run_tests(level, None, pred)
    assert out["flag"].iloc[3000] == FAIL
    assert (out["flag"].iloc[:2999] < FAIL).all()


def test_good_sample_after_a_spike_is_not_blamed_for_the_return(calm):
    level, pred = calm
    level = level.copy()
    level.iloc[3000] += 0.30
    out = qc.run_tests(level, None, pred)
    assert out["roc"].iloc[3001] == PASS


def test_smooth_surge_of_one_metre_over_hours_passes():
    # A metre in about five hours (Gaussian, e-folding 2 h): the rise is not a spike.
    level, pred = record(days=4, seed=3, surge_height=1.0, surge_width_h=2.0)
    out = qc.run_tests(level, None, pred)
    for test in ("spike", "roc", "resid", "flag"):
        assert len(flagged(out, test)) == 0, test


def test_spike_test_ignores_tide_curvature_on_the_residual():
    # Hourly samples: the tide's own curvature at high water is ~0.15 m per step pair,
    # which the raw-level formula would call a spike; on the residual it vanishes.
    level, pred = record(days=5, step_s=3600, seed=2, red_sigma=0.01)
    raw = qc.spike_test(level, 0.08, 0.20, 2 * hour)
    resid = qc.spike_test(level - pred, 0.08, 0.20, 2 * hour)
    assert (raw >= SUSPECT).sum() > 0
    assert (resid >= SUSPECT).sum() == 0


def test_flat_line_is_suspect_after_30_min_and_fails_after_60_min(calm):
    level, pred = calm
    level = level.copy()
    stuck_from = 2000
    level.iloc[stuck_from:stuck_from + 120] = level.iloc[stuck_from]
    out = qc.run_tests(level, None, pred)
    flat = out["flat"]
    first_suspect = flat.index[flat == SUSPECT][0]
    first_fail = flat.index[flat == FAIL][0]
    t0 = level.index[stuck_from]
    assert abs((first_suspect - t0).total_seconds() - 30 * minute) <= 1 * minute
    assert abs((first_fail - t0).total_seconds() - 60 * minute) <= 1 * minute
    assert (flat.iloc[:stuck_from + 29] == PASS).all()


def test_gap_marks_the_first_sample_after_it_as_missing_data(calm):
    # QARTOD v2.1 Test 1: data that did not arrive within TIM_INC are missing (9), not suspect;
    # the flag sits on the first sample after the silence and records the gap.
    level, pred = calm
    keep = np.ones(len(level), bool)
    keep[1500:1520] = False  # twenty minutes missing
    out = qc.run_tests(level[keep], None, pred[keep])
    after = level.index[1520]
    assert out.loc[after, "gap"] == MISSING
    assert (out["gap"] != PASS).sum() == 1


def test_the_sample_after_a_gap_keeps_its_own_value_usable(calm):
    # the gap's 9 is about the data that never came; the sample's own value is judged by the
    # other tests and still reaches alerts and fits
    level, pred = calm
    keep = np.ones(len(level), bool)
    keep[1500:1520] = False
    out = qc.run_tests(level[keep], None, pred[keep])
    assert out.loc[level.index[1520], "flag"] in (PASS, NOT_EVALUATED, SUSPECT)


def test_find_gaps_reports_start_end_and_length(calm):
    level, _ = calm
    keep = np.ones(len(level), bool)
    keep[1500:1520] = False
    gaps = qc.find_gaps(level[keep].index, 5 * minute)
    assert len(gaps) == 1
    assert gaps.loc[0, "start"] == level.index[1499]
    assert gaps.loc[0, "end"] == level.index[1520]
    assert gaps.loc[0, "seconds"] == pytest.approx(21 * minute)


def test_future_time_stamp_fails(calm):
    level, pred = calm
    now = level.index[-10].timestamp()
    out = qc.gap_test(level, 300, now=now, future_tolerance=120)
    assert (out.iloc[-7:] == FAIL).all() and (out.iloc[:-8] != FAIL).all()


def test_gross_range_fails_outside_sensor_limits_and_suspects_outside_operator_limits():
    idx = pd.date_range("2024-01-01", periods=4, freq="1min", tz="UTC")
    level = pd.Series([1.0, 25.0, -0.6, np.nan], index=idx)
    out = qc.gross_range_test(level, -10, 20, suspect_min=-0.5, suspect_max=6)
    assert list(out) == [PASS, FAIL, SUSPECT, NOT_EVALUATED]


def test_expected_range_suspects_a_level_far_from_the_prediction(calm):
    level, pred = calm
    level = level.copy()
    level.iloc[100:110] += 2.0
    out = qc.expected_range_test(level, pred, 1.5)
    assert list(out.index[out == SUSPECT]) == list(level.index[100:110])


def test_multi_sensor_suspect_once_backup_drift_passes_the_limit(calm):
    level, pred = calm
    rng = np.random.default_rng(4)
    drift_per_min = 0.02 / 1440  # 20 mm/day
    backup = level + rng.normal(0, 1 * mm, len(level)) + drift_per_min * np.arange(len(level))
    out = qc.multi_sensor_test(level, backup, 0.05, 300)
    first = out.index[out == SUSPECT][0]
    expected = level.index[0] + pd.Timedelta(days=2.5)  # 50 mm / 20 mm/day
    # The first crossing comes early by up to ~4.5 sigma of the 1 mm noise: 4.5 mm at 0.83 mm/h.
    assert abs((first - expected).total_seconds()) <= 6 * hour


def test_multi_sensor_not_evaluated_without_another_sensor(calm):
    level, _ = calm
    assert (qc.multi_sensor_test(level, None, 0.05, 300) == NOT_EVALUATED).all()


def test_residual_outlier_fails_a_three_sample_burst(calm):
    # Three consecutive bad samples: each looks like a plateau to the spike formula.
    level, pred = calm
    level = level.copy()
    level.iloc[4000:4003] += 0.35
    out = qc.run_tests(level, None, pred)
    assert (out["resid"].iloc[4000:4003] == FAIL).all()
    assert (out["flag"].iloc[4000:4003] == FAIL).all()


def test_missing_value_is_9_and_other_tests_not_evaluated(calm):
    level, pred = calm
    level = level.copy()
    level.iloc[50] = np.nan
    out = qc.run_tests(level, None, pred)
    assert out["flag"].iloc[50] == MISSING
    assert out.iloc[50][[c for c in qc.TESTS if c != "syntax"]].eq(NOT_EVALUATED).all()


def test_aggregate_is_worst_evaluated_test():
    tests = pd.DataFrame({c: [PASS, PASS, NOT_EVALUATED, PASS] for c in qc.TESTS})
    tests.loc[1, "spike"] = SUSPECT
    tests.loc[1, "roc"] = FAIL
    tests.loc[2, :] = NOT_EVALUATED
    tests.loc[3, "flat"] = SUSPECT
    assert list(qc.aggregate_flags(tests)) == [PASS, FAIL, NOT_EVALUATED, SUSPECT]


@settings(max_examples=200, deadline=None)
@given(rows=st.lists(st.lists(st.sampled_from([PASS, NOT_EVALUATED, SUSPECT, FAIL, MISSING]),
                              min_size=len(qc.TESTS), max_size=len(qc.TESTS)), max_size=30))
def test_the_array_aggregate_equals_the_rule_written_out(rows):
    """``_aggregate`` (the QC context's, by table lookups) against the QARTOD aggregate
    written out row by row: the worst evaluated test (4 > 3 > 1), 9 when a test other than
    the gap test says the value is missing, else 2 when nothing was evaluated."""
    table = np.array(rows, dtype=np.int8).reshape(len(rows), len(qc.TESTS))
    gap = qc.TESTS.index("gap")
    want = []
    for row in rows:
        codes = [c for j, c in enumerate(row) if c != NOT_EVALUATED and not (j == gap and c == MISSING)]
        want.append(max(codes) if codes else NOT_EVALUATED)
    got = qc._aggregate(table)
    assert got.dtype == np.int8 and list(got) == want
    frame = pd.DataFrame(table, columns=list(qc.TESTS))
    assert list(qc.aggregate_flags(frame)) == want


@settings(max_examples=200, deadline=None)
@given(steps=st.lists(st.sampled_from([60.0, 60.0, 60.0, 30.0, 61.5, 600.0]), min_size=1, max_size=40),
       start=st.integers(1_600_000_000, 1_900_000_000))
def test_the_median_step_equals_numpy_median_of_the_steps(steps, start):
    """The attenuation test's sampling step against ``np.median(np.diff(t))`` (numpy as the
    reference), for steady feeds (one step throughout) and irregular ones."""
    t = start + np.concatenate([[0.0], np.cumsum(steps)])
    assert qc_tail._median_step(t) == float(np.median(np.diff(t)))


@settings(max_examples=600, deadline=None)
@given(head=st.lists(st.booleans(), max_size=30), runs=st.integers(0, 30), tail=st.lists(st.booleans(), max_size=30),
       count=st.integers(1, 5), data=st.data())
def test_the_finite_rows_found_near_an_end_equal_those_of_the_whole_scan(head, runs, tail, count, data):
    """The spike test's memo finds the n-th finite row before a row (and from the first row
    on) by looking near it first: against ``np.flatnonzero(np.isfinite(...))`` of the whole
    record, with runs of NaN longer than the first look."""
    values = np.where(np.array(head + [True] * runs + tail, dtype=bool), np.nan, 1.0)
    end = data.draw(st.integers(0, len(values)))
    fin = np.flatnonzero(np.isfinite(values))
    before = fin[fin < end]
    assert qc_tail._finite_back(values, end, count) == (int(before[-count]) if len(before) >= count else -1)
    assert qc_tail._finite_ahead(values, count) == (int(fin[count - 1]) if len(fin) >= count else -1)


def test_override_wins_over_automatic_flag(calm):
    level, pred = calm
    idx = level.index[:3]
    flags = pd.Series([FAIL, PASS, PASS], index=idx)
    out = qc.apply_overrides(flags, pd.Series([PASS, FAIL], index=idx[:2]))
    assert list(out) == [PASS, FAIL, PASS]


def test_usable_excludes_fail_and_missing_but_keeps_suspect():
    assert list(qc.usable_mask([1, 2, 3, 4, 9])) == [True, True, True, False, False]


def test_without_prediction_expected_range_is_not_evaluated(calm):
    level, _ = calm
    out = qc.run_tests(level.iloc[:500])
    assert (out["expected"] == NOT_EVALUATED).all()


def test_episodes_orders_worst_first(calm):
    level, _ = calm
    f = pd.Series(PASS, index=level.index[:20])
    f.iloc[3:5] = SUSPECT
    f.iloc[10] = FAIL
    ep = qc.episodes(f)
    assert list(ep["worst"]) == [FAIL, SUSPECT]
    assert ep.loc[1, "start"] == level.index[3] and ep.loc[1, "samples"] == 2


@pytest.mark.parametrize("step_s, days", [(60, 30), (360, 90)])
def test_clean_record_with_coloured_noise_and_surge_flags_under_a_tenth_of_a_percent(step_s, days):
    # Coloured noise (AR(1), 3 cm, 6 h memory) + 4 mm white + a 1 m surge + a negative surge.
    level, pred = record(days=days, step_s=step_s, seed=21, surge_height=1.0, surge_width_h=4.0)
    level = level + record(days=days, step_s=step_s, seed=22, red_sigma=0.0, white_sigma=0.0,
                           surge_height=-0.6, surge_peak=level.index[len(level) // 4])[0] - \
        record(days=days, step_s=step_s, seed=22, red_sigma=0.0, white_sigma=0.0)[0]
    backup = level + np.random.default_rng(23).normal(0, 3 * mm, len(level)) + 0.004
    s = qc.QcSettings(gap_limit=5 * step_s)
    out = qc.run_tests(level, s, pred, other=backup)
    share = (out["flag"].isin([SUSPECT, FAIL])).mean()
    assert share < 0.001


def test_diagnostics_leave_out_a_spell_the_flat_line_test_doubts():
    # A stuck float reads nothing of the sea even while only suspect; other suspects stay usable
    # for diagnostics, and fail (4) never is (design notes, "Quality control").
    from monitor.quality.records import diagnostic_mask

    flags = [1, 3, 3, 4, 2]
    flat = [1, 3, 1, 4, 2]
    assert diagnostic_mask(flags, flat).tolist() == [True, False, True, False, True]


@st.composite
def _short_records(draw):
    """A few rows of a residual [m] with spikes, steps, ties, zeros and missing values, at
    times [s] with repeats, gaps and one-minute steps."""
    n = draw(st.integers(0, qc_tail._SMALL))
    pick = st.sampled_from([0.0, -0.0, 0.01, -0.01, 0.05, 0.09, -0.09, 0.25, -0.25, 0.5, 1.0, np.nan])
    r = np.array(draw(st.lists(st.one_of(pick, st.floats(-2, 2)), min_size=n, max_size=n)), dtype=float)
    steps = draw(st.lists(st.sampled_from([60.0, 60.0, 60.0, 0.0, 240.0, 300.0, 301.0, 900.0]), min_size=n, max_size=n))
    t = 1_760_000_000.0 + np.cumsum(steps)
    return r, t


@settings(max_examples=400, deadline=None)
@given(rec=_short_records())
def test_the_spike_test_of_a_few_rows_on_floats_equals_the_array_and_pandas_forms(rec):
    """The steady pass's few re-judged rows go through Python floats (``_spike_flags_small``):
    the same flags as the whole-array form and as ``spike_test`` on a pandas Series (the
    whole-record reference), on short records full of ties, zeros, gaps and NaN."""
    r, t = rec
    s = qc.QcSettings()
    args = (s.spike_suspect, s.spike_fail, s.gap_limit, s.jump_ratio)
    small = qc_tail._spike_flags_small(r, t, *args)
    arrays = qc.spike_flags_on_arrays(r, t, *args)
    assert small.tolist() == arrays.tolist()
    if len(t) and np.all(np.diff(t) > 0):  # (a Series wants distinct times)
        series = pd.Series(r, index=pd.to_datetime(t, unit="s", utc=True))
        assert small.tolist() == qc.spike_test(series, *args).tolist()


@st.composite
def _stuck_records(draw):
    """Levels [m] with stuck spells, near-ties within the flat tolerance and missing values,
    at one-minute steps with gaps [s]."""
    n = draw(st.integers(2, 150))
    base = draw(st.sampled_from([2.0, 2.0004, 2.0006, 2.001]))
    v = np.array(draw(st.lists(st.sampled_from([base, 2.0, 2.0003, 2.0005, 2.1, np.nan]), min_size=n, max_size=n)))
    steps = draw(st.lists(st.sampled_from([60.0, 60.0, 60.0, 60.0, 120.0, 301.0, 1800.0]), min_size=n, max_size=n))
    return v, 1_760_000_000.0 + np.cumsum(steps)


@settings(max_examples=300, deadline=None)
@given(rec=_stuck_records(), data=st.data())
def test_the_flat_line_at_one_row_on_scalars_equals_the_array_form_and_pandas(rec, data):
    """A steady pass's one new row goes through ``_flat_row`` (scalars): the flag equals the
    whole-array form's and ``flat_line_test`` over the whole record (pandas, the reference)."""
    v, t = rec
    s = qc.QcSettings()
    tn = (t * 1e9).astype(np.int64)
    row = data.draw(st.integers(0, len(v) - 1))
    other = (row + 1) % len(v)
    one = qc_tail._flat_rows(v, t, tn, np.array([row]), s)[0]
    assert one == qc_tail._flat_rows(v, t, tn, np.array(sorted({row, other})), s)[sorted({row, other}).index(row)]
    series = pd.Series(v, index=pd.to_datetime(t, unit="s", utc=True))
    ref = qc.flat_line_test(series, s.flat_tolerance, s.flat_suspect_after, s.flat_fail_after, s.gap_limit)
    assert one == ref.iloc[row]


@pytest.mark.parametrize("case", ["a sample just at the window's start after a silence", "one finite value"])
def test_the_flat_line_at_one_row_at_the_edges_of_its_window(case):
    s = qc.QcSettings()
    if case.startswith("a sample"):  # 1000 s of silence, then 30 min of one-minute samples, all one value
        t = np.concatenate([[0.0], 1000.0 + 60.0 * np.arange(31)])
        v = np.full(len(t), 2.0)
    else:  # the hour missing but its first sample (another level) and the newest
        t = 60.0 * np.arange(61)
        v = np.full(len(t), np.nan)
        v[0], v[-1] = 2.1, 2.0
    t += 1_760_000_000.0
    tn = (t * 1e9).astype(np.int64)
    row = len(t) - 1
    series = pd.Series(v, index=pd.to_datetime(t, unit="s", utc=True))
    want = qc.flat_line_test(series, s.flat_tolerance, s.flat_suspect_after, s.flat_fail_after, s.gap_limit).iloc[row]
    assert want == (qc.SUSPECT if case.startswith("a sample") else qc.PASS)
    assert qc_tail._flat_rows(v, t, tn, np.array([row]), s)[0] == want
    assert qc_tail._flat_rows(v, t, tn, np.array([row - 1, row]), s)[1] == want


@settings(max_examples=300, deadline=None)
@given(values=st.lists(st.floats(-5, 5), min_size=10, max_size=3000), scale=st.sampled_from([1.0, 1e-3, 1e3]))
def test_the_sample_std_is_numpys_to_the_bit(values, scale):
    """The rate of change's sd at a steady pass's new row (``_sample_std``) is ``np.std(ddof=1)``."""
    w = np.array(values) * scale
    assert qc_tail._sample_std(w) == float(np.std(w, ddof=1))


@pytest.mark.parametrize("shape, value, dtype", [(5, np.nan, float), (3, qc.NOT_EVALUATED, np.int8),
                                                 ((2, 3), -1, np.int64), (0, qc.PASS, np.int8),
                                                 ((4, 3), np.nan, float), (7, -1, np.int8)])
def test_the_filled_helper_is_numpys_full(shape, value, dtype):
    """``_filled`` stands in for ``np.full`` on the steady pass: the same dtype, shape and values."""
    got, want = qc_tail._filled(shape, value, dtype), np.full(shape, value, dtype=dtype)
    assert got.dtype == want.dtype and got.shape == want.shape
    assert np.array_equal(got, want, equal_nan=True)
