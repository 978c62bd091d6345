"""Backfill batches grow from a small first one (so a big file's first rows are stored at
once); how a file is cut into batches never changes what is stored. Invented data."""
from __future__ import annotations

import sqlite3
from pathlib import Path

import numpy as np

from monitor.cli import main
from monitor.cli.station import ingest_file
from monitor.feeds.base import batch_sizes
from monitor.feeds.capture import MAGIC, read_capture
from monitor.feeds.parse import LineFormat
from monitor.service.config import SensorConfig
from monitor.store.database import Store

SENSOR = SensorConfig(station="st", role="primary", units="m", offset=0.0, label="primary",
                      format=LineFormat(missing_marker="-999"))


def take(sizes, k: int) -> list[int]:
    return [next(sizes) for _ in range(k)]


def test_batches_start_small_and_grow_to_the_most():
    assert take(batch_sizes(100_000, first=2_000, growth=2), 8) == [
        2_000, 4_000, 8_000, 16_000, 32_000, 64_000, 100_000, 100_000]


def test_a_first_batch_above_the_most_is_the_most():
    assert take(batch_sizes(10, first=2_000), 3) == [10, 10, 10]


def mixed_file(path: Path) -> Path:
    """Good lines with bad ones, blanks, comments, exact repeats and conflicting repeats
    scattered so that they fall on either side of batch boundaries."""
    lines = ["time,level"]
    for k in range(60):
        lines.append(f"2025-01-01T{k // 60:02d}:{k % 60:02d}:00Z,{1.0 + k / 100:.3f}")
        if k % 7 == 3:
            lines.append(f"2025-01-01T00:{k // 2:02d}:00Z,{1.0 + k / 200:.3f}")  # repeat, mostly conflicting
        if k % 11 == 5:
            lines += ["", "# note", "2025-01-01T00:00:00Z,abc", "2025-02-30T00:00:00Z,1.0",
                      "2025-01-01T00:00:00Z,-999", "lone"]
    path.write_text("\n".join(lines) + "\n")
    return path


def contents(db: Path) -> tuple:
    con = sqlite3.connect(db)
    try:
        obs = con.execute("SELECT station, sensor, t, value, time_source FROM observations ORDER BY t").fetchall()
        rej = con.execute("SELECT lineno, text, reason, kind, t, kept, value FROM rejects ORDER BY lineno, id"
                          ).fetchall()
    finally:
        con.close()
    return obs, rej


def test_how_a_file_is_cut_into_batches_does_not_change_what_is_stored(tmp_path):
    src = mixed_file(tmp_path / "mixed.csv")
    results = []
    for name, most, first in [("one.db", 10_000, 10_000), ("grown.db", 7, 1), ("even.db", 5, 5)]:
        with Store.open(tmp_path / name) as store:
            res, first_t = ingest_file(store, SENSOR, src, batch_size=most, first_batch=first)
        results.append((res, first_t, contents(tmp_path / name)))
    one, grown, even = results
    assert grown == one and even == one
    res, _, (obs, rej) = one
    assert res.conflicts > 0 and res.duplicates > 0 and res.rejected > 0 and res.skipped > 0  # all kinds met
    assert len(obs) == 60


def test_a_bad_line_past_the_first_batch_is_named_by_its_line_in_the_file(tmp_path):
    lines = [f"2025-03-01T{k // 60 % 24:02d}:{k % 60:02d}:00Z,{1.5 + k % 10 / 100:.2f}" for k in range(1_400)]
    lines[1_234] = "2025-03-01T20:34:00Z,not-a-level"
    src = tmp_path / "long.csv"
    src.write_text("\n".join(lines) + "\n")
    with Store.open(tmp_path / "q.db") as store:
        res, _ = ingest_file(store, SENSOR, src, batch_size=500, first_batch=100)
        rej = store.rejects(station="st", limit=5)
    assert res.rejected == 1 and rej["lineno"].tolist() == [1_235]
    assert rej["feed"].tolist() == ["ingest:st:long.csv"]
    assert "'not-a-level' is not a number" in rej["reason"].iloc[0]


def test_the_command_names_the_file_and_line_of_the_first_bad_line(tmp_path, capsys):
    constants = tmp_path / "c.toml"
    constants.write_text('mean = 1.0\n[[constituents]]\nname = "M2"\namplitude = 1.0\nphase = 0.0\n')
    cfg = tmp_path / "config.toml"
    cfg.write_text(f'[store]\npath = "{tmp_path / "q.db"}"\n[[stations]]\nid = "testport"\nlatitude = 50.0\n'
                   f'longitude = -4.0\nconstants = "{constants}"\n[stations.sensors.primary]\nline = {{}}\n')
    bad = tmp_path / "bad.csv"
    bad.write_text("".join(f"2025-01-01T00:{k:02d}:00Z,high\n" for k in range(40)))
    assert main(["ingest", str(cfg), "--station", "testport", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "bad.csv" in err and "line 1:" in err and "'high' is not a number" in err


def test_capture_records_come_in_batches_of_each_size_in_turn(tmp_path):
    path = tmp_path / "x.capture"
    body = "".join(f"{1_700_000_000 + k}.0\t2025-01-01T00:{k:02d}:00Z,1.0\n" for k in range(10))
    path.write_bytes(MAGIC + b"\n" + body.encode())
    got = [len(raws) for raws, *_ in read_capture(path, iter([1, 2, 4, 8]))]
    assert got == [1, 2, 4, 3]


def test_a_capture_read_in_batches_of_a_numpy_integer_size(tmp_path):
    """A size computed with numpy (an np.int64, not an int) is one size, not an iterator."""
    path = tmp_path / "x.capture"
    body = "".join(f"{1_700_000_000 + k}.0\t2025-01-01T00:{k:02d}:00Z,1.0\n" for k in range(10))
    path.write_bytes(MAGIC + b"\n" + body.encode())
    assert [len(raws) for raws, *_ in read_capture(path, np.int64(4))] == [4, 4, 2]
