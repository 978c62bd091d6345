"""A daemon killed with a message in flight: the next daemon takes the claim over at once.

Real parts: the daemon as a subprocess, killed with SIGKILL while an SMTP server on loopback
(aiosmtpd) holds the message's DATA unanswered; the SMTP timeout is ten minutes, so a claim
left to lapse would hold that recipient's later mail (the all-clear) for over forty. Delivery
stays at least once: the message in flight is sent again with the same Message-ID.
"""
from __future__ import annotations

import asyncio
import email
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import threading
import time
from email import policy
from pathlib import Path

from aiosmtpd.controller import Controller

ROOT = Path(__file__).resolve().parent.parent
START_DEADLINE = 90.0   # [s] a daemon's start and first outbox round on a loaded machine
SMTP_TIMEOUT_MIN = 10   # [min] mail.timeout: a claim lasts four times this plus a minute


class Holding:
    """aiosmtpd handler: while ``hold`` is set, a message's DATA is never answered."""

    def __init__(self):
        self.hold = threading.Event()
        self.hold.set()
        self.in_flight = threading.Event()
        self.held: list = []
        self.accepted: list = []

    async def handle_DATA(self, server, session, envelope):
        msg = email.message_from_bytes(envelope.content, policy=policy.default)
        if self.hold.is_set():
            self.held.append(msg)
            self.in_flight.set()
            while self.hold.is_set():
                await asyncio.sleep(0.05)
            return "451 4.3.0 try again later"
        self.accepted.append(msg)
        return "250 OK"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _config(tmp: Path, port: int) -> Path:
    (tmp / "gauge.csv").write_text("time,level\n")
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[daemon]
poll_seconds = 0.2
process_seconds = 0.5
outbox_seconds = 0.5
[mail]
sender = "Test gauge <gauge@testport.example>"
host = "127.0.0.1"
port = {port}
security = "none"
timeout = "{SMTP_TIMEOUT_MIN}min"
retry_first = "1s"
retry_max = "2s"
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "history"
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "gauge.csv" }}
""")
    return cfg


def _start(cfg: Path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg)], cwd=cfg.parent, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


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


def _rows(db: Path) -> list[tuple]:
    con = sqlite3.connect(db, timeout=10)
    try:
        return con.execute("SELECT id, kind, status, message_id FROM outbox ORDER BY id").fetchall()
    finally:
        con.close()


def test_a_restart_takes_over_a_message_in_flight_at_once_with_the_same_message_id(tmp_path):
    from alerts.mail.outbox import enqueue
    from monitor.store.database import Store

    handler = Holding()
    port = _free_port()
    ctl = Controller(handler, hostname="127.0.0.1", port=port)
    ctl.start()
    cfg = _config(tmp_path, port)
    db = tmp_path / "q.db"
    with Store.open(db) as store:  # an alert and its all-clear, queued for one recipient
        enqueue(store.db, ["duty@testport.example"], "raised", "The water is up.", None, "alert", "ep-1/alert")
        enqueue(store.db, ["duty@testport.example"], "all clear", "The water is down.", None, "all_clear",
                "ep-1/clear")
    proc = _start(cfg)
    try:
        _wait("the alert in flight", handler.in_flight.is_set, proc, START_DEADLINE)
        assert [r[2] for r in _rows(db)] == ["sending", "pending"]
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        handler.hold.clear()  # the server answers again (the killed session is gone)

        proc = _start(cfg)
        _wait("both messages", lambda: len(handler.accepted) >= 2, proc, START_DEADLINE)
        _wait("both recorded as sent", lambda: [r[2] for r in _rows(db)] == ["sent", "sent"], proc, START_DEADLINE)
    finally:
        handler.hold.clear()
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        ctl.stop()
    rows = _rows(db)
    assert [str(m["subject"]) for m in handler.accepted] == ["raised", "all clear"]  # in order
    assert str(handler.accepted[0]["Message-ID"]) == str(handler.held[0]["Message-ID"]) == rows[0][3]
    assert str(handler.accepted[1]["Message-ID"]) == rows[1][3]


def test_a_claim_of_a_live_process_is_left_alone(tmp_path):
    from alerts.mail.outbox import enqueue, process_identity, take_over_claims
    from monitor.store.database import Store

    with Store.open(tmp_path / "q.db") as store:
        enqueue(store.db, ["a@testport.example"], "s", "t", None, "test", "k1")
        enqueue(store.db, ["b@testport.example"], "s", "t", None, "test", "k2")
        gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                              text=True, check=True).stdout.strip()
        store.conn.execute("UPDATE outbox SET status = 'sending', claimed_until = ?, claimed_by = ? WHERE id = 1",
                           (int(time.time()) + 3600, process_identity("cli")))  # this very process: alive
        store.conn.execute("UPDATE outbox SET status = 'sending', claimed_until = ?, claimed_by = ? WHERE id = 2",
                           (int(time.time()) + 3600, f"cli:{socket.gethostname()}:{gone}:-"))  # exited
        assert take_over_claims(store.db, holds_store_lock=True) == [2]
        assert [r[0] for r in store.conn.execute("SELECT status FROM outbox ORDER BY id")] == ["sending", "pending"]
