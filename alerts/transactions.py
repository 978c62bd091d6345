"""Write transactions on SQLite: the one helper every package uses.

It sits in :mod:`alerts`, the lowest package that stores anything, so the alert engine, the
outbox and everything in :mod:`monitor` (the store, quality control) share it.
"""
from __future__ import annotations

import contextlib
import sqlite3
from typing import Any, Iterator

__all__ = ["transaction"]


@contextlib.contextmanager
def transaction(target: Any) -> Iterator[sqlite3.Connection]:
    """One immediate write transaction: commit on success, roll back on any exception.

    Parameters
    ----------
    target : sqlite3.Connection, or anything with a ``conn`` (a ``sqlite_utils.Database``,
        a store)
        Where to write. Inside a transaction already open on the connection, the outer one
        decides (nothing is begun, committed or rolled back here).

    Yields
    ------
    sqlite3.Connection
        The connection, for the statements of the transaction.
    """
    conn = target if isinstance(target, sqlite3.Connection) else target.conn
    if conn.in_transaction:
        yield conn
        return
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")
