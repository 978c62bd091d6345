"""Ingest speed: a year of one-minute CSV for one station through our path (parse + store,
with a feed checkpoint committed with every batch), as a ratio to a bare sqlite3
``executemany`` of the same, already parsed rows into a table of the same shape.

Target (design notes): ratio >= 0.5. Both sides use WAL with synchronous = NORMAL.
"""
from __future__ import annotations

import sqlite3
import tempfile
import time
from pathlib import Path

import numpy as np

ROWS = 525_600          # one year at one-minute steps
BATCH = 100_000         # lines per transaction on our path (as ingest uses)
TARGET = 0.5


def make_lines(n: int = ROWS) -> list[str]:
    """An invented one-minute record (a plain M2-like curve), as CSV lines."""
    t = np.datetime64("2025-01-01T00:00:00") + np.arange(n).astype("timedelta64[m]")
    v = 2.5 + 1.2 * np.cos(np.arange(n) * (2 * np.pi / 745.2))
    return [f"{a}Z,{b:.3f}" for a, b in zip(np.datetime_as_string(t, unit="s"), v)]


def ours(path: Path, lines: list[str]) -> float:
    """Seconds for parse + store with a checkpoint per batch."""
    from monitor.feeds.parse import LineFormat
    from monitor.feeds.parse import parse_lines
    from monitor.store.database import Store

    fmt = LineFormat()
    store = Store.open(path)
    t0 = time.perf_counter()
    for i in range(0, len(lines), BATCH):
        chunk = lines[i:i + BATCH]
        p = parse_lines(chunk, fmt, 0.0, range(i + 1, i + 1 + len(chunk)))
        store.write_batch("bench", "primary", p.t, p.value, p.time_source, p.rejects, feed="bench.primary",
                          state={"offset": i + len(chunk)})
    dt = time.perf_counter() - t0
    assert store.observation_count("bench", "primary") == len(lines)
    store.close()
    return dt


def bare(path: Path, ddl: str, rows: list[tuple]) -> float:
    """Seconds for one executemany of parsed rows into the same table shape."""
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode = WAL")
    con.execute("PRAGMA synchronous = NORMAL")
    con.execute(ddl)
    t0 = time.perf_counter()
    con.execute("BEGIN")
    con.executemany("INSERT INTO observations (station, sensor, t, value, time_source) VALUES (?, ?, ?, ?, ?)",
                    rows)
    con.execute("COMMIT")
    dt = time.perf_counter() - t0
    con.close()
    return dt


def main() -> None:
    lines = make_lines()
    t = (np.datetime64("2025-01-01T00:00:00") + np.arange(ROWS).astype("timedelta64[m]")).astype(np.int64)
    vals = [float(x.split(",")[1]) for x in lines]
    rows = list(zip(["bench"] * ROWS, ["primary"] * ROWS, t.tolist(), vals, ["sensor"] * ROWS))
    with tempfile.TemporaryDirectory() as tmp:
        ours_s = ours(Path(tmp) / "ours.db", lines)
        con = sqlite3.connect(Path(tmp) / "ours.db")
        ddl = con.execute("SELECT sql FROM sqlite_master WHERE name = 'observations'").fetchone()[0]
        con.close()
        bare_s = bare(Path(tmp) / "bare.db", ddl, rows)
    ratio = bare_s / ours_s
    print(f"ingest: {ROWS:,} one-minute rows")
    print(f"  ours (parse + store + checkpoints): {ours_s:6.2f} s  {ROWS / ours_s:10,.0f} rows/s")
    print(f"  bare sqlite3 executemany          : {bare_s:6.2f} s  {ROWS / bare_s:10,.0f} rows/s")
    print(f"  ratio ours/bare = {ratio:.2f} (target >= {TARGET}) {'PASS' if ratio >= TARGET else 'FAIL'}")


if __name__ == "__main__":
    main()
