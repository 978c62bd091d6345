"""`make demo-records`: forty invented years at Port Dunmerrow, ingested, checked and analysed.

Generates the multi-decade hourly history of ``sample_feeds/decades.py`` with its fixed seed
(invented tide, a slow sea-level rise, a datum step, outages, storms from a known
distribution), writes it as a telemetry file, a configuration and a constants file under
``demo-output/records/``, then runs the command line as a user would:

1. ``quaywatch ingest`` (decades of hourly lines in one go, progress on standard error);
2. quality control over the whole record (:func:`monitor.quality.records.run_station_qc`, a year at a time);
3. ``quaywatch extremes --json`` and the text form, saved beside the truth the generator put in
   (``truth.json``: the true rise and the true return levels), with a comparison: does each
   95 % band cover the true level, and the trend's interval the true rise.

The station log of the invented gauge records its zero being reset when the gauge was
replaced (the generator's datum step); the demo gives it with ``--datum-step``, as a
technician would, because the datum-step test of quality control cannot find a 4 cm step in an
hourly record whose mean sea level wanders by several centimetres for weeks at a time (it
needs minute data or a backup sensor).

Everything is invented; automated and unofficial.
"""
from __future__ import annotations

import argparse
import contextlib
import dataclasses
import importlib.util
import io
import json
import sys
import time
import tomllib
from pathlib import Path

import numpy as np

from monitor.cli import main as cli
from monitor.quality import records as qc_records
from monitor.service.config import load_config
from monitor.service.constants import load_model
from monitor.store.database import Store
from predictor import TideModel

ROOT = Path(__file__).resolve().parent.parent
DEFAULT_OUT = ROOT / "demo-output" / "records"
STATION = "dunmerrow-records"
PERIODS = (2.0, 5.0, 10.0, 20.0, 50.0, 100.0)


def _decades():
    name = "sample_feeds_decades"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, ROOT / "sample_feeds" / "decades.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


def write_inputs(out: Path, years: int | None = None, truth_levels: bool = True,
                 start_year: int | None = None) -> dict:
    """History CSV, constants file and configuration; returns the truth as a dict (its return
    levels only when ``truth_levels``: a few seconds of Monte Carlo)."""
    dec = _decades()
    spec = dec.DecadesSpec()
    if years is not None:
        spec = dataclasses.replace(spec, years=years)
    if start_year is not None:
        spec = dataclasses.replace(spec, start_year=start_year,
                                   datum_step=(f"{start_year + years // 2}-06-17T10:00:00", spec.datum_step[1]))
    levels, truth = dec.make_history(spec, return_periods=PERIODS if truth_levels else None)
    out.mkdir(parents=True, exist_ok=True)
    dec.write_csv(out / "history.csv", levels)
    with open(ROOT / "demo" / "port.toml", "rb") as fh:
        port = tomllib.load(fh)
    cd = float(port["datums"]["chart_datum"])
    model = TideModel(float(port["tide"]["mean"]), port["tide"]["constituents"])
    model.datum = "chart"
    model.save(out / "constants.toml")
    (out / "config.toml").write_text(f'''# The invented port's forty-year record (monitor/demo_decades.py). Automated and unofficial.
[store]
path = "records.db"

[[stations]]
id = "{STATION}"
name = "Port Dunmerrow, forty invented years"
latitude = {port["port"]["latitude"]}
longitude = {port["port"]["longitude"]}
tz = "{port["port"]["tz"]}"
constants = "constants.toml"
display_datum = "chart"
datums = {{ chart = {cd:.3f} }}

[stations.qc]
gap_limit = "2h"             # hourly values: one hour between samples is no gap

[stations.sensors.primary]
label = "float gauge (hourly values)"
units = "m"
line = {{ delimiter = ",", time_column = 1, value_column = 2, time_format = "iso", header_lines = 1 }}
feed = {{ kind = "file", path = "history.csv" }}
''')
    doc = {"rise_mm_per_year": truth.rise_mm_per_year, "epoch": truth.epoch.isoformat(),
           "datum_steps": [{"time": s["time"].isoformat(), "offset_m": s["offset_m"]} for s in truth.datum_steps],
           "return_levels_chart_datum": [],
           "note": "what sample_feeds/decades.py put into the record (invented)"}
    if truth.return_levels is not None:
        rl = truth.return_levels
        doc["return_levels_chart_datum"] = [{"period": float(p), "level": float(z) - cd, "mc_se": float(e)}
                                            for p, z, e in rl[["period", "level", "mc_se"]].itertuples(index=False)]
    (out / "truth.json").write_text(json.dumps(doc, indent=1))
    return doc


def run_qc(config: Path, progress=None) -> None:
    """Quality control over the whole record, a year at a time."""
    cfg = load_config(config)
    st = cfg.station(STATION)
    with Store.open(cfg.store_path) as store:
        model, _ = load_model(store, st)
        t0 = store.first_time(st.id)
        t1 = store.last_time(st.id)
        year = 365 * 86400
        starts = list(range(t0, t1 + 1, year))
        for k, a in enumerate(starts):
            qc_records.run_station_qc(store, st, st.qc, a, min(a + year - 1, t1), model, now=t1 + 3600)
            if progress:
                progress(k + 1, len(starts))


def compare(result: dict, truth: dict) -> list[str]:
    """Lines saying whether each band covers the true level and the trend's interval the rise."""
    lines = []
    true = {r["period"]: r["level"] for r in truth["return_levels_chart_datum"]}
    for key, name in (("annual_maxima", "annual maxima"), ("joint_probability", "joint probability")):
        for r in result.get(key, {}).get("curve", []):
            if r["period"] in true:
                z = true[r["period"]]
                up = np.inf if r["upper"] is None else r["upper"]
                ok = r["lower"] <= z <= up
                lines.append(f"{name:17s} {r['period']:5g} years: true {z:.3f} m, band {r['lower']:.3f} to "
                             f"{up:.3f} m: {'covered' if ok else 'NOT COVERED'}")
    tr = result["sea_level"].get("trend")
    if tr:
        ok = tr["lower_mm_per_year"] <= truth["rise_mm_per_year"] <= tr["upper_mm_per_year"]
        lines.append(f"trend: true {truth['rise_mm_per_year']:.2f} mm/year, found {tr['rate_mm_per_year']:.2f} +- "
                     f"{tr['se_mm_per_year']:.2f}, interval {tr['lower_mm_per_year']:.2f} to "
                     f"{tr['upper_mm_per_year']:.2f}: {'covered' if ok else 'NOT COVERED'}")
    return lines


def run(out: Path = DEFAULT_OUT, years: int | None = None, quiet: bool = False) -> dict:
    """The whole demo; returns ``{"result": ..., "truth": ..., "comparison": [...]}``."""
    def say(text: str) -> None:
        if not quiet:
            print(text, flush=True)

    t = time.monotonic()
    say(f"generating the invented record (fixed seed) under {out} ...")
    truth = write_inputs(out, years)
    (out / "records.db").unlink(missing_ok=True)
    config = out / "config.toml"
    say("ingesting it in one go ...")
    rc = cli(["ingest", str(config), "--station", STATION, str(out / "history.csv")])
    if rc:
        raise SystemExit(f"ingest failed ({rc})")
    say("quality control over the record ...")
    run_qc(config, None if quiet else lambda k, n: print(f"\r  year {k} of {n}", end="", file=sys.stderr, flush=True))
    if not quiet:
        print(file=sys.stderr)
    step = truth["datum_steps"][0]["time"] if truth["datum_steps"] else None
    args = ["extremes", str(config), "--station", STATION, "--return-periods", *[f"{p:g}" for p in PERIODS]]
    if step:
        args += ["--datum-step", step]
    say("return levels and the sea-level trend ...")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        rc = cli(args + ["--json"])
    if rc:
        raise SystemExit(f"extremes failed ({rc})")
    result = json.loads(buf.getvalue())
    (out / "extremes.json").write_text(buf.getvalue())
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        cli(args)
    (out / "extremes.txt").write_text(buf.getvalue())
    lines = compare(result, truth)
    (out / "comparison.txt").write_text("\n".join(lines) + "\n")
    say(buf.getvalue())
    say("Against what the generator put in:\n" + "\n".join(lines))
    say(f"done in {time.monotonic() - t:.0f} s; files in {out}")
    return {"result": result, "truth": truth, "comparison": lines}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT)
    ap.add_argument("--years", type=int, default=None, help="years of record (default 40)")
    args = ap.parse_args(argv)
    res = run(args.out, args.years)
    return 0 if all("NOT" not in line for line in res["comparison"]) else 1


if __name__ == "__main__":
    raise SystemExit(main())
