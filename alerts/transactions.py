"""Write transactions on SQLite: the one helper every package uses.

It sits in :mod:`alerts`, the lowest package that stores anything, so the alert engine, the
outbox and everything in :mod:`monitor` (the store, quality control) share it. A part of a
transaction that may fail on its own (one alert rule among a station's) is a
:func:`savepoint` inside it.
"""
from __future__ import annotations

import contextlib
import sqlite3
from typing import Any, Iterator

__all__ = ["LazySavepoint", "savepoint", "transaction"]


def transaction(target: Any) -> "_Transaction":
    """One immediate write transaction: commit on success, roll back on any exception.

    Parameters
    ----------
    target : sqlite3.Connection, or anything with a ``conn`` (a ``sqlite_utils.Database``,
        a store)
        Where to write. Inside a transaction already open on the connection, the outer one
        decides (nothing is begun, committed or rolled back here).

    Returns
    -------
    context manager
        Entered, it gives the connection, for the statements of the transaction.
    """
    return _Transaction(target if isinstance(target, sqlite3.Connection) else target.conn)


class _Transaction:
    """:func:`transaction`'s context manager: a class rather than a generator, as a pass
    enters a dozen of them (most nested, doing nothing) and a generator's costs several
    times more than the little they do."""

    __slots__ = ("conn", "nested")

    def __init__(self, conn: sqlite3.Connection):
        self.conn, self.nested = conn, False

    def __enter__(self) -> sqlite3.Connection:
        conn = self.conn
        self.nested = conn.in_transaction
        if not self.nested:
            conn.execute("BEGIN IMMEDIATE")
        return conn

    def __exit__(self, kind: Any, exc: Any, tb: Any) -> bool:
        if self.nested:
            return False
        if kind is not None:
            _roll_back(self.conn)
            return False
        try:
            self.conn.execute("COMMIT")
        except BaseException:  # (busy, an I/O error): nothing of it kept, nothing left open for others to join
            _roll_back(self.conn)
            raise
        return False


def _roll_back(conn: sqlite3.Connection) -> None:
    """ROLLBACK of the transaction open on ``conn``, if one still is (an I/O error may have
    ended it already; a ROLLBACK then would raise and hide the error that ended it)."""
    if conn.in_transaction:
        conn.execute("ROLLBACK")


#: The name of the savepoints :func:`savepoint` sets (nested ones share it: ROLLBACK TO and
#: RELEASE act on the innermost of that name).
_SAVEPOINT = "qw_part"


@contextlib.contextmanager
def savepoint(target: Any) -> Iterator[sqlite3.Connection]:
    """A part of the write transaction open on the connection that fails on its own: on an
    exception its writes alone are undone (``ROLLBACK TO``), the transaction stays open with
    everything written before the part, and the exception is raised again.

    Parameters
    ----------
    target : sqlite3.Connection, or anything with a ``conn``
        As :func:`transaction`. Without a transaction open, the part is one of its own
        (:func:`transaction`: committed on success, rolled back on an exception).

    Yields
    ------
    sqlite3.Connection
        The connection, for the statements of the part.
    """
    conn = target if isinstance(target, sqlite3.Connection) else target.conn
    if not conn.in_transaction:
        with transaction(conn):
            yield conn
        return
    conn.execute(f"SAVEPOINT {_SAVEPOINT}")
    try:
        yield conn
    except BaseException:
        if conn.in_transaction:  # (an I/O error may have ended the whole transaction already)
            conn.execute(f"ROLLBACK TO {_SAVEPOINT}")
            conn.execute(f"RELEASE {_SAVEPOINT}")
        raise
    conn.execute(f"RELEASE {_SAVEPOINT}")


class LazySavepoint:
    """:func:`savepoint` for a part that mostly writes one statement or none: the savepoint
    is set only when the part calls :meth:`begin`, before the first of several writes. A
    part that never calls it writes at most one statement, as its last step, which SQLite
    applies whole or not at all, so an exception leaves nothing of it; a part that did is
    undone on an exception (``ROLLBACK TO``) and the exception raised again, as
    :func:`savepoint` does. Use it inside a transaction open on ``conn``.

    Parameters
    ----------
    conn : sqlite3.Connection
    """

    def __init__(self, conn: sqlite3.Connection):
        self.conn, self.set = conn, False

    def begin(self) -> None:
        """Set the savepoint (once): several writes may follow."""
        if not self.set and self.conn.in_transaction:
            self.conn.execute(f"SAVEPOINT {_SAVEPOINT}")
            self.set = True

    def __enter__(self) -> "LazySavepoint":
        return self

    def __exit__(self, kind: Any, exc: Any, tb: Any) -> bool:
        if self.set:
            self.set = False
            if kind is None:
                self.conn.execute(f"RELEASE {_SAVEPOINT}")
            elif self.conn.in_transaction:  # (an I/O error may have ended the whole transaction already)
                self.conn.execute(f"ROLLBACK TO {_SAVEPOINT}")
                self.conn.execute(f"RELEASE {_SAVEPOINT}")
        return False
