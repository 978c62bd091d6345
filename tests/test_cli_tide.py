"""Command line: predict, table and datums (run in-process through monitor.cli.main)."""
import json

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from predictor import TideModel

mm = 1e-3

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


def test_datums_table_is_aligned_with_units(capsys, constants):
    code, out, _ = _run(capsys, "datums", constants, "--years", "1")
    rows = [l for l in out.splitlines() if l[:4] in ("HAT ", "MHW ", "LAT ", "MSL ")]
    assert code == 0 and "height [m]" in out and len(rows) == 4
    assert len({l.index(".") for l in rows}) == 1  # decimal points line up
