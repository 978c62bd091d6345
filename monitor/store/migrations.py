"""The store's schema, in one place: every table of every owner, under one schema version.

Each migration brings a store from the version before it to its own; :meth:`Store.open
<monitor.store.database.Store.open>` runs the ones a store lacks, each in one transaction
with the new version number. Tables belong to the module that uses them, which declares
them in a function of its own (``ensure_*``, idempotent: create what is missing, add missing
columns); migration 3 calls those declarations, so a store of any earlier version, with or
without those tables, with or without their later columns, comes out the same.

To change a table: add a migration ``N + 1`` here (calling the owner's declaration, or
altering the table), raise :data:`SCHEMA_VERSION`, and say so in DEVELOPERS.md.
``tests/test_store_upgrade.py`` opens a store made before issue 13 and checks the upgrade.
"""
from __future__ import annotations

import sqlite_utils

from alerts.engine import ensure_alert_schema
from alerts.mail.outbox import ensure_outbox_schema
from monitor.quality.records import ensure_qc_schema
from monitor.surge.forecast import ensure_forecast_schema, ensure_history_bins, rebin_all

__all__ = ["SCHEMA_VERSION", "MIGRATIONS", "DERIVED_COLUMNS", "HISTORY_BINS_KEY", "HISTORY_BINS_VERSION"]

#: This program's schema version. 1: core tables; 2: conflicting repeats in ``rejects``;
#: 3: the quality-control, forecast-log, alert, outbox and report-run tables under the version;
#: 4: ``report_runs.summary`` (each report's index figures, so the index reads no report file);
#: 5: ``extremes_cache`` (return levels and trend of monitor.service.extremes, kept between runs);
#: 6: ``residual_bins``, ``pressure_bins`` (ten-minute means of the forecaster's history).
SCHEMA_VERSION = 6
DERIVED_COLUMNS = ("observed", "predicted", "residual", "smoothed", "barometric")


def _create_v1(db: sqlite_utils.Database) -> None:
    db["observations"].create(
        {"station": str, "sensor": str, "t": int, "value": float, "time_source": str, "flag": int},
        pk=("station", "sensor", "t"), not_null={"station", "sensor", "t", "value"},
        defaults={"time_source": "sensor", "flag": 2}, if_not_exists=True)
    db["feed_checkpoints"].create({"feed": str, "state": str, "updated_at": int}, pk="feed", if_not_exists=True)
    db["rejects"].create(
        {"id": int, "feed": str, "station": str, "sensor": str, "lineno": int, "text": str, "reason": str,
         "at": int}, pk="id", if_not_exists=True)
    db["rejects"].create_index(["station", "feed"], if_not_exists=True)
    db["derived"].create({"station": str, "t": int, **{c: float for c in DERIVED_COLUMNS}},
                         pk=("station", "t"), if_not_exists=True)
    db["skew_surges"].create(
        {"station": str, "hw_t": int, "predicted_high": float, "observed_high": float, "observed_t": int,
         "skew_surge": float}, pk=("station", "hw_t"), if_not_exists=True)
    db["hw_forecasts"].create(
        {"station": str, "hw_t": int, "made_t": int, "predicted_high": float, "residual_now": float,
         "forecast": float, "lower": float, "upper": float, "coverage": float, "note": str},
        pk=("station", "hw_t"), if_not_exists=True)
    db["fits"].create(
        {"id": int, "station": str, "fitted_at": int, "start": int, "end": int, "n": int, "rms": float,
         "variance_explained": float, "constants": str, "in_use": int, "robust": int, "note": str},
        pk="id", if_not_exists=True)
    db["fits"].create_index(["station", "fitted_at"], if_not_exists=True)


def _conflicts_v2(db: sqlite_utils.Database) -> None:
    # A conflicting repeat is kept in the reject log with the time it repeats, the value kept
    # (the first) and the value it brought; unreadable lines leave these empty.
    cols = db["rejects"].columns_dict
    for name, kind in (("kind", str), ("t", int), ("kept", float), ("value", float)):
        if name not in cols:
            db["rejects"].add_column(name, kind)
    db["rejects"].create_index(["station", "kind"], if_not_exists=True)


def _owners_tables_v3(db: sqlite_utils.Database) -> None:
    # Until version 3 these tables were made by their owners on first use, outside the
    # version; each declaration is idempotent, so existing tables keep their rows and gain
    # any column they lacked.
    ensure_qc_schema(db)              # qc_tests, qc_overrides, staff_readings
    ensure_forecast_schema(db)        # hw_forecast_log
    ensure_alert_schema(db)           # alert_state, alert_episodes
    ensure_outbox_schema(db)          # outbox
    ensure_report_runs(db)            # report_runs


def ensure_report_runs(db: sqlite_utils.Database) -> None:
    """``report_runs`` (station, day): which local days' reports were written, and each one's
    index figures as JSON in ``summary`` (monitor.service.reporting)."""
    db["report_runs"].create({"station": str, "day": str, "written_at": int, "path": str, "queued": int,
                              "summary": str}, pk=("station", "day"), if_not_exists=True)
    if "summary" not in db["report_runs"].columns_dict:
        db["report_runs"].add_column("summary", str)


def _report_summaries_v4(db: sqlite_utils.Database) -> None:
    # The index is written from the summaries kept here (a report written before has its
    # summary read from its file once, when the index is next written).
    ensure_report_runs(db)


def ensure_extremes_cache(db) -> None:
    """``extremes_cache`` (station, options): the analysis of monitor.service.extremes, with the
    events it rests on (annual maxima, storm peaks, threshold, record end). ``db`` is a
    ``sqlite_utils.Database`` or a ``sqlite3.Connection``."""
    db.execute("CREATE TABLE IF NOT EXISTS extremes_cache (station TEXT NOT NULL, options TEXT NOT NULL, "
               "made_t INTEGER NOT NULL, record_end INTEGER NOT NULL, events TEXT NOT NULL, "
               "result TEXT NOT NULL, options_json TEXT NOT NULL, PRIMARY KEY (station, options))")


def _extremes_cache_v5(db: sqlite_utils.Database) -> None:
    # Until version 5 the cache was made by its owner on first use.
    ensure_extremes_cache(db)


def _history_bins_v6(db: sqlite_utils.Database) -> None:
    # The means of the rows already stored, made once; from now on each write of the rows
    # keeps them (monitor.surge.forecast.rebin_residual, rebin_pressure). A daemon of version 5
    # still running writes rows without them: the store's first locked open makes them again.
    ensure_history_bins(db)
    rebin_all(db.conn)


#: The version that brought the kept means, and the meta key saying a daemon's open (the lock
#: held: no program of an earlier version writing) has seen them whole since.
HISTORY_BINS_VERSION = 6
HISTORY_BINS_KEY = "history_bins.whole"


#: version -> function that brings a store at (version - 1) to version
MIGRATIONS = {1: _create_v1, 2: _conflicts_v2, 3: _owners_tables_v3, 4: _report_summaries_v4,
              5: _extremes_cache_v5, 6: _history_bins_v6}
