"""Snapshots of an invented station for the live page tests (invented numbers throughout)."""
from __future__ import annotations

import numpy as np

from alerts.live.settings import Mark
from alerts.live.snapshot import build_snapshot
from units import hour, minute

NOW = 1_761_172_200.0          # 2025-10-22 22:30:00Z (23:30 IST in Europe/Dublin), invented storm night
OFFSET = 1.0                   # chart datum 1.000 m above the gauge zero
M2_PERIOD = 12.4206012 * hour  # M2 period (Schureman 1958: 28.9841042 deg/h)
MARKS = (Mark("quay top", 4.25 + OFFSET), Mark("boards out", 4.00 + OFFSET), Mark("lock sill", -0.90 + OFFSET, "below"))
STATION = {"id": "skerrin", "name": "Skerrin <b>Quay</b>", "tz": "Europe/Dublin", "datum": "chart datum",
           "note": "", "datum_note": ""}


def tide(t):
    """An invented semidiurnal tide on the station datum [m], high water at NOW + 1 h."""
    return OFFSET + 2.2 + 1.6 * np.cos(2 * np.pi * (np.asarray(t, dtype=float) - (NOW + hour)) / M2_PERIOD)


def sample_snapshot(age: float = 60.0, surge: float = 0.6, episodes=(), health=None, written_at: float | None = None,
                    stale_after: float = 30 * minute, now: float = NOW, rarity=None):
    """A snapshot whose last sample is ``age`` seconds before ``now``, with a steady surge [m]."""
    last = now - age
    t = np.arange(last - 48 * hour, last + 1, minute)
    pred = tide(t)
    obs = pred + surge
    ahead = np.arange(now, now + 3 * hour, 600.0)
    return build_snapshot(
        station=STATION, marks=MARKS, display_offset=OFFSET, now=now,
        written_at=now if written_at is None else written_at, stale_after=stale_after, refresh=60.0,
        last_sample_t=last, samples={"t": t, "observed": obs, "predicted": pred, "residual": obs - pred,
                                     "smoothed": obs - pred},
        ahead={"t": ahead, "predicted": tide(ahead)},
        forecast={"hw_t": NOW + hour, "made_t": now, "predicted_high": OFFSET + 3.8, "forecast": OFFSET + 3.8 + surge,
                  "lower": OFFSET + 3.8 + surge - 0.3, "upper": OFFSET + 3.8 + surge + 0.3, "coverage": 0.9,
                  "note": ""},
        episodes=list(episodes),
        health=health if health is not None else {
            "sensors": [{"role": "primary", "label": "pressure sensor", "kind": "file", "last_t": last}],
            "qc": {"hours": 6.0, "fail": 0, "suspect": 0, "total": 360}, "faults": []},
        caution="Automated and unofficial. Official warnings and the local emergency authorities come first.",
        rarity=rarity)
