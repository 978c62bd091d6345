"""A refit while the daemon processes: does a fit of years of one-minute data hold up the
processing of new lines?

One store, two invented stations: ``fitted`` holds ``QW_BENCH_REFIT_YEARS`` years (default 1)
of one-minute levels that passed quality control and takes its constants from its history;
``busy`` has a constants file (written here: the same invented tide) and a day of history. A
pass of ``busy`` stores one new sample and processes it (quality control, residual, skew
surge, forecast), as the daemon does when a line arrives. Measured, in one run: the wall time
of such passes alone (the baseline) and while the daemon's refit job (``Daemon.job_refit``,
its own thread and SQLite connection, as on the scheduler's ``fits`` worker) fits
``fitted``'s record. Target: no pass during the fit takes more than 1 s longer than the
baseline's median (issue 16: a refit must not delay the processing of new lines by more than
about a second).

Run: ``python -m benchmarks.bench_refit``.
"""
from __future__ import annotations

import os
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from benchmarks.targets import Targets

YEARS = float(os.environ.get("QW_BENCH_REFIT_YEARS", 1.0))
T0 = 1_700_000_040             # a whole minute (2023-11-14, invented record)
DELAY_TARGET_S = 1.0           # [s] longest extra wall time of a pass while a fit runs
BASELINE_PASSES = 20


def levels(t: np.ndarray) -> np.ndarray:
    """An invented semidiurnal tide with a little noise [m] (M2 and S2 at their standard
    speeds, Schureman 1958, from memory)."""
    h = (t - T0) / 3600.0
    rng = np.random.default_rng(16)
    return (3.0 + 1.2 * np.cos(np.radians(28.9841042 * h - 40)) + 0.4 * np.cos(np.radians(30.0 * h - 75))
            + rng.normal(0.0, 0.01, t.size))


def build(folder: Path):
    from monitor.service.config import validate_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store
    from predictor import TideModel

    constants = folder / "busy.toml"
    TideModel(mean=3.0, constituents=[{"name": "M2", "amplitude": 1.2, "phase": 40.0},
                                      {"name": "S2", "amplitude": 0.4, "phase": 75.0}]).save(constants)
    raw = {"store": {"path": str(folder / "q.db")},
           "stations": [{"id": "fitted", "latitude": 50.0, "longitude": -4.0, "constants": "history",
                         "fit_span_days": 366 * YEARS + 1, "datums": {"chart": -1.0}, "sensors": {"primary": {}}},
                        {"id": "busy", "latitude": 50.0, "longitude": -4.0, "constants": str(constants),
                         "datums": {"chart": -1.0}, "sensors": {"primary": {}}}]}
    cfg, errors = validate_config(raw, folder)
    if errors:
        raise SystemExit("; ".join(map(str, errors)))
    store = Store.open(cfg.store_path)
    end = T0 + int(YEARS * 365 * 86400)
    t = np.arange(T0, end, 60, dtype=np.int64)
    store.write_batch("fitted", "primary", t, levels(t))
    store.conn.execute("UPDATE observations SET flag = 1 WHERE station = 'fitted'")
    t = np.arange(end - 26 * 3600, end, 60, dtype=np.int64)
    store.write_batch("busy", "primary", t, levels(t))
    d = Daemon(cfg, store)
    return d, store, end


def one_pass(d, t: int) -> float:
    """Store one new sample of ``busy`` and process it [s wall]."""
    w0 = time.perf_counter()
    d.store.write_batch("busy", "primary", np.array([t], dtype=np.int64), levels(np.array([float(t)])))
    d.process_station(d.stations["busy"], now=float(t))
    return time.perf_counter() - w0


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        w0 = time.perf_counter()
        d, store, end = build(Path(tmp))
        print(f"store: {YEARS:g} year(s) of one-minute levels for the fit, built in {time.perf_counter() - w0:.1f} s")
        try:
            d.process_station(d.stations["busy"], now=float(end))        # the day of history, once
            t = end
            base = []
            for _ in range(BASELINE_PASSES):
                base.append(one_pass(d, t))
                t += 60
            cpu: dict = {}

            def fit_job() -> None:
                c0 = time.thread_time()
                d.job_refit()
                cpu["fit"] = time.thread_time() - c0

            fit = threading.Thread(target=fit_job, name="fits")
            f0 = time.perf_counter()
            fit.start()
            during = []
            while fit.is_alive():
                during.append(one_pass(d, t))
                t += 60
            fit.join()
            fit_s = time.perf_counter() - f0
            fits = store.fits("fitted")
        finally:
            store.close()
    median = float(np.median(base))
    worst = max(during) if during else median
    print(f"a pass of one new sample alone: median {median * 1e3:.0f} ms (max {max(base) * 1e3:.0f} ms); "
          f"during the fit ({fit_s:.1f} s wall, {len(fits)} fit kept): {len(during)} passes, median "
          f"{np.median(during) * 1e3:.0f} ms, max {worst * 1e3:.0f} ms (ratio of medians "
          f"{np.median(during) / median:.2f}); with the fit on the processing worker, as before issue 16, "
          f"a line arriving as it began would have waited the whole fit")
    every = d.cfg.daemon.refit_days
    print(f"the fit's own CPU (its thread): {cpu['fit']:.1f} s; one every {every:g} days "
          f"(daemon.refit_days) is {cpu['fit'] * 1e3 / (every * 1440):.3f} ms per station-minute (not a target)")
    targets = Targets()
    targets.at_least("fits kept", float(len(fits)), 1.0, ".0f")
    targets.below("longest extra wall time of a pass during a fit [s]", worst - median, DELAY_TARGET_S, ".3f")
    targets.finish()


if __name__ == "__main__":
    main()
