"""Station verbs: check, run, status, ingest, export, refit.

Every verb takes the configuration file first; bad input raises UserError (one line,
naming the file, option or key). Output is automated and unofficial: official warnings
and the local emergency authorities come first.
"""
from __future__ import annotations

import argparse
import csv
import dataclasses
import datetime as dt
import math
import re
import sys
import textwrap
import time
from pathlib import Path
from typing import Iterator

import numpy as np

from alerts.live.headline import headline
from alerts.live.settings import LiveSettings
from monitor.cli.common import CAUTION, count, finite_float, input_file, store_errors
from monitor.cli.errors import UserError
from monitor.cli.timeparse import local_text, parse_range
from monitor.errors import MonitorError
from monitor.feeds.base import FIRST_BATCH_LINES, batch_sizes, decode_line
from monitor.feeds.capture import SUFFIX
from monitor.feeds.capture import is_capture
from monitor.feeds.capture import read_capture
from monitor.feeds.parse import Reject
from monitor.feeds.parse import parse_lines
from monitor.service.config import datum_words, load_config, unsendable
from monitor.service.constants import load_model
from monitor.service.daemon import future_tolerance
from monitor.service.daemon import preflight
from monitor.service.daemon import refit_station
from monitor.service.daemon import row_lines
from monitor.service.daemon import run_daemon
from monitor.service.live_pages import gather
from monitor.store.database import EMPTY_BATCH
from monitor.store.database import Store

INGEST_BATCH = 100_000  # lines per transaction in a backfill


def register(subparsers) -> None:
    p = subparsers.add_parser("check", help="validate a configuration file and stop",
                              description="Validate CONFIG: every problem is listed with its key path.")
    p.add_argument("config", metavar="CONFIG")
    p.set_defaults(func=store_errors(cmd_check))

    p = subparsers.add_parser("run", help="run the monitor daemon",
                              description="Poll the feeds, process each station, send alerts and reports "
                                          "until SIGTERM or SIGINT. " + CAUTION)
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--until-exhausted", "--until-idle", dest="until_exhausted", action="store_true",
                   help="stop once every feed is played out (replays) or idle for daemon.idle_polls polls, "
                        "processing has caught up and the outbox is drained")
    p.set_defaults(func=cmd_run)

    p = subparsers.add_parser("status", help="per station: latest level, residual, feeds, rejects, constants")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--station", metavar="ID", help="only this station")
    p.add_argument("--rejects", type=count, default=0, metavar="N", help="also show the last N entries of the reject log (unreadable lines, conflicting repeats)")
    p.set_defaults(func=store_errors(cmd_status))

    p = subparsers.add_parser("ingest", help="backfill a station from telemetry files or raw captures",
                              description="Read FILEs in the sensor's configured line format into the store. "
                                          "Rows already stored are left alone; bad lines go to the reject log. "
                                          "A raw capture file of a serial line (or a folder of them) is read "
                                          "as the daemon read the line, with the time each line arrived, so "
                                          "a lost store can be rebuilt.")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--station", required=True, metavar="ID")
    p.add_argument("--sensor", default="primary", choices=("primary", "backup", "barometer"))
    p.add_argument("files", nargs="+", metavar="FILE")
    p.set_defaults(func=store_errors(cmd_ingest))

    p = subparsers.add_parser("backup", help="a consistent copy of the store, while the daemon runs",
                              description="Copy the store to DEST with SQLite's online backup: a consistent "
                                          "copy as of one commit, taken while the daemon goes on writing. "
                                          "DEST is a new file, or a folder (then a dated file is made in "
                                          "it). The copy is checked before it is kept.")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("dest", metavar="DEST")
    p.set_defaults(func=store_errors(cmd_backup))

    p = subparsers.add_parser("export", help="CSV of level, predicted tide, residual and flag",
                              description="Write time, level, predicted tide, residual and QC flag: UTC times, "
                                          "levels in metres on the station's display datum, named in the column "
                                          "names (e.g. level_m_above_chart_datum); the residual is observed minus "
                                          "predicted (no datum). Times without an offset are the station's local time.")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--station", required=True, metavar="ID")
    p.add_argument("--from", dest="start", required=True, metavar="ISO")
    p.add_argument("--to", dest="end", required=True, metavar="ISO")
    p.add_argument("-o", "--output", metavar="FILE", help="write here instead of standard output")
    p.set_defaults(func=store_errors(cmd_export))

    p = subparsers.add_parser("refit", help="fit constants to a station's own quality-controlled history",
                              description="Fit harmonic constants to the station's stored primary record "
                                          "(fail-flagged samples left out), keep the fit with its date and "
                                          "quality, and compare it with the constants in use.")
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--station", required=True, metavar="ID")
    p.add_argument("--days", type=finite_float, metavar="N", help="fit the last N days (default stations[].fit_span_days)")
    p.add_argument("--use", dest="use", action="store_true", default=None,
                   help="put the new fit in use, whatever it hindcasts (default: for stations with "
                   "constants = \"history\", and only when it hindcasts the days the constants in use "
                   "have not seen no worse than they do)")
    p.add_argument("--keep", dest="use", action="store_false", help="keep the fit for comparison only")
    p.add_argument("--list", action="store_true", help="list the kept fits and stop")
    p.add_argument("--infer", choices=("none", "auto", "equilibrium"), default="auto",
                   help="constituents the record cannot resolve, taken from a fitted neighbour at "
                   "equilibrium ratios: 'auto' P1, K2, NU2, and N2 and Q1 in records under 27.6 days, "
                   "when needed (default, as the daemon's refit and 'fit'); 'none' fits only what the "
                   "record resolves")
    p.set_defaults(func=store_errors(cmd_refit))


# --------------------------------------------------------------------------- helpers

def _config(path: str):
    return load_config(path)


def _store(cfg, create: bool = False, lock: bool = False):
    return Store.open(cfg.store_path, create=create, lock=lock)


def _local(t: float | None, tz: str) -> str:
    return local_text(t, tz, utc=True)


def _age(seconds: float) -> str:
    if seconds < 0:
        return "in the future"
    if seconds < 120:
        return f"{seconds:.0f} s ago"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min ago"
    if seconds < 172800:
        return f"{seconds / 3600:.1f} h ago"
    return f"{seconds / 86400:.1f} days ago"


def _m(v: float | None, signed: bool = False) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    return f"{v:+.3f} m" if signed else f"{v:.3f} m"


# --------------------------------------------------------------------------- check

def cmd_check(args: argparse.Namespace) -> int:
    cfg = _config(args.config)

    # a broken constants file, or a store that could not be created, is a configuration
    # problem too (checked without creating anything)
    sources = preflight(cfg)
    problems = unsendable(cfg)
    if problems:
        raise UserError(f"{args.config}: " + "; ".join(problems))
    print(f"{args.config}: configuration is valid")
    for st in cfg.stations:
        sensors = ", ".join(f"{r} ({s.units}, feed {getattr(s.feed, 'kind', 'none')})" for r, s in st.sensors.items())
        const = sources.get(st.id, "fitted from the station's own history")
        print(f"  station {st.id}: {st.name}; {st.tz}; sensors: {sensors}; constants: {const}; levels shown "
              f"above {st.display_label}" + (f" ({st.datum_note})" if st.datum_note else ""))
    print(f"  store: {cfg.store_path}")
    return 0


# --------------------------------------------------------------------------- run

def cmd_run(args: argparse.Namespace) -> int:
    cfg = _config(args.config)

    return run_daemon(cfg, until_exhausted=args.until_exhausted, verbose=getattr(args, "verbose", 0))


# --------------------------------------------------------------------------- status

def cmd_status(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    stations = [cfg.station(args.station)] if args.station else list(cfg.stations)
    now = time.time()
    out = sys.stdout
    with _store(cfg) as store:
        checkpoints = store.checkpoints()
        counts = store.reject_counts()
        conflicts = store.reject_counts(conflicts=True)
        for st in stations:
            shift, on = st.display_offset, f"above {st.display_label}"
            print(f"Station {st.id}: {st.name}  (times in {st.tz}; levels in metres {on}"
                  + (f"; {st.datum_note}" if st.datum_note else "") + ")", file=out)
            # the live page's headline: STALE in words, the level and the next high water
            # against the operator's marks, open alerts, the gauge
            snap = gather(store, st, cfg.live or LiveSettings(), now=now, until=int(now + future_tolerance(st)))
            for line in headline(snap):
                print(textwrap.fill(line.text, 100, initial_indent=f"  {'!' if line.alarm else '-'} ",
                                    subsequent_indent="    "), file=out)
            if snap.rarity:  # in an event: its highest water read off the return-level curve, as on the page
                rare = f"{snap.rarity['words']} (at {_local(snap.rarity['t'], st.tz)})."
                if snap.rarity.get("note"):
                    rare += f" {snap.rarity['note']}"
                print(textwrap.fill(rare, 100, initial_indent="  - ", subsequent_indent="    "), file=out)
            rows: list[tuple[str, str]] = []
            # the last sample that counts: one that failed quality control, or stamped ahead
            # of the clock, is no sign of life
            last = store.last_time(st.id, "primary", until=int(now + future_tolerance(st)), usable=True)
            rows.append(("last observation", "-" if last is None else f"{_local(last, st.tz)}, {_age(now - last)}"))
            stored_last = store.last_time(st.id, "primary")
            if stored_last is not None and stored_last != last:
                later = store.conn.execute(
                    "SELECT count(*) FROM observations WHERE station = ? AND sensor = 'primary' AND t > ?",
                    (st.id, -(2 ** 62) if last is None else last)).fetchone()[0]
                rows.append(("unusable since", f"{later:,} later sample(s) failed quality control, are missing "
                                               f"or are ahead of the clock (latest {_local(stored_last, st.tz)})"))
            latest = store.latest_derived(st.id)

            def lv(v):
                return None if v is None else v - shift

            if latest is not None:
                rows.append(("level", f"{_m(lv(latest['observed']))} {on}  at {_local(latest['t'], st.tz)}"))
                rows.append(("predicted tide", f"{_m(lv(latest['predicted']))} {on}"))
                rows.append(("residual", f"{_m(latest['residual'], True)}   smoothed {_m(latest['smoothed'], True)}"
                                         "   (observed minus predicted)"))
                if latest.get("barometric") is not None:
                    rows.append(("inverse barometer", _m(latest["barometric"], True)))
            else:
                rows.append(("level", "- (not processed yet)"))
            fc = store.latest_forecast(st.id)
            if fc is not None:
                rng = "" if fc["lower"] is None else \
                    f"  ({fc['coverage']:.0%} range {lv(fc['lower']):.2f} to {lv(fc['upper']):.2f} m)"
                rows.append(("next high water", f"{_m(lv(fc['forecast']))} {on} at {_local(fc['hw_t'], st.tz)}"
                                                f"  (predicted tide {_m(lv(fc['predicted_high']))}){rng}"))
                if fc.get("note"):
                    rows.append(("forecast method", fc["note"]))
            try:
                _, source = load_model(store, st)
            except MonitorError as exc:
                source = f"unreadable: {exc}"
            rows.append(("constants", source))
            for role, sensor in st.sensors.items():
                name = sensor.feed_name
                ck = checkpoints.get(name)
                kind = getattr(sensor.feed, "kind", "none")
                when = "never read" if ck is None else f"checkpoint {_local(ck[1], st.tz)}, {_age(now - ck[1])}"
                lt = store.last_time(st.id, role)
                n_obs = store.observation_count(st.id, role)
                rows.append((f"feed {role}", f"{kind}; {when}; {n_obs:,} rows, last {_local(lt, st.tz)}; "
                                             f"{counts.get(name, 0):,} rejected; "
                                             f"{conflicts.get(name, 0):,} conflicting repeats"))
            ingest_rejects = sum(n for f, n in counts.items() if f.startswith(f"ingest:{st.id}:"))
            if ingest_rejects:
                rows.append(("ingest rejects", f"{ingest_rejects:,}"))
            n_conflicts = store.conflict_count(st.id)
            if n_conflicts:
                rows.append(("conflicting repeats", f"{n_conflicts:,} line(s) repeated a stored time with "
                                                    f"another value (first value kept; see --rejects)"))
            width = max(len(k) for k, _ in rows)
            for k, v in rows:
                print(f"  {k.ljust(width)}  {v}", file=out)
            if args.rejects:
                rej = store.rejects(station=st.id, limit=args.rejects)
                for r in rej.itertuples():
                    print(f"    {r.feed} line {r.lineno}: {r.reason}: {r.text!r}", file=out)
            print(file=out)
    print(CAUTION, file=out)
    return 0


# --------------------------------------------------------------------------- ingest

def _read_batches(path: Path, sizes: Iterator[int]):
    """(lines, bytes read so far) in batches of the ``sizes`` in turn [lines], line endings
    removed; undecodable bytes become U+FFFD."""
    try:
        fh = open(path, encoding="utf-8-sig", errors="replace", newline="")  # a leading BOM is not data
    except OSError as exc:
        raise UserError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    with fh:
        batch: list[str] = []
        size = next(sizes)
        for line in fh:
            batch.append(line.rstrip("\r\n"))
            if len(batch) >= size:
                yield batch, fh.buffer.tell() if hasattr(fh, "buffer") else 0
                batch = []
                size = next(sizes)
        if batch:
            yield batch, path.stat().st_size


def ingest_file(store, sensor, path: Path, progress=None, batch_size: int = INGEST_BATCH,
                first_reject: list | None = None, max_ahead: float | None = None,
                first_batch: int = FIRST_BATCH_LINES):
    """Backfill one file into the store.

    Batches grow from ``first_batch`` to ``batch_size`` [lines]
    (:func:`monitor.feeds.base.batch_sizes`), each stored in one transaction, so the
    first rows of a big file are stored at once.

    Returns
    -------
    (BatchResult, int or None)
        Summed counts, and the earliest time read [s] (None when no line was read).
        When ``first_reject`` is a list, the first rejected line is appended to it.
        Lines stamped more than ``max_ahead`` [s] ahead of the clock are rejected
        (the station's ``qc.future_tolerance``; None: not checked).
    """
    if is_capture(path):
        return _ingest_capture(store, sensor, path, progress, batch_sizes(batch_size, first_batch), first_reject,
                               max_ahead)
    total = EMPTY_BATCH
    lineno = 0
    first_t = None
    label = f"ingest:{sensor.station}:{path.name}"
    fmt = sensor.format
    for lines, pos in _read_batches(path, batch_sizes(batch_size, first_batch)):
        if lineno == 0 and _is_header(lines[0], fmt):
            # a file written with a column header, for a sensor whose lines have none: the
            # header is skipped, not counted as a rejected line
            fmt = dataclasses.replace(fmt, header_lines=1)
        parsed = parse_lines(lines, fmt, time.time(), range(lineno + 1, lineno + 1 + len(lines)),
                             max_ahead)
        lineno += len(lines)
        res = store.write_batch(sensor.station, sensor.role, parsed.t, parsed.value, parsed.time_source,
                                parsed.rejects, feed=label, skipped=parsed.skipped,
                                lines=row_lines(parsed, lines))
        if first_reject is not None and parsed.rejects and not first_reject:
            first_reject.append(parsed.rejects[0])
        if len(parsed):
            lo = int(parsed.t.min())
            first_t = lo if first_t is None else min(first_t, lo)
        total = total + res
        if progress:
            progress(path, lineno, pos, total)
    return total, first_t


def _is_header(line: str, fmt) -> bool:
    """The first line of a file is a column header: the format expects none, and the line
    holds words but not a single digit (no time or level can be written without one)."""
    text = line.strip()
    return (fmt.header_lines == 0 and bool(text) and not (fmt.comment and text.startswith(fmt.comment))
            and re.search(r"[A-Za-z]", text) is not None and re.search(r"\d", text) is None)


def _ingest_capture(store, sensor, path: Path, progress, sizes: Iterator[int], first_reject: list | None,
                    max_ahead: float | None):
    """:func:`ingest_file` for a raw capture file of a serial line: each line parsed as the
    daemon parsed it when it was read (same receive time, same format, no header lines)."""
    encoding = getattr(sensor.feed, "encoding", None) or "utf-8"
    # a serial line has no header: the daemon never skipped its first lines
    fmt = dataclasses.replace(sensor.format, header_lines=0)
    total = EMPTY_BATCH
    first_t = None
    label = f"ingest:{sensor.station}:{path.name}"
    try:
        for raws, recv, linenos, bad, pos in read_capture(path, sizes):
            texts = [decode_line(r, encoding) for r in raws]
            parsed = parse_lines(texts, fmt, np.asarray(recv, dtype=float), linenos, max_ahead)
            rejects = sorted(parsed.rejects + [Reject(n, text[:500], "not a capture record (cut short?)")
                                               for n, text in bad], key=lambda r: r.lineno)
            res = store.write_batch(sensor.station, sensor.role, parsed.t, parsed.value, parsed.time_source,
                                    rejects, feed=label, skipped=parsed.skipped, lines=row_lines(parsed, texts))
            if first_reject is not None and rejects and not first_reject:
                first_reject.append(rejects[0])
            if len(parsed):
                lo = int(parsed.t.min())
                first_t = lo if first_t is None else min(first_t, lo)
            total = total + res
            if progress:
                progress(path, linenos[-1] if linenos else 0, pos, total)
    except OSError as exc:
        raise UserError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    return total, first_t


def _telemetry_files(name: str) -> list[Path]:
    """The file, or the capture files (``*.capture``, in name order) of a capture folder."""
    p = Path(name)
    if p.is_dir():
        found = sorted(f for f in p.iterdir() if f.suffix == SUFFIX and f.is_file())
        if found:
            return found
    return [_telemetry_file(name)]


def _telemetry_file(name: str) -> Path:
    """A readable, non-empty text file; binary data is refused before anything is stored
    (a raw capture file may hold any bytes a serial line delivered)."""
    path = input_file(name, "telemetry file")
    if is_capture(path):
        return path
    with open(path, "rb") as fh:
        head = fh.read(8192)
    if not head:
        raise UserError(f"{path}: empty file, nothing to ingest")
    nul = head.find(b"\0")
    if nul >= 0:
        raise UserError(f"{path}: binary data (a NUL byte at byte {nul}), expected lines of text")
    return path


def cmd_ingest(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    st = cfg.station(args.station)
    if args.sensor not in st.sensors:
        raise UserError(f"--sensor {args.sensor}: station {st.id} has no {args.sensor} sensor "
                        f"(it has {', '.join(st.sensors)})")
    sensor = st.sensors[args.sensor]
    if sensor.format is None:
        raise UserError(f"stations[{st.id}].sensors.{args.sensor}.line: no line format configured")
    paths = [p for f in args.files for p in _telemetry_files(f)]
    tty = sys.stderr.isatty()
    last_print = [time.monotonic()]  # quiet for small files; a line every 5 s for long ones

    def progress(path: Path, lines: int, pos: int, total) -> None:
        size = max(1, path.stat().st_size)
        if tty:
            sys.stderr.write(f"\r{path.name}: {min(1.0, pos / size):4.0%}  {lines:,} lines, "
                             f"{total.stored:,} stored, {total.rejected:,} rejected   ")
            sys.stderr.flush()
        elif time.monotonic() - last_print[0] > 5:
            last_print[0] = time.monotonic()
            print(f"{path.name}: {lines:,} lines read", file=sys.stderr)


    grand = EMPTY_BATCH
    with _store(cfg, create=True) as store:
        for p in paths:
            first_reject: list = []
            res, first_t = ingest_file(store, sensor, p, progress, first_reject=first_reject,
                                       max_ahead=future_tolerance(st))
            if tty:
                sys.stderr.write("\n")
            print(f"{p}: {res.read:,} rows read, {res.stored:,} stored, {res.duplicates:,} duplicates, "
                  f"{res.rejected:,} rejected, {res.conflicts:,} conflicting repeats "
                  f"({res.skipped:,} blank, comment or header lines skipped)")
            grand = grand + res
            if res.rejected and not (res.stored or res.duplicates or res.conflicts):
                r = first_reject[0] if first_reject else None
                why = f"; first: line {r.lineno}: {r.reason}" if r is not None else ""
                raise UserError(f"{p}: none of its {res.read:,} lines fit stations[{st.id}].sensors."
                                f"{args.sensor}.line{why} (rejected lines kept: quaywatch status "
                                f"{args.config} --station {st.id} --rejects 20)")
            mark = store.get_meta(f"processed.{st.id}")
            if res.stored and mark is not None and first_t is not None and first_t <= int(mark):
                # older rows were added: the daemon processes again from there
                store.set_meta(f"processed.{st.id}", str(first_t - 1))
    if len(paths) > 1:
        print(f"total: {grand.read:,} rows read, {grand.stored:,} stored, {grand.duplicates:,} duplicates, "
              f"{grand.rejected:,} rejected, {grand.conflicts:,} conflicting repeats")
    if grand.rejected or grand.conflicts:
        print(f"see the rejected lines with: quaywatch status {args.config} --station {st.id} --rejects 20",
              file=sys.stderr)
    return 0


# --------------------------------------------------------------------------- backup

def cmd_backup(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    dest = Path(args.dest).expanduser()
    if dest.is_dir():
        stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime())
        dest = dest / f"{cfg.store_path.stem}-{stamp}{cfg.store_path.suffix or '.db'}"
    elif not dest.parent.is_dir():
        raise UserError(f"{args.dest}: folder {dest.parent} does not exist")
    with _store(cfg) as store:
        info = store.backup(dest)
    when = "no feed checkpoint" if info["checkpoint"] is None else \
        "feeds as of " + dt.datetime.fromtimestamp(info["checkpoint"], dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%SZ")
    print(f"{info['path']}: backup of {cfg.store_path}, {info['bytes']:,} bytes, {info['observations']:,} "
          f"observations, {when}; integrity ok")
    return 0


# --------------------------------------------------------------------------- export

def cmd_export(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    st = cfg.station(args.station)
    start, end = parse_range(args.start, args.end, st.tz)

    with _store(cfg) as store:
        obs = store.observations(st.id, "primary", int(start.timestamp()), int(end.timestamp()))
        model, _ = load_model(store, st)
    pred = model.predict(obs.index) if (model is not None and len(obs)) else np.full(len(obs), np.nan)
    try:
        out = open(args.output, "w", newline="") if args.output else sys.stdout
    except OSError as exc:
        raise UserError(f"-o {args.output}: cannot write ({exc.strerror or exc})") from None
    try:
        w = csv.writer(out, lineterminator="\n")
        w.writerow(export_header(st.display_datum))
        times = obs.index.strftime("%Y-%m-%dT%H:%M:%SZ")
        shift = st.display_offset
        for t, v, p, f in zip(times, obs["value"].to_numpy(), pred, obs["flag"].to_numpy()):
            pf = "" if not np.isfinite(p) else f"{p - shift:.4f}"
            rf = "" if not np.isfinite(p) else f"{v - p:.4f}"
            w.writerow([t, f"{v - shift:.4f}", pf, rf, int(f)])
    except OSError as exc:
        raise UserError(f"-o {args.output}: cannot write ({exc.strerror or exc})") from None
    finally:
        if args.output:
            out.close()
    if args.output:
        print(f"{args.output}: {len(obs):,} rows", file=sys.stderr)
    return 0


def export_header(datum: str) -> list[str]:
    """The export's column names; the levels' datum is named in them."""
    on = re.sub(r"[^a-z0-9]+", "_", datum_words(datum).lower()).strip("_")
    return ["time", f"level_m_above_{on}", f"predicted_m_above_{on}", "residual_m", "flag"]


# --------------------------------------------------------------------------- refit

_COMPARE = ("M2", "S2", "N2", "K1", "O1")


def cmd_refit(args: argparse.Namespace) -> int:
    cfg = _config(args.config)
    st = cfg.station(args.station)

    with _store(cfg, create=False) as store:
        if args.list:
            fits = store.fits(st.id)
            if fits.empty:
                print(f"station {st.id}: no fits kept yet")
                return 0
            print(f"{'id':>4}  {'fitted (UTC)':16}  {'from (UTC)':10}  {'to (UTC)':10}  {'samples':>9}  "
                  f"{'rms m':>7}  {'var expl':>8}  in use")
            for r in fits.itertuples():
                print(f"{r.id:>4}  {_utc(r.fitted_at, '%Y-%m-%d %H:%M')}  {_utc(r.start, '%Y-%m-%d')}  "
                      f"{_utc(r.end, '%Y-%m-%d')}  {r.n:>9,}  {r.rms:7.3f}  {r.variance_explained:8.1%}  "
                      f"{'yes' if r.in_use else ''}")
            return 0
        try:
            old, old_source = load_model(store, st)
        except MonitorError:
            old, old_source = None, "unreadable"
        if args.days is not None and not args.days > 0:
            raise UserError(f"--days {args.days:g}: expected a number of days above 0")
        fit = refit_station(store, st, use=args.use, span_days=args.days,
                            infer=None if args.infer == "none" else args.infer, force=bool(args.use))
    model = fit["model"]
    print(f"station {st.id}: fit #{fit['id']} of {fit['n']:,} samples, {_utc(fit['start'], '%Y-%m-%d')} to "
          f"{_utc(fit['end'], '%Y-%m-%d')} (UTC); rms {fit['rms']:.3f} m; variance explained "
          f"{fit['variance_explained']:.1%}; {'in use' if fit['in_use'] else 'kept for comparison'}")
    if fit.get("check"):
        print(f"  {fit['check']}")
    new = {c["name"]: c for c in model.constituents}
    prev = {c["name"]: c for c in (old.constituents if old is not None else [])}
    print(f"compared with the constants in use ({old_source}); phases are Greenwich lags, UTC:")
    print(f"  {'':4} {'amplitude m':>12} {'change mm':>10} {'phase deg':>10} {'change deg':>11}")
    for name in _COMPARE:
        if name not in new:
            continue
        a, g = new[name]["amplitude"], new[name]["phase"]
        if name in prev:
            da = (a - prev[name]["amplitude"]) * 1000
            dg = (g - prev[name]["phase"] + 180) % 360 - 180
            print(f"  {name:4} {a:12.4f} {da:+10.1f} {g:10.2f} {dg:+11.2f}")
        else:
            print(f"  {name:4} {a:12.4f} {'-':>10} {g:10.2f} {'-':>11}")
    if fit["in_use"]:
        print("a running daemon picks the new fit up within the hour")
    return 0


def _utc(t: float, fmt: str) -> str:
    return dt.datetime.fromtimestamp(int(t), dt.timezone.utc).strftime(fmt)
