"""The demo: a storm at the invented port of Port Dunmerrow, end to end, in one command.

``python -m monitor.demo`` (``make demo``):

1. fits harmonic constants to 190 days of history (``quaywatch fit``) and loads the last
   five weeks of it into the store (``quaywatch ingest``), so the high water forecast has
   a residual history for its uncertainty;
2. starts a local SMTP server on loopback that keeps every message as
   ``demo-output/mail/NNN-*.eml``;
3. runs the real daemon (``quaywatch run --until-exhausted``, a subprocess) on the storm
   week through its replay feeds;
4. writes a report for each local day (``quaywatch report``) under ``demo-output/reports/``
   and the technician's quality-control summary (``quaywatch qc``) as ``demo-output/qc.txt``;
5. prints a summary: the surge peak, the alerts sent and cleared, the faults that quality
   control found, the backup's drift and clock, whether every email and report carries the
   caution, and the paths to open.

Everything goes under ``demo-output/``, removed and made again on each run. The scenario is
in ``sample_feeds/`` (made by ``sample_feeds/generate.py``) and ``demo/``. ``--short`` (or
``QUAYWATCH_DEMO_SHORT=1``) replays only the days around the storm and writes the storm
day's report only, for tests; ``--speedup 0`` replays as fast as the daemon reads.

All of it is an automated, unofficial aid: official warnings and the local emergency
authorities come first.
"""
from __future__ import annotations

import argparse
import datetime as dt
import email
import email.policy
import json
import os
import re
import shutil
import socket
import sqlite3
import subprocess
import sys
import threading
import time
import tomllib
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

import pandas as pd
import tomli_w
from aiosmtpd.controller import Controller

from monitor.cli import build_parser
from monitor.quality import checks as qc
from monitor.quality.diagnostics import clock_episodes
from monitor.quality.diagnostics import sensor_drift
from monitor.quality.diagnostics import sensor_timing
from predictor import harmonic_fit
from predictor.caution import CAUTION, comment_lines

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "sample_feeds"
DEMO = ROOT / "demo"
DEFAULT_OUT = ROOT / "demo-output"


# The storm-week files and where each one's time sits: (file, header lines, time field).
FEED_FILES = {
    "primary": ("storm/primary.csv", 1, lambda line: line.split(",", 1)[0]),
    "backup": ("storm/backup.txt", 0, lambda line: line.split()[2]),
    "barometer": ("storm/barometer.csv", 1, lambda line: line.split(",", 1)[0]),
}


class DemoError(Exception):
    """A step of the demo failed; the message says which and where to look."""


# --------------------------------------------------------------------------- scenario files


def load_truth(samples: Path = SAMPLES) -> dict:
    """The injected scenario (``sample_feeds/truth.json``)."""
    with open(samples / "truth.json") as fh:
        return json.load(fh)


def parse_utc(text: str) -> dt.datetime:
    """An ISO 8601 time with ``Z`` (extended or basic format) as an aware UTC datetime."""
    return dt.datetime.fromisoformat(text).astimezone(dt.timezone.utc)


def replay_window(truth: dict, short: bool) -> tuple[dt.datetime, dt.datetime]:
    """Start (inclusive) and end (exclusive) of the storm-week span to replay [UTC]."""
    key = "short_window" if short else "storm_week"
    start = parse_utc(truth[key]["start"])
    end = parse_utc(truth[key]["end"]) + dt.timedelta(minutes=1)
    return start, end


def trim_feed(src: Path, dst: Path, header_lines: int, time_of, start: dt.datetime,
              end: dt.datetime) -> int:
    """Copy the lines of ``src`` whose time lies in [start, end) to ``dst``; returns their count.

    Header lines are kept as they are; the files are in time order.
    """
    n = 0
    with open(src) as fin, open(dst, "w", newline="\n") as fout:
        for i, line in enumerate(fin):
            if i < header_lines:
                fout.write(line)
                continue
            t = parse_utc(time_of(line.strip()))
            if start <= t < end:
                fout.write(line)
                n += 1
    return n


# --------------------------------------------------------------------------- mail catcher


@dataclass
class CaughtMail:
    """One message the loopback server took: where it was saved and its headers."""

    path: Path
    subject: str
    recipients: list[str]


class MailCatcher:
    """An SMTP server on loopback that keeps every message as ``NNN-subject.eml``.

    It runs aiosmtpd's threaded controller in this process; ``port`` is picked free.
    """

    def __init__(self, folder: Path):
        self.folder = folder
        self.folder.mkdir(parents=True, exist_ok=True)
        self.caught: list[CaughtMail] = []
        self._lock = threading.Lock()
        self.controller = None
        self.port = 0

    async def handle_DATA(self, server, session, envelope):  # aiosmtpd handler hook
        content = envelope.original_content or envelope.content
        if isinstance(content, str):
            content = content.encode("utf-8")
        msg = email.message_from_bytes(content, policy=email.policy.default)
        subject = " ".join(str(msg.get("Subject", "") or "").split())
        with self._lock:
            n = len(self.caught) + 1
            slug = re.sub(r"[^a-z0-9]+", "-", subject.lower()).strip("-")[:60] or "message"
            path = self.folder / f"{n:03d}-{slug}.eml"
            path.write_bytes(content)
            self.caught.append(CaughtMail(path, subject, list(envelope.rcpt_tos)))
        return "250 Message accepted for delivery"

    def start(self) -> int:
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.controller = Controller(self, hostname="127.0.0.1", port=self.port)
        self.controller.start()
        return self.port

    def stop(self) -> None:
        if self.controller is not None:
            self.controller.stop()
            self.controller = None


# --------------------------------------------------------------------------- steps


def quaywatch(args: list[str], log: Path | None = None, timeout: float = 600,
              cwd: Path | None = None) -> subprocess.CompletedProcess:
    """Run ``quaywatch ARGS`` with this interpreter; output to ``log`` (appended) or captured."""
    cmd = [sys.executable, "-m", "monitor", *args]
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    if log is None:
        return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, cwd=cwd, env=env)
    with open(log, "a") as fh:
        fh.write(f"\n$ quaywatch {' '.join(args)}\n")
        fh.flush()
        return subprocess.run(cmd, stdout=fh, stderr=subprocess.STDOUT, text=True, timeout=timeout,
                              cwd=cwd, env=env)


def _has_verb(verb: str) -> bool:
    sub = next(a for a in build_parser()._actions if a.dest == "verb")
    return verb in sub.choices


def fit_constants(history: Path, out: Path, log: Path) -> dict:
    """Fit constants to the history with ``quaywatch fit``; returns its JSON summary.

    Where the ``fit`` verb is not installed, ``predictor.harmonic_fit`` is called directly.
    The invented port's tide (demo/port.toml) has no minor lines such as NU2 beside N2, which
    every real sea has and which ``fit`` by default infers when the record cannot resolve them
    (190 days do not separate NU2 from N2): here there is nothing to infer, so the demo fits
    only what the record resolves (``--infer none``). Inferring NU2 into this sea would raise
    the storm week's tide error from 1.0 to 2.5 cm RMS. A real port's record keeps the default.
    """
    if not _has_verb("fit"):
        df = pd.read_csv(history)
        model = harmonic_fit(pd.DatetimeIndex(pd.to_datetime(df["time"], utc=True)), df["level"].to_numpy(),
                             infer=None)
        model.save(out)
        return {"mean": model.mean}
    # the history is on the station datum, and the constants file says so
    res = quaywatch(["fit", str(history), "-o", str(out), "--json", "--infer", "none", "--datum", "station"])
    with open(log, "a") as fh:
        fh.write(f"$ quaywatch fit {history} -o {out} --json --infer none --datum station\n{res.stderr}")
    if res.returncode != 0:
        raise DemoError(f"quaywatch fit failed (exit {res.returncode}): {res.stderr.strip()[-500:]}")
    try:
        return json.loads(res.stdout)
    except json.JSONDecodeError:
        return {}


def ingest_history(history: Path, config: Path, port: dict, before: dt.datetime, log: Path,
                   days: float = 35) -> None:
    """Put the last ``days`` of history before ``before`` into the store as primary samples.

    The history file is on the station datum; the primary's line format adds the sensor's
    zero, so the lines are written as the sensor would send them. Five weeks give the high
    water forecast the residual history it needs for its uncertainty (``min_history_days``).
    """
    zero = port["datums"]["primary_sensor_zero"]
    since = before - dt.timedelta(days=days)
    path = config.parent / "feeds" / "history-primary.csv"
    with open(history) as fin, open(path, "w", newline="\n") as fout:
        fout.write(fin.readline())
        for line in fin:
            t, level = line.strip().split(",")
            if since <= parse_utc(t) < before:
                fout.write(f"{t},{float(level) - zero:.3f}\n")
    res = quaywatch(["ingest", str(config), "--station", port["port"]["station"], "--sensor", "primary",
                     str(path)], log=log, cwd=config.parent)
    if res.returncode != 0:
        raise DemoError(f"quaywatch ingest failed (exit {res.returncode}); see {log}")


def write_config(template: Path, out_dir: Path, smtp_port: int, feeds: dict[str, Path],
                 constants: Path, speedup: float | None = None, daemon_reports: bool = True) -> Path:
    """The daemon's configuration: the demo template with this run's port, feeds and constants."""
    with open(template, "rb") as fh:
        cfg = tomllib.load(fh)
    cfg["mail"]["port"] = smtp_port
    if not daemon_reports:
        # Without a [reports] table the daemon writes no scheduled reports; 'quaywatch report'
        # still writes to the default folder, reports/ beside the configuration.
        cfg.pop("reports", None)
    station = cfg["stations"][0]
    station["constants"] = str(constants.relative_to(out_dir))
    for role, path in feeds.items():
        station["sensors"][role]["feed"]["path"] = str(path.relative_to(out_dir))
        if speedup is not None:
            station["sensors"][role]["feed"]["speedup"] = speedup
    path = out_dir / "config.toml"
    header = "# Written by python -m monitor.demo from demo/config.toml for this run.\n" + comment_lines()
    path.write_text(header + tomli_w.dumps(cfg))
    return path


def run_daemon(config: Path, log: Path, timeout: float, progress=None, every: float = 5.0) -> None:
    """Run ``quaywatch run CONFIG`` until its replay feeds are exhausted; ``progress()`` is
    called every ``every`` seconds while it runs (a line on how far the replay has got)."""
    cmd = [sys.executable, "-m", "monitor", "run", str(config), "--until-exhausted"]
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    deadline = time.monotonic() + timeout
    with open(log, "a") as fh:
        fh.write(f"\n$ quaywatch run {config} --until-exhausted\n")
        fh.flush()
        proc = subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, cwd=config.parent, env=env)
        while True:
            try:
                code = proc.wait(timeout=max(0.1, min(every, deadline - time.monotonic())))
                break
            except subprocess.TimeoutExpired:
                if time.monotonic() >= deadline:
                    proc.kill()
                    proc.wait()
                    raise DemoError(f"the daemon did not finish within {timeout:.0f} s; see {log}") from None
                if progress is not None:
                    progress()
    if code != 0:
        raise DemoError(f"the daemon exited with {code}; see {log}")


def replay_progress(store: Path, station: str, start: dt.datetime, end: dt.datetime, tz: str,
                    emails: int) -> str | None:
    """``replayed to Thu 23 Oct 14:00 IST, 45 % of the span; 3 emails so far``, from the
    store's latest primary sample (read-only), or None while there is none."""
    try:
        con = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=1.0)
        try:
            row = con.execute("SELECT MAX(t) FROM observations WHERE station = ? AND sensor = 'primary' "
                              "AND t >= ?", (station, int(start.timestamp()))).fetchone()
        finally:
            con.close()
    except sqlite3.Error:
        return None
    if not row or row[0] is None:
        return None
    t = int(row[0])
    share = (t - start.timestamp()) / max(1.0, (end - start).total_seconds())
    when = dt.datetime.fromtimestamp(t, dt.timezone.utc).astimezone(ZoneInfo(tz)).strftime("%a %d %b %H:%M %Z")
    return (f"replayed to {when}, {100 * min(1.0, max(0.0, share)):.0f} % of the span; "
            f"{emails} email{'s' if emails != 1 else ''} so far")


def local_days(start: dt.datetime, end: dt.datetime, tz: str) -> list[dt.date]:
    """The station's local dates touched by [start, end)."""
    zone = ZoneInfo(tz)
    first = start.astimezone(zone).date()
    last = (end - dt.timedelta(seconds=1)).astimezone(zone).date()
    return [first + dt.timedelta(days=i) for i in range((last - first).days + 1)]


def write_reports(config: Path, station: str, days: list[dt.date], log: Path) -> None:
    """One report per local day with ``quaywatch report``, two at a time."""
    def one(day: dt.date) -> tuple[dt.date, subprocess.CompletedProcess]:
        return day, quaywatch(["report", str(config), "--station", station, "--day", day.isoformat()],
                              cwd=config.parent)

    # Two at a time: the index page is rewritten by each, so the last one runs alone.
    with ThreadPoolExecutor(2) as pool:
        done = list(pool.map(one, days[:-1]))
    done += [one(days[-1])]
    with open(log, "a") as fh:
        for day, res in done:
            fh.write(f"\n$ quaywatch report {config} --station {station} --day {day}\n{res.stdout}{res.stderr}")
    for day, res in done:
        if res.returncode != 0:
            raise DemoError(f"quaywatch report for {day} failed (exit {res.returncode}); see {log}")


# --------------------------------------------------------------------------- technician checks


def technician_checks(store: Path, station: str, start: dt.datetime, end: dt.datetime) -> dict:
    """Drift and timing of the backup against the primary in [start, end), from usable samples."""
    con = sqlite3.connect(f"file:{store}?mode=ro", uri=True)

    def series(sensor: str, flags: tuple[int, ...]) -> pd.Series:
        q = (f"select t, value from observations where station=? and sensor=? and t >= ? and t < ? "
             f"and flag in ({','.join('?' * len(flags))}) order by t")
        df = pd.read_sql_query(q, con, params=(station, sensor, int(start.timestamp()), int(end.timestamp()),
                                               *flags))
        return pd.Series(df["value"].to_numpy(), index=pd.to_datetime(df["t"], unit="s", utc=True))

    try:
        # Pass and not-evaluated only: a stuck spell is suspect for its first hour.
        primary = series("primary", (1, 2))
        backup = series("backup", (1, 2, 3))
    finally:
        con.close()
    if primary.empty or backup.empty:
        return {}
    drift = sensor_drift(primary, backup)
    timing = sensor_timing(primary, backup)
    return {"drift": drift, "timing": timing, "clock": clock_episodes(timing)}


# --------------------------------------------------------------------------- summary


def _local(t, tz: str) -> str:
    when = pd.Timestamp(t, unit="s", tz="UTC") if isinstance(t, (int, float)) else pd.Timestamp(t)
    return when.tz_convert(tz).strftime("%a %d %b %H:%M %Z")


def _until(a, b, tz: str) -> str:
    """The end of a span: its time alone on the same local day, else in full."""
    la, lb = _local(a, tz), _local(b, tz)
    return lb[-9:].strip() if la[:10] == lb[:10] else lb


@dataclass
class Summary:
    """What the demo found, read back from the store, the mail folder and the reports.

    Times are UTC pandas Timestamps; levels metres on chart datum; residuals metres.
    """

    highest: tuple | None = None              # (time, level above chart datum)
    surge_peak: tuple | None = None           # (time, smoothed residual)
    surge_at_highest: float | None = None     # smoothed residual at the highest water
    episodes: list[dict] = field(default_factory=list)
    mail: list[CaughtMail] = field(default_factory=list)
    reports: list[Path] = field(default_factory=list)
    spikes: list = field(default_factory=list)        # times of samples failed by the spike test
    flat: list[tuple] = field(default_factory=list)   # (start, end) of flat-line runs
    gaps: list[tuple] = field(default_factory=list)   # (last sample before, first after)
    multi: int = 0                                    # samples the two sensors disagree on
    drift: dict = field(default_factory=dict)         # primary - backup, from sensor_drift
    clock: list[dict] = field(default_factory=list)   # spans where the backup's clock is off
    caution_missing: list[Path] = field(default_factory=list)
    # the storm's high water: (predicted time, came [m, chart datum], [(lead h, forecast, lower, upper, method)])
    storm_hw: tuple | None = None
    # the quay rule's all-clear: held at, its held high water [t], sent at, the range's top then [m, chart datum]
    quay_clear: dict = field(default_factory=dict)
    boards_out: float | None = None                   # the operator's boards-out level [m, chart datum]


CAUTION_WORDS = ("unofficial", "official warnings")


def _has_caution(text: str) -> bool:
    low = " ".join(text.lower().split())
    return all(w in low for w in CAUTION_WORDS)


def read_summary(out: Path, station: str, chart: float, mail: list[CaughtMail],
                 start: dt.datetime, end: dt.datetime) -> Summary:
    """Read what the run produced in [start, end): peaks, episodes and quality-control findings."""
    store = out / "quaywatch.db"
    s = Summary(mail=list(mail), reports=sorted((out / "reports").rglob("*.html")))
    for m in s.mail:
        msg = email.message_from_bytes(m.path.read_bytes(), policy=email.policy.default)
        texts = [part.get_content() for part in msg.walk() if part.get_content_maintype() == "text"]
        if not _has_caution(" ".join(texts)):
            s.caution_missing.append(m.path)
    for r in s.reports:
        if r.name != "index.html" and not _has_caution(r.read_text(errors="replace")):
            s.caution_missing.append(r)
    if not store.exists():
        return s
    con = sqlite3.connect(f"file:{store}?mode=ro", uri=True)
    con.row_factory = sqlite3.Row
    try:
        def frame(sql: str, *params) -> pd.DataFrame:
            df = pd.read_sql_query(sql, con, params=params)
            if "t" in df:
                df.index = pd.to_datetime(df.pop("t"), unit="s", utc=True)
            return df

        t0, t1 = int(start.timestamp()), int(end.timestamp())
        obs = frame("select t, value, flag from observations where station=? and sensor='primary' "
                    "and t >= ? and t < ? order by t", station, t0, t1)
        good = obs[~obs["flag"].isin((4, 9))]
        der = frame("select t, smoothed from derived where station=? and t >= ? and t < ? order by t",
                    station, t0, t1)
        if len(good):
            t = good["value"].idxmax()
            s.highest = (t, float(good.loc[t, "value"]) - chart)
            sm = der["smoothed"].dropna()
            if len(sm):
                s.surge_peak = (sm.idxmax(), float(sm.max()))
                near = sm[(sm.index >= t - pd.Timedelta("5min")) & (sm.index <= t + pd.Timedelta("5min"))]
                s.surge_at_highest = float(near.mean()) if len(near) else None
        s.episodes = [dict(r) for r in con.execute(
            "select * from alert_episodes where station=? order by opened_at", (station,))] \
            if _table(con, "alert_episodes") else []
        if _table(con, "qc_tests"):
            tests = frame("select t, spike, flat, multi from qc_tests where station=? and sensor='primary' "
                          "and t >= ? and t < ? order by t", station, t0, t1)
            s.spikes = list(tests.index[tests["spike"] == qc.FAIL])
            fl = qc.episodes(tests["flat"], at_least=qc.SUSPECT)
            s.flat = sorted(zip(fl["start"], fl["end"]))
            s.multi = int((tests["multi"] == qc.SUSPECT).sum())
        gaps = qc.find_gaps(obs.index, 300.0)
        s.gaps = list(zip(gaps["start"], gaps["end"]))
        if _table(con, "hw_forecast_log") and s.highest:
            s.storm_hw, s.quay_clear = _forecast_story(con, station, chart, s.highest[0], s.episodes)
    finally:
        con.close()
    checks = technician_checks(store, station, start, end)
    s.drift = checks.get("drift", {})
    s.clock = checks.get("clock", [])
    return s


def _forecast_story(con, station: str, chart: float, highest, episodes: list[dict]) -> tuple:
    """What was forecast for the storm's high water 6, 3 and 1 h before (the last forecast issued
    at or before each, from the daemon's forecast log) and how the quay's all-clear waited."""
    log = pd.read_sql_query("select made_t, hw_t, forecast, lower, upper, method from hw_forecast_log "
                            "where station = ?", con, params=(station,))
    ss = pd.read_sql_query("select hw_t, observed_high from skew_surges where station = ?", con, params=(station,))
    t_high = int(highest.timestamp())
    storm = None
    if len(ss):
        row = ss.iloc[int((ss["hw_t"] - t_high).abs().idxmin())]
        hw_t = int(row["hw_t"])
        mine = log[(log["hw_t"] - hw_t).abs() <= 300]
        leads = []
        for lead in (6, 3, 1):
            target = hw_t - lead * 3600
            near = mine[(mine["made_t"] <= target) & (mine["made_t"] > target - 3600)]
            if len(near):
                f = near.loc[near["made_t"].idxmax()]
                leads.append((lead, f["forecast"] - chart, f["lower"] - chart, f["upper"] - chart, f["method"]))
        storm = (hw_t, float(row["observed_high"]) - chart, leads)
    quay: dict = {}
    eps = [e for e in episodes if e["rule"] == "quay"]
    if eps:
        held = con.execute("select min(event_at) from outbox where key like ?",
                           (f"{station}/quay/episode-{eps[0]['id']}/held/%",)).fetchone()[0] \
            if _table(con, "outbox") else None
        quay = {"held": held, "closed": eps[0].get("closed_at")}
        if quay["closed"]:
            closed = int(quay["closed"])
            made = log["made_t"][log["made_t"] <= closed].max()
            now = log[(log["made_t"] == made) & (log["hw_t"] > closed)].sort_values("hw_t")
            if len(now):
                quay.update(next_hw=int(now["hw_t"].iloc[0]), top=float(now["upper"].iloc[0]) - chart)
    return storm, quay


def _table(con, name: str) -> bool:
    return con.execute("select 1 from sqlite_master where type='table' and name=?", (name,)).fetchone() is not None


def print_summary(s: Summary, out: Path, tz: str) -> None:
    """The short summary the demo ends with, in the port's local time."""
    p = print
    p("")
    p("Port Dunmerrow (invented port, invented storm): what the monitor saw")
    p("=" * 68)
    if s.highest:
        extra = f", surge {s.surge_at_highest:+.2f} m" if s.surge_at_highest is not None else ""
        p(f"Highest water   {s.highest[1]:.2f} m above chart datum at {_local(s.highest[0], tz)}{extra}")
    if s.surge_peak:
        p(f"Largest surge   {s.surge_peak[1]:+.2f} m (smoothed residual) at {_local(s.surge_peak[0], tz)}")
    p("")
    p(f"Alert episodes  {len(s.episodes)} ({sum(1 for e in s.episodes if e.get('closed_at'))} closed "
      f"with an all-clear)")
    for e in s.episodes:
        closed = _local(e["closed_at"], tz) if e.get("closed_at") else "still open"
        p(f"  {e['rule']:7s} {e['top_step']:15s} {_local(e['opened_at'], tz)} -> {closed}")
    if s.storm_hw:
        hw_t, came, leads = s.storm_hw
        p(f"Storm high water {_local(hw_t, tz)}: came {came:.2f} m above chart datum; forecast (90 % range):")
        for lead, fc, lo, hi, method in leads:
            where = "inside" if lo <= came <= hi else ("ABOVE" if came > hi else "BELOW")
            p(f"  {lead} h before  {fc:.2f} m ({lo:.2f} to {hi:.2f}{', wide' if method == 'wide' else ''}): came {where}")
    q = s.quay_clear
    if q.get("held"):
        p(f"Quay all-clear  held at {_local(q['held'], tz)} (\"not clear yet\": the next high water could reach "
          f"boards out again)")
    if q.get("closed") and q.get("next_hw"):
        p(f"                sent at {_local(q['closed'], tz)}, when the range for the high water of "
          f"{_local(q['next_hw'], tz)} topped out at {q['top']:.3f} m above chart datum"
          + (f" (boards out {s.boards_out:.3f} m)" if s.boards_out is not None else ""))
    p(f"Emails sent     {len(s.mail)} (all captured by the demo's own SMTP server)")
    for m in s.mail:
        p(f"  {m.path.name[:4]} {m.subject}  -> {', '.join(m.recipients)}")
    p("")
    p("For the technician (quality control and diagnostics):")
    p(f"  spikes          {len(s.spikes)} sample(s) failed: " + ", ".join(_local(t, tz)[4:] for t in s.spikes))
    for a, b in s.flat:
        p(f"  flat line       {_local(a, tz)} to {_until(a, b, tz)}")
    for a, b in s.gaps:
        p(f"  gap             no data between {_local(a, tz)} and {_until(a, b, tz)}")
    if s.drift and s.drift.get("bins"):
        p(f"  sensor drift    primary - backup {s.drift['drift_mm_per_day']:+.1f} mm/day "
          f"({s.drift['drift_low']:+.1f} to {s.drift['drift_high']:+.1f}, 95%)")
    for c in s.clock:
        p(f"  backup clock    {abs(c['lag_min']):.1f} min {'late' if c['lag_min'] > 0 else 'early'} "
          f"from about {_local(c['start'], tz)} to {_until(c['start'], c['end'], tz)}")
    p(f"  sensors differ  {s.multi} primary sample(s) more than 5 cm from the backup")
    p("")
    if s.caution_missing:
        p("CAUTION MISSING from: " + ", ".join(str(x) for x in s.caution_missing))
    else:
        p(f"Caution present in all {len(s.mail)} emails and {len(s.reports)} report pages.")
    p("Open:")
    p(f"  {out / 'reports' / 'index.html'}")
    p(f"  {out / 'mail'}/  (each .eml opens in a mail client)")
    p(f"  {out / 'qc.txt'}  (the technician's quality-control summary)")
    p(f"  {out / 'daemon.log'}")
    p("")
    p(CAUTION)


# --------------------------------------------------------------------------- main


def run_demo(out: Path = DEFAULT_OUT, short: bool = False, speedup: float | None = None,
             timeout: float = 900, quiet: bool = False) -> Summary:
    """Run the whole demo into ``out`` and return what it found.

    ``speedup`` overrides the replay pace of ``demo/config.toml`` (0: as fast as possible).
    """
    say = (lambda *a: None) if quiet else (lambda *a: print(*a, flush=True))
    truth = load_truth()
    with open(DEMO / "port.toml", "rb") as fh:
        port = tomllib.load(fh)
    tz = port["port"]["tz"]
    station = port["port"]["station"]
    chart = port["datums"]["chart_datum"]

    if out.exists():
        shutil.rmtree(out)
    (out / "feeds").mkdir(parents=True)
    (out / "reports").mkdir()
    log = out / "demo.log"
    t_start = time.monotonic()

    def step(text: str) -> None:
        say(f"[{time.monotonic() - t_start:5.0f} s] {text}")

    start, end = replay_window(truth, short)
    step(f"Storm feeds from {_local(start, tz)} to {_local(end, tz)} "
         f"({'the days around the storm' if short else 'the whole week'})")
    feeds = {}
    for role, (name, header, time_of) in FEED_FILES.items():
        dst = out / "feeds" / Path(name).name
        trim_feed(SAMPLES / name, dst, header, time_of, start, end)
        feeds[role] = dst

    step("Fitting harmonic constants to 190 days of history (quaywatch fit) ...")
    constants = out / "constants.toml"
    fit_constants(SAMPLES / "history.csv", constants, log)

    # Written once with a placeholder port so that ingest can read it; rewritten below with
    # the mail server's port.
    # The quick run leaves out the history (only the forecast's uncertainty needs it) and the
    # daemon's own scheduled reports.
    config = write_config(DEMO / "config.toml", out, 25, feeds, constants, speedup, not short)
    if not short:
        step("Loading the last five weeks of history into the store (quaywatch ingest) ...")
        ingest_history(SAMPLES / "history.csv", config, port, start, log)

    catcher = MailCatcher(out / "mail")
    port_no = catcher.start()
    try:
        write_config(DEMO / "config.toml", out, port_no, feeds, constants, speedup, not short)
        step(f"Running the daemon (quaywatch run) on the replay feeds; mail to 127.0.0.1:{port_no} ...")
        last = [None]

        def progress() -> None:
            line = replay_progress(out / "quaywatch.db", station, start, end, tz, len(catcher.caught))
            if line and line != last[0]:
                last[0] = line
                step("  " + line)

        run_daemon(config, out / "daemon.log", timeout, progress)
        time.sleep(0.5)  # the last SMTP transaction may still be closing
    finally:
        catcher.stop()

    days = local_days(start, end, tz)
    if short:
        # The quick run writes the storm day's report only, and no technician text.
        peak = parse_utc(truth["storm"]["main_peak"]["time"])
        days = local_days(peak, peak + dt.timedelta(seconds=1), tz)
    step(f"Writing {len(days)} daily report(s) (quaywatch report) ...")
    write_reports(config, station, days, log)
    if not short:
        step("Quality-control summary for the technician (quaywatch qc) ...")
        write_qc(config, station, start, end, out / "qc.txt")

    step("Reading back what was found ...")
    summary = read_summary(out, station, chart, catcher.caught, start, end)
    summary.boards_out = port["levels"]["boards_out"]
    if not quiet:
        print_summary(summary, out, tz)
    return summary


def write_qc(config: Path, station: str, start: dt.datetime, end: dt.datetime, path: Path) -> None:
    """``quaywatch qc`` over the replayed span, kept as text."""
    res = quaywatch(["qc", str(config), "--station", station, "--from", start.isoformat(),
                     "--to", end.isoformat()], cwd=config.parent)
    path.write_text(res.stdout + (f"\n{res.stderr}" if res.returncode else ""))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m monitor.demo", description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT, help="output folder (default demo-output/)")
    ap.add_argument("--short", action="store_true", default=os.environ.get("QUAYWATCH_DEMO_SHORT") == "1",
                    help="replay only the days around the storm (for tests)")
    ap.add_argument("--speedup", type=float, default=None,
                    help="replay pace: 3600 plays an hour a second (demo/config.toml); 0 as fast as possible")
    ap.add_argument("--timeout", type=float, default=900, help="longest wait for the daemon [s]")
    args = ap.parse_args(argv)
    try:
        run_demo(args.out.resolve(), short=args.short, speedup=args.speedup, timeout=args.timeout)
    except DemoError as exc:
        print(f"demo: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
