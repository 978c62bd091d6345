"""A store that can be rebuilt: the serial line's raw capture files and the followed file are
enough to make the store again, to the same rows and flags, after it is deleted.

Real parts: the daemon as a subprocess reading a pseudo-terminal as its serial line (the
primary) and following a file (the backup); `quaywatch ingest` rebuilding from the capture
folder and the file; the daemon run again to quality-control the rebuilt record. The record
is invented: one constituent (M2) on an invented port, one-minute samples two days back.
"""
from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from monitor.cli import main
from units import minute, hour

ROOT = Path(__file__).resolve().parent.parent
START_DEADLINE = 90.0   # [s] a daemon's start and first passes on a loaded machine
T0 = (int(time.time()) // hour - 48) * hour
N = 240  # four hours of one-minute samples

pytestmark = pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs pseudo-terminals")

CONSTANTS = 'mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n'


def _level(k: np.ndarray, offset: float = 0.0) -> np.ndarray:
    """The tide of the constants file (so the residual is small: no sample near a quality-control
    threshold, where a flag may depend on how much record there was when it was checked)."""
    import pandas as pd

    from predictor import TideModel

    model = TideModel.from_dict({"mean": 2.0, "constituents": [{"name": "M2", "amplitude": 1.0, "phase": 40.0}]})
    t = pd.to_datetime(T0 + minute * np.asarray(k), unit="s", utc=True)
    return np.asarray(model.predict(t)) + offset


def _iso(t: int) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(t)))


def _config(tmp: Path, port: str) -> Path:
    (tmp / "constants.toml").write_text(CONSTANTS)
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "data/q.db"
captures = "captures"
[daemon]
poll_seconds = 0.1
process_seconds = 0.3
idle_polls = 5
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "constants.toml"
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ time_column = 2, value_column = 3 }}
feed = {{ kind = "serial", port = "{port}", reopen_after = 0.05, reopen_max = 0.5 }}
[stations.sensors.backup]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "backup.csv" }}
""")
    return cfg


def _start(cfg: Path, *extra: str) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg), *extra], cwd=cfg.parent,
                            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)


def _query(db: Path, sql: str, *args) -> list:
    if not db.exists():
        return []
    con = sqlite3.connect(db, timeout=10)
    try:
        return con.execute(sql, args).fetchall()
    except sqlite3.OperationalError:  # tables not made yet
        return []
    finally:
        con.close()


def _wait(what: str, cond, proc: subprocess.Popen, deadline: float = START_DEADLINE) -> None:
    end = time.monotonic() + deadline
    while time.monotonic() < end:
        if cond():
            return
        if proc.poll() is not None:
            raise AssertionError(f"the daemon exited ({proc.returncode}) waiting for {what}: "
                                 f"{proc.stderr.read()[-2000:]}")
        time.sleep(0.1)
    raise AssertionError(f"no {what} within {deadline:.0f} s")


def _port_open(proc: subprocess.Popen, device: str) -> bool:
    try:
        return any(os.readlink(f"/proc/{proc.pid}/fd/{fd}") == device for fd in os.listdir(f"/proc/{proc.pid}/fd"))
    except OSError:
        return False


def _snapshot(db: Path) -> tuple[list, list]:
    obs = _query(db, "SELECT station, sensor, t, value, time_source, flag FROM observations "
                     "ORDER BY station, sensor, t")
    tests = _query(db, "SELECT * FROM qc_tests ORDER BY station, sensor, t")
    return obs, tests


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


@pytest.mark.slow
def test_deleting_the_store_and_rebuilding_it_from_captures_and_the_feed_file(tmp_path):
    master, slave = os.openpty()
    device = os.ttyname(slave)
    cfg = _config(tmp_path, device)
    db = tmp_path / "data" / "q.db"
    k = np.arange(N)
    primary = [f"QW1,{_iso(T0 + minute * i)},{v:.3f}\r\n".encode() for i, v in zip(k, _level(k))]
    primary.insert(100, b"QW1,garbage,\xff\xfe\r\n")  # a line the parser rejects, captured all the same
    primary.append(b"QW1,,2.100\r\n")                  # no time: the time it was read is used
    (tmp_path / "backup.csv").write_text("time,level\n" + "".join(
        f"{_iso(T0 + minute * i)},{v:.3f}\n" for i, v in zip(k, _level(k, 0.01))))
    proc = _start(cfg)
    try:
        _wait("the daemon to open the serial line", lambda: _port_open(proc, device), proc)
        for part in (primary[:80], primary[80:160], primary[160:]):  # three deliveries
            os.write(master, b"".join(part))
            last = len(_query(db, "SELECT t FROM observations WHERE sensor = 'primary'"))
            _wait("the delivery stored", lambda: len(_query(db, "SELECT t FROM observations WHERE sensor = "
                                                                "'primary'")) > last, proc)
        _wait("every line stored", lambda: len(_query(db, "SELECT t FROM observations")) == 2 * N + 1, proc)
        received_t = _query(db, "SELECT max(t) FROM observations WHERE time_source = 'receive'")[0][0]
        _wait("processing", lambda: _query(db, "SELECT value FROM meta WHERE key = 'processed.testport'")
              == [(str(received_t),)], proc)
    finally:
        _stop(proc)
    before = _snapshot(db)
    assert len(before[0]) == 2 * N + 1 and all(f != 2 for *_, f in before[0][:-1])  # flags set

    captures = sorted((tmp_path / "captures" / "testport.primary").glob("*.capture"))
    assert captures, "no capture file"
    for p in db.parent.iterdir():  # the store is lost: file, journal, lock
        p.unlink()
    assert main(["ingest", str(cfg), "--station", "testport", "--sensor", "primary",
                 str(tmp_path / "captures" / "testport.primary")]) == 0
    assert main(["ingest", str(cfg), "--station", "testport", "--sensor", "backup",
                 str(tmp_path / "backup.csv")]) == 0
    proc = _start(cfg, "--until-exhausted")  # quality control of the rebuilt record
    try:
        proc.wait(timeout=300)
    finally:
        _stop(proc)
    assert proc.returncode == 0, proc.stderr.read()[-2000:]
    after = _snapshot(db)
    assert after[0] == before[0]  # the same rows, times, values, time sources and flags
    assert after[1] == before[1]  # the same flag of every test
    os.close(master)
    os.close(slave)
