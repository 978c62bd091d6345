"""Frames the daemon keeps between passes (the tide extremes) are read back
equal, and reading them every pass leaves nothing behind (pandas' copy-on-write keeps a
weak reference on a frame for each view taken of it; kept for days, those piled up)."""
from __future__ import annotations

import gc
import weakref

import numpy as np
import pandas as pd

from monitor.service.daemon import Frozen, StationRuntime
from predictor import TideModel

MODEL = TideModel.from_dict({"mean": 2.0, "constituents": [{"name": "M2", "amplitude": 1.0, "phase": 40.0}]})


def _weakrefs() -> int:
    gc.collect()
    return sum(1 for o in gc.get_objects() if type(o) is weakref.ReferenceType)


def test_extremes_read_back_equal():
    rt = StationRuntime(cfg=None)
    ext = MODEL.high_low(pd.Timestamp("2025-01-01", tz="UTC"), pd.Timestamp("2025-01-08", tz="UTC"))
    rt.extremes = ext
    pd.testing.assert_frame_equal(rt.extremes, ext)
    assert rt.extremes is not rt.extremes  # a new object at each read


def test_a_series_on_a_grid_and_an_irregular_index_read_back_equal():
    grid = pd.Series(np.linspace(-0.2, 0.3, 500), name="smoothed",
                     index=pd.date_range("2025-01-01", periods=500, freq="10min", tz="UTC"))
    pd.testing.assert_series_equal(Frozen(grid).thaw(), grid, check_freq=False)
    idx = pd.DatetimeIndex(["2025-01-01T00:00Z", "2025-01-01T00:10Z", "2025-01-01T00:25Z", "2025-01-01T00:30Z"])
    hist = pd.Series([0.1, np.nan, 0.3, 0.4], index=idx.tz_convert("Europe/Dublin"), name="smoothed")
    pd.testing.assert_series_equal(Frozen(hist).thaw(), hist)


def test_reading_the_kept_frames_every_pass_leaves_no_references_behind():
    rt = StationRuntime(cfg=None)
    rt.extremes = MODEL.high_low(pd.Timestamp("2025-01-01", tz="UTC"), pd.Timestamp("2025-01-08", tz="UTC"))
    before = _weakrefs()
    for _ in range(300):  # what a pass does with them
        ext = rt.extremes
        lows = ext[ext["kind"] == "low"]
        lows["time"].map(pd.Timestamp.timestamp)
    assert _weakrefs() - before < 30
