"""Command line: predict, table and datums (run in-process through monitor.cli.main)."""
import json
import re

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from predictor import TideModel
from units import mm


CONSTANTS = """\
mean = 2.2
[[constituents]]
name = "M2"
amplitude = 0.9
phase = 312
[[constituents]]
name = "S2"
amplitude = 0.3
phase = 348
[[constituents]]
name = "K1"
amplitude = 0.35
phase = 78
[[constituents]]
name = "O1"
amplitude = 0.28
phase = 331
"""


@pytest.fixture()
def constants(tmp_path):
    path = tmp_path / "constants.toml"
    path.write_text(CONSTANTS)
    return path


def _run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_predict_prints_every_step_with_both_ends(capsys, constants):
    code, out, _ = _run(capsys, "predict", constants, "--start", "2025-03-01T00:00Z",
                        "--end", "2025-03-01T01:00:00+00:00", "--step", "10min")
    assert code == 0
    lines = out.splitlines()
    assert lines[0] == "time,level"
    assert [l.split(",")[0] for l in lines[1:]] == [f"2025-03-01T00:{m:02d}:00Z" for m in range(0, 60, 10)] \
        + ["2025-03-01T01:00:00Z"]


def test_predict_levels_equal_library_prediction(capsys, constants):
    _, out, _ = _run(capsys, "predict", constants, "--start", "2025-03-01T01:00+01:00",
                     "--end", "2025-03-01T06:00Z", "--step", "1h")
    rows = [l.split(",") for l in out.splitlines()[1:]]
    assert rows[0][0] == "2025-03-01T00:00:00Z"  # the offset is converted to UTC
    times = pd.DatetimeIndex([r[0] for r in rows])
    expected = TideModel.load(constants).predict(times)
    assert np.allclose([float(r[1]) for r in rows], expected, atol=0.05 * mm)


def test_predict_start_after_end_is_an_error(capsys, constants):
    code, out, err = _run(capsys, "predict", constants, "--start", "2025-03-02T00:00Z", "--end", "2025-03-01T00:00Z")
    assert code == 2 and out == ""
    assert "after --end" in err and "Traceback" not in err


@pytest.mark.parametrize("step", ["xx", "-5min", "0s", "1.5s"])
def test_predict_bad_step_is_an_error(capsys, constants, step):
    code, _, err = _run(capsys, "predict", constants, "--start", "2025-03-01T00:00Z",
                        "--end", "2025-03-01T01:00Z", f"--step={step}")
    assert code == 2 and "--step" in err


def test_predict_naive_time_is_refused_without_tz(capsys, constants):
    code, _, err = _run(capsys, "predict", constants, "--start", "2025-03-01T00:00", "--end", "2025-03-01T01:00Z")
    assert code == 2 and "--start" in err and "time zone" in err


def test_predict_naive_time_with_tz_is_local(capsys, constants):
    code, out, _ = _run(capsys, "predict", constants, "--start", "2025-07-01T01:00", "--end", "2025-07-01T01:00",
                        "--tz", "Europe/Dublin")
    assert code == 0 and out.splitlines()[1].startswith("2025-07-01T00:00:00Z")  # summer time, UTC+1


def test_table_without_tz_labels_its_columns_honestly(capsys, constants):
    code, out, _ = _run(capsys, "table", constants, "--days", "1", "--start", "2025-03-01")
    lines = out.splitlines()
    head = next(ln for ln in lines if ln.startswith("date"))
    assert code == 0 and head.split()[:3] == ["date", "time", "offset"]
    assert "times: UTC (no --tz given" in out


def test_unknown_constituent_is_a_one_line_error(capsys, tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('mean = 0\n[[constituents]]\nname = "Q2"\namplitude = 0.1\nphase = 0\n')
    code, _, err = _run(capsys, "predict", path, "--start", "2025-03-01T00:00Z", "--end", "2025-03-01T01:00Z")
    assert code == 2 and "c.toml" in err and "Q2" in err and len(err.strip().splitlines()) == 1


def test_table_shows_local_times_units_and_caution(capsys, constants):
    code, out, _ = _run(capsys, "table", constants, "--days", "2", "--start", "2025-03-29",
                        "--tz", "Europe/Dublin", "--datum-offset", "1.0", "--datum-name", "chart datum")
    assert code == 0
    assert "Europe/Dublin" in out and "height [m]" in out and "chart datum" in out
    assert "+00:00" in out and "+01:00" in out  # the clock change on 2025-03-30
    assert "unofficial" in out
    assert sum(1 for l in out.splitlines() if " HW " in l) in (3, 4)


def test_datums_json(capsys, constants):
    code, out, _ = _run(capsys, "datums", constants, "--json", "--years", "1")
    doc = json.loads(out)
    assert code == 0 and doc["units"] == "m" and "unofficial" in doc["caution"]
    d = doc["datums"]
    assert d["HAT"] > d["MHHW"] > d["MHW"] > d["MSL"] > d["MLW"] > d["MLLW"] > d["LAT"]


def test_datums_write_the_ranges_in_words(capsys, constants):
    code, out, _ = _run(capsys, "datums", constants, "--years", "1")
    assert code == 0
    assert not any(line.split()[:1] in (["MN"], ["GT"]) for line in out.splitlines())
    mean = next(ln for ln in out.splitlines() if ln.strip().startswith("mean range"))
    diurnal = next(ln for ln in out.splitlines() if ln.strip().startswith("diurnal range"))
    assert "MHW minus MLW" in mean and "MHHW minus MLLW" in diurnal
    levels = {ln.split()[0]: float(ln.split()[1]) for ln in out.splitlines()
              if ln.split()[:1] and ln.split()[0] in ("MHW", "MLW", "MHHW", "MLLW")}
    # the ranges are the differences of the printed levels (to their rounding)
    assert float(mean.split()[2]) == pytest.approx(levels["MHW"] - levels["MLW"], abs=2 * mm)
    assert float(diurnal.split()[2]) == pytest.approx(levels["MHHW"] - levels["MLLW"], abs=2 * mm)


def test_datums_method_names_no_agency(capsys, constants):
    code, out, _ = _run(capsys, "datums", constants, "--years", "1")
    _, js, _ = _run(capsys, "datums", constants, "--years", "1", "--json")
    for text in (out, json.loads(js)["method"]):
        assert "NOAA" not in text and "tidal cycle" in text


def test_datums_table_is_aligned_with_units(capsys, constants):
    code, out, _ = _run(capsys, "datums", constants, "--years", "1")
    rows = [l for l in out.splitlines() if l[:4] in ("HAT ", "MHW ", "LAT ", "MSL ")]
    assert code == 0 and "height [m]" in out and len(rows) == 4
    assert len({l.index(".") for l in rows}) == 1  # decimal points line up


def test_table_rounds_times_to_the_nearest_minute(capsys, constants):
    # A turning point at hh:mm:40 is shown at the next minute; truncating it made every time in
    # the table half a minute early on average.
    code, out, _ = _run(capsys, "table", constants, "--days", "3", "--start", "2025-03-01", "--tz", "UTC")
    events = TideModel.load(constants).high_low("2025-03-01T00:00Z", "2025-03-04T00:00Z")
    shown = [r[0] for r in _table_rows(out)]
    want = [t.round("min").strftime("%H:%M") for t in events["time"]]
    assert code == 0 and shown == want
    assert any(t.second >= 30 for t in events["time"])  # some must round up


DOUBLE_HIGH = """\
mean = 0.0
[[constituents]]
name = "M2"
amplitude = 1.2
phase = 100
[[constituents]]
name = "S2"
amplitude = 0.35
phase = 130
[[constituents]]
name = "M4"
amplitude = 0.3
phase = 20
[[constituents]]
name = "MS4"
amplitude = 0.15
phase = 50
[[constituents]]
name = "M6"
amplitude = 0.1
phase = 120
"""


def test_table_lists_both_peaks_of_a_double_high_water_as_one_stand(capsys, tmp_path):
    # NOAA (2003) glossary: a double high water is one high water; the dip is no low water
    path = tmp_path / "dhw.toml"
    path.write_text(DOUBLE_HIGH)
    code, out, _ = _run(capsys, "table", path, "--days", "2", "--start", "2031-03-08", "--tz", "UTC")
    rows = _table_rows(out)
    assert code == 0
    assert sum(r[3] == "double HW, peak 1 of 2" for r in rows) >= 3
    assert sum(r[3].startswith("double HW, peak 2 of 2") for r in rows) >= 3
    assert all(r[2] < -0.5 for r in rows if r[1] == "LW")  # no dip is shown as a low water
    assert "one stand" in out


def _table_rows(out):
    """(time, HW/LW, height, note) of each tide row of ``table``'s output."""
    import re

    rows = []
    for line in out.splitlines():
        m = re.search(r"(\d\d:\d\d) +[+-]\d\d:\d\d  (HW|LW) +(-?\d+\.\d+) *(.*)$", line)
        if m:
            rows.append((m.group(1), m.group(2), float(m.group(3)), m.group(4)))
    return rows
# --------------------------------------------------------------------------- one display datum per station

STATION_CONFIG = """\
[store]
path = "q.db"
[[stations]]
id = "harbour"
name = "Harbour (invented)"
latitude = 54.0
longitude = -10.0
tz = "Europe/Dublin"
constants = "{constants}"
datums = {{ chart = 1.0 }}   # chart datum stands 1.0 m above the station datum (invented)
[stations.sensors.primary]
units = "m"
"""


def _station(tmp_path, constants_text, datums="{ chart = 1.0 }"):
    (tmp_path / "k.toml").write_text(constants_text)
    cfg = tmp_path / "config.toml"
    cfg.write_text(STATION_CONFIG.format(constants="k.toml").replace("{ chart = 1.0 }", datums))
    return cfg


def _heights(out):
    rows = [re.search(r"\s(HW|LW)\s+(-?\d+\.\d\d)$", line) for line in out.splitlines()]
    return [float(m.group(2)) for m in rows if m]


def test_table_for_a_station_is_on_its_display_datum(capsys, tmp_path, constants):
    # The file's levels are on the station datum; chart datum is 1.0 m above it, so every
    # height printed for the station is 1.0 m below the file's own (by hand, no shared code).
    cfg = _station(tmp_path, 'datum = "station"\n' + CONSTANTS)
    _, plain, _ = _run(capsys, "table", constants, "--days", "2", "--start", "2025-03-01")
    code, out, _ = _run(capsys, "table", "--config", cfg, "--station", "harbour", "--days", "2",
                        "--start", "2025-03-01")
    assert code == 0 and "heights [m] above chart datum" in out
    assert np.allclose(_heights(out), np.array(_heights(plain)) - 1.0, atol=0.006)


def test_predict_and_datums_for_a_station_are_on_its_display_datum(capsys, tmp_path, constants):
    cfg = _station(tmp_path, 'datum = "station"\n' + CONSTANTS)
    code, out, err = _run(capsys, "predict", "--config", cfg, "--station", "harbour",
                          "--start", "2025-03-01T00:00Z", "--end", "2025-03-01T03:00Z", "--step", "1h")
    rows = [l.split(",") for l in out.splitlines()[1:]]
    expected = TideModel.load(constants).predict(pd.DatetimeIndex([r[0] for r in rows])) - 1.0
    assert code == 0 and out.splitlines()[0] == "time,level" and "above chart datum" in err
    assert np.allclose([float(r[1]) for r in rows], expected, atol=0.05 * mm)
    code, out, _ = _run(capsys, "datums", "--config", cfg, "--station", "harbour", "--json", "--years", "1")
    _, plain, _ = _run(capsys, "datums", constants, "--json", "--years", "1")
    doc, ref = json.loads(out), json.loads(plain)
    assert doc["reference"] == "chart datum"
    assert doc["datums"]["MSL"] == pytest.approx(ref["datums"]["MSL"] - 1.0, abs=0.1 * mm)
    assert doc["ranges"]["diurnal_range"] == pytest.approx(ref["ranges"]["diurnal_range"], abs=0.1 * mm)  # no datum


def test_constants_on_chart_datum_are_moved_by_the_offset_said_in_words(capsys, tmp_path, constants):
    # The same tide typed on chart datum (mean 2.2 m above CD) must print as the file says,
    # never a metre off: the station adds CD's 1.0 m to reach its station datum, then shows CD.
    cfg = _station(tmp_path, 'datum = "chart"\n' + CONSTANTS)
    _, plain, _ = _run(capsys, "table", constants, "--days", "1", "--start", "2025-03-01")
    code, out, _ = _run(capsys, "table", "--config", cfg, "--station", "harbour", "--days", "1",
                        "--start", "2025-03-01")
    assert code == 0 and np.allclose(_heights(out), _heights(plain), atol=0.006)
    assert "+1.000 m added" in out


def test_constants_on_a_datum_the_station_lacks_are_refused(capsys, tmp_path):
    cfg = _station(tmp_path, 'datum = "lat"\n' + CONSTANTS)
    code, out, err = _run(capsys, "table", "--config", cfg, "--station", "harbour", "--days", "1")
    assert code == 2 and out == ""
    assert "k.toml" in err and "'lat'" in err and "harbour" in err and len(err.strip().splitlines()) == 1


def test_station_without_a_chart_datum_uses_the_station_datum_and_says_so(capsys, tmp_path, constants):
    cfg = _station(tmp_path, CONSTANTS, datums="{ quay = 5.0 }")
    _, plain, _ = _run(capsys, "table", constants, "--days", "1", "--start", "2025-03-01")
    code, out, _ = _run(capsys, "table", "--config", cfg, "--station", "harbour", "--days", "1",
                        "--start", "2025-03-01")
    assert code == 0 and "above station datum" in out and "no chart datum offset is configured" in out
    assert np.allclose(_heights(out), _heights(plain), atol=0.006)


def test_table_of_a_file_names_the_datum_it_records_or_says_it_has_none(capsys, tmp_path, constants):
    _, out, _ = _run(capsys, "table", constants, "--days", "1")
    assert "the file does not record which" in out
    path = tmp_path / "cd.toml"
    path.write_text('datum = "chart"\n' + CONSTANTS)
    _, out, _ = _run(capsys, "table", path, "--days", "1")
    assert "heights [m] above chart datum" in out


def test_config_without_station_is_an_error(capsys, tmp_path):
    cfg = _station(tmp_path, CONSTANTS)
    code, _, err = _run(capsys, "table", "--config", cfg)
    assert code == 2 and "--station" in err
