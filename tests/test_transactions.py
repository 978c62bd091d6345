"""The write-transaction helpers (alerts/transactions.py): a savepoint undoes its own part only."""
from __future__ import annotations

import sqlite3

import pytest

from alerts.transactions import LazySavepoint, savepoint, transaction


@pytest.fixture
def conn(tmp_path):
    c = sqlite3.connect(tmp_path / "t.sqlite", isolation_level=None)
    c.execute("CREATE TABLE x (k TEXT PRIMARY KEY)")
    yield c
    c.close()


def _keys(conn):
    return [r[0] for r in conn.execute("SELECT k FROM x ORDER BY k")]


def test_a_failing_part_undoes_its_own_writes_and_the_transaction_keeps_the_rest(conn):
    with transaction(conn):
        conn.execute("INSERT INTO x VALUES ('before')")
        with pytest.raises(RuntimeError):
            with savepoint(conn):
                conn.execute("INSERT INTO x VALUES ('part')")
                raise RuntimeError("invented")
        with savepoint(conn):
            conn.execute("INSERT INTO x VALUES ('after')")
        assert conn.in_transaction
    assert not conn.in_transaction and _keys(conn) == ["after", "before"]


def test_parts_nest(conn):
    with transaction(conn):
        with savepoint(conn):
            conn.execute("INSERT INTO x VALUES ('outer')")
            with pytest.raises(ValueError):
                with savepoint(conn):
                    conn.execute("INSERT INTO x VALUES ('inner')")
                    raise ValueError("invented")
    assert _keys(conn) == ["outer"]


def test_a_part_without_a_transaction_is_one(conn):
    with pytest.raises(RuntimeError):
        with savepoint(conn):
            conn.execute("INSERT INTO x VALUES ('alone')")
            assert conn.in_transaction
            raise RuntimeError("invented")
    assert not conn.in_transaction and _keys(conn) == []
    with savepoint(conn):
        conn.execute("INSERT INTO x VALUES ('alone')")
    assert not conn.in_transaction and _keys(conn) == ["alone"]


def test_the_whole_transaction_still_rolls_back_on_an_error_outside_the_parts(conn):
    with pytest.raises(RuntimeError):
        with transaction(conn):
            with savepoint(conn):
                conn.execute("INSERT INTO x VALUES ('part')")
            raise RuntimeError("invented")
    assert _keys(conn) == []


class _Broken(Exception):
    """An invented failure that ended the transaction on its way out (as an I/O error may)."""


def test_an_error_that_ended_the_transaction_comes_out_as_itself(conn):
    with pytest.raises(_Broken):
        with transaction(conn):
            with savepoint(conn):
                conn.execute("INSERT INTO x VALUES ('part')")
                conn.execute("ROLLBACK")  # the transaction is gone before the error is raised
                raise _Broken("invented")
    assert not conn.in_transaction and _keys(conn) == []


def test_a_commit_that_fails_leaves_nothing_open_and_nothing_kept(conn):
    # a deferred foreign key is checked at COMMIT, which fails and would leave the
    # transaction open for the next caller to join
    conn.execute("PRAGMA foreign_keys = ON")
    conn.execute("CREATE TABLE child (k TEXT REFERENCES x (k) DEFERRABLE INITIALLY DEFERRED)")
    with pytest.raises(sqlite3.IntegrityError):
        with transaction(conn):
            conn.execute("INSERT INTO x VALUES ('kept?')")
            conn.execute("INSERT INTO child VALUES ('no such parent')")
    assert not conn.in_transaction and _keys(conn) == []
    with transaction(conn):  # the next transaction is a fresh one
        conn.execute("INSERT INTO x VALUES ('next')")
    assert not conn.in_transaction and _keys(conn) == ["next"]


def test_a_lazy_part_sets_its_savepoint_only_once_begun_and_then_undoes_its_writes(conn):
    said = []
    conn.set_trace_callback(said.append)
    with transaction(conn):
        conn.execute("INSERT INTO x VALUES ('before')")
        with LazySavepoint(conn):  # one statement, never begun: no savepoint
            conn.execute("INSERT INTO x VALUES ('alone')")
        assert not any(s.startswith("SAVEPOINT") for s in said)
        with pytest.raises(sqlite3.IntegrityError):  # one statement that fails: nothing of it
            with LazySavepoint(conn):
                conn.execute("INSERT INTO x VALUES ('new'), ('before')")
        with pytest.raises(RuntimeError):  # begun, two writes, then a failure: both undone
            with LazySavepoint(conn) as part:
                part.begin()
                conn.execute("INSERT INTO x VALUES ('one')")
                conn.execute("INSERT INTO x VALUES ('two')")
                raise RuntimeError("invented")
        with LazySavepoint(conn) as part:  # begun and done: kept
            part.begin()
            conn.execute("INSERT INTO x VALUES ('three')")
            conn.execute("INSERT INTO x VALUES ('four')")
        assert conn.in_transaction
    assert _keys(conn) == ["alone", "before", "four", "three"]
    assert sum(s.startswith("SAVEPOINT") for s in said) == 2


def test_a_nested_transaction_leaves_everything_to_the_outer_one(conn):
    """Inside an open transaction, another neither commits, nor rolls back on an error: the
    outer one decides, and commits all that was written, the nested part's too."""
    with transaction(conn):
        conn.execute("INSERT INTO x VALUES ('outer')")
        with pytest.raises(RuntimeError):
            with transaction(conn) as inner:
                assert inner is conn
                conn.execute("INSERT INTO x VALUES ('nested')")
                raise RuntimeError("invented")
        assert conn.in_transaction
        with transaction(conn):
            conn.execute("INSERT INTO x VALUES ('second')")
        assert conn.in_transaction  # not committed by the nested one
        conn.execute("INSERT INTO x VALUES ('last')")
    assert not conn.in_transaction and _keys(conn) == ["last", "nested", "outer", "second"]


def test_a_transaction_object_entered_again_starts_afresh(conn):
    """The context manager a transaction returns keeps no state from an earlier use."""
    with transaction(conn):
        t = transaction(conn)
        with t:  # nested here
            conn.execute("INSERT INTO x VALUES ('a')")
    with t:  # now the outer one: it commits
        conn.execute("INSERT INTO x VALUES ('b')")
    assert not conn.in_transaction and _keys(conn) == ["a", "b"]
