"""The hourly drift and clock diagnostics of many stations are spread over the hour.

A daemon in this process with four stations (invented, one constituent, a rule each) is
fed one sample a minute per station; each station's diagnostics run at its first pass and
then every ``daemon.diagnostics_minutes`` of data time, but offset by station so they do not
all land in the same pass.
"""
from __future__ import annotations

import numpy as np

from monitor.service.daemon import Daemon
from monitor.store.database import Store

minute = 60
T0 = 1_760_000_000 - 1_760_000_000 % 3600
STATIONS = 4
PERIOD_MIN = 20


def test_diagnostics_of_several_stations_land_in_different_passes(m2_stations, monkeypatch):
    cfg = m2_stations([f"s{k}" for k in range(STATIONS)], daemon={"diagnostics_minutes": PERIOD_MIN})
    runs: list[tuple[str, int]] = []
    monkeypatch.setattr(Daemon, "_run_diagnostics", lambda self, rt, end_t: runs.append((rt.cfg.id, end_t)) or {})
    with Store.open(cfg.store_path) as store:
        d = Daemon(cfg, store)
        for m in range(0, 3 * PERIOD_MIN + 1):
            ts = np.array([T0 + minute * (180 + m)]) if m else T0 + minute * np.arange(181)
            for st in cfg.stations:
                store.write_batch(st.id, "primary", ts, 2.0 + 0.01 * np.sin(ts / 600.0))
            for rt in d.stations.values():
                d.process_station(rt, now=float(ts[-1]) + 30)
    first = {sid: min(t for s, t in runs if s == sid) for sid in d.stations}
    assert set(first.values()) == {T0 + minute * 180}  # all at once at the start
    later = [t for s, t in runs if t > T0 + minute * 180]
    per_pass = np.unique(later, return_counts=True)[1]
    assert per_pass.max() == 1                          # never two stations in one pass
    for sid in d.stations:                              # and each still once a period
        mine = sorted(t for s, t in runs if s == sid)
        assert np.all(np.diff(mine[1:]) == PERIOD_MIN * minute)
        assert mine[1] - mine[0] <= PERIOD_MIN * minute
