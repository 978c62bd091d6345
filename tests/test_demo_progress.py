"""`make demo` says how far the replay has got (monitor.demo.replay_progress)."""
from __future__ import annotations

import datetime as dt

import numpy as np

from monitor.demo import replay_progress
from monitor.store.database import Store

START = dt.datetime(2025, 10, 20, tzinfo=dt.timezone.utc)
END = START + dt.timedelta(days=4)


def test_progress_names_the_replayed_time_and_share(tmp_path):
    with Store.open(tmp_path / "q.db") as s:
        t = np.arange(int(START.timestamp()), int((START + dt.timedelta(days=1)).timestamp()) + 1, 600)
        s.write_batch("dunmerrow", "primary", t, np.full(len(t), 2.0))
    line = replay_progress(tmp_path / "q.db", "dunmerrow", START, END, "Europe/Dublin", 3)
    # one day of four: 25 %; 2025-10-21 00:00 UTC is 01:00 IST (Irish summer time until 26 Oct, tz database)
    assert line == "replayed to Tue 21 Oct 01:00 IST, 25 % of the span; 3 emails so far"


def test_no_progress_line_before_the_first_sample(tmp_path):
    assert replay_progress(tmp_path / "missing.db", "dunmerrow", START, END, "UTC", 0) is None
