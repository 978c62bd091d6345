"""Quality-control speed: one year of one-minute data for a station with two sensors.

Ratios measured in the same run, against the time to read the same rows from the store
(``SELECT t, value, flag, time_source`` for both sensors into DataFrames):

- every QC test for both sensors (pure computation, prediction excluded);
- the whole store pass ``run_station_qc`` (read, predict, test, write ``qc_tests`` and
  ``observations.flag``), first over the whole year, then again over the unchanged year
  (writes follow what changed, so it writes nothing), and the daemon's incremental
  pass over the last hour.

Target: the daemon's pass judges only the rows it writes (``run_tests_tail``) in at most half
the time of every row of its context (``run_tests``), measured in the same run.

Run: ``python -m benchmarks.bench_qc`` (``QW_BENCH_DAYS=N`` changes the span).
Data: an invented port (synthetic tide plus coloured noise and a few injected faults).
"""
from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd


class _Tide:
    """Four constituents at their standard speeds (Schureman 1958); invented constants."""

    speeds = np.radians([28.9841042, 30.0, 15.0410686, 13.9430356]) / 3600.0
    amps = np.array([1.2, 0.4, 0.12, 0.09])
    phases = np.radians([95.0, 130.0, 210.0, 190.0])

    def predict(self, times) -> np.ndarray:
        t = pd.DatetimeIndex(times).as_unit("ns").asi8 / 1e9
        return 2.5 + np.cos(np.outer(t, self.speeds) - self.phases) @ self.amps


def _data(days: int):
    from scipy.signal import lfilter

    rng = np.random.default_rng(5)
    idx = pd.date_range("2023-01-01", periods=days * 1440, freq="1min", tz="UTC")
    tide = _Tide().predict(idx)
    phi = np.exp(-60 / 21600)
    red = lfilter([1.0], [1.0, -phi], rng.normal(0, 0.03 * np.sqrt(1 - phi**2), len(idx)))
    primary = np.round((tide + red + rng.normal(0, 0.004, len(idx))) * 1000) / 1000
    primary[rng.integers(0, len(idx), 50)] += 0.3        # spikes
    backup = primary + rng.normal(0, 0.002, len(idx)) + np.arange(len(idx)) * 1e-3 / 1440  # 1 mm/day drift
    return idx, primary, backup


def main() -> None:
    from benchmarks.targets import Targets
    from monitor.quality import checks as qc
    from monitor.quality import records as qc_records
    from monitor.quality import tail as qc_tail
    from monitor.store.database import Store

    days = int(os.environ.get("QW_BENCH_DAYS", "365"))
    idx, primary, backup = _data(days)
    t = idx.as_unit("s").asi8
    with tempfile.TemporaryDirectory() as tmp:
        with Store.open(Path(tmp) / "bench.sqlite") as store:
            store.write_batch("bench", "primary", t, primary)
            store.write_batch("bench", "backup", t, backup)
            qc_records.ensure_qc_schema(store.db)

            qc_records.read_observations(store, "bench", "primary", float(t[0]), float(t[0] + 86400))  # warm-up
            t0 = time.perf_counter()
            obs = {s: qc_records.read_observations(store, "bench", s) for s in ("primary", "backup")}
            t_read = time.perf_counter() - t0

            model = _Tide()
            pred = model.predict(obs["primary"].index)
            t0 = time.perf_counter()
            a = qc.run_tests(obs["primary"]["value"], None, pred, now=float(t[-1]))
            qc.run_tests(obs["backup"]["value"], None, pred, obs["primary"]["value"].where(a["flag"] != 4),
                         now=float(t[-1]))
            t_tests = time.perf_counter() - t0

            c0 = store.db.conn.total_changes
            t0 = time.perf_counter()
            qc_records.run_station_qc(store, "bench", None, float(t[0]), float(t[-1]), model, now=float(t[-1]))
            t_pass = time.perf_counter() - t0
            written = store.db.conn.total_changes - c0

            # the same pass again: nothing changed, so (almost) nothing is written
            t0 = time.perf_counter()
            qc_records.run_station_qc(store, "bench", None, float(t[0]), float(t[-1]), model, now=float(t[-1]))
            t_again = time.perf_counter() - t0
            rewritten = store.db.conn.total_changes - c0 - written

            # the daemon's incremental pass: the last hour of the record
            t0 = time.perf_counter()
            qc_records.run_station_qc(store, "bench", None, float(t[-60]), float(t[-1]), model, now=float(t[-1]))
            t_hour = time.perf_counter() - t0

    n = 2 * len(idx)
    print(f"rows: {n:,} ({days} days x 2 sensors at one minute)")
    print(f"read from store:          {t_read:7.2f} s  (baseline)")
    print(f"all QC tests, in memory:  {t_tests:7.2f} s  ratio {t_tests / t_read:5.2f}")
    print(f"run_station_qc (full):    {t_pass:7.2f} s  ratio {t_pass / t_read:5.2f}  "
          f"(rows written: {written:,})")
    print(f"run_station_qc (re-run):  {t_again:7.2f} s  ratio {t_again / t_read:5.2f}  "
          f"(rows written: {rewritten:,}; writes follow what changed)")
    print(f"run_station_qc (last hour, incremental): {t_hour * 1e3:7.1f} ms")
    # the daemon's pass: the last hour judged against a day of context, whole context against tail only
    ctx = obs["primary"]["value"].iloc[-26 * 60:]
    cpred = model.predict(ctx.index)
    best = lambda fn: min(_timed(fn) for _ in range(5))  # noqa: E731
    t_ctx = best(lambda: qc.run_tests(ctx, None, cpred, now=float(t[-1])))
    t_tail = best(lambda: qc_tail.run_tests_tail(ctx, None, cpred, now=float(t[-1]), start=len(ctx) - 60))
    print(f"a station pass of one sensor (26 h of context, the last hour judged): every row {t_ctx * 1e3:.1f} ms, "
          f"the last hour only {t_tail * 1e3:.1f} ms")
    targets = Targets()
    targets.at_most("tail-only / whole-context quality control of a pass", t_tail / t_ctx, 0.5, ".2f")
    targets.finish()


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


if __name__ == "__main__":
    main()
