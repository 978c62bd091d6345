"""A steady pass stores its writes in one transaction (Daemon.process_window).

Quality control's flags, the derived rows, the forecasts, the rules' state and the
processing mark of a steady pass are committed together. If that transaction fails, none
of it is stored, and what the station holds in memory on the strength of those writes
(quality control's rows and flags as stored, the derived rows held) is forgotten, so the
next pass writes them again. Each run is compared with the same run without the failure:
every table the passes write must come out the same.
"""
from __future__ import annotations

import sqlite3

import numpy as np
import pytest

from monitor.service.daemon import Daemon
from monitor.store.database import Store
from units import hour, minute, mm

T0 = 1_767_225_600          # 2026-01-01T00:00Z (invented)
HISTORY = 26 * hour         # quality control looks 25 h back
LIVE = 40                   # one-minute passes after the history
FAIL_AT = 20                # the pass whose transaction fails


def _level(t: np.ndarray, sensor: str) -> np.ndarray:
    """An invented tide with a little wobble [m]; the backup reads 3 mm high."""
    return 2.0 + np.cos(2 * np.pi * t / 44714.16 + 0.7) + 0.004 * np.sin(t / 377.0) + (sensor == "backup") * 0.003


def _write(store: Store, t: np.ndarray) -> None:
    for sensor in ("primary", "backup"):
        store.write_batch("port", sensor, t, _level(t, sensor), now=int(t[-1]))


def _same(a: dict[str, list], b: dict[str, list]) -> None:
    """Every table equal; the derived rows to 1e-5 mm (a pass the full way predicts the tide
    through pandas, the pass from memory from plain seconds: they differ in the last bits)."""
    for name in b:
        if name == "derived":
            assert [r[:2] for r in a[name]] == [r[:2] for r in b[name]]
            np.testing.assert_allclose(np.array([r[2:] for r in a[name]], dtype=float),
                                       np.array([r[2:] for r in b[name]], dtype=float), rtol=0, atol=1e-5 * mm)
        else:
            assert a[name] == b[name], name


def _tables(store: Store) -> dict[str, list]:
    q = {"flags": "SELECT sensor, t, flag FROM observations ORDER BY sensor, t",
         "qc_tests": "SELECT * FROM qc_tests ORDER BY sensor, t",
         "derived": "SELECT * FROM derived ORDER BY t",
         "hw_forecasts": "SELECT * FROM hw_forecasts ORDER BY hw_t",
         "hw_forecast_log": "SELECT * FROM hw_forecast_log ORDER BY hw_t, slot",
         "alert_state": "SELECT rule, level, watermark FROM alert_state ORDER BY rule",
         "processed": "SELECT value FROM meta WHERE key = 'processed.port'"}
    return {name: store.conn.execute(sql).fetchall() for name, sql in q.items()}


class _Failing:
    """Makes the processing mark's write at the end of one pass fail, as a full disk would:
    the last write of the pass's transaction, after every other."""

    def __init__(self, store: Store):
        self.store, self.at, self.real = store, None, store.set_meta

    def __call__(self, key: str, value: str) -> None:
        if key == "processed.port" and value == str(self.at):
            self.at = None
            raise sqlite3.OperationalError("database or disk is full (test)")
        self.real(key, value)


def _start(tmp_path, m2_stations) -> tuple[Store, Daemon, _Failing]:
    cfg = m2_stations(["port"], sensors=("primary", "backup"), folder=tmp_path)  # a store of its own per run
    store = Store.open(cfg.store_path)
    failing = _Failing(store)
    store.set_meta = failing
    _write(store, T0 + minute * np.arange(HISTORY // minute))
    d = Daemon(cfg, store)
    d.process_station(d.stations["port"], now=T0 + HISTORY)
    return store, d, failing


def _logged_but_not_stored(store: Store, rt) -> set:
    """The (hw_t, slot) the station holds as logged that hw_forecast_log does not hold."""
    stored = set(store.conn.execute("SELECT hw_t, slot FROM hw_forecast_log WHERE station = 'port'").fetchall())
    return set(rt.slots_logged) - stored


def _run(tmp_path, m2_stations, fail: bool, windows: bool, fail_at: int = FAIL_AT) -> dict[str, list]:
    """A minute at a time, the pass at ``FAIL_AT`` failing its transaction when ``fail``.
    ``windows``: each window handed to process_window one after the other, as a caller that
    keeps its own marks would (the window after the failed one starts where the failed one
    ended); else process_station, as the daemon's loop runs it."""
    store, d, failing = _start(tmp_path, m2_stations)
    rt = d.stations["port"]

    def step(t: int) -> None:
        if windows:
            d.process_window(rt, t - minute + 1, t, now=t + 30)
        else:
            d.process_station(rt, now=t + 30)
    try:
        for k in range(LIVE):
            t = T0 + HISTORY + k * minute
            _write(store, np.array([t]))
            if fail and k == fail_at:
                failing.at = t
                before = _tables(store)
                with pytest.raises(sqlite3.OperationalError):
                    step(t)
                assert _tables(store) == before  # nothing of the failed pass is stored
                assert not _logged_but_not_stored(store, rt)
                assert rt.alert_memo.rows is None  # nor kept of the rules' state rows
                continue
            step(t)
            assert not _logged_but_not_stored(store, rt)
            # the rules' state rows the daemon keeps between passes are those stored
            assert rt.alert_memo.rows == {r["rule"]: r for r in store.db.query("SELECT * FROM alert_state")}
        return _tables(store)
    finally:
        store.close()


def test_a_steady_pass_whose_transaction_fails_stores_nothing_and_the_next_pass_stores_it(tmp_path, m2_stations,
                                                                                        monkeypatch):
    passes = []
    real = Daemon._pass_in_memory
    monkeypatch.setattr(Daemon, "_pass_in_memory", lambda self, *a: passes.append(a[2]) or real(self, *a))
    failed = _run(tmp_path / "failed", m2_stations, fail=True, windows=False)
    assert T0 + HISTORY + FAIL_AT * minute in passes, "not a steady pass"
    _same(failed, _run(tmp_path / "whole", m2_stations, fail=False, windows=False))


def test_after_a_failed_transaction_the_station_forgets_what_it_held_of_the_passs_writes(tmp_path, m2_stations):
    # Held on, quality control's rows would count the failed pass's flags as stored and
    # the derived rows held would count its residual as stored: the next window would
    # write neither, and the store would keep those samples unjudged and without residual.
    failed = _run(tmp_path / "failed", m2_stations, fail=True, windows=True)
    _same(failed, _run(tmp_path / "whole", m2_stations, fail=False, windows=True))


@pytest.mark.parametrize("windows", [False, True])
def test_a_failed_pass_that_opened_a_forecast_log_slot_leaves_no_slot_held_as_logged(tmp_path, m2_stations,
                                                                                    windows):
    # the pass at 26 h 30 min is the first of a half-hour slot: its forecasts would be the
    # slot's first in the log; rolled back, the station must not hold them as logged (the
    # steady passes do not offer the log what they hold as logged)
    assert (T0 + HISTORY + 30 * minute) % 1800 == 0
    failed = _run(tmp_path / "failed", m2_stations, fail=True, windows=windows, fail_at=30)
    assert len(failed["hw_forecast_log"]) >= 2
    if not windows:  # the pass after it does the failed one's window again
        _same(failed, _run(tmp_path / "whole", m2_stations, fail=False, windows=False))


def test_a_rule_that_fails_in_a_steady_pass_undoes_its_own_writes_alone(tmp_path, m2_stations, monkeypatch):
    from alerts import engine

    store, d, _ = _start(tmp_path, m2_stations)
    rt = d.stations["port"]
    real, fail = engine._save_state, []

    def save_state(*a, **k):
        if fail:  # the rule's state row refused (its one write: a rule below every step)
            raise sqlite3.OperationalError("database or disk is full (test)")
        return real(*a, **k)

    monkeypatch.setattr(engine, "_save_state", save_state)
    try:
        for k in range(3):
            t = T0 + HISTORY + k * minute
            _write(store, np.array([t]))
            fail[:] = [True] if k == 2 else []
            before = _tables(store)
            d.process_station(rt, now=t + 30)
        after = _tables(store)
    finally:
        store.close()
    assert after["alert_state"] == before["alert_state"]  # the failed rule's state as it was
    # the rest of the pass is stored: the newest sample judged and its residual, the mark moved
    assert after["processed"] == [(str(t),)] and before["processed"] == [(str(t - minute),)]
    assert sorted(r[1] for r in after["qc_tests"] if r[2] == t) == ["backup", "primary"]
    assert not any(r[2] == t for r in before["qc_tests"])
    assert any(r[1] == t for r in after["derived"]) and not any(r[1] == t for r in before["derived"])


def test_a_pass_whose_transaction_sqlite_ended_early_keeps_nothing_of_the_rest(tmp_path, m2_stations, monkeypatch):
    # After a full disk or an I/O error SQLite rolls the transaction back itself. The
    # equipment-fault checks log such an error and go on; the rules and the processing mark
    # after them must not then be stored on their own (autocommit), outside the lost pass.
    store, d, _ = _start(tmp_path, m2_stations)
    rt = d.stations["port"]
    real, lose = rt.diag_memory.begin, []

    def begin(store_, end_t):
        if lose:
            store_.conn.execute("ROLLBACK")  # as SQLite does itself
            raise sqlite3.OperationalError("disk I/O error (test)")
        return real(store_, end_t)

    monkeypatch.setattr(rt.diag_memory, "begin", begin)
    try:
        for k in range(3):
            t = T0 + HISTORY + k * minute
            _write(store, np.array([t]))
            d.process_station(rt, now=t + 30)
        t += minute
        _write(store, np.array([t]))
        lose.append(True)
        rt.diag_at = -np.inf  # the hourly diagnostics run in this pass
        before = _tables(store)
        with pytest.raises(sqlite3.OperationalError, match="ended early"):
            d.process_station(rt, now=t + 30)
        assert _tables(store) == before  # no rule state, no mark, nothing of the pass
        lose.clear()
        d.process_station(rt, now=t + 30)  # the next pass does it all
        after = _tables(store)
    finally:
        store.close()
    assert after["processed"] == [(str(t),)]
    assert sorted(r[1] for r in after["qc_tests"] if r[2] == t) == ["backup", "primary"]


def _land_late(tmp_path, m2_stations, monkeypatch, landing: int | None, late: int) -> tuple[dict, list]:
    """Passes a minute at a time, the backup's sample of minute ``late`` missing from its
    feed until the pass of minute ``landing``: there another writer (a connection of its
    own, as ``quaywatch ingest`` is) stores it right after the pass has read the processing
    mark -- the worst moment. ``landing`` None: stored just before that pass instead (the
    plain late-data case). Returns the tables after the last pass and the steady passes."""
    store, d, _ = _start(tmp_path, m2_stations)
    rt = d.stations["port"]
    t_late = T0 + HISTORY + late * minute
    other = Store.open(store.path)
    steady, pending = [], []
    real_pass, real_bounds = Daemon._pass_in_memory, store.pass_bounds

    def bounds(*a, **k):
        got = real_bounds(*a, **k)
        if pending:
            other.write_batch("port", "backup", *pending.pop(), now=t_late)
        return got

    store.pass_bounds = bounds
    try:
        with monkeypatch.context() as mp:  # each run spies on its own passes
            mp.setattr(Daemon, "_pass_in_memory", lambda self, *a: steady.append(a[2]) or real_pass(self, *a))
            for k in range(8):
                t = T0 + HISTORY + k * minute
                store.write_batch("port", "primary", np.array([t]), _level(np.array([t]), "primary"), now=t)
                if k != late:
                    store.write_batch("port", "backup", np.array([t]), _level(np.array([t]), "backup"), now=t)
                if k == 4:
                    row = (np.array([t_late]), _level(np.array([t_late]), "backup"))
                    if landing is None:
                        other.write_batch("port", "backup", *row, now=t)
                    else:
                        pending.append(row)
                d.process_station(rt, now=t + 30)
                assert not pending
        return _tables(store), steady
    finally:
        other.close()
        store.close()


@pytest.mark.parametrize("late", [1, 4], ids=["before-the-mark", "inside-the-window"])
def test_a_batch_landing_right_after_the_mark_is_read_is_processed(tmp_path, m2_stations, monkeypatch, late):
    # The steady pass clears ``touched`` inside its own transaction. A row stored between
    # reading the mark and that transaction with a time before the window must keep it
    # (and so lower the mark at the next pass): cleared unconditionally, the row would
    # never be judged. A row inside the window is seen by the pass's transaction.
    got, steady = _land_late(tmp_path / "worst", m2_stations, monkeypatch, landing=4, late=late)
    assert T0 + HISTORY + 4 * minute in steady, "the batch did not land before a steady pass"
    t_late = T0 + HISTORY + late * minute
    assert ("backup", t_late) in {(r[1], r[2]) for r in got["qc_tests"]}, "the late row never judged"
    assert [f for s, t, f in got["flags"] if s == "backup" and t == t_late] != [None]
    want, _ = _land_late(tmp_path / "plain", m2_stations, monkeypatch, landing=None, late=late)
    _same(got, want)
