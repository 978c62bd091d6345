"""Clock-offset diagnostic speed: a week of one-minute data against the package's tide model.

Ratios measured in the same run, against one ``model.predict`` over the same week (the
least any comparison with the predicted tide must spend):

- ``clock_offset`` (one prediction on a grid, band-filtered regression, per-day values);
- ``sensor_timing`` of a backup against the primary over the same week.

Target (design notes: diagnostics feed the daily report and the daemon): the clock
offset of a week well under 1 s, that is within a few tens of predictions.

Run: ``python -m benchmarks.bench_diagnostics``. Data: an invented port (twelve
constituents with invented constants, 1 cm noise, a 1 m surge, the clock 6 minutes late).
"""
from __future__ import annotations

import time

import numpy as np
import pandas as pd


def _best(fn, repeat: int = 3) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
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
    print(f"clock_offset (week, 1 min)                    {clock * 1e3:8.1f} ms  ratio {clock / base:6.1f}"
          f"  -> {'PASS' if clock < 1.0 else 'FAIL'} (< 1 s)")
    print(f"  found {res['offset_min']:+.2f} +- {res['offset_se_min']:.2f} min (injected +6.00), "
          f"bands consistent: {res['consistent']}")
    print(f"sensor_timing (week, 6 h windows)             {timing * 1e3:8.1f} ms  ratio {timing / base:6.1f}")


if __name__ == "__main__":
    main()
