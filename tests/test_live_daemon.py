"""The live pages from the daemon (in process) and the headline of ``quaywatch status``."""
from __future__ import annotations

import json
import time
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.service.config import load_config
from monitor.service.daemon import Daemon, ingest_lines
from monitor.store.database import Store
from units import minute

T0 = 1_760_000_040  # a whole minute (2025-10-09), invented record


def _write_config(tmp: Path, live: bool = True) -> Path:
    cfg = tmp / "config.toml"
    cfg.write_text(("""
[live]
folder = "live"
stale_after = "30min"
refresh = "1min"
""" if live else "") + """
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
[[stations.marks]]
name = "quay top"
level = 4.0
[[stations.marks]]
name = "sill"
level = 0.5
side = "below"
""")
    return cfg


def _lines(start: float, n: int, level: float = 2.0) -> list[str]:
    return [f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(start + 60 * i))},{level + 0.001 * i:.3f}"
            for i in range(n)]


def _run_once(cfg_path: Path, lines: list[str]) -> Daemon:
    cfg = load_config(cfg_path)
    store = Store.open(cfg.store_path)
    d = Daemon(cfg, store)
    st = cfg.stations[0]
    ingest_lines(store, st.sensors["primary"], lines, received=time.time())
    d.process()
    return d


def test_daemon_writes_page_json_and_overview_and_says_stale(tmp_path):
    d = _run_once(_write_config(tmp_path), _lines(T0, 120))
    try:
        live = tmp_path / "live"
        doc = json.loads((live / "testport.json").read_text())
        # the record is from 2025, the clock is the wall's: STALE, and its last level shown
        assert doc["stale"] is True and doc["last_sample_t"] == T0 + 119 * minute
        # level 2.119 m on the station datum; chart datum 1.0 m below the gauge zero: 3.119 m
        assert doc["level"]["value"] == pytest.approx(3.119, abs=1e-6)
        assert doc["level"]["rate"] == pytest.approx(0.06, abs=1e-9)  # 1 mm a minute
        assert [m["words"] for m in doc["marks_now"]] == ["0.88 m below quay top", "2.62 m above sill"]
        assert 'id="stale"' in (live / "testport.html").read_text()
        assert "testport.html" in (live / "index.html").read_text()
    finally:
        d.store.close()


def test_silent_station_page_is_rewritten_only_when_refresh_is_due(tmp_path):
    d = _run_once(_write_config(tmp_path), _lines(T0, 30))
    try:
        page = tmp_path / "live" / "testport.json"
        first = json.loads(page.read_text())["written_at"]
        d.process()  # no new data, refresh not due: left alone
        assert json.loads(page.read_text())["written_at"] == first
        d.live.written["testport"] -= d.cfg.live.refresh  # as if a refresh interval had passed
        d.process()
        assert json.loads(page.read_text())["written_at"] > first
    finally:
        d.store.close()


def test_no_live_table_no_pages(tmp_path):
    d = _run_once(_write_config(tmp_path, live=False), _lines(T0, 30))
    try:
        assert d.live is None and not (tmp_path / "live").exists()
    finally:
        d.store.close()


def test_status_headline_says_stale_in_words_and_the_marks(tmp_path, capsys):
    cfg = _write_config(tmp_path)
    _run_once(cfg, _lines(T0, 120)).store.close()
    assert main(["status", str(cfg)]) == 0
    out = capsys.readouterr().out
    head = " ".join(out.split("last observation")[0].split())  # lines are wrapped at 100 columns
    assert "! STALE: the last usable sample is" in head and "days" in head and "limit is 30 min" in head
    assert "0.88 m below quay top; 2.62 m above sill" in head
    assert "Next high water: no forecast yet." in head


def test_status_of_a_fresh_gauge_has_no_stale_line(tmp_path, capsys):
    cfg = _write_config(tmp_path)
    now = time.time() // 60 * 60
    _run_once(cfg, _lines(now - 29 * minute, 30)).store.close()
    assert main(["status", str(cfg)]) == 0
    head = " ".join(capsys.readouterr().out.split("last observation")[0].split())
    assert "STALE" not in head and "- Level 3." in head and "rising 0.06 m/h" in head


def test_refit_with_too_little_history_is_a_warning_not_a_traceback(tmp_path, caplog):
    # fit_min_days = 365 and half an hour of record: the hourly refit says so and goes on
    d = _run_once(_write_config(tmp_path), _lines(T0, 30))
    try:
        d.refit(d.stations["testport"])
        assert any("days of usable history" in r.getMessage() for r in caplog.records if r.levelname == "WARNING")
    finally:
        d.store.close()
