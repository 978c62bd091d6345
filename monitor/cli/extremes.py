"""The ``extremes`` verb: how rare was this water, and is the sea rising here.

Return levels by two routes side by side (annual maxima with a GEV fit; declustered skew
surges with a GPD joined with the predicted high waters), their 95 % bands, the return period
of a level or of an event, threshold diagnostics, and the sea-level trend, all from the
station's own QC-passed record (:mod:`monitor.service.extremes`).
"""
from __future__ import annotations

import argparse
import json
import math
import sys

import pandas as pd

from monitor.cli.common import CAUTION, finite_float, positive_int, store_errors, table
from monitor.cli.timeparse import parse_time
from monitor.cli.errors import UserError
from monitor.service import extremes as se
from monitor.service.config import load_config
from monitor.service.constants import load_model
from monitor.store.database import Store
from predictor import extremes as ex

__all__ = ["register", "cmd_extremes", "render_text"]


def _period(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a return period in years, got {text!r}") from None
    if not (v > 1.0 and math.isfinite(v)):
        raise argparse.ArgumentTypeError(f"a return period must be more than 1 year, got {text!r}")
    return v


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "extremes", help="return levels, return periods and the sea-level trend from a station's record",
        description="How rare was this water, and is the sea rising here: return levels from the station's "
                    "own QC-passed record by annual maxima (GEV) and by skew-surge joint probability (GPD of "
                    "declustered storms joined with the predicted high waters), with 95 %% bands; the return "
                    "period of a level or an event; threshold diagnostics; and the linear trend of monthly "
                    "mean sea level. Levels on the station's display datum. " + CAUTION)
    p.add_argument("config", metavar="CONFIG")
    p.add_argument("--station", required=True, metavar="ID")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    p.add_argument("--level", type=finite_float, action="append", default=[], metavar="X",
                   help="also give the return period of level X [m on the display datum] (repeatable)")
    p.add_argument("--event", action="append", default=[], metavar="ISO",
                   help="also give the return period of the highest water within a day of this time "
                        "(ISO 8601; no offset: the station's local time; repeatable)")
    p.add_argument("--return-periods", nargs="+", type=_period, metavar="YEARS",
                   help="return periods of the curve (default 2 5 10 20 50 100 200)")
    p.add_argument("--datum-step", action="append", default=[], metavar="ISO",
                   help="a known change of the gauge's zero from the station log (repeatable); steps "
                        "found by quality control are used as well")
    p.add_argument("--split-at-steps", action="store_true",
                   help="fit a trend per segment between datum steps instead of correcting them in one fit")
    p.add_argument("--run-length", type=finite_float, default=48.0, metavar="HOURS",
                   help="storms closer than this are one storm (default 48)")
    p.add_argument("--threshold", type=finite_float, metavar="M",
                   help="skew-surge threshold [m] (default: the 0.99 quantile; see the diagnostics)")
    p.add_argument("--bootstrap", type=positive_int, default=None, metavar="N",
                   help="year-block bootstrap replicates of the joint-probability band (default 400)")
    p.add_argument("--fresh", action="store_true", help="compute again even if nothing new has come")
    p.set_defaults(func=store_errors(cmd_extremes))


def cmd_extremes(args: argparse.Namespace) -> int:
    cfg = load_config(args.config)
    st = cfg.station(args.station)
    steps = tuple(parse_time(s, "--datum-step", st.tz).isoformat() for s in args.datum_step)
    events = [parse_time(s, "--event", st.tz) for s in args.event]
    periods = tuple(sorted(set(args.return_periods))) if args.return_periods else ex.DEFAULT_PERIODS
    opts = se.Options(periods=periods, datum_steps=steps,
                      step_handling="split" if args.split_at_steps else "correct",
                      run_length_h=float(args.run_length), threshold=args.threshold,
                      bootstrap=args.bootstrap if args.bootstrap is not None else ex.DEFAULT_BOOTSTRAP)
    if not cfg.store_path.exists():
        raise UserError(f"{args.config}: store.path {cfg.store_path} does not exist yet (ingest data first)")
    with Store.open(cfg.store_path, create=False) as store:
        model, _ = load_model(store, st)
        need_fits = bool(args.level or events)
        result, _fresh = se.cached_analysis(store, st, model, opts, st.qc, refresh=args.fresh or need_fits)
        asked = [se.period_of(result, x) for x in args.level]
        if events:
            record = se.read_record(store, st.id)
            for when in events:
                ev = se.event_level(record, result, pd.Timestamp(when).tz_convert("UTC"))
                asked.append({**se.period_of(result, ev["level_today"]), "event": ev})
    out = se.public(result)
    out["asked"] = [se.public(a) for a in asked]
    out["caution"] = CAUTION
    if args.json:
        json.dump(out, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        print(render_text(out, periods))
    return 0


# ---------------------------------------------------------------------------- text
def _m(v) -> str:
    return "no upper end" if v is None else f"{v:.2f}"


def _yr(v) -> str:
    if v is None:
        return "longer than any"
    return f"{v:,.0f}" if v >= 10 else f"{v:.1f}"


def render_text(out: dict, periods) -> str:
    """The verb's text: record, trend, both routes side by side, diagnostics, warnings."""
    datum = out["datum"]
    rec = out["record"]
    c = rec["samples"]
    lines = [f"Station {out['station']}: how rare was this water, and is the sea rising here",
             f"Levels in metres above {datum}. Record {rec['first'][:10]} to {rec['last'][:10]} "
             f"({rec['years_of_hours']:.1f} years of hours with data).",
             f"Used: {c['passed']:,} samples that passed quality control; left out {c['suspect']:,} suspect, "
             f"{c['fail']:,} failed, {c['missing']:,} missing, {c['not_evaluated']:,} not yet evaluated."]
    if "highest_left_out" in rec:
        lines.append("NOTE: " + rec["highest_left_out"]["note"] + ".")
    lines += ["", "Sea-level trend", "---------------", out["sea_level"]["rule"]]
    sea = out["sea_level"]
    tr = sea.get("trend")
    if tr:
        lines.append(f"{sea['days']:,} days, {sea['months']} months and {sea['years']} years count.")
        lines += tr["notes"]
        if tr.get("segments"):
            lines += [f"  segment {s['start'][:7]} to {s['end'][:7]}: {s['rate_mm_per_year']:.2f} +- "
                      f"{s['se_mm_per_year']:.2f} mm/year ({s['n_months']} months)" for s in tr["segments"]]
        for s in tr.get("steps", []):
            lines.append(f"  datum step at {s['time'][:16]}Z: {s['offset_mm']:+.1f} +- {s['se_mm']:.1f} mm (corrected)")
    else:
        lines.append(sea.get("note", "no trend"))
    if out["datum_steps"]:
        lines.append("Datum steps: " + "; ".join(f"{d['time'][:16]}Z ({d['source']})" for d in out["datum_steps"]))
    else:
        lines.append("Datum steps: none found by quality control and none given.")
    lines += ["", "Return levels", "-------------", out.get("stationary", "")]
    am, jp = out.get("annual_maxima", {}), out.get("joint_probability", {})
    curves = {}
    for key, route in (("am", am), ("jp", jp)):
        curves[key] = {r["period"]: r for r in route.get("curve", [])}
    rows = []
    for p in periods:
        row = [f"{p:g}"]
        for key in ("am", "jp"):
            r = curves[key].get(float(p))
            row += ([f"{r['level']:.2f}", f"{r['lower']:.2f} to {_m(r['upper'])}"] if r else ["-", "-"])
        rows.append(row)
    lines.append(table(rows, ["years", "annual max", "95 % band", "joint prob.", "95 % band"], right=(0, 1, 3)))
    lines.append(f"Annual maxima: {am.get('error') or am['method']}" +
                 (f"; {am['years']} years, GEV location {am['location']:.3f} m, scale {am['scale']:.3f} m, "
                  f"shape {am['shape']:+.3f}" if "years" in am else ""))
    lines.append(f"Joint probability: {jp.get('error') or jp['method']}" +
                 (f"; threshold {jp['threshold_m']:.3f} m, {jp['storms']} storms ({jp['storms_per_year']:.1f} a "
                  f"year), extremal index {jp['extremal_index']:.2f}, GPD scale {jp['scale']:.3f} m, shape "
                  f"{jp['shape']:+.3f}; band: {jp['band']}" if "storms" in jp else ""))
    warned = {r.get("warning") for route in (am, jp) for r in route.get("curve", []) if r["period"] in periods}
    warned.discard(None)
    for w in sorted(warned):
        lines.append("WARNING: " + w)
    for a in out.get("asked", []):
        lines.append("")
        if "event" in a:
            ev = a["event"]
            lines.append(f"Event near {ev['time'][:16]}Z: highest water {ev['level']:.2f} m, "
                         f"{ev['level_today']:.2f} m on today's sea")
        else:
            lines.append(f"Level {a['level']:.2f} m:")
        for key, name in (("annual_maxima", "annual maxima"), ("joint_probability", "joint probability")):
            r = a.get(key)
            if r:
                lines.append(f"  {name}: return period {_yr(r['period'])} years, range {_yr(r['lower'])} to "
                             f"{_yr(r['upper'])} years" + (f". WARNING: {r['warning']}" if r.get("warning") else ""))
    td = out.get("threshold_diagnostics")
    if td:
        lines += ["", "Threshold diagnostics (skew surges)", "-----------------------------------", td["note"] + "."]
        rows = [[f"{r['threshold']:.3f}", r["storms"], _f(r["shape"], "+.2f"),
                 f"{_f(r['shape_lower'], '+.2f')} to {_f(r['shape_upper'], '+.2f')}", _f(r["modified_scale"], ".3f"),
                 _f(r["mean_excess"], ".3f")] for r in td["rows"]]
        lines.append(table(rows, ["threshold m", "storms", "shape", "95 % range", "mod. scale m", "mean excess m"],
                           right=(0, 1, 2, 4, 5)))
    if out.get("warnings"):
        lines += [""] + ["WARNING: " + w for w in out["warnings"]]
    lines += ["", CAUTION]
    return "\n".join(lines)


def _f(v, fmt: str) -> str:
    return "-" if v is None or (isinstance(v, float) and math.isnan(v)) else format(v, fmt)
