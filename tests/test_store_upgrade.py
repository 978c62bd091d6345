"""A store made before issue 13 opens and upgrades to the current schema, keeping every row.

``tests/data/store_before_issue13.sql`` is ``sqlite3 .dump`` of a store written by the code
just before issue 13 (schema version 2; its quality-control, alert, outbox, forecast-log and
report-run tables made by their owners outside the version): a replay of one invented day
through the daemon, with a level rule that opened and cleared episodes, a staff reading and a
manual flag. The expected row counts are read from the dump's own INSERT statements, not from
the code under test.
"""
from __future__ import annotations

import re
import sqlite3
from collections import Counter

import pytest

from alerts.engine import list_episodes
from alerts.mail.outbox import list_outbox
from monitor.quality import records as qc_records
from monitor.store.database import Store
from monitor.store.migrations import SCHEMA_VERSION

from tests.old_store import DUMP, load_old_store

OWNED = ("qc_tests", "qc_overrides", "staff_readings", "hw_forecast_log", "alert_state", "alert_episodes",
         "outbox", "report_runs", "extremes_cache", "residual_bins", "pressure_bins")


def _rows_in_dump(text: str) -> Counter:
    return Counter(re.findall(r'^INSERT INTO "?(\w+)"? VALUES', text, flags=re.M))


def _columns(conn: sqlite3.Connection, table: str) -> list[str]:
    return [r[1] for r in conn.execute(f"PRAGMA table_info({table})")]


def test_the_dump_is_a_version_2_store():
    text = DUMP.read_text(encoding="utf-8")
    assert "INSERT INTO meta VALUES('schema_version','2');" in text
    assert SCHEMA_VERSION > 2


def test_an_old_store_opens_at_the_current_version_with_every_row(old_store):
    expected = _rows_in_dump(DUMP.read_text(encoding="utf-8"))
    with Store.open(old_store) as store:
        assert store.get_meta("schema_version") == str(SCHEMA_VERSION)
        for table, n in expected.items():
            if table == "meta":
                continue
            got = store.conn.execute(f'SELECT count(*) FROM "{table}"').fetchone()[0]
            assert got == n, table


def test_an_upgraded_store_has_the_tables_and_columns_of_a_new_one(old_store, tmp_path):
    with Store.open(tmp_path / "new.db"), Store.open(old_store):
        pass
    new, old = sqlite3.connect(tmp_path / "new.db"), sqlite3.connect(old_store)
    try:
        for table in OWNED:
            assert set(_columns(old, table)) == set(_columns(new, table)), table
    finally:
        new.close()
        old.close()


def test_a_version_2_store_without_the_owned_tables_gets_them(tmp_path):
    path = load_old_store(tmp_path / "bare.db", drop=OWNED)
    with Store.open(path) as store:
        names = set(store.db.table_names())
        assert set(OWNED) <= names
        assert store.conn.execute("SELECT count(*) FROM observations").fetchone()[0] == 180


def test_the_upgraded_store_reads_as_before(old_store):
    with Store.open(old_store) as store:
        episodes = list_episodes(store.db, "testport")
        assert len(episodes) == 2 and sum(e["closed_at"] is None for e in episodes) == 1
        assert {r["status"] for r in list_outbox(store.db)} == {"sent"}
        assert len(qc_records.read_overrides(store, "testport", "primary")) == 3
        staff = qc_records.read_staff_readings(store, "testport")
        assert staff["reading"].tolist() == [pytest.approx(2.95)]


def test_opening_twice_changes_nothing(old_store):
    with Store.open(old_store):
        pass
    before = sqlite3.connect(old_store).execute("SELECT count(*) FROM sqlite_master").fetchone()[0]
    with Store.open(old_store) as store:
        assert store.get_meta("schema_version") == str(SCHEMA_VERSION)
    assert sqlite3.connect(old_store).execute("SELECT count(*) FROM sqlite_master").fetchone()[0] == before
