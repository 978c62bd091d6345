"""The one definition of a gap (predictor.timeutil.silences), and its two users agree with it.

Expected gaps are worked out by hand from the sample times below, not by the code under test.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from alerts.reports.model import find_gaps as report_gaps
from monitor.quality.checks import find_gaps as qc_gaps
from predictor.timeutil import silences
from units import minute


# samples at 0, 1, 2, 10, 11, 20 minutes: silences of 8 min (2 -> 10) and 9 min (11 -> 20)
T = np.array([0, 1, 2, 10, 11, 20]) * minute


def test_a_gap_is_a_silence_longer_than_the_limit():
    before, after = silences(T, 8.5 * minute)
    assert before.tolist() == [11 * minute] and after.tolist() == [20 * minute]


def test_a_silence_of_exactly_the_limit_is_not_a_gap():
    before, _ = silences(T, 9 * minute)
    assert before.size == 0
    before, _ = silences(T, 9 * minute - 1)
    assert before.tolist() == [11 * minute]


def test_window_edges_count_as_samples():
    before, after = silences(T, 5 * minute, start=-10 * minute, end=30 * minute)
    assert list(zip(before.tolist(), after.tolist())) == [
        (-10 * minute, 0.0), (2 * minute, 10 * minute), (11 * minute, 20 * minute), (20 * minute, 30 * minute)]


def test_order_of_samples_does_not_matter():
    a = silences(T, 5 * minute)
    b = silences(T[::-1], 5 * minute)
    assert all((x == y).all() for x, y in zip(a, b))


def test_quality_control_and_report_find_the_same_gaps():
    index = pd.DatetimeIndex(pd.Timestamp("2025-01-01", tz="UTC") + pd.to_timedelta(T, unit="s"))
    qc = qc_gaps(index, 2 * minute)
    # the report's limit is twice the sampling interval: the same limit with a one-minute interval
    day_start, day_end = index[0], index[-1] + pd.Timedelta(minutes=1)
    rep = report_gaps(index, day_start, day_end, interval=minute)
    assert qc["start"].tolist() == [index[2], index[4]]
    assert qc["end"].tolist() == [index[3], index[5]]
    # the report's gap starts when the next sample was due, one interval after the last
    assert [(g.start, g.end) for g in rep] == [(index[2] + pd.Timedelta(minutes=1), index[3]),
                                               (index[4] + pd.Timedelta(minutes=1), index[5])]
