"""Configuration of the live pages: [live] and [[stations.marks]], errors by key path, no traceback."""
from __future__ import annotations

import re
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from alerts.live.settings import LIVE_KEYS, MARK_KEYS, LiveSettings, live_settings_from, marks_from_config
from monitor.service.config import validate_config
from units import minute

ROOT = Path(__file__).resolve().parent.parent


def _raw(**extra):
    station = {"id": "skerrin", "latitude": 54.0, "longitude": -10.0, "constants": "history",
               "datums": {"chart": 1.0}, "sensors": {"primary": {}}}
    station.update(extra.pop("station", {}))
    return {"stations": [station], **extra}


def test_defaults_and_durations_written_by_people(tmp_path):
    cfg, errors = validate_config(_raw(live={"stale_after": "45min", "refresh": "30s", "folder": "pages"}), tmp_path)
    assert errors == []
    assert cfg.live == LiveSettings(folder=tmp_path / "pages", stale_after=45 * minute, refresh=30.0)
    cfg, _ = validate_config(_raw(), tmp_path)
    assert cfg.live is None  # no [live] table: no pages


def test_marks_are_kept_on_the_station_datum(tmp_path):
    marks = [{"name": "quay top", "level": 4.25, "datum": "chart"}, {"name": "sill", "level": -0.9, "side": "below"},
             {"name": "gauge zero", "level": 0.5, "datum": "station"}]
    cfg, errors = validate_config(_raw(station={"marks": marks}), tmp_path)
    assert errors == []
    got = [(m.name, round(m.level, 6), m.side) for m in cfg.stations[0].marks]
    # chart datum stands 1.0 m above the station datum; the display datum (chart) is the default
    assert got == [("quay top", 5.25, "above"), ("sill", 0.1, "below"), ("gauge zero", 0.5, "above")]


@pytest.mark.parametrize("live, key", [
    ({"stale_after": "soon"}, "live.stale_after"),
    ({"stale_after": 0}, "live.stale_after"),
    ({"refresh": "2d"}, "live.refresh"),
    ({"folder": ""}, "live.folder"),
    ({"colour": "red"}, "live.colour"),
])
def test_bad_live_values_name_their_key(tmp_path, live, key):
    cfg, errors = validate_config(_raw(live=live), tmp_path)
    assert cfg is None and len(errors) == 1 and errors[0].startswith(key + ":")


@pytest.mark.parametrize("mark, key", [
    ({"name": "quay", "level": "high"}, "stations[0].marks[1].level"),
    ({"name": "quay", "level": 4.0, "side": "over"}, "stations[0].marks[1].side"),
    ({"name": "quay", "level": 4.0, "datum": "lat"}, "stations[0].marks[1].datum"),
    ({"name": "", "level": 4.0}, "stations[0].marks[1].name"),
    ({"name": "top", "level": 4.0}, "stations[0].marks[1].name"),  # a second "top"
    ({"name": "quay", "level": 4.0, "colour": "red"}, "stations[0].marks[1].colour"),
])
def test_bad_marks_name_their_key(tmp_path, mark, key):
    cfg, errors = validate_config(_raw(station={"marks": [{"name": "top", "level": 5.0}, mark]}), tmp_path)
    assert cfg is None and len(errors) == 1 and errors[0].startswith(key + ":"), errors


def test_marks_must_be_an_array_of_tables(tmp_path):
    _, errors = validate_config(_raw(station={"marks": {"name": "x"}}), tmp_path)
    assert errors and errors[0].startswith("stations[0].marks:")


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(st.sampled_from([*LIVE_KEYS, "x"]),
                       st.one_of(st.none(), st.booleans(), st.integers(), st.floats(), st.text(max_size=8),
                                 st.lists(st.integers(), max_size=2))))
def test_live_validator_never_raises(raw):
    raw = {k: v for k, v in raw.items() if v is not None}
    value, errors = live_settings_from(raw, "live")
    assert isinstance(value, LiveSettings) and all(e.startswith("live.") for e in errors)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.dictionaries(st.sampled_from([*MARK_KEYS, "x"]),
                                st.one_of(st.booleans(), st.integers(), st.floats(), st.text(max_size=8),
                                          st.sampled_from(["above", "below", "chart", "station"]))), max_size=4))
def test_marks_validator_never_raises(raw):
    marks, errors = marks_from_config(raw, "marks", {"station": 0.0, "chart": 1.0}, "chart")
    assert all(e.startswith("marks[") for e in errors)
    assert len(marks) <= len(raw)


def test_check_names_the_key_without_a_traceback(tmp_path):
    cfg = tmp_path / "config.toml"
    cfg.write_text("""
[live]
stale_after = "a while"
[[stations]]
id = "skerrin"
latitude = 54.0
longitude = -10.0
constants = "history"
[stations.sensors.primary]
[[stations.marks]]
name = "quay top"
level = 4.25
side = "upwards"
""")
    res = subprocess.run([sys.executable, "-m", "monitor", "check", str(cfg)], capture_output=True, text=True,
                         cwd=ROOT, timeout=120)
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert "live.stale_after:" in res.stderr and "stations[0].marks[0].side:" in res.stderr


def test_example_documents_every_live_and_mark_key():
    text = (ROOT / "config.example.toml").read_text()
    raw = tomllib.loads(text)
    assert set(LIVE_KEYS) <= set(raw["live"])
    shown = set().union(*(set(m) for m in raw["stations"][0]["marks"]))
    assert set(MARK_KEYS) <= shown
    assert {m["side"] for m in raw["stations"][0]["marks"]} == {"above", "below"}
    assert re.search(r"^\[live\]", text, re.M)
