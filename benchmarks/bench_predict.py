"""Prediction speed: one year at one-minute steps with every catalogue constituent.

Ratios measured in the same run:

- speed-up of ``TideModel.predict`` over a straightforward per-constituent numpy
  evaluation (for each constituent: its arguments, f and u at every sample, and a
  cosine per sample) of the same model; target at least 20.  The naive time is
  measured on the first 30 days and scaled linearly (it takes minutes for a year);
- ``predict`` time over the time to merely write the output array (allocate and fill
  N floats: the bare floor), over the time to write the output as the CSV text that
  ``quaywatch predict`` prints (the realistic output; target: predicting costs no more
  than writing it), and over one ``numpy.cos`` of N samples (one constituent's worth of
  trigonometry);
- the largest difference from the naive evaluation (target below 0.1 mm).

Run: ``python -m benchmarks.bench_predict`` (``QW_BENCH_DAYS=N`` changes the span).
The model's constants are invented (not a real station).
"""
from __future__ import annotations

import os
import time

import numpy as np


def _model():
    from predictor import TideModel
    from predictor.constituents import CATALOGUE

    rng = np.random.default_rng(11)
    cons = [{"name": n, "amplitude": float(rng.uniform(0.001, 0.3)), "phase": float(rng.uniform(0, 360))}
            for n in CATALOGUE]
    return TideModel(mean=2.0, constituents=cons)


def _naive(model, t):
    """Straightforward evaluation: each constituent on its own, cos at every sample."""
    from predictor.astro import astronomical_arguments
    from predictor.constituents import get
    from predictor.nodal import nodal_factors

    level = np.full(t.shape, model.mean)
    for c in model.constituents:
        d = np.asarray(get(c["name"]).doodson, dtype=float)
        v = astronomical_arguments(t) @ d[:6] + 90.0 * d[6]
        f, u = nodal_factors(t, [c["name"]], daily=False)
        level += f[:, 0] * c["amplitude"] * np.cos(np.radians(v + u[:, 0] - c["phase"]))
    return level


def _best(fn, repeat=3):
    best, out = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def _write_csv(times, level, path) -> None:
    """The CSV that ``quaywatch predict`` prints (same formatting), to a file."""
    stamps = np.datetime_as_string(times, unit="s")
    with open(path, "w") as fh:
        fh.write("time,level\n")
        fh.write("".join(f"{s}Z,{v:.4f}\n" for s, v in zip(stamps, level)))


def main() -> None:
    import tempfile

    from benchmarks.targets import Targets
    from predictor import TideModel

    days = float(os.environ.get("QW_BENCH_DAYS", "365"))
    model = _model()
    n = int(days * 1440)
    times = np.datetime64("2026-01-01T00:00", "ns") + np.arange(n) * np.timedelta64(60, "s")
    t = times.astype(np.int64) / 1e9

    TideModel(mean=0.0, constituents=[{"name": "M2", "amplitude": 1.0, "phase": 0.0}]).predict(times[:2000])
    # cold: a fresh model, so the per-step phasor matrix is built inside the timing
    t0 = time.perf_counter()
    model.predict(times)
    t_cold = time.perf_counter() - t0
    t_fast, fast = _best(lambda: model.predict(times), 7)
    # The naive evaluation is linear in the number of samples and takes minutes for a
    # year, so it is timed on the first QW_BENCH_NAIVE_DAYS (default 30) and scaled.
    m = min(n, int(float(os.environ.get("QW_BENCH_NAIVE_DAYS", "30")) * 1440))
    t0 = time.perf_counter()
    slow = _naive(model, t[:m])
    t_naive = (time.perf_counter() - t0) * n / m
    src = np.random.default_rng(0).random(n)

    def write():
        out = np.empty(n)
        out[:] = src
        return out

    t_write, _ = _best(write, 7)
    t_cos, _ = _best(lambda: np.cos(src), 5)
    with tempfile.TemporaryDirectory() as d:
        t_csv, _ = _best(lambda: _write_csv(times, fast, os.path.join(d, "p.csv")), 1)

    k = len(model.constituents)
    err = np.max(np.abs(fast[:m] - slow)) / 1e-3
    ratio = t_naive / t_fast
    print(f"prediction: {days:g} days at 1 min = {n} samples, {k} constituents "
          f"(OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')})")
    print(f"  predict (best of 7)      {t_fast * 1e3:9.1f} ms   first call on a fresh model {t_cold * 1e3:.1f} ms")
    print(f"  naive per-constituent    {t_naive * 1e3:9.1f} ms   (timed on {m} samples, scaled to {n})")
    print(f"  write output array       {t_write * 1e3:9.2f} ms   (allocate and fill {n} floats)")
    print(f"  write output as CSV      {t_csv * 1e3:9.1f} ms   (the text `quaywatch predict` prints)")
    print(f"  one cos per sample       {t_cos * 1e3:9.2f} ms")
    targets = Targets()
    targets.below("max |predict - naive| [mm]", err, 0.1, ".5f")
    targets.at_least("speed-up over naive [x]", ratio, 20.0, ".1f")
    print(f"  predict / write output array: {t_fast / t_write:.1f} (the bare floor; no target)")
    targets.at_most("predict / write output as CSV (predicting costs no more than writing the result)",
                    t_fast / t_csv, 1.0, ".3f")
    print(f"  predict / one cos per sample: {t_fast / t_cos:.1f} (naive does {k} of them)")
    targets.finish()


if __name__ == "__main__":
    main()
