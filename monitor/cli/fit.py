"""The ``fit`` verb: harmonic constants from a CSV of observed levels.

``quaywatch fit OBS.csv [-o CONSTANTS.toml] [--json] [--tz ZONE] [--robust] [--rayleigh R]
[--trend] [--infer auto|equilibrium|none] [--robust [auto|on|off]]``. The CSV reader :func:`read_level_csv` is shared with the daemon's backfill.
"""
from __future__ import annotations

import argparse
import json
import re
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.cli.timeparse import zone as _zone
from monitor.errors import UserError
from monitor.service.config import datum_words
from predictor.fit import FitConditioningWarning
from predictor.fit import FitInputError
from predictor.fit import harmonic_fit

__all__ = ["CAUTION", "read_level_csv", "register", "run_fit", "model_summary"]

CAUTION = ("Automated, unofficial analysis. Official tide tables, official warnings and the local "
           "emergency authorities come first; defer to local codes and licensed practice.")

# An explicit zone at the end of an ISO 8601 time: Z, +HH, +HHMM or +HH:MM.
_ZONE = re.compile(r"(?:[Zz]|[+-]\d{2}(?::?\d{2})?)$")
_MAX_LISTED = 5


def _bad(path, lines, what):
    """A UserError naming the first bad line and counting the rest."""
    first = lines[0]
    more = ""
    if len(lines) > 1:
        shown = ", ".join(str(n) for n in lines[1:_MAX_LISTED])
        extra = len(lines) - _MAX_LISTED
        more = f" (also line{'s' if len(lines) > 2 else ''} {shown}" + (f" and {extra} more" if extra > 0 else "") + ")"
    return UserError(f"{path} line {first}: {what}{more}")


def read_level_csv(path, tz: str | None = None):
    """Read a ``time,level`` CSV of observed levels.

    Parameters
    ----------
    path : str or Path
        CSV file with the header ``time,level``; ``time`` ISO 8601 with ``Z`` or an offset,
        ``level`` in metres. Blank lines and lines starting with ``#`` are skipped; an empty
        level is a missing value and is left out.
    tz : str, optional
        IANA zone for times written without a zone; without it such times are refused.

    Returns
    -------
    times : pandas.DatetimeIndex
        UTC, sorted, without duplicates.
    levels : ndarray
        Levels [m].
    notes : list of str
        What was changed (re-sorted rows, duplicates dropped, missing levels skipped).

    Raises
    ------
    UserError
        Naming the file and line: unreadable file, wrong header, wrong number of columns,
        bad time or level, time without a zone, no data.
    """
    path = Path(path)
    zone = None if tz is None else _zone(tz)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise UserError(f"{path}: no such file") from None
    except UnicodeDecodeError as exc:
        raise UserError(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read ({exc.strerror})") from None

    lines = text.splitlines()
    header_no = next((i for i, ln in enumerate(lines) if ln.strip() and not ln.lstrip().startswith("#")), None)
    if header_no is None:
        raise UserError(f"{path}: empty file, expected a header 'time,level' and data")
    header = [h.strip().lower() for h in lines[header_no].split(",")]
    if header != ["time", "level"]:
        raise UserError(f"{path} line {header_no + 1}: expected the header 'time,level', "
                        f"found {lines[header_no].strip()!r}")

    numbers, t_text, v_text, malformed = [], [], [], []
    for i in range(header_no + 1, len(lines)):
        ln = lines[i].strip()
        if not ln or ln.startswith("#"):
            continue
        parts = ln.split(",")
        if len(parts) != 2:
            malformed.append(i + 1)
            continue
        numbers.append(i + 1)
        t_text.append(parts[0].strip())
        v_text.append(parts[1].strip())
    if malformed:
        raise _bad(path, malformed, "expected two fields 'time,level'")
    if not numbers:
        raise UserError(f"{path}: no data rows after the header")
    numbers = np.asarray(numbers)

    v_series = pd.Series(v_text, dtype=object)
    empty = (v_series == "").to_numpy()
    levels = pd.to_numeric(v_series.where(~empty, "nan"), errors="coerce").to_numpy(dtype=float)
    bad_level = np.isnan(levels) & ~empty & ~v_series.str.lower().isin(["nan"]).to_numpy()
    if bad_level.any():
        first = v_text[int(np.flatnonzero(bad_level)[0])]
        raise _bad(path, list(numbers[bad_level]), f"level {first!r} is not a number (metres expected)")
    infinite = np.isinf(levels)
    if infinite.any():
        raise _bad(path, list(numbers[infinite]), "level is not finite")

    t_series = pd.Series(t_text, dtype=object)
    has_zone = t_series.str.contains(_ZONE).to_numpy()
    naive = ~has_zone
    if naive.any() and zone is None:
        raise _bad(path, list(numbers[naive]), f"time {t_text[int(np.flatnonzero(naive)[0])]!r} has no "
                   "zone; write it with Z or an offset such as +01:00, or give --tz")
    ns = np.empty(len(t_text), dtype=np.int64)
    bad_time = np.zeros(len(t_text), dtype=bool)
    if has_zone.any():
        parsed = pd.to_datetime(t_series[has_zone], format="ISO8601", utc=True, errors="coerce")
        bad_time[has_zone] = parsed.isna().to_numpy()
        ns[has_zone] = pd.DatetimeIndex(parsed).as_unit("ns").asi8
    if naive.any():
        parsed = pd.to_datetime(t_series[naive], format="ISO8601", errors="coerce")
        bad_time[naive] = parsed.isna().to_numpy()
        if not bad_time[naive].any():
            local = pd.DatetimeIndex(parsed)
            try:
                ns[naive] = local.tz_localize(zone, ambiguous="raise", nonexistent="raise") \
                    .tz_convert("UTC").as_unit("ns").asi8
            except Exception:  # pandas raises several types for clock changes
                for k, stamp in zip(np.flatnonzero(naive), local):
                    try:
                        pd.Timestamp(stamp).tz_localize(zone, ambiguous="raise", nonexistent="raise")
                    except Exception:
                        raise UserError(f"{path} line {numbers[k]}: local time {t_text[k]!r} is "
                                        f"ambiguous or does not exist in {tz} (clock change); "
                                        "write it with an offset") from None
                raise
    if bad_time.any():
        first = t_text[int(np.flatnonzero(bad_time)[0])]
        raise _bad(path, list(numbers[bad_time]), f"time {first!r} is not an ISO 8601 date and time")

    notes = []
    keep = ~np.isnan(levels)
    if (~keep).any():
        notes.append(f"{path}: {int((~keep).sum())} row(s) without a level skipped")
    ns, levels = ns[keep], levels[keep]
    if ns.size == 0:
        raise UserError(f"{path}: no levels in the file")
    if np.any(np.diff(ns) < 0):
        order = np.argsort(ns, kind="stable")
        notes.append(f"{path}: {int(np.sum(np.diff(ns) < 0))} row(s) out of time order; sorted")
        ns, levels = ns[order], levels[order]
    dup = np.concatenate([[False], np.diff(ns) == 0])
    if dup.any():
        notes.append(f"{path}: {int(dup.sum())} row(s) repeating an earlier time dropped (first kept)")
        ns, levels = ns[~dup], levels[~dup]
    times = pd.DatetimeIndex(ns.astype("datetime64[ns]")).tz_localize("UTC")
    return times, levels, notes


def model_summary(model) -> dict:
    """The JSON-ready summary printed by ``fit --json``."""
    meta = dict(getattr(model, "metadata", {}) or {})
    out = {"mean": float(model.mean)}
    if getattr(model, "datum", None):
        out["datum"] = model.datum
    trend = getattr(model, "trend", 0.0)
    if meta.get("trend_epoch") is not None:
        out["trend"] = float(trend or 0.0)
    out["constituents"] = [dict(c) for c in _constituent_dicts(model)]
    for key in ("rms", "variance_explained", "record_start", "record_end", "n_samples", "duration_days",
                "sample_interval_s", "rayleigh", "method", "robust_reason", "confidence", "trend_epoch", "dropped",
                "inferred"):
        if key in meta:
            out[key] = meta[key]
    out["units"] = {"mean": "m", "amplitude": "m", "phase": "deg (Greenwich, UTC)", "speed": "deg/h",
                    "rms": "m", "trend": "m/year"}
    out["caution"] = CAUTION
    return out


def _constituent_dicts(model):
    for c in model.constituents:
        yield c if isinstance(c, dict) else dict(vars(c))


def _table(model, source) -> str:
    meta = dict(getattr(model, "metadata", {}) or {})
    conf = meta.get("confidence")
    ci = f"±{conf * 100:.0f}%" if conf else "±CI"
    rows = [
        f"Harmonic constants from {source} (phases: Greenwich lag, UTC)",
        f"record {meta.get('record_start', '?')} to {meta.get('record_end', '?')}, "
        f"{meta.get('n_samples', '?')} samples, {meta.get('duration_days', float('nan')):.1f} days, "
        f"Rayleigh factor {meta.get('rayleigh', float('nan')):g}, {meta.get('method', '')}",
        f"mean level {model.mean:.4f} m"
        + (f" above {datum_words(model.datum)}" if getattr(model, "datum", None) else "")
        + f"; residual RMS {meta.get('rms', float('nan')):.4f} m; "
        f"variance explained {100 * meta.get('variance_explained', float('nan')):.2f} %",
    ]
    if meta.get("robust_reason"):
        rows.append(f"{meta.get('method', 'fit')}: {meta['robust_reason']}")
    if meta.get("trend_epoch"):
        rows.append(f"trend {model.trend * 1000:.2f} mm/year about {meta['trend_epoch']}")
    rows.append("")
    head = ("name", "speed[deg/h]", "amplitude[m]", f"{ci}[m]", "phase[deg]", f"{ci}[deg]", "SNR")
    rows.append(f"{head[0]:<6} {head[1]:>13} {head[2]:>12} {head[3]:>10} {head[4]:>10} {head[5]:>10} {head[6]:>9}")
    for c in _constituent_dicts(model):
        def num(key, fmt):
            v = c.get(key)
            return format(v, fmt) if v is not None else "-"
        rows.append(f"{c['name']:<6} {num('speed', '13.7f')} {num('amplitude', '12.4f')} "
                    f"{num('amplitude_ci', '10.4f')} {num('phase', '10.2f')} {num('phase_ci', '10.2f')} "
                    f"{num('snr', '9.3g')}")
    inferred = meta.get("inferred") or []
    if inferred:
        rows.append("")
        rows.append(f"{len(inferred)} constituent(s) inferred, not fitted (the record cannot resolve them; "
                    "amplitude and phase taken from a fitted neighbour, Foreman 1977):")
        for d in inferred:
            rows.append(f"  {d['name']} from {d['from']}: amplitude x {d['ratio']:.3f}, phase "
                        f"{d['phase_difference']:+.1f} deg ({d['source']})")
    dropped = meta.get("dropped") or []
    weak = [d for d in dropped if d["reason"].startswith("long-period")]
    if weak:
        rows.append("")
        rows.append(f"{len(weak)} long-period constituent(s) left out as not significant:")
        rows += [f"  {d['name']}: {d['reason']}" for d in weak]
    short = [d for d in dropped if not d["reason"].startswith("long-period")]
    if short:
        rows.append("")
        rows.append(f"{len(short)} constituent(s) left out (record length or sampling): "
                    + ", ".join(d["name"] for d in short[:12]) + (" ..." if len(short) > 12 else ""))
    rows.append("")
    rows.append(CAUTION)
    return "\n".join(rows) + "\n"


def run_fit(args) -> int:
    """Run ``quaywatch fit``; returns the exit code."""
    if args.rayleigh is not None and not args.rayleigh > 0:
        raise UserError(f"--rayleigh {args.rayleigh}: must be a positive number")
    times, levels, notes = read_level_csv(args.obs, tz=args.tz)
    for note in notes:
        print(note, file=sys.stderr)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", FitConditioningWarning)
        try:
            robust = {"auto": "auto", "on": True, "off": False}[args.robust]
            model = harmonic_fit(times, levels, rayleigh=args.rayleigh or 1.0, trend=args.trend,
                                 robust=robust, infer=None if args.infer == "none" else args.infer)
        except FitInputError as exc:
            raise UserError(f"{args.obs}: {exc}") from None
    for w in caught:
        print(f"{args.obs}: warning: {w.message}", file=sys.stderr)
    if args.datum:
        model.datum = args.datum
    if args.output:
        try:
            model.save(args.output)
        except OSError as exc:
            raise UserError(f"-o {args.output}: cannot write ({exc.strerror})") from None
        if not args.datum:
            print(f"{args.obs}: note: the constants file does not say which datum its mean is on; give "
                  "--datum NAME (the datum of the levels in the CSV, e.g. station or chart) so a station "
                  "can check it against its own", file=sys.stderr)
    if args.json:
        json.dump(model_summary(model), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(_table(model, args.obs))
        if args.output:
            print(f"constants written to {args.output}", file=sys.stderr)
    if args.infer == "none":
        unresolved = [d["name"] for d in model.metadata.get("dropped", ())
                      if d["name"] in ("P1", "K2", "N2", "Q1") and d["reason"].startswith("not resolved")]
        if unresolved:
            print(f"{args.obs}: note: the record is too short to resolve {', '.join(unresolved)} from their "
                  "neighbours, which absorb them; without '--infer none' they are taken at equilibrium "
                  "ratios (Foreman 1977).", file=sys.stderr)
    return 0


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``fit`` verb to the ``quaywatch`` sub-command parsers."""
    p = subparsers.add_parser(
        "fit", help="harmonic constants from a CSV of observed levels",
        description="Fit harmonic tidal constants (mean, amplitudes, Greenwich phase lags in UTC) to "
        "a CSV with the header 'time,level' (ISO 8601 times with Z or an offset; levels in metres). "
        "Constituents are chosen by the Rayleigh criterion for the record length. " + CAUTION)
    p.add_argument("obs", metavar="OBS.csv", help="observed levels: header 'time,level'")
    p.add_argument("-o", "--output", metavar="CONSTANTS.toml", help="write the constants file (TOML)")
    p.add_argument("--json", action="store_true", help="print the constants as JSON")
    p.add_argument("--tz", metavar="ZONE", help="IANA time zone for times written without one")
    p.add_argument("--robust", nargs="?", const="on", default="auto", choices=("auto", "on", "off"),
                   help="down-weight storms and outliers (iteratively reweighted least squares): 'auto' "
                   "(default) when the least-squares residual is heavy-tailed, '--robust' or 'on' always, "
                   "'off' never; the output says which and why")
    p.add_argument("--rayleigh", type=float, metavar="R", default=None,
                   help="Rayleigh factor for choosing constituents (default 1)")
    p.add_argument("--trend", action="store_true", help="also fit a linear trend (m/year)")
    p.add_argument("--infer", choices=("none", "auto", "equilibrium"), default="auto",
                   help="infer constituents the record cannot resolve from a fitted neighbour at "
                   "equilibrium ratios: 'auto' (default, as refit and the daemon) P1 from K1, K2 from S2, "
                   "NU2 from N2, and N2 from M2 and Q1 from O1 in records under 27.6 days, each only when "
                   "needed; 'equilibrium' every known pair; 'none' fits only what the record resolves")
    p.add_argument("--datum", metavar="NAME", type=_datum_name,
                   help="the datum the CSV's levels are on (e.g. station, chart); recorded in the "
                   "constants file so a station can check it or add its offset")
    p.set_defaults(func=run_fit)
    return p


def _datum_name(text: str) -> str:
    """argparse type: a datum name as the configuration writes them."""
    name = text.strip()
    if not re.fullmatch(r"[a-z0-9][a-z0-9_-]{0,39}", name):
        raise argparse.ArgumentTypeError(f"expected a datum name of lower-case letters, digits, '-' or '_' "
                                         f"such as station or chart, got {text!r}")
    return name
