"""The ``extremes`` verb and its station glue (monitor.service.extremes) on a store.

The record is eight invented years (fixture ``records_station``: sample_feeds/decades.py with
a fixed seed and a datum step in the middle), ingested through the command line. Checks are
of behaviour the design asks for: only QC-passed samples enter, the output says how datum
steps were handled and which trend method, a plain warning on a period long for the record,
one-line messages for bad input, and a cache that is refreshed by new annual maxima and storms
only. The science itself is checked against outside references in test_extremes.py,
test_sealevel.py and test_decades.py.
"""
from __future__ import annotations

import contextlib
import io
import json
import shutil
import sqlite3

import pandas as pd
import pytest

from monitor.cli import main as cli
from monitor.demo_decades import STATION
from monitor.service import extremes as se
from monitor.service.config import load_config
from monitor.service.constants import load_model
from monitor.store.database import Store

# A small bootstrap and four periods keep these tests quick; the band's coverage is checked
# with the defaults in test_extremes_coverage.py.
FAST = ["--bootstrap", "50", "--return-periods", "2", "5", "10", "100"]


def _copy(records_station, tmp_path):
    config, truth, db = records_station
    for name in ("config.toml", "constants.toml", "records.db", "records.db-wal"):
        if (config.parent / name).exists():
            shutil.copy(config.parent / name, tmp_path / name)
    return tmp_path / "config.toml", tmp_path / "records.db", truth


def _json(capsys, config, *args):
    assert cli(["extremes", str(config), *map(str, args), "--json", *FAST]) == 0
    return json.loads(capsys.readouterr().out)


@pytest.fixture(scope="module")
def result(records_station):
    """The verb's JSON with the station log's datum step given, computed once."""
    config, truth, _ = records_station
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert cli(["extremes", str(config), "--station", STATION, "--json", *FAST,
                    "--datum-step", truth["datum_steps"][0]["time"]]) == 0
    return json.loads(buf.getvalue())


def test_both_routes_give_a_curve_with_bands_on_the_display_datum(result):
    assert result["datum"] == "chart datum"
    for route in ("annual_maxima", "joint_probability"):
        curve = result[route]["curve"]
        assert [r["period"] for r in curve if r["period"] in (2, 5, 10)] == [2, 5, 10]
        for r in curve:
            assert r["lower"] < r["level"] and (r["upper"] is None or r["level"] < r["upper"])
    # chart datum stands 1.000 m above the gauge zero: the curve is 1 m below the stored levels
    assert result["datum_offset_m"] == pytest.approx(1.0)


def test_a_long_period_on_a_short_record_is_warned_in_plain_words(result):
    row = [r for r in result["annual_maxima"]["curve"] if r["period"] == 100][0]
    years = result["annual_maxima"]["years"]              # 7: one year lost most of its hours
    assert f"100-year level from {years} years of record is a guess" in row["warning"]
    assert f"{years} annual maxima" in row["warning"]
    assert [r for r in result["annual_maxima"]["curve"] if r["period"] == 2][0]["warning"] is None


def test_the_trend_names_its_method_rule_and_step_handling(result):
    sea = result["sea_level"]
    assert "15 of its days" in sea["rule"] and "24 UTC hours" in sea["rule"]
    tr = sea["trend"]
    assert "AR(1)" in tr["method"] and "restricted maximum likelihood" in tr["method"]
    assert tr["step_handling"] == "corrected" and len(tr["steps"]) == 1
    assert "nodal term left in" in tr["nodal_note"]            # 8 years: less than a nodal cycle
    assert result["datum_steps"][-1]["source"] == "given (station log)"


def test_split_at_steps_says_so(records_station, capsys):
    config, truth, _ = records_station
    tr = _json(capsys, config, "--station", STATION, "--split-at-steps",
               "--datum-step", truth["datum_steps"][0]["time"])["sea_level"]["trend"]
    assert tr["step_handling"] == "split" and len(tr["segments"]) == 2
    assert tr["step_note"].startswith("split:")


def test_return_period_of_a_level_reads_the_curve_backwards(records_station, result, capsys):
    config, _, _ = records_station
    ten = [r for r in result["annual_maxima"]["curve"] if r["period"] == 10][0]
    assert cli(["extremes", str(config), "--station", STATION, "--json", *FAST, "--level", f"{ten['level']:.4f}",
                "--datum-step", "2019-06-17T10:00:00Z"]) == 0
    asked = json.loads(capsys.readouterr().out)["asked"][0]["annual_maxima"]
    assert asked["period"] == pytest.approx(10.0, rel=0.01)
    assert asked["lower"] < 10.0 < (asked["upper"] or float("inf"))


def test_text_output_has_both_routes_side_by_side_and_the_caution(records_station, capsys):
    config, _, _ = records_station
    assert cli(["extremes", str(config), "--station", STATION, *FAST, "--datum-step", "2019-06-17T10:00:00Z"]) == 0
    text = capsys.readouterr().out
    assert "annual max" in text and "joint prob." in text and "95 % band" in text
    assert "WARNING: A 100-year level from 7 years of record is a guess" in text
    assert "Automated and unofficial" in text


def test_failed_samples_never_enter_and_a_suspect_crest_is_named(records_station, tmp_path, capsys):
    config, db, _ = _copy(records_station, tmp_path)
    with sqlite3.connect(db) as conn:
        t_fail, t_susp = conn.execute("SELECT min(t) + 86400 * 100, min(t) + 86400 * 200 FROM observations").fetchone()
        conn.execute("UPDATE observations SET value = 50.0, flag = 4 WHERE t = ?", (t_fail,))
        conn.execute("UPDATE observations SET value = 9.0, flag = 3 WHERE t = ?", (t_susp,))
    out = _json(capsys, config, "--station", STATION)
    top = max(m["level"] for m in out["annual_maxima"]["maxima"])
    assert top < 8.0                                   # neither the failed 50 m nor the suspect 9 m
    note = out["record"]["highest_left_out"]
    assert note["flag"] == 3 and note["level_station_m"] == 9.0
    assert "confirm" in note["note"]
    assert out["record"]["samples"]["fail"] == 1 and out["record"]["samples"]["suspect"] == 1


def test_unknown_station_is_one_line(records_station, capsys):
    config, _, _ = records_station
    assert cli(["extremes", str(config), "--station", "nowhere"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "nowhere" in err and "Traceback" not in err


def test_no_qc_passed_data_is_one_line_saying_what_to_do(records_station, tmp_path, capsys):
    config, db, _ = _copy(records_station, tmp_path)
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE observations SET flag = NULL")
    assert cli(["extremes", str(config), "--station", STATION]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "passed quality control" in err and "quaywatch qc" in err


def test_too_short_a_record_is_one_line(records_station, tmp_path, capsys):
    config, db, _ = _copy(records_station, tmp_path)
    with sqlite3.connect(db) as conn:
        conn.execute("DELETE FROM observations WHERE t > (SELECT min(t) FROM observations) + 400 * 86400")
    assert cli(["extremes", str(config), "--station", STATION]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "years of QC-passed hourly data" in err


def test_bad_option_values_are_refused_by_name(records_station, capsys):
    config, _, _ = records_station
    with pytest.raises(SystemExit):
        cli(["extremes", str(config), "--station", STATION, "--return-periods", "0.5"])
    assert "more than 1 year" in capsys.readouterr().err
    assert cli(["extremes", str(config), "--station", STATION, "--event", "yesterday"]) == 2
    assert "--event" in capsys.readouterr().err


# ----------------------------------------------------------------------------- the cache
def _append(db, t0, hours, level):
    with sqlite3.connect(db) as conn:
        conn.executemany("INSERT INTO observations (station, sensor, t, value, time_source, flag) "
                         "VALUES (?, 'primary', ?, ?, 'data', 1)",
                         [(STATION, t0 + 3600 * k, level) for k in range(hours)])


def test_cache_is_kept_until_a_new_annual_maximum(records_station, tmp_path):
    config, db, _ = _copy(records_station, tmp_path)
    cfg = load_config(config)
    st = cfg.station(STATION)
    opts = se.Options(bootstrap=20)
    with Store.open(db, create=False) as store:
        model, _ = load_model(store, st)
        first, fresh1 = se.cached_analysis(store, st, model, opts)
        again, fresh2 = se.cached_analysis(store, st, model, opts)
        end = int(pd.Timestamp(first["record"]["last"]).timestamp())
    assert fresh1 and not fresh2
    assert again["annual_maxima"]["curve"] == se.public(first)["annual_maxima"]["curve"]
    # the record ends with a year: the first day of the next one is that year's maximum so far
    mean_level = float(model.mean)
    _append(db, end + 3600, 24, mean_level)
    with Store.open(db, create=False) as store:
        _, fresh3 = se.cached_analysis(store, st, model, opts)
    assert fresh3
    # a calmer day after it: no new maximum, no skew surge above the threshold
    _append(db, end + 3600 * 30, 24, mean_level - 0.5)
    with Store.open(db, create=False) as store:
        _, fresh4 = se.cached_analysis(store, st, model, opts)
    assert not fresh4
    # a new annual maximum arrives
    _append(db, end + 3600 * 60, 3, 9.0)
    with Store.open(db, create=False) as store:
        _, fresh5 = se.cached_analysis(store, st, model, opts)
        _, fresh6 = se.cached_analysis(store, st, model, opts)
    assert fresh5 and not fresh6


def test_report_section_says_the_days_water_in_words(records_station, tmp_path):
    config, db, _ = _copy(records_station, tmp_path)
    st = load_config(config).station(STATION)
    with Store.open(db, create=False) as store:
        model, _ = load_model(store, st)
        result, _ = se.cached_analysis(store, st, model, se.Options(bootstrap=20))
        five = [r for r in result["joint_probability"]["curve"] if r["period"] == 5][0]["level"]
        sec = se.report_section(store, st, model, five)
    assert sec.words.startswith("today's highest water, ")
    assert "about a 1-in-5-year level, range 1-in-" in sec.words
    assert "above chart datum" in sec.words
    assert sec.curves and sec.monthly and "mm a year" in sec.trend_words
