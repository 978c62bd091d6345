"""The SQLite store (monitor.store.database): batches, duplicates, checkpoints, lock, migrations."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.feeds.parse import LineFormat
from monitor.errors import StoreError
from monitor.feeds.parse import parse_lines
from monitor.store.database import SCHEMA_VERSION, Store

LINES = ["2025-01-01T00:00:00Z,1.00", "2025-01-01T00:01:00Z,1.01", "bad line", "2025-01-01T00:02:00Z,1.02"]


@pytest.fixture
def store(tmp_path):
    s = Store.open(tmp_path / "q.db")
    yield s
    s.close()


def _write(store, lines=LINES, state=None):
    p = parse_lines(lines, LineFormat(), 0)
    return store.write_batch("st", "primary", p.t, p.value, p.time_source, p.rejects, feed="st.primary",
                             state=state or {"offset": len(lines)})


def test_wal_mode(store):
    assert store.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_batch_counts(store):
    res = _write(store)
    assert (res.read, res.stored, res.duplicates, res.rejected) == (4, 3, 0, 1)


def test_reading_the_same_lines_again_duplicates_nothing(store):
    _write(store)
    res = _write(store)
    assert (res.stored, res.duplicates) == (0, 3)
    assert store.observation_count("st", "primary") == 3


def test_checkpoint_is_stored_with_the_batch(store):
    _write(store, state={"offset": 99})
    assert store.checkpoint("st.primary") == {"offset": 99}


def test_failed_transaction_keeps_neither_rows_nor_checkpoint(store):
    with pytest.raises(RuntimeError):
        with store.transaction():
            _write(store, state={"offset": 5})
            raise RuntimeError("crash inside the batch")
    assert store.observation_count() == 0 and store.checkpoint("st.primary") is None


def test_observations_frame_has_a_utc_index(store):
    _write(store)
    df = store.observations("st", "primary")
    assert str(df.index.tz) == "UTC" and list(df.columns) == ["value", "flag", "time_source"]
    assert np.allclose(df["value"], [1.00, 1.01, 1.02]) and set(df["flag"]) == {2}


def test_rejects_are_kept_with_feed_line_and_reason(store):
    _write(store)
    rej = store.rejects(station="st")
    assert list(rej[["feed", "lineno", "text"]].iloc[0]) == ["st.primary", 3, "bad line"]
    assert "columns" in rej["reason"].iloc[0]
    assert store.reject_counts() == {"st.primary": 1}


def test_second_lock_holder_is_refused(tmp_path):
    first = Store.open(tmp_path / "q.db", lock=True)
    try:
        with pytest.raises(StoreError, match="in use by another quaywatch daemon"):
            Store.open(tmp_path / "q.db", lock=True)
    finally:
        first.close()
    Store.open(tmp_path / "q.db", lock=True).close()  # released on close


def test_the_lock_holds_through_a_symlink_to_the_store(tmp_path):
    first = Store.open(tmp_path / "q.db", lock=True)
    (tmp_path / "other-name.db").symlink_to(tmp_path / "q.db")
    try:
        with pytest.raises(StoreError, match="in use by another quaywatch daemon"):
            Store.open(tmp_path / "other-name.db", lock=True)
    finally:
        first.close()


def test_the_lock_holds_through_a_symlink_to_the_store_folder(tmp_path):
    (tmp_path / "data").mkdir()
    (tmp_path / "elsewhere").symlink_to(tmp_path / "data", target_is_directory=True)
    first = Store.open(tmp_path / "elsewhere" / "q.db", lock=True)
    try:
        with pytest.raises(StoreError, match="in use by another quaywatch daemon"):
            Store.open(tmp_path / "data" / "q.db", lock=True)
    finally:
        first.close()


def test_newer_schema_is_refused_with_a_clear_message(tmp_path):
    s = Store.open(tmp_path / "q.db")
    s.set_meta("schema_version", str(SCHEMA_VERSION + 1))
    s.close()
    with pytest.raises(StoreError, match="newer than this quaywatch understands"):
        Store.open(tmp_path / "q.db")


def test_a_file_that_is_not_a_store_is_refused(tmp_path):
    (tmp_path / "x.db").write_bytes(b"not sqlite at all" * 100)
    with pytest.raises(StoreError, match="not a quaywatch store"):
        Store.open(tmp_path / "x.db")


def test_fits_keep_history_and_one_in_use(store):
    a = store.add_fit("st", fitted_at=1, start=0, end=10, n=5, rms=0.1, variance_explained=0.9,
                      constants="mean = 0.0\n", in_use=True)
    b = store.add_fit("st", fitted_at=2, start=0, end=20, n=9, rms=0.08, variance_explained=0.95,
                      constants="mean = 0.1\n", in_use=True)
    assert store.fit_in_use("st")["id"] == b
    assert list(store.fits("st")["id"]) == [b, a]


def test_a_batch_marks_the_earliest_time_it_stored(store):
    _write(store)
    assert store.take_touched("st") is None  # nothing processed yet
    store.set_meta("processed.st", "1735689720")  # 00:02, the newest row, processed
    late = ["2024-12-31T23:58:00Z,0.98", "2024-12-31T23:59:00Z,0.99"]
    _write(store, late)
    # the mark drops to just before the earliest late row (2024-12-31T23:58Z = 1735689480)
    assert store.take_touched("st") == 1735689480 - 1
    assert store.get_meta("processed.st") == str(1735689480 - 1)


def test_duplicates_alone_touch_nothing(store):
    _write(store)
    store.take_touched("st")
    store.set_meta("processed.st", "1735689720")
    _write(store)  # the same lines again (a replay after a crash)
    assert store.take_touched("st") == 1735689720


def test_touched_is_cleared_only_when_every_row_it_records_is_at_or_after_the_window(store):
    store.write_batch("st", "primary", np.array([600, 660]), np.array([1.0, 1.1]))
    store.set_meta("processed.st", "540")
    assert store.pass_bounds("st", ["primary"], until=10_000) == ({"primary": 660}, 540, 600)
    store.write_batch("st", "backup", np.array([480]), np.array([1.0]))  # late: before the window
    assert not store.clear_touched("st", 541)  # kept, so the next pass lowers the mark
    assert store.pass_bounds("st", ["primary"], until=10_000)[1:] == (540, 480)
    assert store.take_touched("st") == 479
    store.write_batch("st", "primary", np.array([720]), np.array([1.2]))
    assert not store.clear_touched("st", 721)  # (an edge: 720 is before a window from 721)
    assert store.clear_touched("st", 720)  # every row at or after the window's start
    assert store.pass_bounds("st", ["primary", "backup"], until=700) == ({"primary": 660, "backup": 480}, 479, None)
    assert not store.clear_touched("st", 0)  # nothing to clear


def test_the_last_times_of_several_sensors_read_at_once_are_each_sensors_newest_time(store):
    t = np.array([100, 160, 220, 5_000])  # the last one stamped ahead of the clocks below
    store.write_batch("st", "primary", t, np.full(len(t), 1.0))
    store.write_batch("st", "backup", t[:2], np.full(2, 1.0))
    store.write_batch("other", "primary", np.array([300]), np.array([1.0]))
    for until in (50, 100, 159, 160, 1_000, 10_000):
        got = store.last_times("st", ["primary", "backup", "barometer"], until=until)
        want = {s: store.conn.execute("SELECT max(t) FROM observations WHERE station = 'st' AND sensor = ? "
                                      "AND t <= ?", (s, until)).fetchone()[0] for s in got}
        assert got == want
    assert store.last_times("st", ["primary", "backup"], until=1_000) == {"primary": 220, "backup": 160}
    assert store.last_times("st", [], until=1_000) == {}


def test_the_array_readers_give_what_the_frame_readers_give(store):
    # the daemon's steady pass reads arrays; the rest of the program reads frames
    _write(store)
    store.conn.execute("UPDATE observations SET flag = 4 WHERE t = (SELECT min(t) FROM observations)")
    t, value, flag = store.observation_arrays("st", "primary", 0, 2 ** 40)
    frame = store.observations("st", "primary")
    assert list(t) == [int(x.timestamp()) for x in frame.index]
    assert list(value) == list(frame["value"]) and list(flag) == list(frame["flag"]) == [4, 2, 2]
    idx = pd.to_datetime(t, unit="s", utc=True)
    store.write_derived_rows("st", t, {"observed": value, "residual": np.array([0.1, np.nan, 0.3])})
    dt, cols = store.derived_arrays("st", 0, 2 ** 40)
    want = store.derived("st")
    assert list(dt) == list(t) and list(want.index) == list(idx)
    for c in want.columns:
        assert np.array_equal(cols[c], want[c].to_numpy(), equal_nan=True)
    assert np.isnan(cols["residual"][1]) and np.isnan(cols["smoothed"]).all()
    # a value that is not finite is stored as NULL (read back as NaN), as NaN is
    store.write_derived_rows("st", t[:2], {"observed": np.array([np.inf, 1.5]), "residual": np.array([0.1, -np.inf])})
    assert store.conn.execute("SELECT observed, residual FROM derived WHERE station = 'st' AND t <= ? ORDER BY t",
                              (int(t[1]),)).fetchall() == [(None, 0.1), (1.5, None)]
