"""The daemon's per-station memo of predicted tide (monitor.service.daemon.PredictionMemo)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from monitor.service.daemon import PredictionMemo
from predictor import TideModel
from units import mm


class CountingModel:
    """A TideModel that records how many times it was asked to predict."""

    def __init__(self):
        self.model = TideModel(2.0, [{"name": "M2", "amplitude": 1.0, "phase": 40.0},
                                     {"name": "K1", "amplitude": 0.3, "phase": 120.0}])
        self.asked = 0

    def predict(self, times):
        self.asked += len(times)
        return self.model.predict(times)


def _minutes(start: str, n: int) -> pd.DatetimeIndex:
    return pd.date_range(start, periods=n, freq="1min", tz="UTC")


def test_memo_agrees_with_the_model_it_wraps():
    # reference: TideModel.predict itself (the memo must only remember, never change, it)
    m = CountingModel()
    memo = PredictionMemo(m)
    day = _minutes("2026-03-01", 1440)
    memo.predict(day)
    later = _minutes("2026-03-01 06:00", 1440)
    np.testing.assert_allclose(memo.predict(later), m.model.predict(later), atol=0.001 * mm)


def test_memo_predicts_only_times_not_asked_for_before():
    m = CountingModel()
    memo = PredictionMemo(m)
    memo.predict(_minutes("2026-03-01", 1440))
    memo.predict(_minutes("2026-03-01 00:01", 1440))  # the next pass: one new minute
    assert m.asked == 1440 + 1


def test_memo_forgets_times_before_the_cut():
    m = CountingModel()
    memo = PredictionMemo(m)
    day = _minutes("2026-03-01", 1440)
    memo.predict(day)
    memo.forget_before(day[60].timestamp())
    memo.predict(day[:61])  # the first hour is gone, the minute at the cut is kept
    assert m.asked == 1440 + 60
