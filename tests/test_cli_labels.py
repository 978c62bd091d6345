"""Labels the command line gets right: --version, log stamps, the zone of an answer, the
order of a verb's configuration and action."""
from __future__ import annotations

import logging
import re
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from alerts.engine import evaluate
from alerts.rules import StationView, rules_from_config
from monitor.cli import main
from monitor.cli.app import config_first
from monitor.store.database import Store
from monitor.service.logs import log_formatter

ROOT = Path(__file__).resolve().parent.parent

CONFIG = """
[store]
path = "store.sqlite"

[[stations]]
id = "harbour"
name = "Invented Harbour"
latitude = 50.0
longitude = -5.0
tz = "Europe/Lisbon"
constants = "history"

[stations.sensors.primary]
units = "m"
"""


@pytest.fixture
def station(tmp_path):
    cfg = tmp_path / "quaywatch.toml"
    cfg.write_text(CONFIG)
    times = pd.date_range("2024-07-01", periods=24 * 60, freq="1min", tz="UTC")
    with Store.open(tmp_path / "store.sqlite") as s:
        s.write_batch("harbour", "primary", times.as_unit("s").asi8, np.full(len(times), 2.0))
    return cfg


def test_version_is_the_packages(capsys):
    with pytest.raises(SystemExit) as done:
        main(["--version"])
    assert done.value.code == 0
    want = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]
    assert capsys.readouterr().out.strip() == f"quaywatch {want}"


def test_log_lines_are_stamped_in_iso_utc():
    record = logging.LogRecord("quaywatch", logging.INFO, __file__, 1, "hello", None, None)
    record.created, record.msecs = 1761220800.25, 250.0   # 2025-10-23 12:00:00.25 UTC
    line = log_formatter().format(record)
    assert line.startswith("2025-10-23T12:00:00.250Z INFO quaywatch: hello")


def test_engine_log_gives_event_times_in_iso_not_epoch_seconds(tmp_path, caplog):
    import sqlite_utils

    view = StationView(id="harbour", name="Invented Harbour", tz="Europe/Lisbon")
    rules, _ = rules_from_config([{"id": "surge", "when": "residual_above", "hold": 0,
                                   "notify": ["duty@port.example"], "steps": [{"name": "raised", "at": 0.3}]}],
                                 "rules", {})
    idx = pd.date_range("2025-10-23 12:00", periods=3, freq="1min", tz="UTC")
    samples = pd.DataFrame({"observed": 3.5, "predicted": 3.0, "residual": 0.5, "smoothed": 0.5, "flag": 1},
                           index=idx)
    with caplog.at_level(logging.INFO, logger="alerts.engine"):
        evaluate(sqlite_utils.Database(tmp_path / "s.db"), view, rules, samples, now=idx[-1])
    line = next(r.getMessage() for r in caplog.records if "opened" in r.getMessage())
    assert "at 2025-10-23T12:00:00Z" in line
    assert not re.search(r"\b17\d{8}\b", line)


def test_flag_answers_in_utc_when_asked_in_utc(station, capsys):
    assert main(["flag", str(station), "--station", "harbour", "--sensor", "primary",
                 "--at", "2024-07-01T10:00Z", "--set", "3", "--who", "tech", "--why", "check"]) == 0
    out = capsys.readouterr().out
    assert "2024-07-01 10:00 UTC" in out and "WEST" not in out


def test_flag_answers_in_local_time_when_asked_in_local_time(station, capsys):
    # Lisbon keeps WEST = UTC+1 in July (tz database): 11:00 local is 10:00 UTC
    assert main(["flag", str(station), "--station", "harbour", "--sensor", "primary",
                 "--at", "2024-07-01T11:00", "--set", "3", "--who", "tech", "--why", "check"]) == 0
    assert "2024-07-01 11:00 WEST" in capsys.readouterr().out


@pytest.mark.parametrize("argv", [
    ["staff", "CONFIG", "list", "--station", "harbour"],
    ["staff", "list", "CONFIG", "--station", "harbour"],
])
def test_staff_takes_the_configuration_first_and_the_old_order_too(station, capsys, argv):
    argv = [str(station) if a == "CONFIG" else a for a in argv]
    assert main(argv) == 0


@pytest.mark.parametrize("argv", [
    ["alerts", "CONFIG", "episodes"],
    ["alerts", "episodes", "CONFIG"],
])
def test_alerts_takes_either_order(station, capsys, argv):
    argv = [str(station) if a == "CONFIG" else a for a in argv]
    assert main(argv) == 0


def test_config_first_leaves_other_verbs_alone():
    assert config_first(["qc", "c.toml", "--station", "x"]) == ["qc", "c.toml", "--station", "x"]
    assert config_first(["-v", "staff", "add", "c.toml"]) == ["-v", "staff", "c.toml", "add"]
