"""Work that must grow with new data, not with the history kept: each part at two sizes,
with the ratio of their times printed beside the ratio of their sizes.

- the outbox's delivery round with nothing due, over a small and a large store of
  delivered messages (report-sized bodies): target, the round at the large size within
  2 times the small one (it reads what is waiting through the status index, not the kept
  messages);
- ``sensor_drift`` (primary against backup) over 30 days and over a year: target, the
  time ratio within 1.5 times the size ratio (linear);
- ``relative_clock`` (backup timing against the primary, ``sensor_timing`` windows) over
  30 and 120 days: target, the time ratio within 1.5 times the size ratio.

Run: ``python -m benchmarks.bench_growth`` (``QW_BENCH_OUTBOX=SMALL,LARGE`` kept messages,
default 500,10000). Data: an invented port (two constituents, 1 mm noise, a backup 3 mm
off drifting 0.5 mm a day and 2 minutes late).
"""
from __future__ import annotations

import os
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

DAY = 86400
BODY = 8000  # [characters] of a kept message's text and of its HTML


def _best(fn, repeat: int = 3) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _outbox_round(kept: int) -> float:
    """Seconds of one delivery round with nothing due over ``kept`` delivered messages."""
    import sqlite_utils

    from alerts.mail.outbox import deliver_due, ensure_outbox_schema, mail_settings_from

    settings, _ = mail_settings_from({"sender": "b@bench.example", "host": "127.0.0.1", "port": 9,
                                      "security": "none"}, "mail")
    body = "x" * BODY
    with tempfile.TemporaryDirectory() as d:
        db = sqlite_utils.Database(Path(d) / "o.sqlite")
        ensure_outbox_schema(db)
        now = int(time.time())
        rows = ((now - kept + i, "report", f"k{i}", "duty@bench.example", f"report {i}", body, body,
                 f"<m{i}@bench.example>", "sent", 1, now - kept + i) for i in range(kept))
        with db.conn:
            db.conn.executemany("INSERT INTO outbox (created_at, kind, key, recipient, subject, text, html,"
                                " message_id, status, attempts, sent_at) VALUES (?,?,?,?,?,?,?,?,?,?,?)", rows)
        db.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return _best(lambda: deliver_due(db, settings), 5)


def _pair(days: float):
    idx = pd.date_range("2025-01-01", periods=int(days * 1440), freq="1min", tz="UTC")
    t = idx.as_unit("s").asi8.astype(float)
    rng = np.random.default_rng(3)

    def sea(tt):
        return 2.0 + 1.2 * np.cos(2 * np.pi * tt / 44714.16) + 0.4 * np.cos(2 * np.pi * tt / 43200.0)

    primary = pd.Series(sea(t) + rng.normal(0, 0.001, len(t)), index=idx)
    backup = pd.Series(sea(t - 120) + 0.003 + 0.0005 * (t - t[0]) / DAY + rng.normal(0, 0.001, len(t)), index=idx)
    return primary, backup


def main() -> None:
    from benchmarks.targets import Targets
    from monitor.quality import diagnostics as D

    small, large = (int(x) for x in os.environ.get("QW_BENCH_OUTBOX", "500,10000").split(","))
    targets = Targets()

    o_small, o_large = _outbox_round(small), _outbox_round(large)
    print(f"outbox round, nothing due: {small:,} kept {o_small * 1e3:7.2f} ms, {large:,} kept {o_large * 1e3:7.2f} ms"
          f" (size ratio {large / small:.0f})")
    targets.at_most("outbox round time ratio (large / small store)", o_large / o_small, 2.0, ".2f")

    p30, b30 = _pair(30)
    p365, b365 = _pair(365)
    d30 = _best(lambda: D.sensor_drift(p30, b30), 3)
    d365 = _best(lambda: D.sensor_drift(p365, b365), 2)
    print(f"sensor_drift: 30 days {d30 * 1e3:8.1f} ms, 365 days {d365 * 1e3:8.1f} ms (size ratio {365 / 30:.1f})")
    targets.at_most("sensor_drift time ratio / size ratio (365 / 30 days)", (d365 / d30) / (365 / 30), 1.5, ".2f")

    p120, b120 = _pair(120)
    c30 = _best(lambda: D.relative_clock(p30, b30), 3)
    c120 = _best(lambda: D.relative_clock(p120, b120), 2)
    print(f"relative_clock: 30 days {c30 * 1e3:8.1f} ms, 120 days {c120 * 1e3:8.1f} ms (size ratio 4)")
    targets.at_most("relative_clock time ratio / size ratio (120 / 30 days)", (c120 / c30) / 4, 1.5, ".2f")
    targets.finish()


if __name__ == "__main__":
    main()
