"""The ``fit`` verb: harmonic constants from a CSV of observed levels.

``quaywatch fit OBS.csv [-o CONSTANTS.toml] [--json] [--tz ZONE] [--robust] [--rayleigh R]
[--trend] [--infer auto|equilibrium|none] [--robust [auto|on|off]]``. The CSV is read by
:func:`monitor.feeds.csvfile.read_level_csv`.
"""
from __future__ import annotations

import argparse
import json
import re
import sys
import warnings


from monitor.cli.errors import UserError
from monitor.cli.timeparse import zone as _zone
from monitor.feeds.csvfile import read_level_csv
from monitor.service.config import datum_words
from predictor.caution import ANALYSIS as CAUTION
from predictor.fit import FitConditioningWarning
from predictor.fit import FitInputError
from predictor.fit import harmonic_fit

__all__ = ["CAUTION", "register", "run_fit", "model_summary"]


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
    times, levels, notes = read_level_csv(args.obs, tz=None if args.tz is None else _zone(args.tz))
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
