"""Harmonic fit of nineteen years of hourly data, and of nineteen years of one-minute data
read in chunks, with every constituent Rayleigh allows.

Hourly (``harmonic_fit``, arrays in memory): wall time and peak traced memory (tracemalloc,
which sees numpy's buffers) on an invented port's record, as ratios to baselines measured in
the same run:

- time: one plain ``numpy.linalg.lstsq`` on ONE year of the same data with the same
  constituents (design matrix built with nodal terms at every sample);
- memory: the record itself (times and levels, 16 bytes a sample), and what the full
  design matrix of the 19-year fit would take if built at once.

One-minute (``harmonic_fit_chunks``, about 10 million samples): the record comes from a chunk
generator standing in for the store (each chunk of 65,536 samples made again on every pass
from the model and seeded noise, so the record is never in memory), fitted in a fresh
subprocess. The target is the subprocess's peak resident memory (``ru_maxrss``: everything,
the interpreter, numpy, scipy, pandas, BLAS and the fit) under 300 MB; printed beside it are
the rise of that peak during the fit (``ru_maxrss`` delta; small, since the fit reuses what
the imports and a short warm-up fit already held) and the peak traced by tracemalloc during
the fit (numpy's buffers: what the fit itself holds at once). Time is the subprocess's CPU
time (``time.process_time``; BLAS single-threaded, so other work on a shared machine moves it
far less than wall time, which is printed beside it), as a ratio to a baseline timed in the
same subprocess: plain numpy normal equations (``X'X`` and ``X'y`` of cos and
sin of the same constituents, no nodal terms, chunks of 4,096 rows) over ONE year of the same
one-minute data; the target is under 1.5 times the number of years (per year of record, the
whole fit, with its nodal terms, a summary pass, two passes over the residual and its
spectrum, within half as much again as that one straightforward pass).

Run: ``python -m benchmarks.bench_fit`` (``QW_BENCH_YEARS=N`` changes the hourly record's
length, ``QW_BENCH_MINUTE_YEARS=N`` the one-minute record's; 0 skips it).
"""
from __future__ import annotations

import gc
import json
import os
import resource
import subprocess
import sys
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
    minute_years = float(os.environ.get("QW_BENCH_MINUTE_YEARS", "19"))
    if minute_years > 0:
        _minute_report(minute_years, targets)
    targets.finish()


# ----------------------------------------------------------------- one-minute, streamed

_CHUNK = 65536  # samples per chunk of the stand-in store [samples]
_MINUTE = 60.0
_START = 1325376000.0  # 2012-01-01T00:00Z [Unix s]


def _minute_reader(model, n: int):
    """``read()`` of n one-minute samples, chunk by chunk: the model's prediction plus noise
    seeded by the chunk's number, so every pass reads the same record."""
    def read():
        for i, s in enumerate(range(0, n, _CHUNK)):
            m = min(_CHUNK, n - s)
            t = _START + _MINUTE * np.arange(s, s + m, dtype=float)
            level = model.predict_grid(t[0], _MINUTE, m)
            level += np.random.default_rng((19, i)).normal(0.0, 0.05, m)
            yield t, level
    return read


def _plain_normal_equations(read, names) -> np.ndarray:
    """The straightforward baseline: X'X and X'y of [1, cos, sin] of the constituents' speeds
    at every sample (no nodal terms), 4,096 rows at a time, then one solve."""
    from predictor.constituents import get

    omega = np.radians([get(n).speed for n in names]) / 3600.0
    p = 1 + 2 * omega.size
    A, rhs = np.zeros((p, p)), np.zeros(p)
    for t, y in read():
        for s in range(0, t.size, 4096):
            tc, yc = t[s:s + 4096], y[s:s + 4096]
            arg = np.outer(tc - _START, omega)
            X = np.column_stack([np.ones(tc.size), np.cos(arg), np.sin(arg)])
            A += X.T @ X
            rhs += X.T @ yc
    return np.linalg.solve(A, rhs)


def _minute_child() -> None:
    """In a fresh process: the streamed one-minute fit and its baseline; JSON on stdout."""
    from predictor import TideModel, harmonic_fit_chunks

    years = float(os.environ.get("QW_BENCH_MINUTE_YEARS", "19"))
    model = TideModel(mean=2.45, constituents=[{"name": n, "amplitude": h, "phase": g} for n, h, g in _PORT])
    n = int(years * 365.25 * 1440)
    harmonic_fit_chunks(_minute_reader(model, 40 * 1440))  # warm-up: imports, caches
    gc.collect()
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    tracemalloc.start()
    t0, c0 = time.perf_counter(), time.process_time()
    fit = harmonic_fit_chunks(_minute_reader(model, n))
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    names = [c["name"] for c in fit.constituents if "inferred_from" not in c]
    one_year = int(365.25 * 1440)
    t0, c0 = time.perf_counter(), time.process_time()
    _plain_normal_equations(_minute_reader(model, one_year), names)
    base_wall, base = time.perf_counter() - t0, time.process_time() - c0
    m2 = next(c for c in fit.constituents if c["name"] == "M2")
    print(json.dumps({"years": years, "n": n, "k": len(names), "wall": wall, "cpu": cpu, "peak": peak,
                      "base_wall": base_wall,
                      "rss_delta": rss1 - rss0, "rss_before": rss0, "base": base,
                      "m2": m2["amplitude"], "m2_ci": m2["amplitude_ci"],
                      "method": fit.metadata["method"]}))


def _minute_report(years: float, targets) -> None:
    env = dict(os.environ, QW_BENCH_MINUTE_YEARS=str(years))
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    code = "from benchmarks.bench_fit import _minute_child; _minute_child()"
    out = subprocess.run([sys.executable, "-c", code], cwd=root, env=env, capture_output=True, text=True,
                         check=False)
    if out.returncode != 0:
        raise RuntimeError(f"the one-minute fit failed:\n{out.stderr}")
    r = json.loads(out.stdout.strip().splitlines()[-1])
    mb = 1e6
    print(f"bench_fit: {r['years']:g} years at one minute, {r['n']} samples read in chunks of {_CHUNK}, "
          f"{r['k']} constituents fitted, {r['method']}; M2 {r['m2']:.4f} m +- {r['m2_ci']:.4f}")
    print(f"  harmonic_fit_chunks {r['cpu']:8.2f} s CPU ({r['wall']:.2f} s wall)   peak rss above start {r['rss_delta'] / mb:8.1f} MB "
          f"(process before the fit {r['rss_before'] / mb:.0f} MB, at its peak "
          f"{(r['rss_before'] + r['rss_delta']) / mb:.0f} MB)   tracemalloc peak {r['peak'] / mb:8.1f} MB")
    print(f"  baseline: plain numpy normal equations, 1 year at one minute {r['base']:8.2f} s CPU "
          f"({r['base_wall']:.2f} s wall)")
    print(f"  bytes per sample held at once (tracemalloc peak / samples) = {r['peak'] / r['n']:6.1f}")
    targets.below(f"peak memory of the process fitting {r['years']:g} years at one minute, ru_maxrss [MB]",
                  (r["rss_before"] + r["rss_delta"]) / mb, 300.0, ".1f")
    targets.below(f"CPU time ratio fit({r['years']:g} y one-minute) / plain normal equations(1 y)",
                  r["cpu"] / r["base"], 1.5 * r["years"], ".2f")


if __name__ == "__main__":
    main()
