"""Harmonic fit of nineteen years of hourly data with every constituent Rayleigh allows.

Measures wall time and peak traced memory (tracemalloc, which sees numpy's buffers) of
``harmonic_fit`` on an invented port's record, and reports them as ratios to baselines
measured in the same run:

- time: one plain ``numpy.linalg.lstsq`` on ONE year of the same data with the same
  constituents (design matrix built with nodal terms at every sample);
- memory: the record itself (times and levels, 16 bytes a sample), and what the full
  design matrix of the 19-year fit would take if built at once.

Run: ``python -m benchmarks.bench_fit`` (``QW_BENCH_YEARS=N`` to change the record length).
"""
from __future__ import annotations

import gc
import os
import time
import tracemalloc

import numpy as np
import pandas as pd

# Invented port (not a real station): amplitude [m], Greenwich phase lag [deg].
_PORT = [("M2", 1.10, 95.0), ("S2", 0.38, 128.0), ("N2", 0.22, 80.0), ("K2", 0.10, 125.0),
         ("K1", 0.12, 205.0), ("O1", 0.09, 350.0), ("P1", 0.04, 200.0), ("Q1", 0.025, 330.0),
         ("M4", 0.06, 40.0), ("MS4", 0.035, 100.0), ("Sa", 0.07, 250.0), ("Ssa", 0.02, 30.0)]


def _record(years: float):
    from predictor import TideModel

    model = TideModel(mean=2.45, constituents=[{"name": n, "amplitude": h, "phase": g} for n, h, g in _PORT])
    times = pd.date_range("2012-01-01", periods=int(years * 365.25 * 24), freq="1h", tz="UTC")
    rng = np.random.default_rng(19)
    levels = model.predict(times) + rng.normal(0.0, 0.05, times.size)
    return times, levels


def _traced(fn):
    gc.collect()
    tracemalloc.start()
    t0 = time.perf_counter()
    out = fn()
    wall = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return out, wall, peak


def _plain_lstsq(t_seconds, y, names):
    from predictor import nodal

    vu, f = nodal.arguments(t_seconds, names, daily=False)
    arg = np.radians(vu)
    X = np.column_stack([np.ones(t_seconds.size), f * np.cos(arg), f * np.sin(arg)])
    coef, *_ = np.linalg.lstsq(X, y, rcond=None)
    return coef


def main() -> None:
    from benchmarks.targets import Targets
    from predictor.fit import harmonic_fit

    years = float(os.environ.get("QW_BENCH_YEARS", "19"))
    times, levels = _record(years)
    t_sec = times.asi8 / 1e9 if times.unit == "ns" else times.as_unit("ns").asi8 / 1e9
    record_bytes = times.size * 16

    harmonic_fit(times[:24 * 40], levels[:24 * 40])  # warm-up: imports, caches

    model, fit_wall, fit_peak = _traced(lambda: harmonic_fit(times, levels))
    names = [c["name"] for c in model.constituents]

    one_year = slice(0, int(365.25 * 24))
    _, base_wall, base_peak = _traced(lambda: _plain_lstsq(t_sec[one_year], levels[one_year], names))
    full_design_bytes = times.size * (1 + 2 * len(names)) * 8

    # bounded memory: the peak of a record a quarter as long, same constituents
    short = slice(0, times.size // 4)
    _, _, short_peak = _traced(lambda: harmonic_fit(times[short], levels[short], constituents=names))
    m2 = next(c for c in model.constituents if c["name"] == "M2")
    time_ratio = fit_wall / base_wall
    design_ratio = fit_peak / full_design_bytes
    print(f"bench_fit: {years:g} years hourly, {times.size} samples, {len(names)} constituents "
          f"(Rayleigh 1), M2 {m2['amplitude']:.4f} m +- {m2['amplitude_ci']:.4f}")
    print(f"  harmonic_fit        {fit_wall:8.2f} s   peak {fit_peak / 2**20:8.1f} MiB")
    print(f"  baseline: numpy lstsq on 1 year, same constituents "
          f"{base_wall:8.2f} s   peak {base_peak / 2**20:8.1f} MiB")
    print(f"  time ratio   fit({years:g} y) / lstsq(1 y)           = {time_ratio:6.2f}")
    targets = Targets()
    targets.below(f"time ratio fit({years:g} y) / lstsq(1 y) (cheaper than one lstsq over the whole record)",
                  time_ratio, years, ".2f")
    print(f"  memory ratio fit peak / record arrays          = {fit_peak / record_bytes:6.2f}")
    print(f"  memory ratio fit peak / full design matrix     = {design_ratio:6.3f}  "
          f"(design matrix at once: {full_design_bytes / 2**20:.0f} MiB)")
    targets.below("memory ratio fit peak / full design matrix", design_ratio, 0.5, ".3f")
    print(f"  memory ratio fit peak / lstsq(1 y) peak        = {fit_peak / base_peak:6.2f}")
    print(f"  memory growth peak({years:g} y) / peak({years / 4:g} y)        = {fit_peak / short_peak:6.2f}  "
          f"(the record grew 4x; bounded memory grows far less)")
    targets.finish()

if __name__ == "__main__":
    main()
