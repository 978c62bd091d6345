"""Tide verbs: ``predict``, ``table`` (high and low waters) and ``datums``.

The ``fit`` verb lives in :mod:`monitor.cli.fit` and is registered from here when
that module is present.  Each verb function takes the parsed ``args`` and returns an
exit code; bad input raises :class:`monitor.errors.UserError`.
"""
from __future__ import annotations

import argparse
import json
import sys

import numpy as np
import pandas as pd

from monitor.cli import fit as fit_verb
from monitor.cli.common import finite_float, input_file
from monitor.cli.errors import UserError
from monitor.cli.timeparse import offset_text, parse_date, parse_range, parse_time, zone
from monitor.service.config import datum_words
from monitor.service.config import load_config
from monitor.service.constants import load_model
from monitor.store.database import Store
from predictor.caution import PREDICTION as CAUTION
from predictor.datums import DATUM_DESCRIPTIONS
from predictor.datums import DATUM_ORDER
from predictor.datums import tidal_datums
from predictor.model import ConstantsFileError
from predictor.model import TideModel
from predictor.timeutil import parse_duration

__all__ = ["register", "run_predict", "run_table", "run_datums", "CAUTION", "parse_step"]


_ROWS_PER_WRITE = 200_000
_MAX_ROWS = 100_000_000  # about 190 years at one-minute steps


def parse_step(text: str) -> pd.Timedelta:
    """A positive step such as 60s, 6min, 10min or 1h, a whole number of seconds."""
    try:
        secs = parse_duration(text, positive=True, maximum=366 * 86400)
    except ValueError:
        raise UserError(f"--step {text!r}: not a time step above zero and below a year "
                        "(examples: 60s, 6min, 10min, 1h)") from None
    if secs != int(secs):
        raise UserError(f"--step {text!r}: the step must be a whole number of seconds")
    return pd.Timedelta(seconds=int(secs))


def _load(path):
    input_file(path, "constants file")
    try:
        return TideModel.load(path)
    except ConstantsFileError as exc:
        raise UserError(str(exc)) from None


class _Source:
    """The model a tide verb predicts from, and the datum its heights are printed on.

    With ``--config FILE --station ID``: the station's constants (its file, or its fit in use),
    on the station's display datum. With a constants file: the datum the file records, or
    words saying the file does not record one. ``--datum-offset``/``--datum-name`` shift and
    rename the file's heights by hand (not with ``--config``).
    """

    def __init__(self, args):
        cfg_path, sid = getattr(args, "config", None), getattr(args, "station", None)
        const = getattr(args, "constants", None)
        offset = float(getattr(args, "datum_offset", 0.0) or 0.0)
        name = getattr(args, "datum_name", None)
        if cfg_path or sid:
            if not (cfg_path and sid):
                raise UserError("--config and --station go together: the station's constants, on its display datum")
            if const:
                raise UserError(f"{const}: give either a constants file or --config FILE --station ID, not both")
            if offset or name:
                raise UserError("--datum-offset/--datum-name: not with --config; the station's display datum "
                                "(stations[].display_datum) is used")
            self._from_station(cfg_path, sid)
            return
        if not const:
            raise UserError("give a constants file, or --config FILE --station ID")
        self.model = _load(const)
        self.source = str(const)
        self.shift = -offset  # printed = predicted - shift
        recorded = getattr(self.model, "datum", None)
        if name:
            self.datum = name
        elif offset:
            self.datum = "the chosen datum"
        elif recorded:
            self.datum = _words(recorded)
        else:
            self.datum = "the constants' datum (the file does not record which)"
        self.note = ""

    def _from_station(self, cfg_path: str, sid: str) -> None:
        cfg = load_config(cfg_path)
        st = cfg.station(sid)
        if st.constants is not None:
            model, source = load_model(None, st)
        else:
            with Store.open(cfg.store_path, create=False) as store:
                model, source = load_model(store, st)
            if model is None:
                raise UserError(f"station {st.id}: no constants yet ({source})")
        self.model = model
        self.source = f"station {st.id} ({source})"
        self.shift = st.display_offset
        self.datum = st.display_label
        self.note = st.datum_note

    def heights(self, levels):
        """Predicted levels [m, model datum] as printed [m, the named datum]."""
        return np.asarray(levels, dtype=float) - self.shift

    def describe(self) -> str:
        return f"heights [m] above {self.datum}" + (f" ({self.note})" if self.note else "")


def _words(datum: str) -> str:
    return datum_words(datum)


# --------------------------------------------------------------------------- predict


def run_predict(args) -> int:
    """``quaywatch predict``: CSV ``time,level`` (UTC, Z) from start to end, both included."""
    tz = zone(args.tz) if args.tz else None
    start, end = parse_range(args.start, args.end, tz, start_option="--start", end_option="--end",
                             hint="or give --tz")
    step = parse_step(args.step)
    n = int((end.value - start.value) // step.value) + 1
    if n > _MAX_ROWS:
        raise UserError(f"--start/--end/--step: {n:,} rows asked for; at most {_MAX_ROWS:,} at a time "
                        "(a longer step or a shorter span)")
    src = _Source(args)
    model = src.model
    step_ns = np.int64(step.value)
    start_ns = np.int64(start.value)
    whole = start.value % 1_000_000_000 == 0
    out = sys.stdout
    out.write("time,level\n")
    for i in range(0, n, _ROWS_PER_WRITE):
        k = np.arange(i, min(n, i + _ROWS_PER_WRITE), dtype=np.int64)
        times = (start_ns + k * step_ns).astype("datetime64[ns]")
        level = src.heights(model.predict(times))
        stamps = np.datetime_as_string(times, unit="s" if whole else "ms")
        out.write("".join(f"{s}Z,{v:.4f}\n" for s, v in zip(stamps, level)))
    out.flush()
    # stdout stays pure CSV for scripts; the datum and the caution go to the terminal
    print(f"predicted tide from {src.source}: {src.describe()}", file=sys.stderr)
    print(CAUTION, file=sys.stderr)
    return 0


# --------------------------------------------------------------------------- table


def run_table(args) -> int:
    """``quaywatch table``: high and low waters in local time, aligned, with units."""
    tz = zone(args.tz or "UTC")
    if args.days <= 0 or args.days > 400:
        raise UserError(f"--days {args.days}: give a number of days from 1 to 400")
    if args.start:
        first = parse_date(args.start, "--start")
    else:
        first = pd.Timestamp.now(tz=tz).date()
    # midnight can be skipped by a clock change in a few zones: the day starts at the first
    # local time that exists
    day = pd.Timestamp(first).tz_localize(tz, nonexistent="shift_forward", ambiguous=True)
    start = day.tz_convert("UTC")
    end = (day.tz_convert(tz) + pd.DateOffset(days=args.days)).tz_convert("UTC")
    src = _Source(args)
    model = src.model
    try:
        events = model.high_low(start, end, step="10min")
    except ValueError as exc:
        raise UserError(str(exc)) from None
    offset = -src.shift

    when = (f"times: local, {tz.key} (its offset from UTC beside each time)" if args.tz else
            "times: UTC (no --tz given; give --tz ZONE for local times)")
    lines = [
        f"High and low waters from {src.source}",
        f"{when}; {src.describe()}"
        + (f" (constants' levels {offset:+.3f} m)" if offset and not getattr(args, "config", None) else ""),
        "",
        f"{'date':<15} {'time':>5} {'offset':>6}  {'tide':<4} {'height [m]':>10}",
    ]
    last_date = None
    notes = _stand_notes(events)
    for row, note in zip(events.itertuples(), notes):
        # to the nearest minute (the turning point is computed to the second)
        local = row.time.round("min").tz_convert(tz)
        date = local.strftime("%a %Y-%m-%d")
        shown = date if date != last_date else ""
        last_date = date
        lines.append((f"{shown:<15} {local.strftime('%H:%M'):>5} {offset_text(local.utcoffset()):>6}  "
                      f"{('HW' if row.kind == 'high' else 'LW'):<4} {float(src.heights(row.level)):>10.2f}  "
                      f"{note}").rstrip())
    if events.empty:
        lines.append("(no high or low water in this period)")
    lines += ["", "HW high water, LW low water; astronomical tide only: weather can change levels and times a lot."]
    if any(notes):
        lines.append("A double high (low) water is one stand: both peaks are listed, the higher (lower) one is its "
                     "high (low) water, and the small dip (rise) between them is no tide (NOAA 2003).")
    lines.append(CAUTION)
    sys.stdout.write("\n".join(lines) + "\n")
    return 0


def _stand_notes(events: pd.DataFrame) -> list[str]:
    """A note per row marking the peaks of a double high (or low) water as one stand."""
    if events.empty or "stand" not in events:
        return [""] * len(events)
    size = events.groupby("stand")["stand"].transform("size").to_numpy()
    nth = events.groupby("stand").cumcount().to_numpy()
    out = []
    for row, k, i in zip(events.itertuples(), size, nth):
        if k < 2:
            out.append("")
            continue
        what = "double HW" if row.kind == "high" else "double LW"
        word = "higher" if row.kind == "high" else "lower"
        out.append(f"{what}, peak {i + 1} of {k}" + (f" ({word})" if row.principal else ""))
    return out


# --------------------------------------------------------------------------- datums


#: The ranges among the datums, and their names in ``datums --json``.
_RANGES = {"MN": "mean_range", "GT": "diurnal_range"}
DATUMS_METHOD = ("every high and low water of the predicted astronomical tide over the period, one "
                 "of each per tidal cycle (the dip inside a double high water is not a low water); "
                 "MHW and MLW are their means, MHHW and MLLW the means of each tidal day's higher high "
                 "and lower low water, MTL halfway between MHW and MLW, MSL the mean of the tide, HAT "
                 "and LAT its highest and lowest.")


def run_datums(args) -> int:
    """``quaywatch datums``: tidal datums from an 18.61-year prediction."""
    src = _Source(args)
    model = src.model
    start = parse_time(args.start, "--start", "UTC") if args.start else None
    if not 0 < args.years <= 100:
        raise UserError(f"--years {args.years}: give a period from 0 to 100 years (18.61 is the nodal cycle)")
    d = tidal_datums(model, start=start, years=args.years)
    offset = -src.shift
    levels = {k: d[k] + offset for k in DATUM_ORDER if k not in _RANGES}
    ranges = {name: d[k] for k, name in _RANGES.items()}
    if args.json:
        doc = {
            "datums": levels,
            "ranges": ranges,
            "units": "m",
            "reference": src.datum,
            "datum_offset": offset,
            "source": src.source,
            "period": {"start": d["start"], "end": d["end"], "years": args.years},
            "method": DATUMS_METHOD,
            "caution": CAUTION,
        }
        sys.stdout.write(json.dumps(doc, indent=2) + "\n")
        return 0
    lines = [
        f"Tidal datums from {src.source}",
        f"prediction {d['start']} to {d['end']} ({args.years:g} years); {src.describe()}"
        + (f" (constants' levels {offset:+.3f} m)" if offset and not getattr(args, "config", None) else ""),
        "",
        f"{'datum':<6} {'height [m]':>10}  description",
    ]
    lines += [f"{k:<6} {levels[k]:>10.3f}  {DATUM_DESCRIPTIONS[k]}" for k in levels]
    lines += ["", "Ranges (no datum: a difference of two levels)"]
    lines += [f"  {DATUM_DESCRIPTIONS[k].split(':')[0]:<14} {ranges[name]:>6.3f} m  "
              f"{DATUM_DESCRIPTIONS[k].split(': ', 1)[1]}" for k, name in _RANGES.items()]
    lines += ["", "How: " + DATUMS_METHOD]
    lines += ["", CAUTION]
    sys.stdout.write("\n".join(lines) + "\n")
    return 0


# --------------------------------------------------------------------------- register


def _source_options(p) -> None:
    p.add_argument("constants", metavar="CONSTANTS.toml", nargs="?",
                   help="harmonic constants (TOML); or give --config and --station instead")
    p.add_argument("--config", metavar="FILE", help="a quaywatch configuration: predict for --station ID on its "
                   "display datum (chart datum where its offset is given)")
    p.add_argument("--station", metavar="ID", help="the station of --config")


def register(subparsers) -> None:
    """Add ``fit``, ``predict``, ``table``, ``datums``."""
    fit_verb.register(subparsers)

    p = subparsers.add_parser(
        "predict", help="predicted tide as CSV time,level",
        description="Predict the astronomical tide from a constants file: CSV 'time,level' with UTC "
        "ISO 8601 times ending in Z, one row per step, both ends included. " + CAUTION)
    _source_options(p)
    p.add_argument("--start", required=True, metavar="ISO", help="first time, with Z or an offset")
    p.add_argument("--end", required=True, metavar="ISO", help="last time, with Z or an offset")
    p.add_argument("--step", default="10min", metavar="STEP", help="time step: 60s, 6min, 10min, 1h (default 10min)")
    p.add_argument("--tz", metavar="ZONE", help="IANA time zone for --start/--end written without one")
    p.set_defaults(func=run_predict)

    p = subparsers.add_parser(
        "table", help="high and low waters in local time",
        description="High and low water times and heights in local time. " + CAUTION)
    _source_options(p)
    p.add_argument("--days", type=int, default=7, help="number of days (default 7)")
    p.add_argument("--start", metavar="DATE", help="first local day, e.g. 2025-03-01 (default today)")
    p.add_argument("--tz", metavar="ZONE", help="IANA time zone for the times shown (default UTC)")
    p.add_argument("--datum-offset", type=finite_float, default=0.0, metavar="M",
                   help="metres added to every height, e.g. the constants' datum above chart datum")
    p.add_argument("--datum-name", metavar="NAME", help="name of the datum the heights refer to, e.g. 'chart datum'")
    p.set_defaults(func=run_table)

    p = subparsers.add_parser(
        "datums", help="tidal datums (HAT, MHHW, MHW, MSL, MLW, MLLW, LAT, ...)",
        description="Tidal datums from an 18.61-year prediction of the astronomical tide. " + CAUTION)
    _source_options(p)
    p.add_argument("--json", action="store_true", help="print JSON")
    p.add_argument("--start", metavar="ISO", help="start of the period (default 2000-01-01, UTC)")
    p.add_argument("--years", type=finite_float, default=18.61, help="length of the period in years (default 18.61)")
    p.add_argument("--datum-offset", type=finite_float, default=0.0, metavar="M", help="metres added to every level")
    p.add_argument("--datum-name", metavar="NAME", help="name of the datum the heights refer to")
    p.set_defaults(func=run_datums)


if __name__ == "__main__":  # pragma: no cover
    parser = argparse.ArgumentParser(prog="quaywatch")
    register(parser.add_subparsers(dest="verb", required=True))
    a = parser.parse_args()
    sys.exit(a.func(a))
