"""Quality control of the newest samples equals a run over the whole record.

``monitor.quality.tail.run_tests_tail(level, ..., start=k)`` evaluates only rows ``k:`` with the
rows before as context; the reference is ``monitor.quality.checks.run_tests`` over the whole record
(pandas' rolling windows), taken from row ``k``. The record is invented: a one-minute tide
with red noise and, in turn, spikes, a flat line, gaps, a surge front, a short burst, a
one-sample step, a gross-range failure and missing values, with and without a backup.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.quality import checks as qc
from monitor.quality.checks import QcSettings, run_tests
from monitor.quality.tail import run_tests_tail
from reference_qc import whole_record_tests

minute = 60
hour = 3600
m = 1.0


def _record(seed: int, hours: float = 30.0, step: float = 60.0):
    rng = np.random.default_rng(seed)
    n = int(hours * hour / step)
    t = 1_760_000_000 + step * np.arange(n)
    pred = 2.0 + 1.1 * np.cos(2 * np.pi * t / 44714.16 + seed) + 0.3 * np.cos(2 * np.pi * t / 43200.0)
    noise = np.cumsum(rng.normal(0, 0.002, n)) + rng.normal(0, 0.004, n)
    level = np.round((pred + noise) * 1000) / 1000
    return t, level, pred, rng


def _features(t, level, rng):
    n = len(level)
    v = level.copy()
    for i in rng.integers(n // 2, n - 3, 4):          # lone spikes
        v[i] += rng.choice([-1, 1]) * rng.uniform(0.1, 0.5)
    a = int(n * 0.7)
    v[a:a + 75] = v[a]                                 # a stuck float, 75 min
    b = int(n * 0.8)
    v[b:b + 12] += np.linspace(0, 0.5, 12)             # a surge front: 0.5 m in 12 min
    v[b + 12:] += 0.5
    c = int(n * 0.9)
    v[c:c + 3] += 0.6                                  # a three-sample burst
    v[c + 20:] += 0.3                                  # a one-sample step that stays
    v[int(n * 0.95)] = 40.0                            # outside the sensor's range
    v[int(n * 0.85)] = np.nan                          # a missing value
    keep = np.ones(n, bool)
    keep[int(n * 0.75):int(n * 0.75) + 20] = False     # a 20-minute gap
    keep[int(n * 0.97)] = False                        # one missed sample
    return v, keep


def _series(t, v):
    return pd.Series(v, index=pd.to_datetime((t * 1e9).astype(np.int64), utc=True))


def _compare(level, pred, other, starts, settings=None, now=None):
    whole = run_tests(level, settings, pred, other, now=now, position=(50.0, -4.0))
    for k in starts:
        tail = run_tests_tail(level, settings, pred, other, now=now, position=(50.0, -4.0), start=k)
        expected = whole.iloc[k:]
        assert list(tail.columns) == list(expected.columns)
        diff = (tail.to_numpy() != expected.to_numpy()).any(axis=1)
        assert not diff.any(), (f"start {k}: rows differ at {list(np.flatnonzero(diff)[:5] + k)}\n"
                                f"{tail[diff].head()}\n{expected[diff].head()}")


def _starts(n):
    # the daemon's tail (the last hour), single rows, and starts inside every feature
    return sorted({n - 1, n - 2, n - 60, n - 61, int(n * 0.7) + 30, int(n * 0.75) + 5, int(n * 0.8) + 6,
                   int(n * 0.85), int(n * 0.9) + 1, int(n * 0.9) + 21, int(n * 0.95), 0, 5, n // 2})


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_tail_flags_equal_a_whole_record_run(seed):
    t, level, pred, rng = _record(seed)
    v, keep = _features(t, level, rng)
    _compare(_series(t[keep], v[keep]), pred[keep], None, _starts(int(keep.sum())), now=float(t[-1]))


@pytest.mark.parametrize("seed", [4, 5])
def test_tail_flags_equal_a_whole_record_run_with_a_backup(seed):
    t, level, pred, rng = _record(seed)
    v, keep = _features(t, level, rng)
    backup = level + 0.004 + rng.normal(0, 0.002, len(level))
    backup[int(len(level) * 0.8):] += 0.5            # the backup sees the surge front too
    backup[int(len(level) * 0.9) + 20:] += 0.3       # ... and the step (a bore)
    other = _series(t[::2], backup[::2])              # at two-minute steps
    _compare(_series(t[keep], v[keep]), pred[keep], other, _starts(int(keep.sum())))


def test_tail_flags_equal_a_whole_record_run_without_a_prediction():
    t, level, pred, rng = _record(6, hours=8)
    v, keep = _features(t, level, rng)
    _compare(_series(t[keep], v[keep]), None, None, _starts(int(keep.sum())))


def test_tail_flags_equal_a_whole_record_run_at_irregular_steps():
    t, level, pred, rng = _record(7, hours=30, step=60.0)
    jitter = np.round(rng.uniform(-20, 20, len(t)))
    tt = t + jitter
    v, keep = _features(tt, level, rng)
    s = QcSettings(resid_burst=600.0)
    _compare(_series(tt[keep], v[keep]), pred[keep], None, _starts(int(keep.sum())), settings=s)


# --------------------------------------------------------------------------- through the store

class _Tide:
    """The record's prediction as a model (the daemon hands QC a model with ``predict``)."""

    def __init__(self, seed: int):
        self.seed = seed

    def predict(self, times):
        t = pd.DatetimeIndex(times).as_unit("ns").asi8 / 1e9
        return 2.0 + 1.1 * np.cos(2 * np.pi * t / 44714.16 + self.seed) + 0.3 * np.cos(2 * np.pi * t / 43200.0)


def _reference(level: pd.Series, backup: pd.Series, model, settings: QcSettings, now: float) -> dict:
    """The tests over the whole record as stored so far, both sensors, as the station pass
    combines them (pandas' windows throughout)."""
    return whole_record_tests({"primary": level, "backup": backup}, model, settings, now)


def test_each_pass_through_the_store_writes_the_flags_of_a_whole_record_run(tmp_path):
    """Passes as the daemon makes them -- a day's backfill, then samples one at a time and a
    few at once, with the process restarted (a new store connection) midway -- write for
    every row they touch the flags a run over the whole record stored so far gives."""
    from monitor.quality import records as qc_records
    from monitor.store.database import Store

    t, level, pred, rng = _record(8, hours=34)
    v, keep = _features(t, level, rng)
    backup = level + 0.004 + rng.normal(0, 0.002, len(level))
    backup[int(len(level) * 0.8):] += 0.5
    t_p, v_p = t[keep], v[keep]
    model, s = _Tide(8), QcSettings()
    path = tmp_path / "q.sqlite"
    day = int(np.searchsorted(t, t[0] + 26 * hour))
    ends = [day] + list(range(day + 1, day + 40)) + list(range(day + 45, len(t), 97)) + [len(t)]
    store = Store.open(path)
    prev = 0
    try:
        for j, end in enumerate(ends):
            if j == 20:  # a restart mid-record
                store.close()
                store = Store.open(path)
            lo, hi = t[prev], t[end - 1]
            sel = (t_p >= lo) & (t_p <= hi)
            if sel.any():
                store.write_batch("harbour", "primary", t_p[sel].astype(np.int64), v_p[sel])
            store.write_batch("harbour", "backup", t[prev:end].astype(np.int64), backup[prev:end])
            now = float(hi) + 30
            written = qc_records.run_station_qc(store, "harbour", s, float(lo), float(hi), model, now=now)
            whole = {sn: qc_records.read_observations(store, "harbour", sn)["value"] for sn in ("primary", "backup")}
            ref = _reference(whole["primary"], whole["backup"], model, s, now)
            for sn, part in written.items():
                want = ref[sn].loc[part.index]
                diff = (part[list(want.columns)].to_numpy() != want.to_numpy()).any(axis=1)
                assert not diff.any(), (f"pass {j} ({sn}): rows differ at {list(part.index[diff][:5])}\n"
                                        f"{part[diff].T}\n{want[diff].T}\n"
                                        f"{part[diff].head()}\n{want[diff].head()}")
            prev = end
    finally:
        store.close()


@pytest.mark.parametrize("position", [(50.0, -4.0), (90.0, 180.0), (90.5, 0.0), (0.0, -180.01), (float("nan"), 0.0),
                                      (0.0, float("inf"))])
def test_tail_location_verdict_equals_a_whole_record_run(position):
    """The location test (QARTOD Test 3: latitude within +-90, longitude within +-180
    degrees, both finite) of the tail, on positions at and past the limits."""
    t, level, pred, rng = _record(4, hours=27.0)
    series = _series(t, level)
    whole = run_tests(series, None, pred, None, now=float(t[-1]), position=position)
    tail = run_tests_tail(series, None, pred, None, now=float(t[-1]), position=position, start=len(t) - 3)
    assert list(tail["location"]) == list(whole["location"].iloc[-3:])
    good = abs(position[0]) <= 90 and abs(position[1]) <= 180
    assert set(tail["location"]) == {qc.PASS if good else qc.FAIL}
