"""Soak: the real daemon through an accelerated week of 500 stations, watching its memory,
its open file descriptors and the store's growth.

The daemon runs as a subprocess (``quaywatch run``) following one file per station (live
``file`` feeds), with two alert rules per station and a local SMTP server (aiosmtpd) taking
the mail. The files start with two days of record, which the daemon processes as it starts
(so every path -- the 25 h of quality-control context, the clock diagnostics that want a day
of record, the forecast's range -- is warm before day one). Then this process writes the
invented week into the files a quarter of a day at a time, as fast as the daemon keeps up: after each quarter it waits until every station is
processed to its end (and the outbox has drained), then reads the daemon's resident memory
(``VmRSS`` in ``/proc/PID/status``) and open descriptors (``/proc/PID/fd``), and the
store's size in use (pages in use times page size, WAL included). Every seventh station
gets a surge on one day of the week, so alerts and all-clears flow all week.

Figures per simulated day: resident memory and descriptors after its first quarter
("start") and after its last ("end"), samples stored, the store's size and its growth per
station-day. The baseline is the first day, measured in the same run.

Targets (the design notes: cost grows with new data, never with history kept):

- resident memory at the end of each later day within 5 % of the end of the first day;
- open descriptors at the end of each later day within 5 % of the end of the first day;
- the store's growth linear in samples: each later day's growth within 15 % of their median.

Exit status non-zero on a miss (``python -m benchmarks.bench_soak``). ``QW_SOAK_STATIONS``,
``QW_SOAK_DAYS`` and ``QW_SOAK_STEP_MIN`` (sample interval, minutes) scale it down for a
quick look; the targets are stated for the defaults (500 stations, 7 days, 6 minutes).
"""
from __future__ import annotations

import os
import signal
import socket
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
STATIONS = int(os.environ.get("QW_SOAK_STATIONS", 500))
DAYS = int(os.environ.get("QW_SOAK_DAYS", 7))
STEP = 60 * int(os.environ.get("QW_SOAK_STEP_MIN", 6))  # [s] sample interval (a common tide-gauge one)
QUARTERS = 4                 # deliveries per simulated day
PRIME_DAYS = 2               # record in the files when the daemon starts
DAY = 86400
MEMORY_TARGET = 0.05         # at most 5 % growth after the first day
FD_TARGET = 0.05
LINEAR_TARGET = 0.15         # each later day's store growth within 15 % of the median day's
CATCH_UP = 900.0             # [s] longest wait for the daemon to process one quarter day
SURGE = 0.6                  # [m] the invented surge's peak

CONSTANTS = """# invented constants for the benchmark
mean = 2.5
[[constituents]]
name = "M2"
amplitude = 1.2
phase = 30.0
[[constituents]]
name = "S2"
amplitude = 0.4
phase = 60.0
"""


class _Catcher:
    def __init__(self):
        self.count = 0
        self.lock = threading.Lock()

    async def handle_DATA(self, server, session, envelope):
        with self.lock:
            self.count += 1
        return "250 OK"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _config(tmp: Path, port: int) -> Path:
    stations = []
    for k in range(STATIONS):
        stations.append(f"""
[[stations]]
id = "s{k:03d}"
latitude = 50.0
longitude = -4.0
constants = "constants.toml"
datums = {{ chart = 0.5 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "feeds/s{k:03d}.csv" }}
[stations.qc]
gap_limit = "{2 * STEP}s"
[[stations.rules]]
id = "surge"
when = "residual_above"
hold = "{2 * STEP}s"
band = 0.1
notify = ["duty@soak.example"]
steps = [{{ name = "raised", at = 0.4 }}]
[[stations.rules]]
id = "quay"
when = "level_above"
datum = "chart"
hold = "{2 * STEP}s"
band = 0.1
notify = ["harbour@soak.example"]
steps = [{{ name = "apron wet", at = 4.2 }}]
""")
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "soak.db"
[daemon]
poll_seconds = 1
process_seconds = 1
outbox_seconds = 2
[logging]
level = "warning"
[residual]
min_history_days = 1
[mail]
sender = "Soak gauge <gauge@soak.example>"
host = "127.0.0.1"
port = {port}
security = "none"
retry_first = "1s"
retry_max = "5s"
""" + "".join(stations))
    return cfg


def _write_quarter(tmp: Path, start: int, a: int, b: int, model) -> None:
    """Samples in [a, b) for every station, appended to its file."""
    import pandas as pd

    t = np.arange(a, b, STEP, dtype=np.int64)
    pred = model.predict(pd.to_datetime(t, unit="s", utc=True))
    stamps = [time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(x))) for x in t]
    for k in range(STATIONS):
        rng = np.random.default_rng(k * 100_003 + a // STEP)
        level = pred + 0.005 * rng.standard_normal(len(t))
        if k % 7 == 0:
            centre = start + (k // 7 % DAYS) * DAY + DAY // 2
            level = level + SURGE * np.exp(-(((t - centre) / 7200.0) ** 2))
        with open(tmp / "feeds" / f"s{k:03d}.csv", "a") as fh:
            fh.write("".join(f"{s},{v:.3f}\n" for s, v in zip(stamps, level)))


def _ro(db: Path) -> sqlite3.Connection:
    return sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=30.0)


def _caught_up(db: Path, end_t: int) -> bool:
    try:
        con = _ro(db)
    except sqlite3.Error:
        return False
    try:
        marks = con.execute("SELECT count(*) FROM meta WHERE key LIKE 'processed.%' AND "
                            "CAST(value AS INTEGER) >= ?", (end_t,)).fetchone()[0]
        pending = con.execute("SELECT count(*) FROM outbox WHERE status NOT IN ('sent', 'expired')").fetchone()[0]
        return marks == STATIONS and pending == 0
    except sqlite3.Error:
        return False
    finally:
        con.close()


def _wait(proc: subprocess.Popen, tmp: Path, db: Path, last: int, what: str, t0: float) -> None:
    """Until every station is processed to ``last`` and the outbox is empty."""
    while not _caught_up(db, last):
        if proc.poll() is not None:
            raise RuntimeError("the daemon exited:\n" + (tmp / "daemon.log").read_text()[-3000:])
        if time.monotonic() - t0 > CATCH_UP:
            raise RuntimeError(f"the daemon did not catch up with {what} within {CATCH_UP:.0f} s")
        time.sleep(0.5)


def _store_figures(db: Path) -> tuple[int, int]:
    """(bytes in use, samples) of the store, WAL included (pages in use x page size)."""
    con = _ro(db)
    try:
        pages = con.execute("PRAGMA page_count").fetchone()[0]
        free = con.execute("PRAGMA freelist_count").fetchone()[0]
        size = con.execute("PRAGMA page_size").fetchone()[0]
        n = con.execute("SELECT count(*) FROM observations").fetchone()[0]
    finally:
        con.close()
    return (pages - free) * size, n


def _rss_kb(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError("no VmRSS")


def _fds(pid: int) -> int:
    return len(os.listdir(f"/proc/{pid}/fd"))


def _run() -> tuple[list[dict], int, int]:
    from aiosmtpd.controller import Controller

    from predictor import TideModel

    port = _free_port()
    catcher = _Catcher()
    ctl = Controller(catcher, hostname="127.0.0.1", port=port)
    ctl.start()
    rows: list[dict] = []
    try:
        with tempfile.TemporaryDirectory() as d:
            tmp = Path(d)
            (tmp / "constants.toml").write_text(CONSTANTS)
            model = TideModel.load(tmp / "constants.toml")
            (tmp / "feeds").mkdir()
            for k in range(STATIONS):
                (tmp / "feeds" / f"s{k:03d}.csv").write_text("time,level\n")
            cfg = _config(tmp, port)
            # the week ends a day before the clock: no sample is ever ahead of it
            start = (int(time.time()) // DAY - DAYS - 1) * DAY
            env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
            with open(tmp / "daemon.log", "w") as log:
                proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", str(cfg)], cwd=tmp,
                                        stdout=log, stderr=subprocess.STDOUT, env=env)
            db = tmp / "soak.db"
            try:
                _write_quarter(tmp, start, start - PRIME_DAYS * DAY, start, model)
                _wait(proc, tmp, db, start - STEP, "the record before day one", time.monotonic())
                prime = {"day": 0, "rss_start": _rss_kb(proc.pid), "fd_start": _fds(proc.pid), "wall": 0.0}
                prime["rss_end"], prime["fd_end"] = prime["rss_start"], prime["fd_start"]
                prime["bytes"], prime["samples"] = _store_figures(db)
                rows.append(prime)
                for day in range(DAYS):
                    row = {"day": day + 1}
                    for q in range(QUARTERS):
                        a = start + day * DAY + q * DAY // QUARTERS
                        b = a + DAY // QUARTERS
                        t0 = time.monotonic()
                        _write_quarter(tmp, start, a, b, model)
                        _wait(proc, tmp, db, b - STEP, f"day {day + 1} quarter {q + 1}", t0)
                        if q == 0:
                            row["rss_start"], row["fd_start"] = _rss_kb(proc.pid), _fds(proc.pid)
                        row["wall"] = row.get("wall", 0.0) + time.monotonic() - t0
                    row["rss_end"], row["fd_end"] = _rss_kb(proc.pid), _fds(proc.pid)
                    row["bytes"], row["samples"] = _store_figures(db)
                    rows.append(row)
                    print(f"  day {day + 1}: rss {row['rss_start'] / 1024:.0f} -> {row['rss_end'] / 1024:.0f} MiB, "
                          f"fds {row['fd_start']} -> {row['fd_end']}, store {row['bytes'] / 2 ** 20:.1f} MiB, "
                          f"{row['samples']:,} samples, {row['wall']:.0f} s", flush=True)
            finally:
                proc.send_signal(signal.SIGTERM)
                try:
                    proc.wait(120)
                except subprocess.TimeoutExpired:
                    proc.kill()
                    proc.wait()
            con = sqlite3.connect(db)
            try:
                queued = con.execute("SELECT count(*) FROM outbox").fetchone()[0]
            finally:
                con.close()
    finally:
        ctl.stop()
    return rows, queued, catcher.count


def main() -> None:
    print(f"soak: {STATIONS} stations, {DAYS} simulated days at {STEP // 60}-minute samples, "
          f"{QUARTERS} deliveries a day, real daemon, file feeds, 2 rules per station, local SMTP", flush=True)
    rows, queued, received = _run()
    prime, rows = rows[0], rows[1:]
    base = rows[0]
    print(f"the record of {PRIME_DAYS} days before day one processed: RSS {prime['rss_end'] / 1024:.1f} MiB, "
          f"{prime['fd_end']} descriptors, store {prime['bytes'] / 2 ** 20:.1f} MiB")
    print(f"{'day':>3}  {'RSS start':>10}  {'RSS end':>9}  {'vs day 1':>8}  {'fds start':>9}  {'fds end':>7}  "
          f"{'vs day 1':>8}  {'store MiB':>9}  {'growth KiB/station-day':>22}  {'bytes/sample':>12}  {'wall s':>6}")
    prev_bytes, prev_n = prime["bytes"], prime["samples"]
    growth = []
    for r in rows:
        g = r["bytes"] - prev_bytes
        per_sample = g / max(1, r["samples"] - prev_n)
        if r["day"] > 1:
            growth.append(g)
        print(f"{r['day']:>3}  {r['rss_start'] / 1024:>8.1f}M  {r['rss_end'] / 1024:>7.1f}M  "
              f"{r['rss_end'] / base['rss_end']:>8.3f}  {r['fd_start']:>9}  {r['fd_end']:>7}  "
              f"{r['fd_end'] / base['fd_end']:>8.3f}  {r['bytes'] / 2 ** 20:>9.1f}  "
              f"{g / 1024 / STATIONS:>22.1f}  {per_sample:>12.1f}  {r['wall']:>6.0f}")
        prev_bytes, prev_n = r["bytes"], r["samples"]
    later = rows[1:]
    rss_growth = max((r["rss_end"] / base["rss_end"] - 1 for r in later), default=0.0)
    fd_growth = max((r["fd_end"] / base["fd_end"] - 1 for r in later), default=0.0)
    med = statistics.median(growth) if growth else 0.0
    spread = max((abs(g / med - 1) for g in growth), default=0.0) if med else float("inf")
    ok_mem, ok_fd, ok_lin = rss_growth <= MEMORY_TARGET, fd_growth <= FD_TARGET, spread <= LINEAR_TARGET
    ok_mail = received >= queued
    print(f"memory: largest growth after day 1 {rss_growth:+.1%} (target <= {MEMORY_TARGET:.0%}): "
          f"{'PASS' if ok_mem else 'FAIL'}")
    print(f"descriptors: largest growth after day 1 {fd_growth:+.1%} (target <= {FD_TARGET:.0%}): "
          f"{'PASS' if ok_fd else 'FAIL'}")
    print(f"store: daily growth of days 2-{DAYS} within {spread:.1%} of their median "
          f"({med / STATIONS / 1024:.1f} KiB per station-day; target <= {LINEAR_TARGET:.0%}): "
          f"{'PASS' if ok_lin else 'FAIL'}")
    print(f"mail: {queued} messages queued, {received} accepted by the local server: "
          f"{'PASS' if ok_mail else 'FAIL'}")
    if not (ok_mem and ok_fd and ok_lin and ok_mail):
        raise RuntimeError("soak: a target was missed")


if __name__ == "__main__":
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    try:
        main()
    except RuntimeError as exc:
        print(exc, file=sys.stderr)
        sys.exit(1)
