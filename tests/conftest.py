"""Shared fixtures."""
from __future__ import annotations

import sqlite3

import pytest

from monitor.cli import main as cli
from monitor.demo_decades import STATION, write_inputs


@pytest.fixture(scope="module")
def records_station(tmp_path_factory):
    """Eight invented years of hourly levels (sample_feeds/decades.py, fixed seed; a datum step
    in the middle) ingested through the command line into a fresh store, every sample then
    marked as having passed quality control (flag 1), as the daemon's QC would leave a calm
    record. Returns (config path, truth dict, store path)."""
    out = tmp_path_factory.mktemp("records")
    truth = write_inputs(out, years=8, truth_levels=False, start_year=2015)
    assert cli(["ingest", str(out / "config.toml"), "--station", STATION, str(out / "history.csv")]) == 0
    db = out / "records.db"
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE observations SET flag = 1")
    with sqlite3.connect(db) as conn:       # into the main file, so a copy of it is whole
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    return out / "config.toml", truth, db
