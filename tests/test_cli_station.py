"""Station verbs through the real command line (monitor.cli.main)."""
from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from monitor.cli import main
from predictor import TideModel
from units import mm

T0 = 1_760_000_000     # 2025-10-09T09:06:40Z
PORT = TideModel(mean=2.5, constituents=[
    {"name": "M2", "amplitude": 1.2, "phase": 40.0},
    {"name": "S2", "amplitude": 0.4, "phase": 80.0},
    {"name": "K2", "amplitude": 0.4 * 0.272, "phase": 80.0},
])


def _setup(tmp_path: Path, constants: str = "history") -> Path:
    cfg = tmp_path / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[[stations]]
id = "testport"
name = "Test Port (invented)"
latitude = 50.0
longitude = -4.0
tz = "Europe/Lisbon"
constants = "{constants}"
fit_min_days = 20
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
units = "cm"
offset = 0.5
line = {{ header_lines = 1 }}
""")
    return cfg


def _gauge_file(path: Path, days: float, step_min: int = 10, extra: str = "") -> None:
    """An invented record: M2, S2 and K2 about a 2.5 m mean, in centimetres.

    K2 stands in its equilibrium ratio to S2 (0.272, Cartwright & Tayler 1971, from memory) with
    the same phase lag, as the refit's inference assumes for records too short to separate them.
    """
    t = T0 + np.arange(0, days * 86400, step_min * 60)
    lvl_m = PORT.predict(t.astype("datetime64[s]"))
    with open(path, "w") as fh:
        fh.write("time,level_cm\n")
        for ti, v in zip(t, lvl_m):
            fh.write(f"{np.datetime_as_string(np.datetime64(int(ti), 's'))}Z,{v * 100:.1f}\n")
        fh.write(extra)


def test_check_accepts_a_valid_file(tmp_path, capsys):
    assert main(["check", str(_setup(tmp_path))]) == 0
    assert "configuration is valid" in capsys.readouterr().out


def test_check_lists_every_problem(tmp_path, capsys):
    cfg = tmp_path / "bad.toml"
    cfg.write_text('[[stations]]\nid = "Bad Id"\nlatitude = 91\n')
    assert main(["check", str(cfg)]) == 2
    err = capsys.readouterr().err
    for key in ("stations[0].id", "stations[0].latitude", "stations[0].longitude",
                "stations[0].sensors", "stations[0].constants"):
        assert key in err
    # a station without datums is allowed: it shows its levels on the station datum and says so
    assert "stations[0].datums" not in err


RULE = """
[[stations.rules]]
id = "surge"
when = "residual_above"
notify = ["duty@port.example"]
steps = [{ name = "raised", at = 0.4 }]
"""


def test_check_refuses_rules_with_recipients_and_no_mail_table(tmp_path, capsys):
    cfg = _setup(tmp_path)
    cfg.write_text(cfg.read_text() + RULE)
    assert main(["check", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert "mail: required: stations[0].rules (surge) have recipients" in err and "Traceback" not in err


def test_check_accepts_rules_with_a_mail_table(tmp_path, capsys):
    cfg = _setup(tmp_path)
    cfg.write_text('[mail]\nsender = "g@port.example"\nsave_dir = "mail"\n' + cfg.read_text() + RULE)
    assert main(["check", str(cfg)]) == 0, capsys.readouterr().err


def test_check_says_the_old_rule_key_is_renamed(tmp_path, caplog):
    cfg = _setup(tmp_path)
    cfg.write_text('[mail]\nsender = "g@port.example"\nsave_dir = "mail"\n' + cfg.read_text()
                   + RULE.replace("when =", "watch ="))
    with caplog.at_level("WARNING"):
        assert main(["check", str(cfg)]) == 0
    assert "stations[0].rules[0].watch: renamed to 'when'" in caplog.text


def test_ingest_summary_and_second_run_duplicates_everything(tmp_path, capsys):
    cfg = _setup(tmp_path)
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1, extra="garbage line\n")
    assert main(["ingest", str(cfg), "--station", "testport", str(data)]) == 0
    out = capsys.readouterr().out
    assert "145 rows read, 144 stored, 0 duplicates, 1 rejected" in out
    assert main(["ingest", str(cfg), "--station", "testport", str(data)]) == 0
    assert "0 stored, 144 duplicates, 1 rejected" in capsys.readouterr().out


def test_ingest_does_not_count_a_csv_header_as_a_rejected_line(tmp_path, capsys):
    # the sensor's lines have no header configured; the backfill file has one
    cfg = _setup(tmp_path)
    cfg.write_text(cfg.read_text().replace("line = { header_lines = 1 }\n", ""))
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1)
    assert main(["ingest", str(cfg), "--station", "testport", str(data)]) == 0
    out = capsys.readouterr().out
    assert "144 stored, 0 duplicates, 0 rejected" in out and "(1 blank, comment or header lines skipped)" in out


def test_ingest_still_rejects_a_bad_first_line_with_digits(tmp_path, capsys):
    cfg = _setup(tmp_path)
    cfg.write_text(cfg.read_text().replace("line = { header_lines = 1 }\n", ""))
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1)
    data.write_text("2025-10-09T09:00:00Z,not a level\n" + data.read_text().split("\n", 1)[1])
    assert main(["ingest", str(cfg), "--station", "testport", str(data)]) == 0
    assert "144 stored, 0 duplicates, 1 rejected" in capsys.readouterr().out


def test_ingest_unknown_station_is_a_user_error(tmp_path, capsys):
    cfg = _setup(tmp_path)
    assert main(["ingest", str(cfg), "--station", "nowhere", str(cfg)]) == 2
    assert "no station 'nowhere'" in capsys.readouterr().err


def test_export_writes_level_predicted_residual_and_flag(tmp_path, capsys):
    (tmp_path / "c.toml").write_text(
        'mean = 2.5\n[[constituents]]\nname = "M2"\namplitude = 1.2\nphase = 0.0\n')
    cfg = _setup(tmp_path, "c.toml")
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1)
    main(["ingest", str(cfg), "--station", "testport", str(data)])
    capsys.readouterr()
    assert main(["export", str(cfg), "--station", "testport", "--from", "2025-10-09T00:00Z",
                 "--to", "2025-10-11T00:00Z"]) == 0
    rows = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    level, predicted = "level_m_above_chart_datum", "predicted_m_above_chart_datum"
    assert list(rows[0]) == ["time", level, predicted, "residual_m", "flag"] and len(rows) == 144
    assert rows[0]["time"].endswith("Z")
    for r in rows[:5]:
        assert float(r["residual_m"]) == pytest.approx(float(r[level]) - float(r[predicted]), abs=0.2 * mm)


def test_export_levels_are_on_the_display_datum_and_name_it(tmp_path, capsys):
    # Chart datum stands 1.0 m BELOW this station's datum (datums.chart = -1.0), so a level on
    # chart datum is the stored level + 1.0 m; the residual is datum-free.
    (tmp_path / "c.toml").write_text(
        'mean = 2.5\n[[constituents]]\nname = "M2"\namplitude = 1.2\nphase = 0.0\n')
    cfg = _setup(tmp_path, "c.toml")
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1)
    main(["ingest", str(cfg), "--station", "testport", str(data)])
    capsys.readouterr()
    main(["export", str(cfg), "--station", "testport", "--from", "2025-10-09T09:00Z", "--to", "2025-10-09T12:00Z"])
    first = next(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    t = pd.Timestamp(first["time"])
    # the gauge file carries PORT in centimetres above the sensor zero, 0.5 m above the station datum
    stored = PORT.predict(np.array([t.tz_convert(None).to_datetime64()]))[0] + 0.5
    assert float(first["level_m_above_chart_datum"]) == pytest.approx(stored + 1.0, abs=1 * mm)
    model = TideModel.load(tmp_path / "c.toml")
    assert float(first["predicted_m_above_chart_datum"]) == pytest.approx(
        model.predict(np.array([t.tz_convert(None).to_datetime64()]))[0] + 1.0, abs=0.1 * mm)


def test_status_shows_rows_and_rejects(tmp_path, capsys):
    cfg = _setup(tmp_path)
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 1, extra="bad\n")
    main(["ingest", str(cfg), "--station", "testport", str(data)])
    capsys.readouterr()
    assert main(["status", str(cfg), "--rejects", "1"]) == 0
    out = capsys.readouterr().out
    assert "Station testport" in out and "144 rows" in out and "expected at least 2 columns" in out
    assert "unofficial" in out


@pytest.mark.slow
def test_refit_recovers_the_constants_of_an_invented_record(tmp_path, capsys):
    cfg = _setup(tmp_path)
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 30, step_min=30)
    main(["ingest", str(cfg), "--station", "testport", str(data)])
    capsys.readouterr()
    assert main(["refit", str(cfg), "--station", "testport"]) == 0
    out = capsys.readouterr().out
    assert "fit #1" in out and "in use" in out
    m2 = next(line for line in out.splitlines() if line.strip().startswith("M2"))
    assert float(m2.split()[1]) == pytest.approx(1.2, abs=2 * mm)
    rms = float(out.split("rms ")[1].split(" m")[0])
    assert rms < 5 * mm
    assert main(["refit", str(cfg), "--station", "testport", "--list"]) == 0
    assert "yes" in capsys.readouterr().out


def test_refit_with_too_little_history_says_how_much_is_needed(tmp_path, capsys):
    cfg = _setup(tmp_path)
    data = tmp_path / "gauge.csv"
    _gauge_file(data, 2)
    main(["ingest", str(cfg), "--station", "testport", str(data)])
    capsys.readouterr()
    assert main(["refit", str(cfg), "--station", "testport"]) == 2
    assert "fit_min_days = 20 needed" in capsys.readouterr().err


def test_status_shows_every_level_on_the_display_datum(tmp_path, capsys):
    # status gave the level on both datums and the next high water on the station datum.
    from monitor.store.database import Store

    (tmp_path / "c.toml").write_text(
        'mean = 2.5\n[[constituents]]\nname = "M2"\namplitude = 1.2\nphase = 0.0\n')
    cfg = _setup(tmp_path, "c.toml")
    with Store.open(tmp_path / "q.db") as store:
        idx = pd.DatetimeIndex([pd.Timestamp(T0, unit="s", tz="UTC")])
        store.write_derived("testport", pd.DataFrame({"observed": [3.0], "predicted": [2.8], "residual": [0.2],
                                                      "smoothed": [0.2]}, index=idx))
        store.write_forecast("testport", {"hw_t": T0 + 3600, "made_t": T0, "predicted_high": 3.5,
                                          "residual_now": 0.2, "forecast": 3.7, "lower": 3.5, "upper": 4.0,
                                          "coverage": 0.9, "note": "test"})
    assert main(["status", str(cfg)]) == 0
    out = capsys.readouterr().out
    # chart datum stands 1.0 m below this station's datum: every level shown is 1.0 m higher
    assert "4.000 m above chart datum" in out and "3.800 m above chart datum" in out
    assert "4.700 m above chart datum" in out and "range 4.50 to 5.00 m" in out
    assert "m above station datum" not in out
