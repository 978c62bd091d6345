"""A refit runs on the daemon's fits worker: new samples are processed while a fit is in
progress, and the new constants are taken between passes.

The fit is made to wait on an event, so "in progress" is a state the test holds, not a
length of time; every wait below is on an event (with a generous timeout, never a sleep).
"""
from __future__ import annotations

import datetime as dt
import sqlite3
import threading

import numpy as np
import pandas as pd
import pytest

from monitor.service import daemon as daemon_mod
from monitor.service.config import validate_config
from monitor.service.daemon import Daemon, ingest_lines, refit_station
from monitor.store.database import Store
from predictor.errors import FitError
from units import day, hour, minute

T0 = 1_760_000_040      # a whole minute (2025-10-09, invented record)
WAIT = 120.0            # [s] the longest any event is waited for (a loaded machine), not a pause


def _lines(t: np.ndarray) -> list[str]:
    h = (t - T0) / hour
    level = 2.0 + 1.0 * np.cos(np.radians(28.9841042 * h)) + 0.3 * np.cos(np.radians(30.0 * h - 20))
    return [f"{pd.Timestamp(ti, unit='s', tz='UTC'):%Y-%m-%dT%H:%M:%SZ},{v:.3f}" for ti, v in zip(t, level)]


@pytest.fixture
def daemon(tmp_path):
    raw = {"store": {"path": "q.db"}, "daemon": {"poll_seconds": 3600, "process_seconds": 3600},
           "stations": [{"id": "testport", "latitude": 50.0, "longitude": -4.0, "constants": "history",
                         "datums": {"chart": -1.0}, "sensors": {"primary": {}}}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == []
    store = Store.open(cfg.store_path)
    d = Daemon(cfg, store)
    t = T0 + 30 * minute * np.arange(40 * 48)          # 40 days every half hour: enough for a fit
    ingest_lines(store, cfg.stations[0].sensors["primary"], _lines(t), received=float(t[-1]))
    yield d, int(t[-1])
    store.close()


class _Spy:
    """Events of the daemon's steps: ``started`` (a fit reads the record), ``offered`` (a fit
    left new constants), ``processed`` (a pass processed samples); ``release`` lets the fit go on."""

    def __init__(self, d: Daemon, monkeypatch):
        self.started, self.release = threading.Event(), threading.Event()
        self.offered, self.processed = threading.Event(), threading.Event()
        real_fit, real_offer, real_process = daemon_mod.harmonic_fit_chunks, d._offer_model, d.process_station

        def fit(*args, **kwargs):
            self.started.set()
            if not self.release.wait(WAIT):
                raise RuntimeError("the test never released the fit")
            return real_fit(*args, **kwargs)

        def offer(*args, **kwargs):
            real_offer(*args, **kwargs)
            self.offered.set()

        def process(*args, **kwargs):
            n = real_process(*args, **kwargs)
            if n:
                self.processed.set()
            return n

        monkeypatch.setattr(daemon_mod, "harmonic_fit_chunks", fit)
        monkeypatch.setattr(d, "_offer_model", offer)
        monkeypatch.setattr(d, "process_station", process)


def _process_now(sched) -> None:
    sched.modify_job("process", next_run_time=dt.datetime.now(dt.timezone.utc))


def _derived_at(d: Daemon, t: int) -> bool:
    with sqlite3.connect(str(d.store.real_path)) as conn:   # the test's own connection
        return conn.execute("SELECT count(*) FROM derived WHERE station = 'testport' AND t = ?", (t,)).fetchone()[0] == 1


def test_new_samples_are_processed_while_a_refit_is_in_progress(daemon, monkeypatch):
    d, last = daemon
    spy = _Spy(d, monkeypatch)
    st = d.cfg.stations[0]
    sched = d.build_scheduler()
    d.scheduler = sched
    sched.start()
    try:
        assert spy.started.wait(WAIT)                      # the hourly refit job is fitting, held
        new_t = last + 30 * minute
        ingest_lines(d.store, st.sensors["primary"], _lines(np.array([new_t])), received=float(new_t))
        _process_now(sched)
        assert spy.processed.wait(WAIT)                    # the pass ran ...
        assert not spy.release.is_set() and not spy.offered.is_set()   # ... with the fit still held
        assert _derived_at(d, new_t)
        assert d.stations["testport"].model is None        # no constants yet: the pass did not wait for them

        spy.release.set()
        assert spy.offered.wait(WAIT)                      # the fit is done and left its constants
        spy.processed.clear()
        newer_t = new_t + 30 * minute
        ingest_lines(d.store, st.sensors["primary"], _lines(np.array([newer_t])), received=float(newer_t))
        _process_now(sched)
        assert spy.processed.wait(WAIT)
        rt = d.stations["testport"]
        assert rt.model is not None and rt.model_source.startswith("fit #")
    finally:
        spy.release.set()
        sched.shutdown(wait=True)
        d.scheduler = None


def test_a_fit_ends_at_its_next_chunk_once_the_daemon_stops(daemon):
    d, last = daemon
    d.stop.set()
    with pytest.raises(FitError, match="stopping"):
        refit_station(d.store, d.cfg.stations[0], now=float(last), use=True, stop=d.stop)
    assert len(d.store.fits("testport")) == 0             # nothing half-made was kept


def test_constants_left_by_a_fit_are_taken_at_the_next_pass_not_before(daemon):
    d, last = daemon
    rt = d.stations["testport"]
    with Store.open(d.store.real_path, create=False) as own:   # as the fits worker: its own connection
        d.refit(rt, now=float(last), store=own)
    assert rt.model is None and rt.new_model is not None
    d.process_station(rt, now=float(last))
    assert rt.model is not None and rt.new_model is None
    assert rt.model_source.startswith("fit #")


class _Recorder:
    """Stands in for the running scheduler: keeps the jobs added to it."""

    def __init__(self):
        self.jobs: list[tuple] = []

    def add_job(self, func, **kwargs):
        self.jobs.append((func, kwargs))


@pytest.mark.parametrize("replay", [False, True])
def test_a_first_fit_goes_to_the_fits_worker_unless_the_clock_is_replayed(daemon, replay):
    # live: the pass asks the fits worker and goes on without constants; replayed: the clock
    # outruns a fit, so it is made in the pass and the next windows use it
    d, last = daemon
    rt = d.stations["testport"]
    rt.replay_clock = replay
    d.scheduler = _Recorder()
    d._maybe_fit(rt, float(last))
    if replay:
        assert d.scheduler.jobs == [] and rt.model is not None
    else:
        (func, kwargs), = d.scheduler.jobs
        assert func == d.job_fit and kwargs["executor"] == "fits" and rt.model is None
