"""``quaywatch qc``, ``quaywatch staff add|list`` and ``quaywatch flag``.

``qc`` re-evaluates the quality flags of a station for a period (writing them, as the
daemon does), then prints a summary per sensor and test, the worst episodes, and the
diagnostics a gauge technician needs, in the station's local time. ``staff`` keeps
tide-staff readings; ``flag`` records a technician's own verdict on samples.

Output is automated and unofficial: official warnings and the local emergency
authorities come first; defer to local codes and licensed practice.
"""
from __future__ import annotations

import argparse

import numpy as np
import pandas as pd

from alerts.reports.model import QC_TEST_NAMES
from monitor.cli.common import CAUTION, count, finite_float, store_errors
from monitor.cli.common import table as _common_table
from monitor.cli.errors import UserError
from monitor.cli.timeparse import asked_zone
from monitor.cli.timeparse import local_text as _local
from monitor.cli.timeparse import parse_range, parse_time
from monitor.quality import checks as qc
from monitor.quality import diagnostics as dg
from monitor.quality import records as qc_records
from monitor.service.config import load_config
from monitor.service.constants import load_model
from monitor.store.database import Store
from predictor.timeutil import index_seconds



def register(subparsers) -> None:
    p = subparsers.add_parser("qc", help="quality flags and gauge diagnostics of a station for a period",
                              description="Re-run quality control for a period and summarise it: flags per "
                              "test, worst episodes, sensor drift, clock offset, datum steps, staff "
                              "comparison. " + CAUTION)
    p.add_argument("config", help="configuration file (TOML)")
    p.add_argument("--station", required=True, help="station id")
    p.add_argument("--from", dest="start", required=True,
                   help="start, ISO 8601 (no offset: the station's local time)")
    p.add_argument("--to", dest="end", required=True, help="end, ISO 8601 (no offset: the station's local time)")
    p.add_argument("--episodes", type=count, default=5, help="worst episodes shown per sensor (default 5)")
    p.set_defaults(func=store_errors(cmd_qc))

    p = subparsers.add_parser("staff", help="tide-staff readings: add or list",
                              description="Tide-staff readings entered by a technician, used to check the "
                              "gauge's offset, scale and timing. " + CAUTION)
    # quaywatch staff CONFIG ACTION, like alerts CONFIG ACTION (the old order, staff ACTION
    # CONFIG, is still read: monitor.cli puts the configuration first)
    p.add_argument("config", help="configuration file (TOML)")
    sub = p.add_subparsers(dest="staff_verb", metavar="ACTION")
    sub.required = True
    a = sub.add_parser("add", help="record one staff reading")
    a.add_argument("--station", required=True)
    a.add_argument("--at", required=True, help="time of the reading, ISO 8601 (no offset: local time)")
    a.add_argument("--reading", required=True, type=finite_float, help="staff reading in metres on the station datum")
    a.add_argument("--who", required=True, help="who read the staff")
    a.add_argument("--note", default="", help="free text (sea state, staff used)")
    a.set_defaults(func=store_errors(cmd_staff_add))
    ls = sub.add_parser("list", help="list staff readings with the gauge beside them")
    ls.add_argument("--station", required=True)
    ls.set_defaults(func=store_errors(cmd_staff_list))

    p = subparsers.add_parser("flag", help="set a quality flag by hand (recorded with who and why)",
                              description="Override the automatic flag of one sample or a range; the "
                              "override wins whenever quality control is re-run. " + CAUTION)
    p.add_argument("config")
    p.add_argument("--station", required=True)
    p.add_argument("--sensor", required=True, help="sensor role: primary or backup")
    p.add_argument("--at", required=True, help="sample time, ISO 8601 (no offset: local time)")
    p.add_argument("--to", dest="end", help="end of a range, ISO 8601 (inclusive)")
    p.add_argument("--set", dest="flag", required=True, type=int, choices=qc.OVERRIDE_FLAGS,
                   help="1 pass, 3 suspect, 4 fail")
    p.add_argument("--who", required=True)
    p.add_argument("--why", required=True)
    p.set_defaults(func=store_errors(cmd_flag))


# --------------------------------------------------------------------------- helpers

def _open(config: str, create: bool = False):
    cfg = load_config(config)
    return cfg, Store.open(cfg.store_path, create=create, lock=False)


def _sensor(st, sensor: str) -> str:
    levels = [r for r, s in st.sensors.items() if getattr(s, "is_level", r != "barometer")]
    if sensor not in levels:
        raise UserError(f"--sensor {sensor!r}: station {st.id} has level sensors {', '.join(levels)}")
    return sensor


def _model(store, st):
    return load_model(store, st)


def _table(rows: list[list[str]], head: list[str], right: set[int] = frozenset()) -> str:
    return _common_table(rows, head, right)


def _pm(v: float, se: float, unit: str, digits: int = 1) -> str:
    if v is None or not np.isfinite(v):
        return "-"
    return f"{v:+.{digits}f} +- {se:.{digits}f} {unit}" if np.isfinite(se) else f"{v:+.{digits}f} {unit}"


# --------------------------------------------------------------------------- qc

def flag_summary(tests: pd.DataFrame) -> list[list[str]]:
    """Rows ``test, pass, not evaluated, suspect, fail, missing`` as 'count (share)'."""
    rows = []
    n = max(len(tests), 1)
    for col in list(qc.TESTS) + ["flag"]:
        vals = tests[col].to_numpy()
        cells = []
        for code in (qc.PASS, qc.NOT_EVALUATED, qc.SUSPECT, qc.FAIL, qc.MISSING):
            k = int((vals == code).sum())
            cells.append(f"{k} ({k / n:.1%})" if k else "0")
        rows.append(["aggregate" if col == "flag" else qc_test_label(col)] + cells)
    return rows


def qc_test_label(test: str, short: bool = False) -> str:
    """A test's name as the daily report gives it (``rate of change (QARTOD 7)``); ``short``:
    without the bracket (``rate of change``)."""
    name = QC_TEST_NAMES.get(test, test)
    return name.split(" (")[0] if short else name


def summarise(st, settings: qc.QcSettings, results: dict[str, pd.DataFrame], obs: dict[str, pd.DataFrame],
              model, model_source: str, staff: pd.DataFrame, start: pd.Timestamp, end: pd.Timestamp,
              n_episodes: int = 5, conflicts: dict[str, int] | None = None) -> str:
    """The text report of ``quaywatch qc`` (pure: frames in, text out). ``conflicts`` is the
    number of conflicting repeats (a stored time sent again with another value) per sensor."""
    tz = st.tz
    out = [f"Quality control, station {st.id} ({st.name}), {_local(start, tz)} to {_local(end, tz)}",
           f"times in {tz} (local); levels in metres; tide model: {model_source}", ""]
    usable = {}
    for sn, tests in results.items():
        tests = tests[(tests.index >= start) & (tests.index <= end)]
        n_conf = (conflicts or {}).get(sn, 0)
        out.append(f"Sensor {sn}: {len(tests)} samples" + (
            f"; {n_conf} conflicting repeat{'s' if n_conf != 1 else ''} (a time sent again with another "
            f"value; the first kept; see quaywatch status --rejects)" if n_conf else "; no conflicting repeats"))
        if tests.empty:
            out.append("")
            continue
        out.append(_table(flag_summary(tests), ["test", "pass", "not evaluated", "suspect", "fail", "missing"],
                          right={1, 2, 3, 4, 5}))
        ep = qc.episodes(tests["flag"], join_gap=2 * settings.gap_limit).head(n_episodes)
        if len(ep):
            rows = []
            for _, e in ep.iterrows():
                seg = tests[(tests.index >= e["start"]) & (tests.index <= e["end"])]
                which = [c for c in qc.TESTS if (seg[c] >= qc.SUSPECT).any() and (seg[c] != qc.MISSING).any()]
                rows.append([_local(e["start"], tz), _local(e["end"], tz), str(e["samples"]),
                             qc.FLAG_NAMES[int(e["worst"])], ", ".join(qc_test_label(c, short=True) for c in which)])
            out += ["", "worst episodes:", _table(rows, ["from", "to", "samples", "worst", "tests"], right={2})]
        gaps = qc.find_gaps(tests.index, settings.gap_limit)
        if len(gaps):
            rows = [[_local(g.start, tz), _local(g.end, tz), f"{g.seconds / 60:.0f} min"]
                    for g in gaps.sort_values("seconds", ascending=False).head(n_episodes).itertuples()]
            out += ["", f"gaps longer than {settings.gap_limit / 60:g} min: {len(gaps)}",
                    _table(rows, ["last sample", "next sample", "silent"], right={2})]
        o = obs[sn]
        o = o[(o.index >= start) & (o.index <= end)]
        t = tests.reindex(o.index)
        usable[sn] = o["value"][qc_records.diagnostic_mask(t["flag"].fillna(qc.PASS).to_numpy(),
                                                           t["flat"].fillna(qc.NOT_EVALUATED).to_numpy())]
        out.append("")

    out.append("Diagnostics (value +- standard error):")
    diag: list[list[str]] = []
    prim = usable.get("primary")
    if prim is not None and "backup" in usable and len(prim) and len(usable["backup"]):
        d = dg.sensor_drift(prim, usable["backup"], gap_limit=settings.gap_limit)
        diag.append(["primary - backup offset", _pm(d["offset_mm"], d["offset_se_mm"], "mm")])
        if np.isfinite(d["drift_mm_per_day"]):
            diag.append(["primary - backup drift",
                         f"{d['drift_mm_per_day']:+.2f} mm/day (95% {d['drift_low']:+.2f} to {d['drift_high']:+.2f})"])
        # Steps in primary - backup first (sea and weather cancel), each attributed to a sensor.
        steps = dg.sensor_steps(prim, usable["backup"], model, min_step=settings.step_min_mm * 1e-3,
                                gap_limit=settings.gap_limit)
        for s in steps.itertuples():
            diag.append([f"datum step, {s.sensor} sensor",
                         f"{_pm(s.step_mm, s.se_mm, 'mm')} at {_local(s.time, tz)} (primary - backup "
                         f"{s.difference_mm:+.0f} mm)"])
        if steps.empty:
            diag.append(["datum steps, primary - backup", f"none above {settings.step_min_mm:g} mm"])
        # The backup's clock against the primary's (the same sea: free of the surge), as the
        # report shows it.
        rel = dg.relative_clock(prim, usable["backup"])
        if np.isfinite(rel["median_min"]):
            diag.append(["backup clock vs primary", _pm(rel["median_min"], rel["offset_se_min"], "min", 2)
                         + "  (+ = backup late)"])
            for e in rel["episodes"]:
                diag.append(["backup clock off", f"{e['lag_min']:+.1f} min from {_local(e['start'], tz)} "
                             f"to {_local(e['end'], tz)}"])
    if prim is not None and len(prim) > 100 and model is not None:
        c = dg.clock_offset(prim, model)
        diag.append(["clock offset vs predicted tide",
                     _pm(c["offset_min"], c["offset_se_min"], "min", 2) + "  (+ = record lags the tide)"])
        if not ("backup" in usable and len(usable["backup"])):  # with a backup, the difference above
            resid = prim - np.asarray(model.predict(prim.index), dtype=float)
            steps = dg.datum_steps(resid, min_step=settings.step_min_mm * 1e-3, gap_limit=settings.gap_limit)
            if steps.empty:
                diag.append(["datum steps in residual", f"none above {settings.step_min_mm:g} mm"])
            for s in steps.itertuples():
                diag.append(["datum step in residual", f"{_pm(s.step_mm, s.se_mm, 'mm')} at {_local(s.time, tz)}"])
        if (end - start).total_seconds() >= 25 * 86400:
            mc = dg.monthly_constants(prim, model)
            for r in mc.itertuples():
                diag.append([f"{r.month} {r.name}", f"amplitude {r.d_amplitude_mm:+.0f} mm, phase "
                             f"{r.d_phase_deg:+.1f} deg ({r.d_time_min:+.1f} min) against the reference"])
    if prim is not None and not staff.empty and len(prim):
        sess = dg.staff_sessions(staff["reading"], prim, min_readings=4)
        for t, r in sess.iterrows():
            diag.append([f"staff {_local(t, tz)} ({int(r['n'])} readings)",
                         f"offset {_pm(r['offset_mm'], r['offset_se_mm'], 'mm')}, scale "
                         f"{_pm(100 * r['scale_error'], 100 * r['scale_se'], '%', 2)}, timing "
                         f"{_pm(r['timing_error_s'] / 60, r['timing_se_s'] / 60, 'min', 2)}"])
    if not diag:
        diag.append(["-", "not enough usable data for diagnostics"])
    out.append(_table(diag, ["diagnostic", "value"]))
    out += ["", CAUTION]
    return "\n".join(out)


def cmd_qc(args: argparse.Namespace) -> int:
    cfg, store = _open(args.config)
    with store:
        st = cfg.station(args.station)
        start, end = parse_range(args.start, args.end, st.tz, allow_equal=False)
        settings = st.qc or qc.QcSettings()
        model, source = _model(store, st)
        results = qc_records.run_station_qc(store, st, settings, start.timestamp(), end.timestamp(), model)
        obs = {sn: qc_records.read_observations(store, st.id, sn, start.timestamp(), end.timestamp()) for sn in results}
        staff = qc_records.read_staff_readings(store, st.id, start.timestamp(), end.timestamp())
        conflicts = {sn: store.conflict_count(st.id, sn, int(start.timestamp()), int(end.timestamp()))
                     for sn in results}
        print(summarise(st, settings, results, obs, model, source, staff, start, end, args.episodes,
                        conflicts))
    return 0


# --------------------------------------------------------------------------- staff, flag

def cmd_staff_add(args: argparse.Namespace) -> int:
    cfg, store = _open(args.config, create=True)
    with store:
        st = cfg.station(args.station)
        at = parse_time(args.at, "--at", st.tz)
        qc_records.add_staff_reading(store, st.id, at.timestamp(), args.reading, args.who, args.note)
        print(f"staff reading {args.reading:.3f} m at {_local(at, st.tz)} recorded for {st.id} by {args.who}")
    return 0


def cmd_staff_list(args: argparse.Namespace) -> int:
    cfg, store = _open(args.config)
    with store:
        st = cfg.station(args.station)
        staff = qc_records.read_staff_readings(store, st.id)
        if staff.empty:
            print(f"no staff readings for {st.id}; add one with: quaywatch staff add {args.config} "
                  f"--station {st.id} --at TIME --reading M --who NAME")
            return 0
        gauge = qc_records.read_observations(store, st.id, "primary", staff.index[0].timestamp() - 3600,
                                             staff.index[-1].timestamp() + 3600)
        g = gauge["value"][qc.usable_mask(gauge["flag"].to_numpy())]
        rows = []
        for t, r in staff.iterrows():
            gv = np.nan
            if len(g):
                tg = index_seconds(g.index)
                ts = t.timestamp()
                j = np.searchsorted(tg, ts)
                if 0 < j < len(tg) and tg[j] - tg[j - 1] <= 600 or (j < len(tg) and tg[j] == ts):
                    gv = float(np.interp(ts, tg, g.to_numpy()))
            diff = "-" if not np.isfinite(gv) else f"{(gv - r['reading']) * 1000:+.0f}"
            rows.append([_local(t, st.tz), f"{r['reading']:.3f}", "-" if not np.isfinite(gv) else f"{gv:.3f}",
                         diff, r["who"], r["note"] or ""])
        print(f"Staff readings, station {st.id} (times in {st.tz}; metres on the station datum)")
        print(_table(rows, ["time", "staff", "gauge", "gauge-staff mm", "who", "note"], right={1, 2, 3}))
        print(CAUTION)
    return 0


def cmd_flag(args: argparse.Namespace) -> int:
    cfg, store = _open(args.config)
    with store:
        st = cfg.station(args.station)
        sensor = _sensor(st, args.sensor)
        if args.end:
            at, end = parse_range(args.at, args.end, st.tz, start_option="--at")
        else:
            at, end = parse_time(args.at, "--at", st.tz), None
        n = qc_records.set_override(store, st.id, sensor, at.timestamp(), None if end is None else end.timestamp(),
                                    args.flag, args.who, args.why)
        # answered in the zone the time was typed in (the station's for a time without one)
        asked = asked_zone(args.at, st.tz)
        span = _local(at, asked) + ("" if end is None else f" to {_local(end, asked_zone(args.end, st.tz))}")
        print(f"{n} sample{'s' if n != 1 else ''} of {st.id}/{sensor} at {span} flagged "
              f"{args.flag} ({qc.FLAG_NAMES[args.flag]}) by {args.who}: {args.why}")
    return 0

