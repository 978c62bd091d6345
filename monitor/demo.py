"""The demo: a storm at the invented port of Port Dunmerrow, end to end, in one command.

``python -m monitor.demo`` (``make demo``):

1. fits harmonic constants to eight weeks of history (``quaywatch fit``);
2. starts a local SMTP server on loopback that keeps every message as
   ``demo-output/mail/NNN-*.eml``;
3. runs the real daemon (``quaywatch run``, a subprocess) on the storm week through its
   replay feeds, until the feeds are exhausted;
4. writes a report for each local day (``quaywatch report``) under ``demo-output/reports/``;
5. prints a summary: the surge peak, the alerts sent and cleared, the faults that quality
   control found, and the paths to open.

Everything goes under ``demo-output/``, removed and made again on each run. The scenario is
in ``sample_feeds/`` (made by ``sample_feeds/generate.py``) and ``demo/``. ``--short`` (or
``QUAYWATCH_DEMO_SHORT=1``) replays only the two and a half days around the storm, for tests.

All of it is an automated, unofficial aid: official warnings and the local emergency
authorities come first.
"""
from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import email
import email.policy
import json
import os
import re
import shutil
import sqlite3
import subprocess
import sys
import threading
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from zoneinfo import ZoneInfo

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = ROOT / "sample_feeds"
DEMO = ROOT / "demo"
DEFAULT_OUT = ROOT / "demo-output"

CAUTION = ("Automated and unofficial. Official warnings and the local emergency authorities come "
           "first; defer to local codes and licensed practice.")

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
        subject = str(msg.get("Subject", "") or "")
        with self._lock:
            n = len(self.caught) + 1
            slug = re.sub(r"[^a-z0-9]+", "-", subject.lower()).strip("-")[:60] or "message"
            path = self.folder / f"{n:03d}-{slug}.eml"
            path.write_bytes(content)
            self.caught.append(CaughtMail(path, subject, list(envelope.rcpt_tos)))
        return "250 Message accepted for delivery"

    def start(self) -> int:
        import socket

        from aiosmtpd.controller import Controller

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
    from monitor.cli import build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "verb")
    return verb in sub.choices


def fit_constants(history: Path, out: Path, log: Path) -> dict:
    """Fit constants to the history with ``quaywatch fit``; returns its JSON summary.

    Where the ``fit`` verb is not installed, ``predictor.harmonic_fit`` is called directly.
    """
    if not _has_verb("fit"):
        import pandas as pd

        from predictor import harmonic_fit

        df = pd.read_csv(history)
        model = harmonic_fit(pd.DatetimeIndex(pd.to_datetime(df["time"], utc=True)), df["level"].to_numpy())
        model.save(out)
        return {"mean": model.mean}
    res = quaywatch(["fit", str(history), "-o", str(out), "--json"])
    with open(log, "a") as fh:
        fh.write(f"$ quaywatch fit {history} -o {out} --json\n{res.stderr}")
    if res.returncode != 0:
        raise DemoError(f"quaywatch fit failed (exit {res.returncode}): {res.stderr.strip()[-500:]}")
    try:
        return json.loads(res.stdout)
    except json.JSONDecodeError:
        return {}


def write_config(template: Path, out_dir: Path, smtp_port: int, feeds: dict[str, Path],
                 constants: Path, speedup: float | None = None) -> Path:
    """The daemon's configuration: the demo template with this run's port, feeds and constants."""
    import tomli_w

    with open(template, "rb") as fh:
        cfg = tomllib.load(fh)
    cfg["mail"]["port"] = smtp_port
    station = cfg["stations"][0]
    station["constants"] = str(constants.relative_to(out_dir))
    for role, path in feeds.items():
        station["sensors"][role]["feed"]["path"] = str(path.relative_to(out_dir))
        if speedup is not None:
            station["sensors"][role]["feed"]["speedup"] = speedup
    path = out_dir / "config.toml"
    header = ("# Written by python -m monitor.demo from demo/config.toml for this run.\n"
              "# Automated and unofficial: official warnings and the local emergency "
              "authorities come first.\n")
    path.write_text(header + tomli_w.dumps(cfg))
    return path


def run_daemon(config: Path, log: Path, timeout: float) -> None:
    """Run ``quaywatch run CONFIG`` until its replay feeds are exhausted."""
    args = ["run", str(config), "--until-exhausted"]
    if not _has_verb("run"):
        # The command line's run verb not installed yet: the same entry point, directly.
        args = None
    try:
        if args is None:
            code = ("import sys; from monitor.config import load_config; from monitor.daemon import run_daemon; "
                    "sys.exit(run_daemon(load_config(sys.argv[1]), until_exhausted=True))")
            with open(log, "a") as fh:
                res = subprocess.run([sys.executable, "-c", code, str(config)], stdout=fh,
                                     stderr=subprocess.STDOUT, timeout=timeout, cwd=config.parent,
                                     env=dict(os.environ, PYTHONPATH=str(ROOT)))
        else:
            res = quaywatch(args, log=log, timeout=timeout, cwd=config.parent)
    except subprocess.TimeoutExpired:
        raise DemoError(f"the daemon did not finish within {timeout:.0f} s; see {log}") from None
    if res.returncode != 0:
        raise DemoError(f"the daemon exited with {res.returncode}; see {log}")


def local_days(start: dt.datetime, end: dt.datetime, tz: str) -> list[dt.date]:
    """The station's local dates touched by [start, end)."""
    zone = ZoneInfo(tz)
    first = start.astimezone(zone).date()
    last = (end - dt.timedelta(seconds=1)).astimezone(zone).date()
    return [first + dt.timedelta(days=i) for i in range((last - first).days + 1)]


def write_reports(config: Path, station: str, days: list[dt.date], log: Path) -> None:
    """One report per local day with ``quaywatch report``."""
    for day in days:
        res = quaywatch(["report", str(config), "--station", station, "--day", day.isoformat()],
                        log=log, cwd=config.parent)
        if res.returncode != 0:
            raise DemoError(f"quaywatch report for {day} failed (exit {res.returncode}); see {log}")


# --------------------------------------------------------------------------- technician checks


def sensor_timing(primary, backup, window_s: float = 6 * 3600, step_s: float = 3 * 3600,
                  max_lag_s: float = 900, lag_step_s: float = 15):
    """Timing of the backup against the primary, window by window.

    For each window, the lag L that makes ``backup(t) - primary(t + L)`` most nearly constant
    (smallest median absolute deviation) over a grid of lags. Both sensors see the same sea,
    so their difference cancels the tide and the weather and leaves offset, drift and timing
    (design notes, "two co-located sensors"); the median keeps spikes and a stuck spell from
    steering it. ``L`` > 0: the backup's stamp T holds the sea of T + L (its clock is late).

    Parameters
    ----------
    primary, backup : pandas.Series
        Usable levels [m] on UTC DatetimeIndexes.

    Returns
    -------
    pandas.DataFrame
        ``start``, ``end`` (UTC), ``lag_min`` [min], ``mad_mm`` [mm] per window.

    References
    ----------
    IOC (1985-2016), Manual on Sea Level Measurement and Interpretation, Vol. IV (a second
    sensor to check the first). Robust lag search by median absolute deviation: common
    practice, no source.
    """
    import numpy as np
    import pandas as pd

    ps = primary.index.as_unit("s").asi8.astype(float)
    pv = primary.to_numpy(dtype=float)
    bs = backup.index.as_unit("s").asi8.astype(float)
    bv = backup.to_numpy(dtype=float)
    lags = np.arange(-max_lag_s, max_lag_s + lag_step_s / 2, lag_step_s)
    rows = []
    if len(ps) < 2 or len(bs) < 2:
        return pd.DataFrame(columns=["start", "end", "lag_min", "mad_mm"])
    t0 = max(ps[0], bs[0])
    while t0 + window_s <= min(ps[-1], bs[-1]):
        m = (bs >= t0) & (bs < t0 + window_s)
        if m.sum() >= 60:
            tt, yy = bs[m], bv[m]
            d = yy[None, :] - np.interp(tt[None, :] + lags[:, None], ps, pv)
            mad = np.median(np.abs(d - np.median(d, axis=1, keepdims=True)), axis=1)
            i = int(np.argmin(mad))
            rows.append({"start": pd.Timestamp(t0, unit="s", tz="UTC"),
                         "end": pd.Timestamp(t0 + window_s, unit="s", tz="UTC"),
                         "lag_min": lags[i] / 60, "mad_mm": mad[i] * 1000})
        t0 += step_s
    return pd.DataFrame(rows, columns=["start", "end", "lag_min", "mad_mm"])


def clock_episodes(timing, limit_min: float = 1.5) -> list[dict]:
    """Spans where the backup's timing is off by more than ``limit_min`` [min].

    Consecutive windows past the limit are joined; each span reports its start and end
    (UTC) and the median lag [min]. The limit is IOC's one-minute timing accuracy (Manual
    Vol. IV, from memory) plus half a minute for the lag grid and noise (our choice).
    """
    out: list[dict] = []
    cur: list = []
    for row in list(timing.itertuples()) + [None]:
        if row is not None and abs(row.lag_min) > limit_min:
            cur.append(row)
            continue
        if cur:
            import numpy as np

            out.append({"start": cur[0].start, "end": cur[-1].end,
                        "lag_min": float(np.median([r.lag_min for r in cur])), "windows": len(cur)})
            cur = []
    return out


def technician_checks(store: Path, station: str) -> dict:
    """Drift and timing of the backup against the primary, from usable samples in the store."""
    import pandas as pd

    from monitor.diagnostics import sensor_drift

    con = sqlite3.connect(f"file:{store}?mode=ro", uri=True)

    def series(sensor: str, flags: tuple[int, ...]) -> pd.Series:
        q = (f"select t, value from observations where station=? and sensor=? "
             f"and flag in ({','.join('?' * len(flags))}) order by t")
        df = pd.read_sql_query(q, con, params=(station, sensor, *flags))
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


def _local(t: int | float, tz: str) -> str:
    when = dt.datetime.fromtimestamp(int(t), dt.timezone.utc).astimezone(ZoneInfo(tz))
    return when.strftime("%a %d %b %H:%M %Z")


@dataclass
class Summary:
    """What the demo found, read back from the store and the mail folder."""

    peak_time: int | None = None
    peak_level: float | None = None          # station datum [m]
    peak_residual: float | None = None       # [m]
    peak_residual_time: int | None = None
    episodes: list[dict] = field(default_factory=list)
    qc_counts: dict[str, dict[int, int]] = field(default_factory=dict)
    mail: list[CaughtMail] = field(default_factory=list)
    reports: list[Path] = field(default_factory=list)


def read_summary(store: Path, station: str, mail: list[CaughtMail], reports_dir: Path) -> Summary:
    """Read the surge peak, the alert episodes and the QC flag counts from the store."""
    s = Summary(mail=list(mail), reports=sorted(reports_dir.rglob("*.html")))
    if not store.exists():
        return s
    con = sqlite3.connect(f"file:{store}?mode=ro", uri=True)
    con.row_factory = sqlite3.Row
    tables = {r[0] for r in con.execute("select name from sqlite_master where type='table'")}
    if "derived" in tables:
        row = con.execute("select t, observed from derived where station=? and observed is not null "
                          "order by observed desc limit 1", (station,)).fetchone()
        if row:
            s.peak_time, s.peak_level = row["t"], row["observed"]
        row = con.execute("select t, residual from derived where station=? and residual is not null "
                          "order by residual desc limit 1", (station,)).fetchone()
        if row:
            s.peak_residual_time, s.peak_residual = row["t"], row["residual"]
    if "alert_episodes" in tables:
        s.episodes = [dict(r) for r in con.execute("select * from alert_episodes where station=?", (station,))]
    if "qc_tests" in tables:
        cols = [r[1] for r in con.execute("pragma table_info(qc_tests)")]
        for test in [c for c in cols if c not in ("station", "sensor", "t")]:
            counts = {}
            for flag, n in con.execute(f'select "{test}", count(*) from qc_tests where station=? '
                                       f'and "{test}" in (3, 4) group by 1', (station,)):
                counts[int(flag)] = n
            if counts:
                s.qc_counts[test] = counts
    con.close()
    return s


def print_summary(s: Summary, out: Path, tz: str, chart: float, truth: dict) -> None:
    """The short summary the demo ends with."""
    p = print
    p("")
    p("Port Dunmerrow (invented) -- storm week summary")
    p("=" * 48)
    if s.peak_level is not None:
        p(f"Highest water:  {s.peak_level - chart:.2f} m above chart datum at {_local(s.peak_time, tz)}")
    if s.peak_residual is not None:
        p(f"Largest surge:  {s.peak_residual:+.2f} m (observed - predicted) at {_local(s.peak_residual_time, tz)}")
    p(f"Emails sent:    {len(s.mail)}")
    for m in s.mail:
        p(f"  {m.path.name}")
    if s.qc_counts:
        p("Quality control found (samples flagged suspect / fail):")
        for test, counts in s.qc_counts.items():
            p(f"  {test:10s} {counts.get(3, 0):5d} / {counts.get(4, 0):5d}")
    p("Open:")
    p(f"  {out / 'reports'}  (daily reports, index.html)")
    p(f"  {out / 'mail'}  (every email, .eml)")
    p(f"  {out / 'daemon.log'}")
    p("")
    p(CAUTION)


# --------------------------------------------------------------------------- main


def run_demo(out: Path = DEFAULT_OUT, short: bool = False, timeout: float = 900,
             quiet: bool = False) -> Summary:
    """Run the whole demo into ``out`` and return what it found."""
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

    start, end = replay_window(truth, short)
    say(f"Replaying {start:%d %b %H:%M} to {end:%d %b %H:%M} UTC ({'short' if short else 'whole week'})")
    feeds = {}
    for role, (name, header, time_of) in FEED_FILES.items():
        dst = out / "feeds" / Path(name).name
        trim_feed(SAMPLES / name, dst, header, time_of, start, end)
        feeds[role] = dst

    say("Fitting harmonic constants to eight weeks of history ...")
    constants = out / "constants.toml"
    fit_constants(SAMPLES / "history.csv", constants, log)

    catcher = MailCatcher(out / "mail")
    port_no = catcher.start()
    try:
        config = write_config(DEMO / "config.toml", out, port_no, feeds, constants)
        say(f"Running the daemon (mail to 127.0.0.1:{port_no}) ...")
        t0 = time.monotonic()
        run_daemon(config, log, timeout)
        say(f"  daemon finished in {time.monotonic() - t0:.0f} s")
        # Let the last deliveries land.
        time.sleep(0.5)
    finally:
        catcher.stop()

    say("Writing the daily reports ...")
    write_reports(config, station, local_days(start, end, tz), log)

    summary = read_summary(out / "quaywatch.db", station, catcher.caught, out / "reports")
    if not quiet:
        print_summary(summary, out, tz, chart, truth)
    return summary


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m monitor.demo", description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT, help="output folder (default demo-output/)")
    ap.add_argument("--short", action="store_true", default=os.environ.get("QUAYWATCH_DEMO_SHORT") == "1",
                    help="replay only the 2.5 days around the storm (for tests)")
    ap.add_argument("--timeout", type=float, default=900, help="longest wait for the daemon [s]")
    args = ap.parse_args(argv)
    try:
        run_demo(args.out, short=args.short, timeout=args.timeout)
    except DemoError as exc:
        print(f"demo: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
