"""Diagnostics speed over a week of one-minute data against the package's tide model.

Ratios measured in the same run, against one ``model.predict`` over the same week (the
least any comparison with the predicted tide must spend):

- ``clock_offset`` (one prediction on a grid, band-filtered regression, per-day values);
- ``sensor_timing`` of a backup against the primary over the same week.

Target (design notes: diagnostics feed the daily report and the daemon): the clock
offset of a week well under 1 s, that is within a few tens of predictions.

Hourly rerun: the daemon's hourly drift and clock diagnostics of one station
(``Daemon._run_diagnostics``: the rows read from the store, ``relative_clock``,
``clock_offset`` and ``sensor_drift``) with a week of one-minute history of a primary and
a backup in a store, then hour by hour: an hour of new rows stored, the processing
pass's mark of what may have changed (``DiagnosticsMemory.note_changed``), and the next
run timed twice on the same store, from what the last run kept
(``monitor.service.diag_memory.DiagnosticsMemory``) and from scratch (a new, empty
memory). CPU time of the process, the median of the hours. Target (our choice): the
next hour's run under 0.25 of a run from scratch (measured 0.18-0.23 on the shared
two-core machine: what is left is mostly ``clock_offset``, whose band filters and
Gauss-Newton iterations run over the whole week each hour); the two runs' results must
be equal.

Run: ``python -m benchmarks.bench_diagnostics`` (``QW_BENCH_DIAG_DAYS=N`` days of
history, default 7; ``QW_BENCH_DIAG_HOURS=N`` hours timed, default 6). Data: an invented
port (twelve constituents with invented constants, 1 cm noise, a 1 m surge, the clock 6
minutes late; the backup 2 cm above, 3 minutes early, with 3 mm noise).
"""
from __future__ import annotations

import math
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

RERUN_TARGET = 0.25  # [1] the next hour's run against a run from scratch (our choice)


def _best(fn, repeat: int = 3) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    from benchmarks.targets import Targets
    from monitor.quality import diagnostics as D
    from predictor import TideModel

    cons = [("M2", 1.2, 95), ("S2", 0.4, 130), ("N2", 0.23, 80), ("K2", 0.11, 128), ("K1", 0.12, 210),
            ("O1", 0.09, 190), ("P1", 0.04, 205), ("Q1", 0.02, 170), ("M4", 0.03, 40), ("MS4", 0.02, 70),
            ("Mf", 0.01, 10), ("Sa", 0.05, 200)]
    model = TideModel(mean=2.5, constituents=[{"name": n, "amplitude": a, "phase": p} for n, a, p in cons])
    idx = pd.date_range("2024-03-01", periods=7 * 1440, freq="1min", tz="UTC")
    rng = np.random.default_rng(5)
    hours = np.arange(len(idx)) / 60.0
    surge = 1.0 * np.exp(-0.5 * ((hours - 84) / 6.0) ** 2)
    level = model.predict(idx - pd.Timedelta(minutes=6)) + surge + rng.normal(0, 0.01, len(idx))
    obs = pd.Series(level, index=idx)
    backup = pd.Series(model.predict(idx + pd.Timedelta(minutes=3)) + surge, index=idx)

    base = _best(lambda: model.predict(idx))
    res = {}
    clock = _best(lambda: res.update(D.clock_offset(obs, model)))
    timing = _best(lambda: D.sensor_timing(obs, backup), repeat=1)
    print(f"baseline: one predict of a week at 1 min      {base * 1e3:8.1f} ms")
    print(f"clock_offset (week, 1 min)                    {clock * 1e3:8.1f} ms  ratio {clock / base:6.1f}")
    targets = Targets()
    targets.below("clock_offset of a week [s]", clock, 1.0, ".3f")
    print(f"  found {res['offset_min']:+.2f} +- {res['offset_se_min']:.2f} min (injected +6.00), "
          f"bands consistent: {res['consistent']}")
    print(f"sensor_timing (week, 6 h windows)             {timing * 1e3:8.1f} ms  ratio {timing / base:6.1f}")
    _hourly_rerun(cons, targets)
    targets.finish()


def _same(a, b) -> bool:
    """Equal, NaN equal to NaN, through dicts, lists and Series."""
    if isinstance(a, dict):
        return isinstance(b, dict) and set(a) == set(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, pd.Series):
        return a.index.equals(b.index) and _same(list(a.to_numpy()), list(b.to_numpy()))
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    return bool(a == b)


def _hourly_rerun(cons, targets) -> None:
    from monitor.service.config import validate_config
    from monitor.service.daemon import Daemon
    from monitor.service.diag_memory import DiagnosticsMemory
    from monitor.store.database import Store
    from predictor import TideModel

    days = float(os.environ.get("QW_BENCH_DIAG_DAYS", 7))
    hours = int(os.environ.get("QW_BENCH_DIAG_HOURS", 6))
    model = TideModel(mean=2.5, constituents=[{"name": n, "amplitude": a, "phase": p} for n, a, p in cons])
    t0 = int(pd.Timestamp("2024-03-01", tz="UTC").timestamp())
    rng = np.random.default_rng(8)

    def levels(t: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        idx = pd.to_datetime(t, unit="s", utc=True)
        surge = 1.0 * np.exp(-0.5 * ((t - t0 - 84 * 3600) / (6 * 3600.0)) ** 2)
        p = model.predict(idx - pd.Timedelta(minutes=6)) + surge + rng.normal(0, 0.01, len(t))
        b = model.predict(idx + pd.Timedelta(minutes=3)) + surge + 0.02 + rng.normal(0, 0.003, len(t))
        return np.round(p, 3), np.round(b, 3)

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        lines = ["mean = 2.5"] + [f'[[constituents]]\nname = "{n}"\namplitude = {a}\nphase = {p}' for n, a, p in cons]
        (tmp / "c.toml").write_text("\n".join(lines) + "\n")
        rule = {"id": "surge", "when": "residual_above", "hold": 0, "notify": ["duty@bench.example"],
                "steps": [{"name": "raised", "at": 5.0}]}
        raw = {"store": {"path": "d.db"},
               "stations": [{"id": "quay", "latitude": 50.0, "longitude": -4.0, "constants": "c.toml",
                             "datums": {"chart": 0.0}, "sensors": {"primary": {}, "backup": {}}, "rules": [rule]}]}
        cfg, errors = validate_config(raw, tmp)
        assert not errors, errors
        with Store.open(cfg.store_path) as store:
            t = t0 + 60 * np.arange(int(days * 1440))
            p, b = levels(t)
            store.write_batch("quay", "primary", t, p)
            store.write_batch("quay", "backup", t, b)
            d = Daemon(cfg, store)
            rt = d.stations["quay"]
            qs = rt.cfg.qc or d.qc.QcSettings()
            d._run_diagnostics(rt, int(t[-1]))
            kept, scratch, same, read = [], [], True, []
            for _ in range(hours):
                t = t[-1] + 60 * np.arange(1, 61)
                p, b = levels(t)
                store.write_batch("quay", "primary", t, p)
                store.write_batch("quay", "backup", t, b)
                rt.diag_memory.note_changed(int(t[0]) - qs.resid_window)  # as the hour's pass does
                c0 = time.process_time()
                got = d._run_diagnostics(rt, int(t[-1]))
                kept.append(time.process_time() - c0)
                read.append(rt.diag_memory.rows_read)
                memo, rt.diag_memory = rt.diag_memory, DiagnosticsMemory()
                c0 = time.process_time()
                ref = d._run_diagnostics(rt, int(t[-1]))
                scratch.append(time.process_time() - c0)
                rt.diag_memory = memo
                same = same and _same(got, ref) and set(got) == {"drift", "clock.primary", "clock.backup"}
    k, s = float(np.median(kept)), float(np.median(scratch))
    print(f"hourly rerun, {days:g} days of one-minute history, primary + backup, median of {hours} hours (CPU):")
    print(f"  from scratch (baseline)                       {s * 1e3:8.1f} ms")
    print(f"  from the last run's memory                    {k * 1e3:8.1f} ms  ratio {k / s:6.3f}  "
          f"({k / 60 * 1e3:.2f} ms per station-minute; rows read {int(np.median(read))})")
    print(f"  results equal to the run from scratch: {'yes' if same else 'NO'}")
    targets.below("hourly rerun / run from scratch", k / s, RERUN_TARGET, ".3f")
    targets.at_least("hourly reruns equal to runs from scratch [1 = all]", float(same), 1.0, ".0f")


if __name__ == "__main__":
    main()
