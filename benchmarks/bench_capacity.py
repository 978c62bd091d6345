"""Capacity: many stations at one-minute cadence through one daemon process.

Each simulated minute stores one new sample per station (one batch with its checkpoint)
and runs the processing pipeline (quality control, residual, skew surge, forecast; no
alert rules) for every station, in-process. Prints CPU seconds per station-minute, and
the largest number of stations one core keeps up with at one-minute cadence (60 s of CPU
per minute), with the baseline of the store write alone measured in the same run.
"""
from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np

STATIONS = 20
WARMUP_MIN = 180     # minutes of history stored and processed before timing
MINUTES = 20         # simulated minutes timed
T0 = 1_760_000_000 - 1_760_000_000 % 60


def _level(t: np.ndarray, k: int) -> np.ndarray:
    return 2.5 + 1.2 * np.cos(2 * np.pi * t / 44714.16 + k) + 0.01 * np.sin(t / 97.0)


def main() -> None:
    from monitor.service.config import validate_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "c.toml").write_text('mean = 2.5\n[[constituents]]\nname = "M2"\namplitude = 1.2\nphase = 30.0\n'
                                    '[[constituents]]\nname = "S2"\namplitude = 0.4\nphase = 60.0\n')
        raw = {"store": {"path": "b.db"},
               "stations": [{"id": f"s{k:03d}", "latitude": 50.0, "longitude": -4.0, "constants": "c.toml",
                             "datums": {"chart": -1.0}, "sensors": {"primary": {}}} for k in range(STATIONS)]}
        cfg, errors = validate_config(raw, tmp)
        assert not errors, errors
        store = Store.open(cfg.store_path)
        d = Daemon(cfg, store)

        def store_minute(ts: np.ndarray) -> None:
            for k, st in enumerate(cfg.stations):
                store.write_batch(st.id, "primary", ts, _level(ts, k), feed=f"{st.id}.primary",
                                  state={"t": int(ts[-1])})

        hist = T0 + 60 * np.arange(WARMUP_MIN)
        store_minute(hist)
        d.process()
        # baseline: the store write alone
        c0 = time.process_time()
        for m in range(MINUTES):
            store_minute(np.array([T0 + 60 * (WARMUP_MIN + m)]))
        write_cpu = time.process_time() - c0
        # full path: write + process, a minute at a time
        c0 = time.process_time()
        for m in range(MINUTES, 2 * MINUTES):
            store_minute(np.array([T0 + 60 * (WARMUP_MIN + m)]))
            d.process()
        full_cpu = time.process_time() - c0
        store.close()

    sm = STATIONS * MINUTES
    per = full_cpu / sm
    print(f"capacity: {STATIONS} stations, {MINUTES} simulated minutes after {WARMUP_MIN} min of history")
    print(f"  store write alone : {write_cpu / sm * 1000:8.2f} ms CPU per station-minute (baseline)")
    print(f"  write + process   : {per * 1000:8.2f} ms CPU per station-minute "
          f"({per / max(write_cpu / sm, 1e-9):.0f} x the write alone)")
    print(f"  stations one core keeps up with at one-minute cadence: about {int(60 / per):,}")


if __name__ == "__main__":
    main()
