"""`quaywatch backup` while the daemon ingests: the copy passes SQLite's integrity check and
holds every sample up to its own feed checkpoint (and none past it).

Real parts: the daemon as a subprocess following a file that a writer thread keeps
appending to; the backup taken through the command line meanwhile. Invented record.
"""
from __future__ import annotations

import calendar
import json
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from monitor.cli import main
from units import minute

ROOT = Path(__file__).resolve().parent.parent
START_DEADLINE = 90.0  # [s]
T0 = (int(time.time()) // 3600 - 72) * 3600


def _config(tmp: Path) -> Path:
    cfg = tmp / "config.toml"
    cfg.write_text("""
[store]
path = "q.db"
[daemon]
poll_seconds = 0.05
process_seconds = 0.5
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "history"
fit_min_days = 365
datums = { chart = -1.0 }
[stations.sensors.primary]
line = { header_lines = 1 }
feed = { kind = "file", path = "gauge.csv" }
""")
    return cfg


def _line(i: int) -> str:
    return f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(T0 + minute * i))},{2.0 + 0.001 * (i % 997):.3f}\n"


def _count(db: Path) -> int:
    if not db.exists():
        return 0
    con = sqlite3.connect(db, timeout=10)
    try:
        return con.execute("SELECT count(*) FROM observations").fetchone()[0]
    except sqlite3.OperationalError:
        return 0
    finally:
        con.close()


@pytest.mark.slow
def test_a_backup_during_live_ingest_is_whole_up_to_its_checkpoint(tmp_path, capsys):
    cfg = _config(tmp_path)
    feed, db = tmp_path / "gauge.csv", tmp_path / "q.db"
    feed.write_text("time,level\n" + "".join(_line(i) for i in range(500)))
    stop = threading.Event()

    def writer():  # the gauge goes on reporting, a few lines at a time
        i = 500
        while not stop.is_set() and i < 3000:
            with open(feed, "a") as fh:
                fh.write("".join(_line(j) for j in range(i, i + 5)))
            i += 5
            stop.wait(0.01)

    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg)], cwd=tmp_path, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    thread = threading.Thread(target=writer)
    try:
        end = time.monotonic() + START_DEADLINE
        while _count(db) < 500 and time.monotonic() < end and proc.poll() is None:
            time.sleep(0.05)
        assert _count(db) >= 500, "the daemon did not start ingesting"
        thread.start()
        seen = _count(db)
        end = time.monotonic() + START_DEADLINE
        while _count(db) <= seen and time.monotonic() < end:  # ingest under way
            time.sleep(0.02)
        assert main(["backup", str(cfg), str(tmp_path / "copy.db")]) == 0
        seen = _count(db)
        end = time.monotonic() + START_DEADLINE
        while _count(db) <= seen and time.monotonic() < end:  # and still under way after it
            time.sleep(0.02)
        assert _count(db) > seen
    finally:
        stop.set()
        if thread.is_alive():
            thread.join()
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    assert "integrity ok" in capsys.readouterr().out
    assert sorted(p.name for p in tmp_path.iterdir() if p.name.startswith(("copy", ".copy"))) == ["copy.db"]

    con = sqlite3.connect(tmp_path / "copy.db")
    try:
        assert con.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "delete"  # one self-contained file
        (state,) = con.execute("SELECT state FROM feed_checkpoints WHERE feed = 'testport.primary'").fetchone()
        stored = {t for (t,) in con.execute("SELECT t FROM observations WHERE station = 'testport'")}
    finally:
        con.close()
    offset = json.loads(state)["offset"]
    lines = feed.read_bytes()[:offset].decode().splitlines()[1:]  # every line up to the copy's checkpoint
    expected = {calendar.timegm(time.strptime(ln.split(",")[0], "%Y-%m-%dT%H:%M:%SZ")) for ln in lines}
    assert len(expected) > 500 and stored == expected  # all of them, and nothing past the checkpoint


def test_a_backup_never_overwrites_a_file(tmp_path, capsys):
    cfg = _config(tmp_path)
    from monitor.store.database import Store

    Store.open(tmp_path / "q.db").close()
    (tmp_path / "copy.db").write_text("keep me")
    assert main(["backup", str(cfg), str(tmp_path / "copy.db")]) == 2
    assert "already exists" in capsys.readouterr().err
    assert (tmp_path / "copy.db").read_text() == "keep me"


def test_a_backup_into_a_folder_gets_a_dated_name(tmp_path, capsys):
    cfg = _config(tmp_path)
    from monitor.store.database import Store

    Store.open(tmp_path / "q.db").close()
    (tmp_path / "backups").mkdir()
    assert main(["backup", str(cfg), str(tmp_path / "backups")]) == 0
    (made,) = (tmp_path / "backups").iterdir()
    assert made.name.startswith("q-") and made.suffix == ".db"
