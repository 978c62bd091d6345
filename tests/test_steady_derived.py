"""The steady pass makes the smoothed residual again only from the first row whose inputs
changed (a new sample, a flag quality control revised, an override); every pass must still
store, and hand the rules, what the smoothing of the whole lookback gives, bit for bit.

Two levels: :func:`monitor.surge.residual.derive_arrays_again` against
:func:`monitor.surge.residual.derive_arrays` over the same arrays, through random revisions
(hypothesis); and the daemon followed a sample a pass through a late spike verdict, a row
failed by a technician and passed again, a row failed before the hour rewritten, a gap and
a run of failed rows longer than the mean's and median's windows, each pass's stored rows
and samples compared with the whole lookback's.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import Phase, given, settings
from hypothesis import strategies as st

from alerts import engine
from monitor.quality.records import set_override
from monitor.service.config import validate_config
from monitor.service.daemon import REWRITE_BACK, TREND_BACK, Daemon
from monitor.store.database import Store
from monitor.store.migrations import DERIVED_COLUMNS
from monitor.surge import residual as R
from predictor import TideModel
from units import hour, minute

T0 = 1_767_225_600           # 2026-01-01T00:00Z (invented)
MED, MEAN = 30.0, 10.0       # the smoothing's windows [min] (the defaults)
# the daemon's lookback: the rows' windows and the longest a value is carried over unusable rows
LOOKBACK = int((MED + MEAN + MED) * minute) + max(REWRITE_BACK, TREND_BACK)


def _bits(a: np.ndarray) -> np.ndarray:
    return np.asarray(a, dtype=float).view(np.int64)


# ----------------------------------------------------------------------------- the function

@st.composite
def _runs(draw):
    """A record of irregular steps (gaps among them), then passes that each add a few rows
    and revise flags and values of older rows."""
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 32 - 1)))
    n = 400
    step = rng.choice([60, 60, 60, 60, 120, 30], size=n)
    step[rng.integers(0, n, 3)] = rng.choice([20 * minute, 45 * minute])  # gaps, some past the staleness limit
    t = T0 + np.cumsum(step)
    value = 0.3 * np.sin(t / 4000.0) + rng.normal(0, 0.02, n)
    value[rng.random(n) < 0.03] = np.nan
    flag = rng.choice([1, 1, 1, 3, 4, 9], size=n)
    passes = []
    end = int(np.searchsorted(t, t[0] + LOOKBACK + 30 * minute))
    while end < n:
        end += draw(st.integers(1, 3))
        revisions = draw(st.lists(st.tuples(st.integers(1, 130), st.sampled_from(["flag", "value", "nan"]),
                                            st.sampled_from([1, 3, 4, 9])), max_size=3))
        passes.append((min(end, n), revisions))
    return t, value, flag, passes


@settings(max_examples=60, deadline=None, phases=[Phase.explicit, Phase.reuse, Phase.generate])
@given(run=_runs())
def test_made_again_from_the_first_changed_row_equals_the_whole_lookback(run):
    # Reference: derive_arrays over the whole lookback at each pass (the computation the
    # shortcut must equal bit for bit) and, for the rows the memo keeps, the last pass's values
    t, value, flag, passes = run
    value, flag = value.copy(), flag.copy()
    pred = 0.1 * np.cos(t / 7000.0)
    memo = None
    held: dict[int, tuple] = {}
    for end, revisions in passes:
        for back, what, f in revisions:  # rows already seen, revised before this pass
            i = max(0, end - back)
            if what == "flag":
                flag[i] = f
            elif what == "value":
                value[i] = value[i] + 0.05
            else:
                value[i] = np.nan
        start = int(t[end - 1]) - 60  # the window: the newest rows
        a = int(np.searchsorted(t, start - LOOKBACK))
        tt, vv, ff, pp = t[a:end], value[a:end], flag[a:end], pred[a:end]
        first = int(np.searchsorted(tt, start - max(REWRITE_BACK, TREND_BACK)))
        got, changed, memo = R.derive_arrays_again(memo, tt, vv, ff, pp, None, MED, MEAN, first=first)
        want = R.derive_arrays(tt, vv, ff, pp, None, MED, MEAN)
        for c in DERIVED_COLUMNS:
            assert np.array_equal(_bits(got[c][first:]), _bits(want[c][first:])), c
        assert np.array_equal(got["flag"], want["flag"])
        # the rows said unchanged hold the last pass's values
        assert first <= changed <= len(tt)
        for i in range(first, changed):
            assert held[int(tt[i])] == tuple(_bits([got[c][i] for c in DERIVED_COLUMNS]))
        held = {int(tt[i]): tuple(_bits([got[c][i] for c in DERIVED_COLUMNS])) for i in range(first, len(tt))}


def test_a_flag_revised_an_hour_back_makes_the_rows_again_from_that_row_on():
    # one row's verdict turns to fail 50 rows back: the rows from it on are made again (and
    # its smoothed value moves, so a shortcut starting one row later would keep a stale one)
    t = T0 + 60 * np.arange(200)
    value = 0.2 * np.sin(t / 3000.0) + 0.01 * np.cos(t / 97.0)
    value[149] += 0.5  # a spike, judged late
    flag = np.ones(200, dtype=int)
    pred = np.zeros(200)
    first = 200 - 80
    _, changed, memo = R.derive_arrays_again(None, t[:199], value[:199], flag[:199], pred[:199], first=first - 1)
    assert changed == first - 1  # nothing held: every row wanted
    before = R.derive_arrays(t[:199], value[:199], flag[:199], pred[:199])["smoothed"]
    flag[149] = 4
    got, changed, _ = R.derive_arrays_again(memo, t, value, flag, pred, first=first)
    assert changed == 149
    assert got["smoothed"][149] != before[149]
    want = R.derive_arrays(t, value, flag, pred)["smoothed"]
    assert np.array_equal(_bits(got["smoothed"][first:]), _bits(want[first:]))


def test_nothing_revised_makes_only_the_new_rows():
    t = T0 + 60 * np.arange(200)
    value = 0.2 * np.sin(t / 3000.0)
    flag, pred = np.ones(200, dtype=int), np.zeros(200)
    _, _, memo = R.derive_arrays_again(None, t[:199], value[:199], flag[:199], pred[:199], first=100)
    _, changed, _ = R.derive_arrays_again(memo, t[1:], value[1:], flag[1:], pred[1:], first=100)
    assert changed == 198  # the new row (index 198 of the 199 from t[1])


def test_other_smoothing_settings_make_every_row_again():
    t = T0 + 60 * np.arange(200)
    value, flag, pred = 0.2 * np.sin(t / 3000.0), np.ones(200, dtype=int), np.zeros(200)
    _, _, memo = R.derive_arrays_again(None, t, value, flag, pred, first=100)
    got, changed, _ = R.derive_arrays_again(memo, t, value, flag, pred, median_minutes=20.0, first=100)
    assert changed == 100
    want = R.derive_arrays(t, value, flag, pred, median_minutes=20.0)["smoothed"]
    assert np.array_equal(_bits(got["smoothed"][100:]), _bits(want[100:]))


def test_the_smoothing_from_memory_agrees_with_pandas():
    # an outside reference (pandas' rolling windows through smooth_residual), to 1e-12 m
    t = T0 + np.cumsum(np.where(np.arange(300) % 50 == 49, 40 * minute, 60))
    value = 0.2 * np.sin(t / 3000.0) + 0.01 * np.cos(t / 97.0)
    flag = np.where(np.arange(300) % 17 == 0, 4, 1)
    pred = np.zeros(300)
    _, _, memo = R.derive_arrays_again(None, t[:299], value[:299], flag[:299], pred[:299], first=150)
    flag[290] = 4
    got, _, _ = R.derive_arrays_again(memo, t, value, flag, pred, first=150)
    want = R.smooth_residual(pd.Series(value, index=pd.to_datetime(t, unit="s", utc=True)), MED, MEAN,
                             flag != 4).to_numpy()
    assert np.array_equal(np.isnan(got["smoothed"][150:]), np.isnan(want[150:]))
    ok = ~np.isnan(want[150:])
    assert np.abs(got["smoothed"][150:][ok] - want[150:][ok]).max() < 1e-12


@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2 ** 32 - 1), added=st.integers(1, 3))
def test_the_few_new_rows_made_in_floats_agree_with_pandas(seed, added):
    # the steady pass's new rows alone made again (in Python floats, residual._smoothed_few)
    # against pandas' rolling windows through smooth_residual, to 1e-12 m: irregular steps,
    # gaps past the staleness limit, missing values, failed and missing flags
    rng = np.random.default_rng(seed)
    n = 200
    step = rng.choice([60, 60, 60, 120, 30], size=n)
    step[rng.integers(0, n, 2)] = rng.choice([20 * minute, 45 * minute])
    t = T0 + np.cumsum(step)
    value = 0.3 * np.sin(t / 4000.0) + rng.normal(0, 0.02, n)
    value[rng.random(n) < 0.05] = np.nan
    flag = rng.choice([1, 1, 1, 3, 4, 9], size=n)
    pred = np.zeros(n)
    first, old = 120, n - added
    _, _, memo = R.derive_arrays_again(None, t[:old], value[:old], flag[:old], pred[:old], first=first)
    got, changed, _ = R.derive_arrays_again(memo, t, value, flag, pred, first=first)
    assert changed == old  # only the new rows were made again
    want = R.smooth_residual(pd.Series(value, index=pd.to_datetime(t, unit="s", utc=True)), MED, MEAN,
                             (flag != 4) & (flag != 9)).to_numpy()
    assert np.array_equal(np.isnan(got["smoothed"][first:]), np.isnan(want[first:]))
    ok = ~np.isnan(want[first:])
    assert np.abs(got["smoothed"][first:][ok] - want[first:][ok]).max(initial=0.0) < 1e-12


# ----------------------------------------------------------------------------- the daemon

STEP = minute
HISTORY = 26 * hour           # quality control looks 25 h back
LIVE = 4 * hour
LIVE_START = T0 + HISTORY
MODEL = TideModel(mean=3.0, constituents=[{"name": "M2", "amplitude": 1.2, "phase": 30.0}], datum="station")
SPIKE_AT = LIVE_START + 40 * minute             # failed by quality control at the next sample
RUN_AT, RUN = LIVE_START + 85 * minute, (LIVE_START + 60 * minute, LIVE_START + 82 * minute)  # failed, 23 min
GAP = (LIVE_START + 100 * minute, LIVE_START + 112 * minute)     # nothing stored
FAILED_AT, FAILED = LIVE_START + 150 * minute, LIVE_START + 115 * minute  # a technician fails a row 35 min back
PASSED_AT = LIVE_START + 170 * minute                            # ... and passes it again
OLD_AT, OLD = LIVE_START + 200 * minute, LIVE_START + 120 * minute  # before the hour rewritten


def _site(tmp_path):
    MODEL.save(tmp_path / "c.toml")
    rules = [{"id": "surge", "when": "residual_above", "hold": 0, "notify": ["duty@port.invalid"],
              "steps": [{"name": "raised", "at": 0.5}]}]
    raw = {"store": {"path": "q.db"}, "mail": {"sender": "gauge@port.invalid", "save_dir": "mail"},
           "stations": [{"id": "port", "latitude": 54.0, "longitude": -10.0, "constants": "c.toml",
                         "sensors": {"primary": {}, "backup": {}}, "rules": rules}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == [], errors
    store = Store.open(cfg.store_path)
    return store, Daemon(cfg, store)


def _record():
    t = np.arange(T0, LIVE_START + LIVE + 1, STEP)
    t = t[(t < GAP[0]) | (t >= GAP[1])]
    level = MODEL.predict(t.astype("datetime64[s]")) + 0.1 * np.sin(t / 2000.0) + 0.004 * np.sin(t / 377.0)
    primary = level + np.where(t == SPIKE_AT, 0.8, 0.0)
    return t, primary, level + 0.003


@pytest.fixture(scope="module")
def followed(tmp_path_factory):
    """Each steady pass of the run: what it stored and handed the rules, and the whole
    lookback's derive_arrays computed from the store after it."""
    mp = pytest.MonkeyPatch()
    store, d = _site(tmp_path_factory.mktemp("derived"))
    passes = []
    seen = {}
    evaluate = engine.evaluate

    def keep_samples(db, view, rules, samples, **k):
        seen["samples"] = samples
        return evaluate(db, view, rules, samples, **k)

    in_memory = Daemon._pass_in_memory

    def pass_in_memory(self, rt, start_t, end_t, lookback):
        seen["samples"] = None
        out = in_memory(self, rt, start_t, end_t, lookback)
        seen["window"] = (start_t, end_t, lookback)
        return out

    mp.setattr(engine, "evaluate", keep_samples)
    mp.setattr(Daemon, "_pass_in_memory", pass_in_memory)
    try:
        t, primary, backup = _record()
        rt = d.stations["port"]
        old = t < LIVE_START
        store.write_batch("port", "primary", t[old], primary[old], now=LIVE_START)
        store.write_batch("port", "backup", t[old], backup[old], now=LIVE_START)
        d.process_station(rt, now=LIVE_START)
        for now in t[~old].tolist():
            due = t == now
            store.write_batch("port", "primary", t[due], primary[due], now=int(now))
            store.write_batch("port", "backup", t[due], backup[due], now=int(now))
            for at, a, b, f in ((RUN_AT, *RUN, 4), (FAILED_AT, FAILED, None, 4), (PASSED_AT, FAILED, None, 1),
                                (OLD_AT, OLD, None, 4)):
                if now == at:
                    set_override(store, "port", "primary", a, b, f, "technician", "checked", at=at)
            seen.pop("window", None)
            d.process_station(rt, now=int(now) + 30)
            if "window" not in seen:
                continue
            start_t, end_t, lookback = seen["window"]
            ot, ov, of = store.observation_arrays("port", "primary", start_t - lookback, end_t)
            want = R.derive_arrays(ot, ov, of, rt.predicted.predict_seconds(ot), None, MED, MEAN)
            st_t, st_cols = store.derived_arrays("port", start_t - REWRITE_BACK, end_t)
            lt, lv, lf = store.observation_arrays("port", "primary", start_t - 6 * hour, end_t)
            longer = R.derive_arrays(lt, lv, lf, rt.predicted.predict_seconds(lt), None, MED, MEAN)
            longer = {c: v[lt >= ot[0]] for c, v in longer.items()}
            passes.append({"window": (start_t, end_t), "t": ot, "want": want, "samples": seen["samples"],
                           "longer": longer,
                           "stored": (st_t, st_cols), "tail": (rt.tail.t.copy(), dict(rt.tail.columns))})
    finally:
        mp.undo()
    flags = dict(store.conn.execute("SELECT t, flag FROM observations WHERE sensor = 'primary'").fetchall())
    store.close()
    return passes, flags


def test_the_run_reaches_each_revision(followed):
    passes, flags = followed
    assert len(passes) >= LIVE // STEP - 20
    assert flags[SPIKE_AT] == 4 and flags[OLD] == 4 and flags[FAILED] == 1
    assert all(flags[m] == 4 for m in range(RUN[0], RUN[1] + 1, STEP))


def test_each_pass_stores_the_whole_lookbacks_rows_bit_for_bit(followed):
    for p in followed[0]:
        start_t, _ = p["window"]
        w = p["t"] >= start_t - REWRITE_BACK
        st_t, st_cols = p["stored"]
        assert np.array_equal(st_t, p["t"][w]), p["window"]
        for c in DERIVED_COLUMNS:
            assert np.array_equal(_bits(st_cols[c]), _bits(p["want"][c][w])), (p["window"], c)


def test_each_pass_stores_the_rows_of_a_longer_record_bit_for_bit(followed):
    # the lookback holds every sample that decides a written row's smoothed value, a value
    # carried over a run of failed rows among them (a lookback of the windows alone fell
    # short there): six hours give the same bits
    for p in followed[0]:
        start_t, _ = p["window"]
        w = p["t"] >= start_t - REWRITE_BACK
        _, st_cols = p["stored"]
        for c in DERIVED_COLUMNS:
            assert np.array_equal(_bits(st_cols[c]), _bits(p["longer"][c][w])), (p["window"], c)


def test_the_rows_held_in_memory_are_the_stored_rows(followed):
    for p in followed[0]:
        st_t, st_cols = p["stored"]
        tt, cols = p["tail"]
        k = tt >= st_t[0]
        assert np.array_equal(tt[k], st_t), p["window"]
        for c in DERIVED_COLUMNS:
            assert np.array_equal(_bits(cols[c][k]), _bits(st_cols[c])), (p["window"], c)


def test_each_pass_hands_the_rules_the_whole_lookbacks_samples_bit_for_bit(followed):
    for p in followed[0]:
        s = p["samples"]
        start_t, _ = p["window"]
        k = p["t"] >= start_t - TREND_BACK
        n = len(s.t)  # the newest sample waits for its verdict (judged_samples)
        assert n >= int(k.sum()) - 1 and np.array_equal(s.t, p["t"][k][:n]), p["window"]
        for c in ("observed", "predicted", "residual", "smoothed", "flag"):
            assert np.array_equal(_bits(s[c]), _bits(np.asarray(p["want"][c][k][:n], dtype=float))), (p["window"], c)
