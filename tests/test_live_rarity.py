"""How rare the water is, on the live page during an event (the cached return-level curve only).

Reference for the expected words: interpolation linear in the logarithm of the period between
the curve's rows, worked by hand below (predictor/rarity.py's documented rule; Coles 2001,
sec. 2.6.6, for reading a band the other way). The curve is hand-made, invented numbers.
"""
from __future__ import annotations

import json
import math
import time
from pathlib import Path

import pytest

from alerts.live.render import render_station, write_station
from alerts.live.settings import LiveSettings
from alerts.live.snapshot import rarity_line
from live_samples import NOW, OFFSET, sample_snapshot
from monitor.cli import main
from monitor.service.config import load_config
from monitor.service.live_pages import RarityCache, gather
from monitor.store.database import Store
from units import hour, minute

# display datum [m]; the upper band of the 100-year row unbounded
CURVE = {"period": [1.1, 2.0, 10.0, 100.0],
         "level": [3.80, 4.00, 4.30, 4.60],
         "lower": [3.78, 3.95, 4.20, 4.40],
         "upper": [3.82, 4.05, 4.40, math.inf]}

# 4.15 m by hand: level half way from (2, 4.00) to (10, 4.30): sqrt(2 * 10) = 4.47 -> "4";
# upper band 0.10/0.35 = 2/7 of the way from (2, 4.05) to (10, 4.40): 2 * 5**(2/7) = 3.17 -> "3";
# lower band 0.20/0.25 = 0.8 of the way from (2, 3.95) to (10, 4.20): 2 * 5**0.8 = 7.25 -> "7".
PERIOD_415 = math.sqrt(20.0)
SHORTEST_415 = 2 * 5 ** (2 / 7)
LONGEST_415 = 2 * 5 ** 0.8
WORDS_415 = ("Highest water in this event so far, 4.15 m above chart datum: "
             "about a 1-in-4-year level, range 1-in-3 to 1-in-7 years")
LEVEL_EPISODE = {"rule": "quay", "watch": "level_above", "step_now": "boards out", "top_step": "boards out",
                 "opened_at": NOW - 2 * hour, "messages": []}
FAULT_EPISODE = {**LEVEL_EPISODE, "rule": "gauge", "watch": "equipment_fault"}


def _rarity(level_display: float, t: float = NOW - hour) -> dict:
    """The snapshot's rarity input: peak on the station datum, curve on the display datum."""
    return {"peak": {"level": level_display + OFFSET, "recorded": level_display + OFFSET, "t": t},
            "curve": CURVE, "note": "hand-made curve"}


# --------------------------------------------------------------------------- pure parts

def test_words_read_off_the_curve_by_hand():
    r = rarity_line({"level": 4.15, "recorded": 4.15, "t": NOW}, CURVE, "chart datum", [LEVEL_EPISODE])
    assert r["period"] == pytest.approx(PERIOD_415)
    assert r["shortest"] == pytest.approx(SHORTEST_415)
    assert r["longest"] == pytest.approx(LONGEST_415)
    assert r["shortest"] < r["period"] < r["longest"]
    assert r["words"] == WORDS_415


def test_no_line_on_calm_water_without_an_episode():
    assert rarity_line({"level": 3.70, "recorded": 3.70, "t": NOW}, CURVE, "chart datum", []) is None
    # a gauge fault is no event of the water
    assert rarity_line({"level": 3.70, "recorded": 3.70, "t": NOW}, CURVE, "chart datum", [FAULT_EPISODE]) is None


def test_water_above_the_lowest_tabulated_level_is_an_event_without_an_alert():
    r = rarity_line({"level": 3.81, "recorded": 3.81, "t": NOW}, CURVE, "chart datum", [])
    assert r is not None and r["why"].startswith("above the 1-in-1.1-year level")
    assert rarity_line({"level": 3.80, "recorded": 3.80, "t": NOW}, CURVE, "chart datum", []) is None


def test_snapshot_page_and_json_carry_the_line(tmp_path):
    snap = sample_snapshot(episodes=[LEVEL_EPISODE], rarity=_rarity(4.15))
    assert snap.rarity["words"] == WORDS_415
    assert snap.rarity["level"] == pytest.approx(4.15)          # moved to the display datum
    page = render_station(snap)
    assert WORDS_415 in page and 'id="rarity"' in page
    write_station(snap, tmp_path)
    doc = json.loads((tmp_path / "skerrin.json").read_text())
    assert doc["rarity"]["words"] == WORDS_415
    assert doc["rarity"]["period"] == pytest.approx(PERIOD_415, abs=1e-4)


def test_snapshot_page_and_json_without_an_event_say_nothing_extra(tmp_path):
    snap = sample_snapshot(rarity=_rarity(3.70))
    assert snap.rarity is None
    assert 'id="rarity"' not in render_station(snap)
    write_station(snap, tmp_path)
    assert json.loads((tmp_path / "skerrin.json").read_text())["rarity"] is None


# --------------------------------------------------------------------------- from the store

T_NOW = 1_760_000_040          # 2025-10-09, invented record
CONFIG = """
[store]
path = "q.db"
[[stations]]
id = "testport"
name = "Test Port (invented)"
latitude = 50.0
longitude = -4.0
tz = "Europe/Dublin"
constants = "history"
fit_min_days = 365
datums = { chart = -1.0 }
[stations.sensors.primary]
"""
CHART = -1.0                   # chart datum 1 m below the station datum: display = station + 1 m


def _station(tmp_path: Path):
    (tmp_path / "config.toml").write_text(CONFIG)
    st = load_config(tmp_path / "config.toml").stations[0]
    assert st.display_offset == CHART and st.display_label == "chart datum"
    return st


def _observe(store, pairs, flag: int = 1) -> None:
    """(t, level on the station datum) samples of the primary with an aggregate QC flag."""
    with store.transaction() as conn:
        conn.executemany("INSERT INTO observations (station, sensor, t, value, flag) VALUES "
                         "('testport', 'primary', ?, ?, ?)", [(int(t), float(v), flag) for t, v in pairs])


def _calm(store) -> None:
    _observe(store, [(T_NOW - 3 * hour + i * 10 * minute, 2.0) for i in range(19)])   # 3.00 m on chart datum


def _cache_row(store, made_t: int = 1_750_000_000) -> None:
    rows = [{"period": p, "level": z, "lower": lo, "upper": None if math.isinf(up) else up, "warning": None}
            for p, z, lo, up in zip(*(CURVE[k] for k in ("period", "level", "lower", "upper")))]
    result = {"station": "testport", "datum": "chart datum", "datum_offset_m": CHART,
              "record": {"first": "2001-01-01T00:00:00Z", "last": "2025-06-01T00:00:00Z", "years_of_hours": 24.4},
              "sea_level": {"trend": None}, "joint_probability": {"curve": rows}}
    with store.transaction() as conn:
        conn.execute("INSERT OR REPLACE INTO extremes_cache (station, options, made_t, record_end, events, result, "
                     "options_json) VALUES ('testport', 'k1', ?, ?, '{}', ?, '{}')",
                     (made_t, made_t, json.dumps(result)))


def _episode(store, watch: str = "level_above") -> None:
    with store.transaction() as conn:
        conn.execute("CREATE TABLE IF NOT EXISTS alert_episodes (id INTEGER PRIMARY KEY, station TEXT, rule TEXT, "
                     "watch TEXT, datum TEXT, unit TEXT, opened_at INTEGER, closed_at INTEGER, top_step TEXT, "
                     "step_now TEXT, peak REAL, peak_t INTEGER, last_value REAL, last_t INTEGER, messages INTEGER)")
        conn.execute("INSERT INTO alert_episodes (station, rule, watch, datum, unit, opened_at, top_step, step_now) "
                     "VALUES ('testport', 'quay', ?, 'station', 'm', ?, 'high', 'high')", (watch, T_NOW - hour))


def _gather(store, st, cache=None):
    return gather(store, st, LiveSettings(), now=T_NOW, until=T_NOW + 60, rarity=cache)


def test_gather_shows_the_line_during_an_open_episode(store, tmp_path):
    st = _station(tmp_path)
    _calm(store)
    _observe(store, [(T_NOW - 85 * minute, 3.15)])                 # 4.15 m on chart datum, passed
    _observe(store, [(T_NOW - 75 * minute, 4.00)], flag=3)         # higher but suspect: not counted
    _cache_row(store)
    _episode(store)
    snap = _gather(store, st)
    assert snap.rarity is not None and snap.rarity["words"] == WORDS_415
    assert snap.rarity["t"] == T_NOW - 85 * minute
    assert snap.to_json()["rarity"]["words"] == WORDS_415


def test_gather_says_nothing_on_calm_water_without_an_episode(store, tmp_path):
    st = _station(tmp_path)
    _calm(store)
    _cache_row(store)
    assert _gather(store, st).rarity is None
    _episode(store, "equipment_fault")                             # a gauge fault is no event of the water
    assert _gather(store, st).rarity is None


def test_gather_without_a_cache_row_says_nothing_and_raises_nothing(store, tmp_path):
    st = _station(tmp_path)
    _calm(store)
    _observe(store, [(T_NOW - 85 * minute, 3.15)])
    _episode(store)
    assert _gather(store, st).rarity is None


def test_the_cached_result_is_parsed_again_only_when_its_row_changes(store, tmp_path):
    st = _station(tmp_path)
    _calm(store)
    _observe(store, [(T_NOW - 85 * minute, 3.15)])
    _cache_row(store)
    _episode(store)
    cache = RarityCache()
    for _ in range(3):
        assert _gather(store, st, cache).rarity["words"] == WORDS_415
    assert cache.reads == 1
    _cache_row(store, made_t=1_760_000_000)                        # a new analysis (a new storm came)
    assert _gather(store, st, cache).rarity["words"] == WORDS_415
    assert cache.reads == 2


def test_an_unreadable_cache_row_is_a_log_line_not_a_traceback(store, tmp_path, caplog):
    st = _station(tmp_path)
    _calm(store)
    _observe(store, [(T_NOW - 85 * minute, 3.15)])
    _episode(store)
    with store.transaction() as conn:
        conn.execute("INSERT INTO extremes_cache (station, options, made_t, record_end, events, result, options_json) "
                     "VALUES ('testport', 'k1', 1, 1, '{}', '{not json', '{}')")
    assert _gather(store, st).rarity is None
    assert "extremes_cache row" in caplog.text


def test_status_prints_the_line_in_an_event_and_not_on_calm_water(tmp_path, capsys, monkeypatch):
    """`quaywatch status` (the harbour master's terminal view) carries the page's rarity line
    while an event is on, and says nothing of rarity on calm water."""
    st = _station(tmp_path)
    with Store.open(tmp_path / "q.db") as store:
        _calm(store)
        _cache_row(store)
    monkeypatch.setattr(time, "time", lambda: float(T_NOW))
    assert main(["status", str(tmp_path / "config.toml")]) == 0
    calm = capsys.readouterr().out
    assert "Highest water in this event" not in calm and "unofficial" in calm
    with Store.open(tmp_path / "q.db") as store:
        _observe(store, [(T_NOW - 85 * minute, 3.15)])             # 4.15 m on chart datum
        _episode(store)
    assert main(["status", str(tmp_path / "config.toml")]) == 0
    out = capsys.readouterr().out
    assert " ".join(out.split()).count(WORDS_415) == 1, out
    assert st.id in out and "unofficial" in out
