"""Alert latency at many stations: a telemetry line appended to a followed file -> the
alert email accepted by a local SMTP server, through the real daemon (``quaywatch run``)
as a subprocess with the polling of ``config.example.toml`` (``[daemon]``; the daemon's
defaults without it).

The daemon follows ``QW_BENCH_STATIONS`` stations (default 500), each with a primary and a
backup file, a residual rule and a level rule, and ``QW_BENCH_HISTORY_H`` hours of
one-minute record (default 3) that it processes as it starts. Then, while every
background station gets one new line per sensor a minute (spread over the minute, as
independent gauges would send them), trial stations (kept out of the background traffic)
run alert episodes one after the other: a line over the rule's step and its follower,
then a line below and its follower. The rules wait for the spike test's verdict on a
sample, which needs the sample after it, so each latency runs from the follower's append
to the message's acceptance (the alert, then the all-clear).

Figures, with baselines measured in the same run:

- line-to-email latency: median and 95th percentile over every alert and all-clear;
- the direct path: queuing one message and delivering it to the same server in-process;
- the daemon's CPU per station-minute while the background traffic runs (user + system
  time of the process from ``/proc/PID/stat``);
- the daemon's resident memory (``VmRSS``) per station, over a one-station daemon
  started the same way (the baseline: interpreter, libraries, one station).

Targets (issue 16; non-zero exit on a miss): median line-to-email under 5 s, 95th
percentile under 10 s.

Run: ``python -m benchmarks.bench_alert_latency`` (``QW_BENCH_STATIONS``,
``QW_BENCH_HISTORY_H``, ``QW_BENCH_TRIALS`` episodes, default 10, and
``QW_BENCH_POLL=POLL,PROCESS,OUTBOX`` seconds to override the configured polling).
"""
from __future__ import annotations

import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import tomllib
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
STEP = 0.50      # [m] the residual rule's step
BELOW = 0.45     # [m] a level that clears the step (band 0.02 m)
ABOVE = 0.52     # [m] a level over the step; 5 to 7 cm from its neighbours, so quality
                 # control sees neither a spike nor a jump
SPACING = 60     # [s] sample time between lines, as from a one-minute gauge
MEDIAN_TARGET = 5.0  # [s] line-to-email, median (design notes and issue 16)
P95_TARGET = 10.0    # [s] line-to-email, 95th percentile (issue 16)
TRIAL_STATIONS = 5


class _Catcher:
    def __init__(self):
        self.got: list[tuple[float, str]] = []
        self.cond = threading.Condition()

    async def handle_DATA(self, server, session, envelope):
        import email
        from email import policy
        msg = email.message_from_bytes(envelope.content, policy=policy.default)
        with self.cond:
            self.got.append((time.time(), str(msg["Subject"])))
            self.cond.notify_all()
        return "250 OK"

    def wait_for(self, pred, since_index: int, timeout: float) -> tuple[float, str] | None:
        deadline = time.monotonic() + timeout
        with self.cond:
            while True:
                for item in self.got[since_index:]:
                    if pred(item[1]):
                        return item
                left = deadline - time.monotonic()
                if left <= 0:
                    return None
                self.cond.wait(left)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _polling() -> tuple[dict, str]:
    override = os.environ.get("QW_BENCH_POLL")  # "POLL,PROCESS,OUTBOX" seconds
    if override:
        p, q, o = (float(x) for x in override.split(","))
        return {"poll_seconds": p, "process_seconds": q, "outbox_seconds": o}, "QW_BENCH_POLL"
    example = ROOT / "config.example.toml"
    if example.exists():
        with open(example, "rb") as fh:
            d = tomllib.load(fh).get("daemon", {})
        src = str(example.name)
    else:
        d, src = {}, "daemon defaults (no config.example.toml)"
    from monitor.service.config import DaemonSettings
    base = DaemonSettings()
    out = {k: float(d.get(k, getattr(base, k))) for k in ("poll_seconds", "process_seconds", "outbox_seconds")}
    out["coalesce_seconds"] = float(d.get("coalesce_seconds", base.coalesce_seconds))
    return out, src


def _line(t: float, level: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t)) + f",{level:.3f}\n"


def _quiet(i: int) -> float:
    return 0.45 + 0.02 * ((i * 7) % 5) / 4


def _write_setup(tmp: Path, port: int, polling: dict, stations: int, history_h: float) -> tuple[Path, float]:
    """Config, constants and the history files; returns the config path and the sample
    time of the last line. The data end 90 minutes before now, so no line the benchmark
    appends runs ahead of the clock."""
    (tmp / "constants.toml").write_text(
        "# invented constants for the benchmark\nmean = 0.0\n\n"
        "[[constituents]]\nname = \"M2\"\namplitude = 0.01\nphase = 0.0\n")
    end = float(int(time.time() - 90 * 60) // SPACING * SPACING)
    n = int(history_h * 60)
    history = "time,level\n" + "".join(_line(end - SPACING * i, _quiet(i)) for i in range(n, -1, -1))
    (tmp / "feeds").mkdir()
    daemon = "".join(f"{k} = {v}\n" for k, v in polling.items())
    parts = [f"""
[store]
path = "store.sqlite"

[daemon]
{daemon}
[mail]
sender = "Bench gauge <gauge@bench.example>"
host = "127.0.0.1"
port = {port}
security = "none"
timeout = "10s"
retry_first = "1s"
retry_max = "5s"
"""]
    for k in range(stations):
        sid = f"s{k:03d}"
        for role in ("primary", "backup"):
            (tmp / "feeds" / f"{sid}.{role}.csv").write_text(history)
        parts.append(f"""
[[stations]]
id = "{sid}"
name = "Bench Quay {sid} (invented)"
latitude = 50.0
longitude = -5.0
tz = "UTC"
constants = "constants.toml"
datums = {{ chart = 0.0 }}

[stations.sensors.primary]
units = "m"
line = {{ delimiter = ",", time_column = 1, value_column = 2, time_format = "iso", header_lines = 1 }}
feed = {{ kind = "file", path = "feeds/{sid}.primary.csv" }}

[stations.sensors.backup]
units = "m"
line = {{ delimiter = ",", time_column = 1, value_column = 2, time_format = "iso", header_lines = 1 }}
feed = {{ kind = "file", path = "feeds/{sid}.backup.csv" }}

[[stations.rules]]
id = "surge"
when = "residual_above"
hold = 0
settle = 0
band = 0.02
notify = ["duty@bench.example"]
steps = [{{ name = "raised", at = {STEP} }}]

[[stations.rules]]
id = "quay"
when = "level_above"
datum = "chart"
hold = 0
band = 0.02
notify = ["duty@bench.example"]
steps = [{{ name = "quay edge", at = 5.0 }}]
""")
    path = tmp / "config.toml"
    path.write_text("".join(parts))
    return path, end


def _append(tmp: Path, sid: str, t: float, level: float) -> None:
    for role in ("primary", "backup"):
        with open(tmp / "feeds" / f"{sid}.{role}.csv", "a") as fh:
            fh.write(_line(t, level + (0.003 if role == "backup" else 0.0)))


def _direct_baseline(port: int, n: int = 20) -> float:
    import sqlite_utils

    from alerts.mail.outbox import deliver_due, enqueue, mail_settings_from
    settings, _ = mail_settings_from({"sender": "b@bench.example", "host": "127.0.0.1", "port": port,
                                      "security": "none"}, "mail")
    times = []
    with tempfile.TemporaryDirectory() as d:
        db = sqlite_utils.Database(Path(d) / "b.sqlite")
        for i in range(n):
            t0 = time.perf_counter()
            enqueue(db, ["x@bench.example"], f"direct {i}", "t", "<p>h</p>", "bench", f"k{i}")
            deliver_due(db, settings)
            times.append(time.perf_counter() - t0)
    return statistics.median(times)


def _processed(db: Path, stations: int, until: float) -> bool:
    """True once every station has ``derived`` rows up to ``until`` [Unix s]."""
    import sqlite3

    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)
        try:
            n = con.execute("SELECT count(*) FROM (SELECT station FROM derived GROUP BY station "
                            "HAVING max(t) >= ?)", [int(until)]).fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return False
    return n >= stations


def _cpu_seconds(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError("no VmRSS")


class _Daemon:
    """``quaywatch run`` on a fresh set-up, stopped with SIGTERM on exit."""

    def __init__(self, tmp: Path, config: Path):
        self.tmp = tmp
        env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        with open(tmp / "daemon.log", "w") as log:
            self.proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", str(config)], cwd=tmp,
                                         stdout=log, stderr=subprocess.STDOUT, env=env)

    def log_tail(self) -> str:
        return (self.tmp / "daemon.log").read_text()[-3000:]

    def wait_processed(self, stations: int, until: float, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the daemon exited; its log:\n{self.log_tail()}")
            if _processed(self.tmp / "store.sqlite", stations, until):
                return
            time.sleep(1.0)
        raise RuntimeError(f"the daemon did not process its history within {timeout:.0f} s; log:\n{self.log_tail()}")

    def stop(self) -> None:
        self.proc.send_signal(signal.SIGTERM)
        try:
            self.proc.wait(60)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


def _background(tmp: Path, sids: list[str], t_start: float, stop: threading.Event, lines: list[int]) -> None:
    """One new line per sensor a minute for every station in ``sids``, spread over the minute."""
    t_data = {sid: t_start for sid in sids}
    n = len(sids)
    t0 = time.monotonic()
    i = 0
    while not stop.is_set():
        k = i % n
        due = t0 + SPACING * (i // n) + SPACING * k / n
        if stop.wait(max(0.0, due - time.monotonic())):
            return
        sid = sids[k]
        t_data[sid] += SPACING
        _append(tmp, sid, t_data[sid], _quiet(int(t_data[sid] // SPACING)))
        lines[0] += 1
        i += 1


def _episodes(tmp: Path, catcher: _Catcher, sids: list[str], t_start: float, trials: int,
              wait: float, daemon: _Daemon) -> list[float]:
    latencies = []
    t_data = {sid: t_start for sid in sids}
    for i in range(trials):
        sid = sids[i % len(sids)]
        name = f"Bench Quay {sid} "
        for level, want in ((ABOVE, lambda s: "raised" in s and "all clear" not in s),
                            (BELOW, lambda s: "all clear" in s)):
            mark = len(catcher.got)
            t_data[sid] += SPACING
            _append(tmp, sid, t_data[sid], level)
            time.sleep(1.0)  # the follower comes later (here a second, on a gauge a minute)
            t_data[sid] += SPACING
            t_append = time.time()
            _append(tmp, sid, t_data[sid], level)
            got = catcher.wait_for(lambda s: name in s and want(s), mark, wait)
            if got is None:
                raise RuntimeError(f"no message within {wait:.0f} s on trial {i} ({sid}); daemon log:\n"
                                 f"{daemon.log_tail()}")
            latencies.append(got[0] - t_append)
            time.sleep(1.0)
    return latencies


def _run(polling: dict, stations: int, history_h: float, trials: int, port: int,
         catcher: _Catcher) -> dict:
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        config, t_end = _write_setup(tmp, port, polling, stations, history_h)
        started = time.monotonic()
        daemon = _Daemon(tmp, config)
        try:
            daemon.wait_processed(stations, t_end, timeout=600 + 2.0 * stations)
            ready = time.monotonic() - started
            if stations == 1:
                time.sleep(2.0)
                return {"rss": _rss_mib(daemon.proc.pid), "ready": ready}
            trial_ids = [f"s{k:03d}" for k in range(min(TRIAL_STATIONS, stations))]
            background = [f"s{k:03d}" for k in range(len(trial_ids), stations)]
            stop, lines = threading.Event(), [0]
            writer = threading.Thread(target=_background, args=(tmp, background, t_end, stop, lines), daemon=True)
            cpu0, w0 = _cpu_seconds(daemon.proc.pid), time.monotonic()
            writer.start()
            try:
                wait = 60.0 + polling["process_seconds"] + polling["outbox_seconds"]
                lat = _episodes(tmp, catcher, trial_ids, t_end, trials, wait, daemon)
                # a whole minute of background traffic at least
                stop.wait(max(0.0, SPACING - (time.monotonic() - w0)))
            finally:
                stop.set()
                writer.join()
            cpu, wall = _cpu_seconds(daemon.proc.pid) - cpu0, time.monotonic() - w0
            return {"latencies": lat, "cpu": cpu, "wall": wall, "lines": lines[0], "ready": ready,
                    "rss": _rss_mib(daemon.proc.pid), "background": len(background)}
        finally:
            daemon.stop()


def main() -> None:
    from aiosmtpd.controller import Controller

    from benchmarks.targets import Targets

    polling, src = _polling()
    stations = int(os.environ.get("QW_BENCH_STATIONS", 500))
    history_h = float(os.environ.get("QW_BENCH_HISTORY_H", 3))
    trials = int(os.environ.get("QW_BENCH_TRIALS", 10))
    port = _free_port()
    catcher = _Catcher()
    ctl = Controller(catcher, hostname="127.0.0.1", port=port)
    ctl.start()
    try:
        direct = _direct_baseline(port)
        base = _run(polling, 1, history_h, 0, port, catcher)
        big = _run(polling, stations, history_h, trials, port, catcher)
    finally:
        ctl.stop()
    lat = big["latencies"]
    med, p95 = statistics.median(lat), float(np.percentile(lat, 95))
    station_minutes = big["background"] * big["wall"] / SPACING
    print(f"alert latency: {stations} stations (primary + backup, 2 rules each), {history_h:g} h of history, "
          f"polling of {src} ({', '.join(f'{k} {v:g}' for k, v in polling.items())})")
    print(f"  history processed {big['ready']:.0f} s after the start (one station: {base['ready']:.0f} s)")
    print(f"  {len(lat)} latencies (alerts and all-clears) while {big['background']} stations sent a line a minute "
          f"({big['lines']} lines in {big['wall']:.0f} s)")
    print(f"  line-to-email median {med:.2f} s, 95th percentile {p95:.2f} s, worst {max(lat):.2f} s")
    print(f"  ratio median / direct queue-and-send ({direct * 1000:.1f} ms): {med / direct:.0f}")
    print(f"  daemon CPU {big['cpu']:.1f} s over {big['wall']:.0f} s: "
          f"{big['cpu'] / max(station_minutes, 1e-9) * 1000:.1f} ms per station-minute "
          f"({big['cpu'] / big['wall']:.2f} of a core)")
    print(f"  daemon memory {big['rss']:.0f} MiB against {base['rss']:.0f} MiB for one station: "
          f"{(big['rss'] - base['rss']) / max(stations - 1, 1):.3f} MiB per station")
    targets = Targets()
    targets.below("median line-to-email [s]", med, MEDIAN_TARGET, ".2f")
    targets.below("95th percentile line-to-email [s]", p95, P95_TARGET, ".2f")
    targets.finish()


if __name__ == "__main__":
    main()
