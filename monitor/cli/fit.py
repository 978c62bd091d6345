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

import numpy as np

from monitor.cli.errors import UserError
from monitor.cli.timeparse import zone as _zone
from monitor.feeds.csvfile import read_level_csv
from monitor.service.config import datum_words
from predictor.caution import ANALYSIS as CAUTION
from predictor.fit import FitConditioningWarning
from predictor.fit import FitInputError
from predictor.fit import harmonic_fit

__all__ = ["CAUTION", "register", "run_fit", "model_summary"]


#: Widest tidal range a gauge reads in metres: the largest known (about 16 m, Bay of Fundy,
#: from memory) with room for a storm surge on top [m].
MAX_RANGE_M = 25.0
#: Farthest a record's mean may stand from the datum its levels are on [m]: chart datum and
#: gauge zeros sit near the lowest water, a few metres below the mean (common practice, no source).
MAX_MEAN_M = 100.0
_UNITS = (("centimetres", 100.0), ("millimetres", 1000.0))


def check_metres(path, levels: np.ndarray) -> None:
    """Refuse levels that no tide gauge reads in metres, naming the unit they look like.

    The spread is taken between the 0.5th and 99.5th percentiles, so a few wild values do
    not decide it. A record passes when that range is at most :data:`MAX_RANGE_M` and its
    median at most :data:`MAX_MEAN_M` from zero.

    Raises
    ------
    UserError
        Naming the file, the range and mean found, and the unit (centimetres or millimetres)
        under which the numbers would be a plausible tide.

    References
    ----------
    Pugh, D., Woodworth, P. (2014). Sea-Level Science, ch. 1: the largest tidal ranges, about
    16 m in the Bay of Fundy (from memory). The mean's limit is common practice, no source.
    """
    lo, mid, hi = np.nanpercentile(levels, [0.5, 50.0, 99.5])
    spread = float(hi - lo)
    if spread <= MAX_RANGE_M and abs(float(mid)) <= MAX_MEAN_M:
        return
    guess = next((name for name, div in _UNITS
                  if spread / div <= MAX_RANGE_M and abs(float(mid)) / div <= MAX_MEAN_M), None)
    looks = (f"the numbers look like {guess}; convert the levels to metres (divide by "
             f"{100 if guess == 'centimetres' else 1000})" if guess else
             "the numbers are not a tide in metres")
    raise UserError(f"{path}: levels range over {spread:g} and centre on {float(mid):g}: no tide gauge "
                    f"reads that in metres (a range above {MAX_RANGE_M:g} m or a mean more than "
                    f"{MAX_MEAN_M:g} m from its datum); {looks}")


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


#: Tidal bands by cycles per day (speed / 15 deg/h, rounded), in the order printed.
_BANDS = {2: "Twice a day (semidiurnal)", 1: "Once a day (diurnal)", 0: "Long period (days to a year)",
          3: "Three times a day (terdiurnal)", 4: "Four times a day (quarter-diurnal)"}
_HIGHER = "Five or more times a day (shallow water)"


def _band(speed: float | None) -> str:
    """The band a constituent's speed [deg/h] falls in (15 deg/h = one cycle a day)."""
    if speed is None:
        return _HIGHER
    return _BANDS.get(int(round(float(speed) / 15.0)), _HIGHER)


def _judgement(c: dict, inferred: dict) -> str:
    """``resolved`` when the amplitude stands clear of its interval (the interval does not
    reach zero), ``too weak to tell from noise`` when it does; inferred ones say so."""
    if c["name"] in inferred:
        return f"inferred from {inferred[c['name']]}"
    amp, ci = c.get("amplitude"), c.get("amplitude_ci")
    if amp is None or ci is None:
        return "not judged (no interval)"
    if amp < 0.0005:
        return "under a millimetre"
    return "resolved" if amp > ci else "too weak to tell from noise"


def _with_interval(values: list, halves: list, fmt: str, unit: str) -> list[str]:
    """``1.100 ± 0.004 m`` for each value, the numbers aligned on their ``±``."""
    v = [format(x, fmt) if x is not None else "-" for x in values]
    h = [format(x, fmt) if x is not None else "" for x in halves]
    wv, wh = max(map(len, v)), max(map(len, h))
    return [f"{a:>{wv}} \u00b1 {b:>{wh}}{unit}" if b else f"{a:>{wv}}{' ' * (wh + 3)}{unit}"
            for a, b in zip(v, h)]


def _table(model, source) -> str:
    """The printout of ``fit``: constituents grouped by tidal band, each amplitude and phase
    with its interval in one column and a plain judgement; the record summary at the end."""
    meta = dict(getattr(model, "metadata", {}) or {})
    conf = meta.get("confidence")
    level = f"{conf * 100:.0f} %" if conf else "confidence"
    inferred = {d["name"]: d["from"] for d in meta.get("inferred") or []}
    rows = [f"Tidal constants fitted to {source}",
            f"Amplitudes in metres and phases in degrees (Greenwich phase lag, times in UTC), each "
            f"with its {level} interval.",
            "",
            f"Mean level {model.mean:.3f} m"
            + (f" above {datum_words(model.datum)}" if getattr(model, "datum", None) else "")]
    if meta.get("trend_epoch"):
        rows.append(f"Trend {model.trend * 1000:.2f} mm a year about {meta['trend_epoch']}")
    groups: dict[str, list[dict]] = {}
    for c in _constituent_dicts(model):
        groups.setdefault(_band(c.get("speed")), []).append(c)
    width = max((len(c["name"]) for g in groups.values() for c in g), default=4)
    for band in [*_BANDS.values(), _HIGHER]:
        members = sorted(groups.get(band, []), key=lambda c: -(c.get("amplitude") or 0.0))
        if not members:
            continue
        rows += ["", band]
        amps = _with_interval([c.get("amplitude") for c in members],
                              [c.get("amplitude_ci") for c in members], ".3f", " m")
        phases = _with_interval([c.get("phase") for c in members],
                                [c.get("phase_ci") for c in members], ".1f", "\u00b0")
        rows += [f"  {c['name']:<{width}}  {a}   {p}   {_judgement(c, inferred)}"
                 for c, a, p in zip(members, amps, phases)]
    rows += ["", "\"resolved\": the amplitude stands clear of its interval (the interval does not reach "
             "zero); \"too weak to tell from noise\": it does, and its phase means little."]
    if inferred:
        rows.append("Inferred, not fitted (the record cannot separate them from a fitted neighbour; "
                    "taken at a published ratio, Foreman 1977): "
                    + "; ".join(f"{d['name']} = {d['from']} x {d['ratio']:.3f}, phase "
                                f"{d['phase_difference']:+.1f}\u00b0" for d in meta.get("inferred") or []) + ".")
    dropped = meta.get("dropped") or []
    weak = [d for d in dropped if d["reason"].startswith("long-period")]
    if weak:
        rows.append("Long-period constituents left out as not significant: "
                    + "; ".join(f"{d['name']} ({d['reason']})" for d in weak) + ".")
    short = [d for d in dropped if not d["reason"].startswith("long-period")]
    if short:
        rows.append(f"Left out for the record's length or sampling ({len(short)}): "
                    + ", ".join(d["name"] for d in short[:12]) + (" and more" if len(short) > 12 else "") + ".")
    rows += ["", "The record and the fit",
             f"  {meta.get('record_start', '?')} to {meta.get('record_end', '?')}: "
             f"{meta.get('duration_days', float('nan')):.1f} days, {meta.get('n_samples', '?')} samples",
             f"  constituents chosen so the record separates each from its neighbours "
             f"(Rayleigh factor {meta.get('rayleigh', float('nan')):g}); method: {meta.get('method', '?')}",
             f"  what is left after the fit: {meta.get('rms', float('nan')) * 1000:.1f} mm RMS; "
             f"the tide explains {100 * meta.get('variance_explained', float('nan')):.2f} % of the variance"]
    if meta.get("robust_reason"):
        rows.append(f"  {meta.get('method', 'fit')}: {meta['robust_reason']}")
    rows += ["", CAUTION]
    return "\n".join(rows) + "\n"


def run_fit(args) -> int:
    """Run ``quaywatch fit``; returns the exit code."""
    if args.rayleigh is not None and not args.rayleigh > 0:
        raise UserError(f"--rayleigh {args.rayleigh}: must be a positive number")
    times, levels, notes = read_level_csv(args.obs, tz=None if args.tz is None else _zone(args.tz))
    for note in notes:
        print(note, file=sys.stderr)
    check_metres(args.obs, levels)
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
