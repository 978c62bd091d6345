"""Fixtures shared by the tests: a fresh store, a fresh database, and an SMTP server on loopback.

- ``store``: a new :class:`monitor.store.database.Store` in the test's folder (schema current).
- ``db``: a new ``sqlite_utils.Database`` file in WAL mode, for the alerts package (which never
  sees a Store).
- ``port``: a free TCP port on 127.0.0.1.
- ``smtp``: an :class:`SmtpCollector` listening on ``port`` (aiosmtpd), stopped after the test.
- ``smtp_server``: a function starting a collector (or another aiosmtpd handler) on a port,
  stopped after the test, for tests that bring a server up part-way through.
- ``records_station``: eight invented years of hourly levels ingested into a store, every
  sample marked as passed by quality control (the extremes verb's tests).
Named units for tolerances are in ``tests/units.py``.
"""
from __future__ import annotations

import email
import io
import logging
import os
import shutil
import socket
import sqlite3
from email import policy
from pathlib import Path

import pytest
import sqlite_utils
from aiosmtpd.controller import Controller

from monitor.cli import main as cli
from monitor.demo_decades import STATION, write_inputs
from monitor.service.config import validate_config
from monitor.service.daemon import Daemon
from monitor.service import logs as service_logs
from monitor.service.logs import RepeatFilter, log_formatter
from monitor.store.database import Store
from tests.old_store import load_old_store
from tests.units import minute


class SmtpCollector:
    """aiosmtpd handler keeping every accepted message.

    ``messages`` holds the parsed messages in arrival order; ``envelopes`` the same messages
    as ``(recipients, message)`` with the envelope's recipients.
    """

    def __init__(self):
        self.messages: list = []
        self.envelopes: list = []
        self.port: int | None = None

    async def handle_DATA(self, server, session, envelope):
        msg = email.message_from_bytes(envelope.content, policy=policy.default)
        self.envelopes.append((tuple(envelope.rcpt_tos), msg))
        self.messages.append(msg)
        return "250 OK"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on (now)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture
def port() -> int:
    return free_port()


@pytest.fixture
def smtp_server():
    """``start(port, handler=None, **controller_options) -> handler``: an aiosmtpd server on
    127.0.0.1 (an SmtpCollector unless a handler is given), stopped when the test ends."""
    running = []

    def start(port: int, handler=None, **options):
        handler = SmtpCollector() if handler is None else handler
        ctl = Controller(handler, hostname="127.0.0.1", port=port, **options)
        ctl.start()
        running.append(ctl)
        if isinstance(handler, SmtpCollector):
            handler.port = port
        return handler

    yield start
    for ctl in running:
        ctl.stop()


@pytest.fixture
def smtp(smtp_server, port) -> SmtpCollector:
    return smtp_server(port)


@pytest.fixture
def store(tmp_path):
    with Store.open(tmp_path / "store.sqlite") as s:
        yield s


@pytest.fixture
def daemon(tmp_path):
    """A daemon over a fresh store with one station, ``testport`` (primary and backup, its
    constants to be fitted from its own history), no feeds."""
    raw = {"store": {"path": "q.db"},
           "stations": [{"id": "testport", "latitude": 50.0, "longitude": -4.0, "constants": "history",
                         "datums": {"chart": -1.0},
                         "sensors": {"primary": {}, "backup": {}}}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == []
    store = Store.open(cfg.store_path)
    yield Daemon(cfg, store)
    store.close()


class Clock:
    """A clock the test moves: ``clock.t`` [s]."""

    def __init__(self, t: float = 1_790_000_000.0):
        self.t = t

    def __call__(self) -> float:
        return self.t


@pytest.fixture
def logged():
    """A logger of its own writing to a text buffer through a RepeatFilter on a test clock."""
    clock, out = Clock(), io.StringIO()
    handler = logging.StreamHandler(out)
    handler.setFormatter(log_formatter())
    handler.addFilter(RepeatFilter(every_s=10 * minute, clock=clock, wall=clock))
    logger = logging.getLogger("qw.test.repeats")
    logger.propagate, logger.level = False, logging.DEBUG
    logger.addHandler(handler)
    yield logger, clock, out
    logger.removeHandler(handler)


@pytest.fixture
def old_store(tmp_path) -> Path:
    """A store made before issue 13 (schema version 2), not yet opened (tests/old_store.py)."""
    return load_old_store(tmp_path / "old.db")


@pytest.fixture(autouse=True)
def _repeat_filter_given_back():
    """No test leaves the daemon's repeat filter set for the tests after it (a daemon
    there would log old counts into their logs): use ``root_logging`` to set up logging."""
    before = service_logs._ACTIVE
    yield
    assert service_logs._ACTIVE is before, "a test left monitor.service.logs._ACTIVE set"


@pytest.fixture
def root_logging(monkeypatch):
    """The root logger's level, handlers and each handler's filters, and the repeat filter
    the daemon reports from, as they were, after the test (``setup_logging`` changes them
    all; a filter left on pytest's own handlers would hide lines from the tests after it,
    and one left for ``report_quiet_repeats`` would log its counts into them). Yields the
    root logger."""
    monkeypatch.setattr(service_logs, "_ACTIVE", service_logs._ACTIVE)
    root = logging.getLogger()
    aps = logging.getLogger("apscheduler")
    kept = (root.level, aps.level, [(h, list(h.filters)) for h in root.handlers])
    try:
        yield root
    finally:
        for h in root.handlers:
            if h not in [k for k, _ in kept[2]]:
                h.close()
        root.setLevel(kept[0])
        aps.setLevel(kept[1])
        root.handlers[:] = [h for h, _ in kept[2]]
        for h, filters in kept[2]:
            h.filters[:] = filters


@pytest.fixture
def db(tmp_path):
    d = sqlite_utils.Database(tmp_path / "store.sqlite")
    d.enable_wal()
    return d


@pytest.fixture(scope="module")
def records_station(tmp_path_factory):
    """Eight invented years of hourly levels (sample_feeds/decades.py, fixed seed; a datum step
    in the middle) ingested through the command line into a fresh store, every sample then
    marked as having passed quality control (flag 1), as the daemon's QC would leave a calm
    record. Returns (config path, truth dict, store path)."""
    out = tmp_path_factory.mktemp("records")
    truth = write_inputs(out, years=8, truth_levels=False, start_year=2015)
    assert cli(["ingest", str(out / "config.toml"), "--station", STATION, str(out / "history.csv")]) == 0
    db = out / "records.db"
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE observations SET flag = 1")
    with sqlite3.connect(db) as conn:       # into the main file, so a copy of it is whole
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    return out / "config.toml", truth, db



# ---------------------------------------------------------------- headless Chromium
CHROMIUM = "/usr/bin/chromium"   # Debian's package; never `playwright install`
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]


def _need_chromium() -> None:
    """Skip without Chromium, but fail in CI (which installs it)."""
    if Path(CHROMIUM).exists() and shutil.which(CHROMIUM):
        return
    message = f"headless Chromium not found at {CHROMIUM} (Debian package 'chromium')"
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture(scope="module")
def browser():
    """Headless Chromium driven by Python playwright, one per test module."""
    _need_chromium()
    sync_api = pytest.importorskip("playwright.sync_api")
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield b
        b.close()


@pytest.fixture
def m2_stations(tmp_path):
    """Make a validated configuration of invented stations beside a one-constituent constants
    file (M2 1 m, mean 2 m) with a residual rule each that the tests' water never reaches:
    ``m2_stations(ids, sensors=("primary",), daemon={...}, qc={...}, folder=None)``; ``folder``
    (made if missing): where the constants and the store go, for several stores in one test
    (default the test's folder)."""
    def make(ids, sensors=("primary",), daemon=None, qc=None, folder=None):
        base = tmp_path if folder is None else Path(folder)
        base.mkdir(parents=True, exist_ok=True)
        (base / "c.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
        rule = {"id": "surge", "when": "residual_above", "hold": 0, "notify": ["duty@port.example"],
                "steps": [{"name": "raised", "at": 5.0}]}
        stations = [{"id": sid, "latitude": 50.0, "longitude": -4.0, "constants": "c.toml", "datums": {"chart": 0.0},
                     "sensors": {s: {} for s in sensors}, "rules": [rule], **({"qc": qc} if qc else {})}
                    for sid in ids]
        cfg, errors = validate_config({"store": {"path": "q.db"}, "daemon": daemon or {}, "stations": stations},
                                      base)
        assert errors == []
        return cfg
    return make
