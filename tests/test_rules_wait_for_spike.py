"""The alert rules wait for the spike test's verdict on the newest sample.

The spike test (QARTOD Test 6) judges a sample by its neighbours on both sides, so the
newest sample is "not evaluated" by it until the next one arrives; counted at once, a lone
spike at the end of the record would open an alert (hold 0) before quality control could
fail it. A daemon in this process follows a file of recent one-minute data (an invented
port, one constituent) with a residual rule that has no hold.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import TideModel

m = 1.0
minute = 60
CONSTANTS = """mean = 2.0
[[constituents]]
name = "M2"
amplitude = 1.0
phase = 40.0
"""
MODEL = TideModel.from_dict({"mean": 2.0, "constituents": [{"name": "M2", "amplitude": 1.0, "phase": 40.0}]})


def _lines(times, surge) -> str:
    t = np.asarray(times, dtype=np.int64)
    level = MODEL.predict(pd.to_datetime(t, unit="s", utc=True)) + np.asarray(surge, dtype=float)
    return "".join(f"{time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(int(a)))},{v:.3f}\n"
                   for a, v in zip(t, level))


def _daemon(tmp: Path):
    from monitor.service.config import load_config
    from monitor.service.daemon import Daemon
    from monitor.store.database import Store

    (tmp / "constants.toml").write_text(CONSTANTS)
    (tmp / "config.toml").write_text(f"""
[store]
path = "q.db"
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "constants.toml"
datums = {{ chart = 0.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "{tmp / 'gauge.csv'}" }}
[[stations.rules]]
id = "surge"
when = "residual_above"
hold = 0
band = 0.05
notify = ["duty@testport.example"]
steps = [{{ name = "raised", at = 0.30 }}]
""")
    cfg = load_config(tmp / "config.toml")
    store = Store.open(cfg.store_path)
    d = Daemon(cfg, store)
    d.open_feeds()
    return d, store


def _step(d) -> list:
    while d.poll():
        pass
    d.process()
    return [r["subject"] for r in d.store.db.query("SELECT subject FROM outbox WHERE kind = 'alert'")]


def _run(tmp: Path, tail: list[float], follower: float, late: int = 2) -> tuple[list, list, int]:
    """Calm record whose newest samples stand ``tail`` [m] over the tide, then one more sample
    ``follower`` [m] over it. Returns the alerts queued before and after the follower, and
    the newest sample's final aggregate flag. The record ends ``late`` minutes ago."""
    # Data time: three hours ending ``late`` minutes ago, none ahead of the clock.
    t_end = (int(time.time()) // minute - late) * minute
    feed = tmp / "gauge.csv"
    times = t_end - 180 * minute + minute * np.arange(180)
    surge = np.zeros(180)
    surge[-len(tail):] = tail
    feed.write_text("time,level\n" + _lines(times, surge))
    d, store = _daemon(tmp)
    try:
        before = _step(d)
        with open(feed, "a") as fh:
            fh.write(_lines([t_end], [follower]))
        after = _step(d)
        flag = store.conn.execute("SELECT flag FROM observations WHERE t = ?", [int(times[-1])]).fetchone()[0]
    finally:
        d.close_feeds()
        store.close()
    return before, after, flag


def test_a_spike_at_the_newest_sample_queues_no_alert_before_or_after_its_verdict(tmp_path):
    before, after, flag = _run(tmp_path, tail=[0.6 * m], follower=0.0)
    assert flag == 4  # the follower let the spike test fail it
    assert before == []
    assert after == []


def test_a_real_rise_at_the_newest_sample_alerts_once_its_follower_confirms_it(tmp_path):
    # a surge front: 8 cm a minute, over the rule's step at the newest sample
    before, after, flag = _run(tmp_path, tail=[0.08 * m, 0.16 * m, 0.24 * m, 0.32 * m], follower=0.40 * m)
    assert flag in (1, 3)  # usable: water that keeps rising is no spike
    assert before == []    # held back until the spike test could judge it
    assert len(after) == 1 and "raised" in after[0]


def test_a_spike_at_the_newest_sample_of_a_feed_running_late_waits_for_its_follower_too(tmp_path):
    # stamps ninety minutes old (a logger sending its backlog): the follower still comes
    before, after, flag = _run(tmp_path, tail=[0.6 * m], follower=0.0, late=90)
    assert flag == 4
    assert before == []
    assert after == []
