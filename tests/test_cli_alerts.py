"""``quaywatch alerts CONFIG episodes|outbox|test-mail`` (monitor/cli/alerts.py)."""
from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
import sqlite_utils

from alerts.engine import evaluate
from alerts.rules import StationView, rules_from_config
from monitor.cli import main

CONFIG = """
[store]
path = "store.sqlite"

[mail]
sender = "Quay monitor <gauge@port.example>"
host = "127.0.0.1"
port = {port}
security = "none"
timeout = "5s"

[[stations]]
id = "dunmerrow"
name = "Port Dunmerrow"
latitude = 54.4
longitude = -11.2
tz = "Europe/Dublin"
constants = "history"
datums = {{ chart = 1.0 }}

[stations.sensors.primary]
units = "m"
line = {{ delimiter = ",", time_column = 1, value_column = 2, time_format = "iso", header_lines = 1 }}
feed = {{ kind = "file", path = "primary.csv" }}

[[stations.rules]]
id = "surge"
when = "residual_above"
hold = "10min"
notify = ["duty@port.example"]
steps = [{{ name = "raised", at = 0.3 }}]
"""


@pytest.fixture
def config(tmp_path, port):
    path = tmp_path / "quaywatch.toml"
    path.write_text(CONFIG.format(port=port))
    return path


def test_test_mail_is_delivered_and_reported(config, smtp, capsys):
    assert main(["alerts", str(config), "test-mail", "--to", "tech@port.example"]) == 0
    assert "sent: accepted by 127.0.0.1" in capsys.readouterr().out
    [msg] = smtp.messages
    assert msg["To"] == "tech@port.example"
    assert "unofficial" in msg.get_body(("plain",)).get_content()


def test_test_mail_goes_through_the_outbox(config, smtp, capsys):
    main(["alerts", str(config), "test-mail"])
    capsys.readouterr()
    main(["alerts", str(config), "outbox"])
    out = capsys.readouterr().out
    assert "test" in out and "sent" in out and "gauge@port.example" in out


def test_test_mail_without_a_server_says_so_and_keeps_the_message(config, capsys):
    assert main(["alerts", str(config), "test-mail", "--wait", "0"]) == 1
    out = capsys.readouterr().out
    assert "not delivered yet" in out and "Connection refused" in out
    main(["alerts", str(config), "outbox", "--status", "pending"])
    assert "pending" in capsys.readouterr().out


def test_test_mail_refuses_an_address_with_extra_headers(config, capsys):
    assert main(["alerts", str(config), "test-mail", "--to", "a@port.example\nBcc: b@evil.example"]) == 2
    assert "--to" in capsys.readouterr().err


def test_listing_before_the_store_exists_is_a_clear_error(config, capsys):
    assert main(["alerts", str(config), "episodes"]) == 2
    assert "does not exist yet" in capsys.readouterr().err


def test_episodes_are_listed_in_local_time_with_the_zone(config, capsys):
    db = sqlite_utils.Database(config.parent / "store.sqlite")
    rules, _ = rules_from_config([{"id": "surge", "when": "residual_above", "hold": 0,
                                   "notify": ["duty@port.example"], "steps": [{"name": "raised", "at": 0.3}]}],
                                 "rules", {})
    idx = pd.date_range("2025-10-23 12:00", periods=30, freq="1min", tz="UTC")
    r = np.r_[[0.5] * 10, [0.0] * 20]
    samples = pd.DataFrame({"observed": 3 + r, "predicted": 3.0, "residual": r, "smoothed": r, "flag": 1}, index=idx)
    evaluate(db, StationView("dunmerrow", "Port Dunmerrow", "Europe/Dublin"), rules, samples, now=idx[-1])
    db.close()
    assert main(["alerts", str(config), "episodes"]) == 0
    out = capsys.readouterr().out
    # 12:00 UTC is 13:00 Irish summer time (IST, UTC+1) on 23 Oct 2025 (tz database).
    assert "2025-10-23 13:00 IST" in out and "raised" in out
    header, rule = out.splitlines()[:2]
    assert len(header) <= len(rule) + 2  # columns line up under the header


def test_episode_peaks_are_levels_on_the_display_datum_and_residuals_with_their_sign(config, capsys):
    db = sqlite_utils.Database(config.parent / "store.sqlite")
    rules, _ = rules_from_config([
        {"id": "surge", "when": "residual_above", "hold": 0, "notify": ["duty@port.example"],
         "steps": [{"name": "raised", "at": 0.3}]},
        {"id": "level", "when": "level_above", "hold": 0, "notify": ["duty@port.example"],   # on the station datum
         "steps": [{"name": "wet", "at": 3.4}]}], "rules", {"chart": 1.0})
    idx = pd.date_range("2025-10-23 12:00", periods=30, freq="1min", tz="UTC")
    r = np.r_[[0.5] * 10, [0.0] * 20]
    samples = pd.DataFrame({"observed": 3 + r, "predicted": 3.0, "residual": r, "smoothed": r, "flag": 1}, index=idx)
    evaluate(db, StationView("dunmerrow", "Port Dunmerrow", "Europe/Dublin", datums={"chart": 1.0}), rules, samples,
             now=idx[-1])
    db.close()
    main(["alerts", str(config), "episodes"])
    out = capsys.readouterr().out
    # the level peaked at 3.5 m on the station datum: 2.5 m above chart datum (1.0 m higher)
    assert "2.50 m above chart datum" in out and "+0.50 m" in out
