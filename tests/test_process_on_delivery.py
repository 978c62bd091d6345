"""A station is processed when its feed delivers lines, not at the next processing timer.

A daemon in this process follows two stations' files (an invented port, one constituent);
its catch-up pass never runs here. One poll job, after lines were appended to one file,
has that station's samples quality-controlled and in ``derived``, and leaves the other
station (whose file got nothing) alone.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import TideModel

minute = 60
T0 = (int(time.time()) // 3600 - 6) * 3600
MODEL = TideModel.from_dict({"mean": 2.0, "constituents": [{"name": "M2", "amplitude": 1.0, "phase": 40.0}]})


def _lines(minutes) -> str:
    t = T0 + minute * np.asarray(minutes)
    level = MODEL.predict(pd.to_datetime(t, unit="s", utc=True))
    return "".join(f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(int(a)))},{v:.3f}\n" for a, v in zip(t, level))


def _daemon(tmp: Path):
    from monitor.service.config import load_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store

    (tmp / "c.toml").write_text('mean = 2.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 40.0\n')
    stations = "".join(f"""
[[stations]]
id = "{sid}"
latitude = 50.0
longitude = -4.0
constants = "c.toml"
datums = {{ chart = 0.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "{tmp / (sid + '.csv')}" }}
""" for sid in ("east", "west"))
    (tmp / "config.toml").write_text(f'[store]\npath = "q.db"\n[daemon]\ncoalesce_seconds = 0.05\n{stations}')
    for sid in ("east", "west"):
        (tmp / f"{sid}.csv").write_text("time,level\n" + _lines(range(60)))
    cfg = load_config(tmp / "config.toml")
    store = Store.open(cfg.store_path)
    d = Daemon(cfg, store)
    d.open_feeds()
    return d, store


def _derived_last(store, sid):
    return store.conn.execute("SELECT max(t) FROM derived WHERE station = ?", [sid]).fetchone()[0]


def test_the_poll_job_processes_the_station_whose_feed_delivered(tmp_path):
    d, store = _daemon(tmp_path)
    try:
        d.poll()
        d.process()  # both stations' first hour
        west_before = _derived_last(store, "west")
        with open(tmp_path / "east.csv", "a") as fh:
            fh.write(_lines(range(60, 65)))
        d.job_poll()
        assert _derived_last(store, "east") == T0 + 64 * minute
        assert _derived_last(store, "west") == west_before == T0 + 59 * minute
    finally:
        d.close_feeds()
        store.close()
