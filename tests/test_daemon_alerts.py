"""Alerts end to end with real parts: the daemon as a subprocess following a file, an SMTP
server on loopback (aiosmtpd). A surge held past a rule's hold sends exactly one email; a
SIGKILL mid-episode and a restart send no duplicate; the residual back below the band sends
one all-clear; a one-sample spike (QC fail) sends nothing.

The record is invented: a tide of one constituent (M2) on an invented port, plus a surge
whose shape the test chooses.
"""
from __future__ import annotations

import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from predictor import TideModel
from units import m

ROOT = Path(__file__).resolve().parent.parent

# Deadlines for a loaded 2-core machine: generous, but bounded.
# Ceilings, not waits: each wait returns as soon as its event comes.
START_DEADLINE = 180.0  # [s] a daemon's start (imports) and first processing pass
STEP_DEADLINE = 120.0   # [s] from appended lines to their processing or their email

# Data time: whole hours, two days back so no sample is ahead of the clock (QC's future check).
T0 = (int(time.time()) // 3600 - 48) * 3600
CONSTANTS = """mean = 2.0
[[constituents]]
name = "M2"
amplitude = 1.0
phase = 40.0
"""
STEP = 0.30 * m       # the rule's one step [m of residual]
SURGE = 0.50 * m      # the plateau of the surge [m]


def _lines(model, minutes, surge) -> str:
    t = T0 + 60 * np.asarray(minutes)
    level = model.predict(pd.to_datetime(t, unit="s", utc=True)) + np.asarray(surge, dtype=float)
    return "".join(f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(ti))},{v:.3f}\n" for ti, v in zip(t, level))


def _config(tmp: Path, smtp_port: int) -> Path:
    (tmp / "constants.toml").write_text(CONSTANTS)
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[daemon]
poll_seconds = 0.1
process_seconds = 0.3
outbox_seconds = 0.5
[mail]
sender = "Test gauge <gauge@testport.example>"
host = "127.0.0.1"
port = {smtp_port}
security = "none"
retry_first = "1s"
retry_max = "2s"
[[stations]]
id = "testport"
name = "Test Port (invented)"
latitude = 50.0
longitude = -4.0
constants = "constants.toml"
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "gauge.csv" }}
[[stations.rules]]
id = "surge"
when = "residual_above"
hold = "10min"
settle = "10min"
band = 0.10
notify = ["duty@testport.example"]
steps = [{{ name = "raised", at = {STEP} }}]
# No hold: a single counted sample past 0.55 m would open an episode at once. Only the
# spike goes there, and QC fails it, so this rule must stay quiet.
[[stations.rules]]
id = "instant"
when = "residual_above"
hold = "0s"
notify = ["duty@testport.example"]
steps = [{{ name = "jump", at = 0.55 }}]
""")
    return cfg


def _start(cfg: Path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg)], cwd=cfg.parent, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _processed(db: Path) -> int:
    """The daemon's processing mark [Unix s], -1 before it has one."""
    if not db.exists():
        return -1
    con = sqlite3.connect(db, timeout=10)
    try:
        row = con.execute("SELECT value FROM meta WHERE key = 'processed.testport'").fetchone()
    except sqlite3.OperationalError:
        return -1
    finally:
        con.close()
    return -1 if row is None else int(row[0])


def _waiting(db: Path) -> int:
    """Messages queued and not yet delivered."""
    con = sqlite3.connect(db, timeout=10)
    try:
        return con.execute("SELECT count(*) FROM outbox WHERE status IN ('pending', 'sending')").fetchone()[0]
    except sqlite3.OperationalError:
        return 0
    finally:
        con.close()


def _outbox(db: Path) -> list[tuple]:
    con = sqlite3.connect(db, timeout=10)
    try:
        return con.execute("SELECT kind, subject FROM outbox ORDER BY id").fetchall()
    except sqlite3.OperationalError:
        return []
    finally:
        con.close()


def _wait(what: str, cond, proc: subprocess.Popen, deadline: float) -> None:
    end = time.monotonic() + deadline
    while time.monotonic() < end:
        if cond():
            return
        if proc.poll() is not None:
            raise AssertionError(f"the daemon exited ({proc.returncode}) waiting for {what}: "
                                 f"{proc.stderr.read()[-2000:]}")
        time.sleep(0.1)
    raise AssertionError(f"no {what} within {deadline:.0f} s")


def _append(path: Path, text: str) -> None:
    with open(path, "a") as fh:
        fh.write(text)


@pytest.mark.slow
def test_one_alert_no_duplicate_after_sigkill_one_all_clear_and_no_mail_for_a_spike(tmp_path, smtp, port):
    catcher = smtp
    cfg = _config(tmp_path, port)
    model = TideModel.load(tmp_path / "constants.toml")
    db, feed = tmp_path / "q.db", tmp_path / "gauge.csv"
    last_t = lambda minutes: T0 + 60 * minutes[-1]  # noqa: E731

    # Phase A: three calm hours with a one-sample spike of +0.8 m in the middle of them.
    a = np.arange(0, 180)
    surge_a = np.where(a == 100, 0.8 * m, 0.0)
    feed.write_text("time,level\n" + _lines(model, a, surge_a))
    proc = _start(cfg)
    try:
        _wait("processing of the calm hours", lambda: _processed(db) >= last_t(a), proc, START_DEADLINE)
        assert _outbox(db) == [] and catcher.messages == []  # the spike failed QC: nothing sent

        # Phase B: the surge ramps up over an hour and stays up: past the step for over the hold.
        b = np.arange(180, 300)
        _append(feed, _lines(model, b, np.clip((b - 180) / 60, 0, 1) * SURGE))
        _wait("the alert email", lambda: len(catcher.messages) >= 1, proc, STEP_DEADLINE)
        _wait("processing of the rise", lambda: _processed(db) >= last_t(b), proc, STEP_DEADLINE)
        # The email recorded as sent before the kill. A kill between the SMTP transaction and
        # that record resends it with the same Message-ID on restart (at least once, by
        # design, alerts.mail.outbox). On a loaded machine the record can come after the
        # rise is processed, and this test is about what the rules queue after a restart.
        _wait("the alert recorded as sent", lambda: _waiting(db) == 0, proc, STEP_DEADLINE)

        # SIGKILL mid-episode, restart, and more of the same surge: no second email.
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        proc = _start(cfg)
        c = np.arange(300, 360)
        _append(feed, _lines(model, c, np.full(len(c), SURGE)))
        _wait("processing after the restart", lambda: _processed(db) >= last_t(c), proc, START_DEADLINE)

        # Phase D: the surge falls back below the band and stays there past the settle time.
        d = np.arange(360, 480)
        _append(feed, _lines(model, d, np.clip(1 - (d - 360) / 60, 0, 1) * SURGE))
        _wait("the all-clear email", lambda: len(catcher.messages) >= 2, proc, STEP_DEADLINE)
        _wait("processing of the fall", lambda: _processed(db) >= last_t(d), proc, STEP_DEADLINE)
        # every queued message delivered (a duplicate would be queued or sent by now)
        _wait("the outbox drained", lambda: _waiting(db) == 0, proc, STEP_DEADLINE)
    finally:
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()

    kinds = [k for k, _ in _outbox(db)]
    assert kinds == ["alert", "all_clear"]
    subjects = [str(msg["subject"]) for msg in catcher.messages]
    assert len(subjects) == 2, subjects
    assert "raised" in subjects[0] and "all clear" in subjects[1]
    assert not any("jump" in s for s in subjects)


# --------------------------------------------------------------------------- delivery off the processing path

def _status(db: Path) -> str | None:
    con = sqlite3.connect(db, timeout=10)
    try:
        row = con.execute("SELECT status FROM outbox ORDER BY id LIMIT 1").fetchone()
    except sqlite3.OperationalError:
        return None
    finally:
        con.close()
    return None if row is None else row[0]


def test_smtp_server_that_never_answers_does_not_hold_up_processing(tmp_path, monkeypatch):
    """In process: the daemon runs in this (main) thread; a helper appends lines while the
    outbox thread is stuck on a server that accepts the connection and never greets."""
    import threading

    from monitor.service.config import load_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store

    silent = socket.socket()
    silent.bind(("127.0.0.1", 0))
    silent.listen(8)  # the kernel completes the handshake; nobody ever reads or answers
    cfg_path = _config(tmp_path, silent.getsockname()[1])
    text = cfg_path.read_text().replace('security = "none"', 'security = "none"\ntimeout = "120s"')
    # one rule that opens on the first sample, so a message is queued straight away
    text = text.replace(f"at = {STEP} }}", "at = -5.0 }")
    cfg_path.write_text(text)
    monkeypatch.chdir(tmp_path)  # the feed's path is relative, as the subprocess tests run it
    cfg = load_config(cfg_path)
    model = TideModel.load(tmp_path / "constants.toml")
    db, feed = tmp_path / "q.db", tmp_path / "gauge.csv"
    first, later = np.arange(0, 30), np.arange(30, 60)
    feed.write_text("time,level\n" + _lines(model, first, np.zeros(len(first))))
    store = Store.open(cfg.store_path, lock=True)
    daemon = Daemon(cfg, store)
    daemon.open_feeds()
    seen: dict = {}

    def drive():
        try:
            end = time.monotonic() + START_DEADLINE
            while _status(db) != "sending" and time.monotonic() < end:
                time.sleep(0.1)
            seen["stuck"] = _status(db)
            _append(feed, _lines(model, later, np.zeros(len(later))))
            end = time.monotonic() + STEP_DEADLINE
            while _processed(db) < T0 + 60 * later[-1] and time.monotonic() < end:
                time.sleep(0.1)
            seen["processed"] = _processed(db)
            seen["status_then"] = _status(db)
        finally:
            silent.close()  # releases the stuck delivery
            daemon.stop.set()

    helper = threading.Thread(target=drive)
    helper.start()
    try:
        daemon.run()
    finally:
        helper.join()
        daemon.close_feeds()
        store.close()
    assert seen["stuck"] == "sending"                 # the delivery was waiting on the server
    assert seen["processed"] >= T0 + 60 * later[-1]   # yet the new lines were processed
    assert seen["status_then"] == "sending"           # while it was still waiting
