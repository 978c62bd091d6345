"""The daemon: late data is processed again (in process); as a real subprocess, SIGKILL at
random moments loses and doubles nothing, SIGTERM stops cleanly, and a second daemon on the
same store is refused."""
from __future__ import annotations

import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from units import minute

from monitor.quality import diagnostics

ROOT = Path(__file__).resolve().parent.parent
N_LINES = 3000
BAD_EVERY = 250  # one rejected line every 250 lines


def _write_feed(path: Path) -> tuple[set, int]:
    """An invented one-minute record with a few bad lines; returns the expected rows and reject count."""
    t0 = 1_760_000_000
    rows, bad = set(), 0
    with open(path, "w") as fh:
        fh.write("time,level\n")
        for i in range(N_LINES):
            if i % BAD_EVERY == 7:
                fh.write(f"not a line {i}\n")
                bad += 1
                continue
            t = t0 + 60 * i
            v = round(2.0 + 1.5 * ((i % 745) / 745.0), 3)
            fh.write(f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(t))},{v:.3f}\n")
            rows.add((t, v))
    return rows, bad


def _config(tmp: Path, feed: str) -> Path:
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[daemon]
poll_seconds = 0.05
process_seconds = 0.5
idle_polls = 3
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "history"
fit_min_days = 365
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {feed}
""")
    return cfg


def _start(cfg: Path, *extra: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg), *extra], cwd=cfg.parent,
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _stored(db: Path) -> tuple[list, int]:
    if not db.exists():
        return [], 0
    con = sqlite3.connect(db)
    try:
        rows = con.execute("SELECT t, value FROM observations WHERE station='testport' AND sensor='primary'").fetchall()
        rejects = con.execute("SELECT count(*) FROM rejects").fetchone()[0]
    except sqlite3.OperationalError:  # tables not made yet
        return [], 0
    finally:
        con.close()
    return rows, rejects


# --------------------------------------------------------------------------- late data, in process

T0 = 1_760_000_040  # a whole minute (2025-10-09, invented record)


def _lines(minutes, level=2.0):
    return [f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(T0 + 60 * m))},{level + 0.001 * m:.3f}"
            for m in minutes]


def _ingest(d, role, minutes):
    from monitor.service.daemon import ingest_lines

    st = d.cfg.stations[0]
    ingest_lines(d.store, st.sensors[role], _lines(minutes), received=T0 + 60 * 200)


def test_late_rows_of_the_primary_are_processed(daemon):
    rt = daemon.stations["testport"]
    _ingest(daemon, "primary", [*range(0, 60), *range(90, 180)])
    daemon.process_station(rt, now=T0 + 60 * 200)
    _ingest(daemon, "primary", range(60, 90))  # the gap, filled after the newer rows were processed
    daemon.process_station(rt, now=T0 + 60 * 201)
    got = daemon.store.derived("testport", T0 + 60 * minute, T0 + 89 * minute)
    assert len(got) == 30


def test_late_rows_of_the_backup_are_quality_controlled(daemon):
    rt = daemon.stations["testport"]
    _ingest(daemon, "primary", range(0, 180))
    daemon.process_station(rt, now=T0 + 60 * 200)
    _ingest(daemon, "backup", range(0, 180))  # its feed lags the primary's
    daemon.process_station(rt, now=T0 + 60 * 201)
    flags = daemon.store.observations("testport", "backup")["flag"]
    assert len(flags) == 180 and not (flags == 2).any()  # 2: not evaluated


# --------------------------------------------------------------------------- the daemon as a subprocess

def _wait_for_rows(db: Path, proc: subprocess.Popen, more_than: int = 0, timeout: float = 60) -> bool:
    """Wait until the store holds more than ``more_than`` rows; False if the daemon exited first."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if proc.poll() is not None:
            return False
        if len(_stored(db)[0]) > more_than:
            return True
        time.sleep(0.02)
    raise AssertionError(f"the daemon stored nothing new within {timeout:.0f} s")


KILLS = 10
PACE = 100  # [lines/s] of the paced replay the kills interrupt


def _fork_daemon(cfg: Path):
    """``quaywatch run CFG`` in a forked child of this (already imported) interpreter.

    The child is a separate process with its own store connection, lock and feeds, killed
    for real; forking skips the seconds of imports a fresh interpreter pays on a loaded
    machine, so the kills come at the pace of the backfill, not of the imports."""
    import multiprocessing

    def child():
        os.chdir(cfg.parent)
        from monitor.cli import main

        os._exit(main(["run", str(cfg)]))

    from monitor.service.config import load_config

    load_config(cfg)  # imports what the configuration and the daemon need, before the fork

    proc = multiprocessing.get_context("fork").Process(target=child, daemon=False)
    proc.start()
    return proc


class _Forked:
    """The subprocess.Popen methods _wait_for_rows uses, for a forked child."""

    def __init__(self, proc):
        self.proc = proc
        self.returncode = None

    def poll(self):
        return None if self.proc.is_alive() else self.proc.exitcode


@pytest.mark.slow
def test_sigkill_at_random_moments_loses_and_doubles_nothing(tmp_path):
    expected, bad = _write_feed(tmp_path / "gauge.csv")
    db = tmp_path / "q.db"
    # A paced replay hands out a few lines per poll, so the kills land between and inside
    # batches. At PACE lines/s even kills held up by a second each on a loaded machine leave
    # most of the N_LINES for later: the kills cannot finish the backfill.
    cfg = _config(tmp_path, f'{{ kind = "replay", path = "gauge.csv", rate = {PACE} }}')
    rng = random.Random(20251020)
    kills = 0
    while kills < KILLS:
        before = len(_stored(db)[0])
        proc = _fork_daemon(cfg)
        # kill once this run has made progress, at a random moment of its backfill
        if not _wait_for_rows(db, _Forked(proc), before):
            raise AssertionError(f"the daemon exited with {proc.exitcode} before storing anything")
        time.sleep(rng.uniform(0.0, 0.2))
        os.kill(proc.pid, signal.SIGKILL)
        proc.join()
        assert proc.exitcode == -signal.SIGKILL
        kills += 1
    partial, _ = _stored(db)
    # The rest is played as fast as the daemon takes it: the checkpoint holds no pacing.
    cfg = _config(tmp_path, '{ kind = "replay", path = "gauge.csv", speedup = 0 }')
    proc = _start(cfg, "--until-exhausted")  # the real entry point, in a fresh interpreter
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 0, err[-2000:]
    rows, rejects = _stored(db)
    assert 0 < len(partial) < len(expected)  # the kills did interrupt the backfill
    assert len(rows) == len(expected) and set(rows) == expected  # none lost, none doubled
    assert rejects == bad  # a replayed batch would have doubled its rejected lines


@pytest.mark.slow
def test_sigterm_stops_cleanly_and_a_second_daemon_is_refused(tmp_path):
    _write_feed(tmp_path / "gauge.csv")
    cfg = _config(tmp_path, '{ kind = "file", path = "gauge.csv" }')
    proc = _start(cfg)
    try:
        assert _wait_for_rows(tmp_path / "q.db", proc), proc.communicate()[1][-2000:]
        second = _start(cfg)
        _, err2 = second.communicate(timeout=60)
        assert second.returncode == 2
        assert "in use by another quaywatch daemon" in err2
        proc.send_signal(signal.SIGTERM)
        _, err = proc.communicate(timeout=30)
        assert proc.returncode == 0, err[-2000:]
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    rows, _ = _stored(tmp_path / "q.db")
    assert len(rows) == N_LINES - (N_LINES // BAD_EVERY)


def test_primary_backup_drift_reaches_the_rules_as_an_equipment_fault(tmp_path):
    from monitor.service.config import validate_config
    from monitor.service.daemon import Daemon, ingest_lines
    from monitor.store.database import Store

    raw = {"store": {"path": "q.db"},
           "stations": [{"id": "testport", "latitude": 50.0, "longitude": -4.0, "constants": "history",
                         "datums": {"chart": -1.0}, "sensors": {"primary": {}, "backup": {}},
                         "rules": [{"id": "gauge", "when": "equipment_fault",
                                    "notify": ["tech@testport.example"]}]}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == []
    with Store.open(cfg.store_path) as store:
        d = Daemon(cfg, store)
        st, rt = cfg.stations[0], d.stations["testport"]
        minutes = np.arange(0, 4 * 1440, 10)  # four days at ten-minute steps
        day = 86400
        sea = 2.0 + 0.5 * np.sin(2 * np.pi * minutes / 745)
        drift = 20e-3 * (60 * minutes / day)  # the backup drifts 20 mm/day (invented)
        for role, level in (("primary", sea), ("backup", sea - drift)):
            lines = [f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(T0 + 60 * m))},{v:.4f}"
                     for m, v in zip(minutes, level)]
            ingest_lines(store, st.sensors[role], lines, received=T0 + 5 * day)
        end = int(T0 + 60 * minutes[-1])
        faults = d._diagnostic_faults(rt, now=end + 60, end_t=end)
        # the next passes, before the next run, get the same faults, as equipment_faults
        # gives them from the run's results; a change made to one pass's copy stays there
        fresh = diagnostics.equipment_faults(end + 120, st.qc, station=st.id, drift=rt.diag["drift"])
        for key, clock in rt.diag.items():
            if key.startswith("clock."):
                fresh += diagnostics.equipment_faults(end + 120, st.qc, station=st.id, clock=clock)
        again = d._diagnostic_faults(rt, now=end + 120, end_t=end + 60)
        assert again == fresh == faults
        again[0]["value"] = -1.0
        assert d._diagnostic_faults(rt, now=end + 180, end_t=end + 120) == faults
        rt.diag = {}  # a run that found nothing: its faults are gone at once
        assert d._diagnostic_faults(rt, now=end + 240, end_t=end + 180) == []
    (f,) = [f for f in faults if f["kind"] == "sensor_drift"]
    # primary - backup grows by 20 mm/day (the injected drift); Theil-Sen on hourly medians
    assert f["value"] == pytest.approx(20.0, abs=1.0)  # mm/day


def test_daemon_refit_infers_unresolved_neighbours_and_records_it(daemon):
    # 40 days resolve M2, S2, N2 and K1 but not K2 from S2 (182.6 days, Rayleigh criterion,
    # Foreman 1977): with infer="auto" K2 comes inferred from S2 and the fit says so.
    import pandas as pd

    from monitor.service.daemon import ingest_lines

    rt = daemon.stations["testport"]
    t = T0 + 1800 * np.arange(40 * 48)
    h = (t - T0) / 3600.0
    lvl = 2.0 + 1.0 * np.cos(np.radians(28.9841042 * h)) + 0.3 * np.cos(np.radians(30.0 * h - 20)) \
        + 0.08 * np.cos(np.radians(30.0821373 * h - 20))
    ingest_lines(daemon.store, rt.cfg.sensors["primary"],
                 [f"{pd.Timestamp(ti, unit='s', tz='UTC'):%Y-%m-%dT%H:%M:%SZ},{v:.3f}" for ti, v in zip(t, lvl)],
                 received=float(t[-1]))
    daemon.refit(rt, now=float(t[-1]))
    md = rt.model.metadata
    assert md["infer"] == "auto"
    assert any(d["name"] == "K2" and d["from"] == "S2" for d in md.get("inferred", []))


def test_scheduler_job_lines_stay_out_of_the_log_unless_very_verbose(daemon, root_logging):
    import logging

    from monitor.service.logs import setup_logging

    setup_logging(daemon.cfg, verbose=1)
    assert logging.getLogger("apscheduler").getEffectiveLevel() == logging.WARNING
    setup_logging(daemon.cfg, verbose=2)
    assert logging.getLogger("apscheduler").getEffectiveLevel() == logging.DEBUG


def test_a_window_whose_quality_control_fails_is_retried_not_passed_on(daemon, monkeypatch):
    # Samples nobody has checked must never reach the rules (design notes: samples flagged fail
    # never trigger an alert), so a QC failure fails the whole window and the next pass retries it.
    _ingest(daemon, "primary", range(0, 120))
    real = daemon.qc_records.run_station_qc

    def broken(*args, **kwargs):
        raise RuntimeError("disk hiccup")

    monkeypatch.setattr(daemon.qc_records, "run_station_qc", broken)
    daemon.process()  # the scheduler's job: logs the failure and goes on
    assert daemon.store.derived("testport", T0, T0 + 120 * 60).empty
    monkeypatch.setattr(daemon.qc_records, "run_station_qc", real)
    daemon.process()
    assert len(daemon.store.derived("testport", T0, T0 + 119 * 60)) == 120
    assert not (daemon.store.observations("testport", "primary")["flag"] == 2).any()
