"""The hourly diagnostics from what the last run kept equal a run from scratch.

Two levels. ``sensor_timing`` with its window cache against the same function without
one, on a record that grows hour by hour while old windows change (a late row, a sample
dropped as quality control would drop it, a value rewritten) and the backup's clock jumps.
And the daemon's hourly run (``Daemon._run_diagnostics`` with the station's
``DiagnosticsMemory``) against the public functions called without any cache on what the
store holds at that hour, through late rows, a technician's override and the clock jump.
The uncached functions are the reference for equality; their accuracy against invented
clock errors and drifts is checked in tests/test_diagnostics.py.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from monitor.quality import diagnostics as dg
from monitor.quality.records import run_station_qc, set_override
from monitor.service.daemon import Daemon
from monitor.store.database import Store
from test_qc_synthetic import START, SynthModel, record
from units import day, hour, minute, mm


def _pair(days: float, jump_h: float, seed: int = 11) -> tuple[pd.Series, pd.Series]:
    """A primary and a backup 2 cm above it whose clock is 4 minutes late from ``jump_h``."""
    primary, _ = record(days=days, seed=seed, white_sigma=0.0, surge_height=0.6)
    elapsed_h = np.arange(len(primary)) / 60
    late = elapsed_h >= jump_h
    backup = primary.copy()
    backup[late] = primary[late] + (SynthModel(shift_s=-4 * minute).predict(primary.index[late])
                                    - SynthModel().predict(primary.index[late]))
    rng = np.random.default_rng(seed + 1)
    return primary, backup + 0.02 + rng.normal(0, 2 * mm, len(backup))


def test_timing_windows_from_the_cache_equal_a_run_without_it_hour_by_hour():
    primary, backup = _pair(days=3, jump_h=40)
    hole = START + pd.Timedelta(hours=10, minutes=7)     # a backup row that arrives late, at hour 50
    dropped = START + pd.Timedelta(hours=20, minutes=31)  # a primary row QC fails at hour 55
    rewritten = START + pd.Timedelta(hours=31, minutes=2)  # a backup value rewritten at hour 60
    cache = dg.TimingWindows()
    computed = []
    for h in range(24, 72):
        end = START + pd.Timedelta(hours=h)
        p, b = primary[primary.index <= end], backup[backup.index <= end]
        if h < 50:
            b = b.drop(hole)
        if h >= 55:
            p = p.drop(dropped)
        if h >= 60:
            b = b.copy()
            b[rewritten] += 5 * mm
        got = dg.sensor_timing(p, b, cache=cache)
        pd.testing.assert_frame_equal(got, dg.sensor_timing(p, b), check_exact=True)
        computed.append((h, cache.computed, cache.reused))
    by_hour = {h: c for h, c, _ in computed}
    # each change recomputes the windows that hold it (6 h windows stepped 3 h: two); a new
    # window comes every third hour and is made again the hour after (the primary then
    # reaches past its lags); every other window comes from the cache
    newest = {h: int(h % 3 in (0, 1)) for h in by_hour}
    assert [by_hour[h] - newest[h] for h in (50, 55, 60)] == [2, 2, 2]
    assert all(c <= 1 for h, c in by_hour.items() if h not in (24, 50, 55, 60))
    assert sum(r for _, _, r in computed) > 10 * sum(c for h, c, _ in computed if h != 24)
    # and the clock jump is there to be found: the windows after it lag about 4 minutes
    last = dg.sensor_timing(primary, backup, cache=cache)
    after = last[last["start"] >= START + pd.Timedelta(hours=40)]
    assert np.allclose(after["lag_min"], 4.0, atol=0.5)


def test_timing_windows_lie_on_a_fixed_grid_in_absolute_time():
    primary, backup = _pair(days=2, jump_h=100)
    late_start = primary.index >= START + pd.Timedelta(minutes=97)
    out = dg.sensor_timing(primary[late_start], backup[late_start])
    starts = np.array([s.timestamp() for s in out["start"]])
    assert np.all(starts % (3 * hour) == 0)
    assert out["start"].iloc[0] == START + pd.Timedelta(hours=3)  # the first grid point after the data's start


def test_timing_cache_forgets_windows_the_record_no_longer_holds():
    primary, backup = _pair(days=2, jump_h=100)
    cache = dg.TimingWindows()
    dg.sensor_timing(primary, backup, cache=cache)
    keep = primary.index >= START + pd.Timedelta(days=1)
    out = dg.sensor_timing(primary[keep], backup[keep], cache=cache)
    assert len(cache.windows) == len(out)
    # the first window's primary lost the samples before its lags: made again; the rest kept
    assert (cache.computed, cache.reused) == (1, len(out) - 1)


def test_drift_bins_are_the_medians_pandas_gives_per_bin_of_the_fixed_grid():
    # Reference: pandas' groupby median (shares no code with drift_bins) over the same
    # differences, bins numbered floor(t / width); times out of order, odd and even counts.
    rng = np.random.default_rng(4)
    t = np.sort(rng.choice(np.arange(0, 20 * hour, 30), 1500, replace=False)).astype(float) + 1.7e9
    shuffled = rng.permutation(len(t))
    vp = rng.normal(0, 0.1, len(t))
    tb = np.arange(t[0] - 50.0, t[-1] + 60.0, 60.0)  # the backup every minute, around every primary time
    vb = rng.normal(0, 0.1, len(tb))
    got = dg.drift_bins(t[shuffled], vp[shuffled], tb, vb, 300.0, 3600.0)
    d = vp - np.interp(t, tb, vb)
    ref = pd.DataFrame({"t": t, "d": d, "b": np.floor(t / 3600.0)}).groupby("b")
    assert list(got.index) == [int(b) for b in ref.groups]
    assert np.allclose(got["t"], ref["t"].median(), rtol=0, atol=1e-6)
    assert np.allclose(got["d"], ref["d"].median(), rtol=0, atol=1e-12)
    assert np.array_equal(got["first"], ref["t"].min()) and np.array_equal(got["last"], ref["t"].max())


# --------------------------------------------------------------------------- the daemon

DRIFT_DAYS = 3
CLOCK_DAYS = 2


def _levels(t: np.ndarray, model, late_from: float) -> tuple[np.ndarray, np.ndarray]:
    """Primary and backup at times ``t`` [Unix s]: the model's tide, a wobble, the backup
    1 cm above drifting 2 mm/day and 4 minutes late from ``late_from``."""
    idx = pd.to_datetime(t, unit="s", utc=True)
    wobble = 0.02 * np.sin(t / 5000.0) + 0.002 * np.cos(t / 61.0)
    p = model.predict(idx) + wobble
    late = model.predict(idx + pd.Timedelta(minutes=4)) + wobble
    b = np.where(t >= late_from, late, p) + 0.01 + 2 * mm * (t - t[0] if len(t) else 0) / day
    return np.round(p, 4), np.round(b, 4)


def _reference(store, station: str, end_t: int, model) -> dict:
    """What the daemon's run gives, from the public functions without any cache."""
    def usable(sensor: str, lo: int) -> pd.Series:
        o = store.observations(station, sensor, lo, end_t)
        return dg.usable_only(o["value"], o["flag"].to_numpy())

    out: dict = {}
    p, b = usable("primary", end_t - DRIFT_DAYS * day), usable("backup", end_t - DRIFT_DAYS * day)
    if len(p) and len(b):
        out["drift"] = dg.sensor_drift(p, b, gap_limit=300.0)
    a = end_t - CLOCK_DAYS * day
    levels = {"primary": usable("primary", a), "backup": usable("backup", a)}
    for role, o in levels.items():
        if role == "backup":
            c = dg.relative_clock(levels["primary"], o)
            if math.isfinite(c["offset_min"]):
                c["since"] = int(c["timing"]["start"].iloc[-1].timestamp())
                out["clock.backup"] = {k: v for k, v in c.items() if k != "timing"}
                continue
        c = dg.clock_offset(o, model)
        c["sensor"], c["since"] = role, int(o.index[0].timestamp())
        out[f"clock.{role}"] = c
    return out


def _same(a, b, where: str = "") -> None:
    """Exactly equal, NaN equal to NaN, through dicts, lists, Series and frames."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and set(a) == set(b), where
        for k in a:
            _same(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{where}[{i}]")
    elif isinstance(a, pd.Series):
        pd.testing.assert_series_equal(a, b, check_exact=True, obj=where)
    elif isinstance(a, float) and math.isnan(a):
        assert isinstance(b, float) and math.isnan(b), where
    else:
        assert a == b and type(a) is type(b), f"{where}: {a!r} != {b!r}"


def test_hourly_run_from_memory_equals_a_run_from_scratch(tmp_path, m2_stations):
    t0 = int(START.timestamp())
    history = DRIFT_DAYS * day + 6 * hour
    late_from = t0 + history + 5 * hour                     # the backup's clock jumps then
    hole = t0 + history - 30 * hour + 7 * minute            # a primary row that arrives late
    cfg = m2_stations(["quay"], sensors=("primary", "backup"),
                      daemon={"diagnostics_minutes": 60, "clock_window_days": CLOCK_DAYS},
                      qc={"drift_window": DRIFT_DAYS * day})
    with Store.open(cfg.store_path) as store:
        d = Daemon(cfg, store)
        rt = d.stations["quay"]
        t = t0 + 60 * np.arange(history // 60 + 1)
        p, b = _levels(t, rt.model, late_from)
        keep = t != hole
        store.write_batch("quay", "primary", t[keep], p[keep])
        store.write_batch("quay", "backup", t, b)
        read, bins = [], []
        for h in range(12):
            if h:
                tn = t[-1] + 60 * np.arange(1, 61)
                pn, bn = _levels(np.concatenate([t, tn]), rt.model, late_from)
                t = np.concatenate([t, tn])
                store.write_batch("quay", "primary", tn, pn[-60:])
                store.write_batch("quay", "backup", tn, bn[-60:])
            if h == 4:   # the late row, 26 h back
                store.write_batch("quay", "primary", np.array([hole]), p[t[:len(p)] == hole])
            if h == 7:   # a technician fails a backup sample 40 h back
                set_override(store, "quay", "backup", t0 + history - 40 * hour, None, 4, "tech", "fouled")
            d.process_station(rt, now=float(t[-1]) + 30)
            assert rt.diag_at == t[-1]
            _same(rt.diag, _reference(store, "quay", int(t[-1]), rt.model), f"hour {h}")
            read.append(rt.diag_memory.rows_read)
            bins.append(rt.diag_memory.drift_computed)
        assert set(rt.diag) == {"drift", "clock.backup", "clock.primary"}
        assert abs(rt.diag["clock.backup"]["offset_min"] - 4.0) <= 0.5  # the jump (15 s lag grid, 2 mm noise)
        # steady hours read the new hour and the drift's first bins, not the record; the late
        # row makes the rows and bins from it again; the override (another writer) everything
        steady = [h for h in range(1, 12) if h not in (4, 7)]
        assert max(read[h] for h in steady) < 400 and max(bins[h] for h in steady) <= 10
        assert 400 < read[4] < read[0] / 3 and read[7] == read[0] + 2
        assert bins[7] == bins[0] > bins[4] > 10


def test_another_connections_override_and_qc_run_are_seen_by_the_next_hour(tmp_path, m2_stations):
    """Writers on their own connection (a technician's `quaywatch flag`, a `quaywatch qc`
    re-run, as other processes do it): the next hour's run reads everything again and equals
    a run from scratch."""
    t0 = int(START.timestamp())
    history = DRIFT_DAYS * day + 6 * hour
    cfg = m2_stations(["quay"], sensors=("primary", "backup"),
                      daemon={"diagnostics_minutes": 60, "clock_window_days": CLOCK_DAYS},
                      qc={"drift_window": DRIFT_DAYS * day})
    with Store.open(cfg.store_path) as store, Store.open(cfg.store_path) as other:
        d = Daemon(cfg, store)
        rt = d.stations["quay"]
        t = t0 + 60 * np.arange(history // 60 + 1)
        p, b = _levels(t, rt.model, t0 + history + 3 * hour)
        store.write_batch("quay", "primary", t, p)
        store.write_batch("quay", "backup", t, b)
        read = []
        for h in range(6):
            if h:
                tn = t[-1] + 60 * np.arange(1, 61)
                t = np.concatenate([t, tn])
                pn, bn = _levels(t, rt.model, t0 + history + 3 * hour)
                store.write_batch("quay", "primary", tn, pn[-60:])
                store.write_batch("quay", "backup", tn, bn[-60:])
            if h == 2:   # a technician fails a primary sample 30 h back, from another process
                set_override(other, "quay", "primary", t0 + history - 30 * hour, None, 4, "tech", "fouled")
            if h == 4:   # quality control re-run over a day, from another process
                run_station_qc(other, cfg.stations[0], None, t0 + history - 40 * hour, t0 + history - 16 * hour,
                               rt.model)
            d.process_station(rt, now=float(t[-1]) + 30)
            _same(rt.diag, _reference(store, "quay", int(t[-1]), rt.model), f"hour {h}")
            read.append(rt.diag_memory.rows_read)
    assert max(read[1], read[3], read[5]) < 400
    assert min(read[2], read[4]) > read[0] / 2  # everything read again
