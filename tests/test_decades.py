"""The multi-decade history (sample_feeds/decades.py) and the return levels and trend found in it.

The generator is invented data for the demo and these tests; its truth (the rise it put in, and
the return levels of its own process, by conditional Monte Carlo) is checked here against a
direct simulation, and the library is checked against the truth end to end: the 95 % bands of
both routes (annual maxima with a GEV; declustered skew surges with a GPD joined with the
predicted high waters, Batstone et al. 2013) cover the true levels, and the trend's interval
covers the true rise.
"""
from __future__ import annotations

import dataclasses
import importlib.util
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.surge.residual import skew_surges
from predictor import TideModel
from predictor import extremes as ex
from predictor import sealevel as sl
from units import mm

ROOT = Path(__file__).resolve().parent.parent
PERIODS = (2, 5, 10, 20, 50, 100)


def _load():
    name = "sample_feeds_decades"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, ROOT / "sample_feeds" / "decades.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


dec = _load()


@pytest.fixture(scope="module")
def port():
    with open(ROOT / "demo" / "port.toml", "rb") as fh:
        return tomllib.load(fh)


@pytest.fixture(scope="module")
def history():
    """The default 40-year history (seed fixed before any result was seen) and its truth."""
    return dec.make_history(return_periods=PERIODS)


def test_history_repeats_and_has_its_outages_and_step():
    spec = dataclasses.replace(dec.DecadesSpec(), years=3, start_year=2001, outages=2)
    a, ta = dec.make_history(spec, seed=5)
    b, _ = dec.make_history(spec, seed=5)
    pd.testing.assert_series_equal(a, b)
    hours = int((spec.epoch - pd.Timestamp("2001-01-01", tz="UTC")) / pd.Timedelta(hours=1))
    assert len(a) < hours
    for start, end in ta.outages:
        assert a[start:end].empty
    assert ta.datum_steps and ta.datum_steps[0]["offset_m"] == pytest.approx(0.042)


def test_truth_agrees_with_a_direct_simulation():
    # Five independent 38-year records at different centuries' tides, stationary (no rise, no
    # step): the fraction of annual maxima above each true T-year level is 1/T within 3.5
    # binomial standard errors.
    truth = dec.true_return_levels((2, 5, 10), dec.DecadesSpec())
    maxima = []
    for k, start in enumerate((1900, 1938, 1976, 2014, 2052)):
        spec = dataclasses.replace(dec.DecadesSpec(), start_year=start, years=38, rise_mm_per_year=0.0,
                                   datum_step=None, outages=0)
        lv, _ = dec.make_history(spec, seed=1000 + k)
        maxima.append(lv.groupby(lv.index.year).max().to_numpy())
    am = np.concatenate(maxima)
    for T, z, se in truth[["period", "level", "mc_se"]].itertuples(index=False):
        assert se < 5 * mm
        freq = np.mean(am > z)
        sd = np.sqrt(1 / T * (1 - 1 / T) / am.size)
        assert abs(freq - 1 / T) < 3.5 * sd, (T, freq)


@pytest.mark.slow
def test_end_to_end_trend_covers_the_true_rise(history):
    levels, truth = history
    msl = sl.mean_sea_levels(levels)
    trend = sl.sea_level_trend(msl.monthly, datum_steps=[s["time"] for s in truth.datum_steps])
    assert trend.lower_mm_per_year <= truth.rise_mm_per_year <= trend.upper_mm_per_year
    step = trend.steps[0]
    assert abs(step["offset_mm"] - 1e3 * truth.datum_steps[0]["offset_m"]) < 1.96 * step["se_mm"]
    assert trend.nodal is not None                       # 40 years: the nodal term is fitted
    assert trend.step_handling == "corrected"


@pytest.mark.slow
def test_end_to_end_return_level_bands_cover_the_true_levels(history, port):
    levels, truth = history
    msl = sl.mean_sea_levels(levels)
    trend = sl.sea_level_trend(msl.monthly, datum_steps=[s["time"] for s in truth.datum_steps])
    sea = sl.stationary_levels(levels, trend)           # as at the epoch, on today's datum
    true = truth.return_levels.set_index("period")["level"]

    gev = ex.fit_gev(ex.annual_maxima(sea)).curve(PERIODS)
    for row in gev.itertuples():
        assert row.lower <= true[row.period] <= row.upper, ("GEV", row)

    # The tide of the port (its constants; the history's tide was synthesised independently)
    model = TideModel(truth.mean_sea_level_m, port["tide"]["constituents"])
    turning = model.high_low(sea.index[0], sea.index[-1] + pd.Timedelta(hours=13))
    surges = skew_surges(sea, turning)
    pot = ex.fit_peaks_over_threshold(pd.to_datetime(surges["hw_t"], unit="s", utc=True),
                                      surges["skew_surge"])
    jp = ex.joint_probability(pot, ex.predicted_high_waters(model, start=truth.epoch))
    curve = jp.curve(PERIODS)
    for row in curve.itertuples():
        assert row.lower <= true[row.period] <= row.upper, ("joint probability", row)
    # within the record no warning; beyond four times it, one in words
    assert curve["warning"].isna().all()
    assert "200-year level from 39 years" in jp.return_level(200).warning


def test_short_record_warns_in_plain_words(history):
    levels, _ = history
    eight = levels[: pd.Timestamp("1993-01-01", tz="UTC")]
    fit = ex.fit_gev(ex.annual_maxima(eight))
    rl = fit.return_level(100)
    assert "100-year level from 8 years of record is a guess" in rl.warning
    assert "8 annual maxima" in rl.warning
