"""What a steady pass takes from memory instead of asking the store gives what the store says.

The feed's age and the silent-feed fault of each level sensor come from its latest usable
sample (flag 1, 2 or 3; Store.last_time with ``usable``). A steady pass takes it from the
quality-control context that has just judged the window (Daemon._last_usable). An invented
port is followed a sample a minute through a spike, missing values, a technician's fail
flags on the newest samples and a primary that falls silent while the backup goes on; at
every pass the answer must equal the store's own query, and the context must have given
most of them.
"""
from __future__ import annotations

import numpy as np

from monitor.quality.records import set_override
from monitor.service.daemon import Daemon
from monitor.store.database import Store
from units import hour, minute

T0 = 1_767_225_600          # 2026-01-01T00:00Z (invented)
HISTORY = 26 * hour         # quality control looks 25 h back
LIVE = 60                   # one-minute passes after the history
SPIKE, MISSING, OVERRIDE, SILENT = 8, (15, 18), 30, (40, 46)  # passes (minutes into the live run)


def _level(t: np.ndarray) -> np.ndarray:
    return 2.0 + np.cos(2 * np.pi * t / 44714.16 + 0.7) + 0.004 * np.sin(t / 377.0)


def test_the_latest_usable_sample_from_the_qc_context_equals_the_stores(tmp_path, m2_stations, monkeypatch):
    cfg = m2_stations(["port"], sensors=("primary", "backup"))
    store = Store.open(cfg.store_path)
    answers, asked = [], []
    real, last_time = Daemon._last_usable, Store.last_time

    def counted(self, *a, **k):
        asked.append(k.get("usable", False))
        return last_time(self, *a, **k)

    def both(self, rt, sensor, end_t, horizon):
        n = len(asked)
        mine = real(self, rt, sensor, end_t, horizon)
        answers.append((sensor, end_t, mine, last_time(self.store, "port", sensor, until=horizon, usable=True),
                        len(asked) > n))
        return mine

    monkeypatch.setattr(Store, "last_time", counted)
    monkeypatch.setattr(Daemon, "_last_usable", both)
    try:
        hist = T0 + minute * np.arange(HISTORY // minute)
        for sensor in ("primary", "backup"):
            store.write_batch("port", sensor, hist, _level(hist))
        d = Daemon(cfg, store)
        rt = d.stations["port"]
        d.process_station(rt, now=T0 + HISTORY)
        for k in range(LIVE):
            t = np.array([T0 + HISTORY + k * minute])
            primary = _level(t) + (1.0 if k == SPIKE else 0.0)
            if MISSING[0] <= k < MISSING[1]:
                primary = np.full(1, np.nan)
            if not SILENT[0] <= k < SILENT[1]:
                store.write_batch("port", "primary", t, primary)
            store.write_batch("port", "backup", t, _level(t) + 0.003)
            if k == OVERRIDE:  # the technician fails the primary's newest five samples
                set_override(store, "port", "primary", int(t[0]) - 4 * minute, int(t[0]), 4, "technician",
                             "float fouled", at=int(t[0]))
            d.process_station(rt, now=int(t[0]) + 30)
    finally:
        store.close()
    live = [a for a in answers if a[1] >= T0 + HISTORY]
    assert len(live) == 2 * LIVE
    assert [a[2] for a in live] == [a[3] for a in live]
    # the passes whose answer is not the window's end: the primary's missing values (not
    # stored), its failed samples and its silence (the backup's rows are newer)
    newest = {a[1]: a[3] for a in live if a[0] == "primary"}
    assert sum(newest[e] < e for e in newest) >= (MISSING[1] - MISSING[0]) + 1 + (SILENT[1] - SILENT[0])
    assert sum(not a[4] for a in live) >= 0.9 * len(live)  # the context answered, not the store
