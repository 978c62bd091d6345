"""A store made before issue 13, for upgrade tests: ``data/store_before_issue13.sql`` is
``sqlite3 .dump`` of a store written by the code just before issue 13 (schema version 2)."""
from __future__ import annotations

import sqlite3
from pathlib import Path

DUMP = Path(__file__).resolve().parent / "data" / "store_before_issue13.sql"


def load_old_store(path: Path, drop: tuple[str, ...] = ()) -> Path:
    """The dump loaded into a new SQLite file at ``path``, without the tables ``drop``."""
    conn = sqlite3.connect(path)
    conn.executescript(DUMP.read_text(encoding="utf-8"))
    for table in drop:
        conn.execute(f"DROP TABLE IF EXISTS {table}")
    conn.commit()
    conn.close()
    return path
