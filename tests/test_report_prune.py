"""Pruning kept reports and the index of a report round: the store says what is kept.

Each test keeps reports of an invented port's two stations as files with their summaries in
``report_runs`` (as ``write_station_day`` leaves them), then runs the end of a round
(``refresh_index``). Days are counted by hand from the retention rule: a report of a day
more than ``keep_days`` before the day just written goes, the rest stay.
"""
from __future__ import annotations

import datetime as dt
import json
import re
from types import SimpleNamespace

import pandas as pd

from alerts.reports import render as report_render
from alerts.reports.model import ReportSettings
from monitor.service import reporting

WRITTEN = dt.date(2024, 3, 12)       # the day just written
NOW = pd.Timestamp("2024-03-13 07:00", tz="UTC")
KEEP = 30                            # [days]
# The oldest day kept: 30 days before 12 March is 11 February (counted by hand).
OLDEST_KEPT = dt.date(2024, 2, 11)
STATIONS = ("skq", "vrn")


def _keep_reports(store, folder, days, stations=STATIONS):
    """Report files with their summaries and ``report_runs`` rows, as a round leaves them."""
    for sid in stations:
        (folder / sid).mkdir(parents=True, exist_ok=True)
        for day in days:
            summary = {"station": sid, "name": sid.upper(), "day": day.isoformat(), "highest_level": 3.1,
                       "highest_residual": 0.1, "completeness": 1.0, "alerts": 0, "water_alerts": 0,
                       "gauge_alerts": 0, "failed": 0, "datum": "chart datum"}
            path = folder / sid / f"{day.isoformat()}.html"
            path.write_text("<!DOCTYPE html><p>kept</p>")
            store.db["report_runs"].insert({"station": sid, "day": day.isoformat(), "written_at": 0,
                                            "path": str(path), "queued": 0, "summary": json.dumps(summary)})


def _config(folder):
    return SimpleNamespace(reports=ReportSettings(folder=folder, keep_days=KEEP), base_dir=folder.parent)


def _days(first, last):
    return [first + dt.timedelta(days=k) for k in range((last - first).days + 1)]


def _files(folder):
    return sorted(p.relative_to(folder).as_posix() for p in folder.glob("*/*.html"))


def _rows(store):
    return sorted(f"{s}/{d}.html" for s, d in store.db.conn.execute("SELECT station, day FROM report_runs"))


def _listed(index_path):
    return sorted(re.findall(r'<a href="([^"]+)"', index_path.read_text()))


def test_pruning_removes_exactly_the_reports_past_retention(store, tmp_path):
    folder = tmp_path / "reports"
    _keep_reports(store, folder, _days(dt.date(2024, 1, 20), WRITTEN))
    reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    kept = sorted(f"{sid}/{d.isoformat()}.html" for sid in STATIONS for d in _days(OLDEST_KEPT, WRITTEN))
    assert _files(folder) == kept
    assert _rows(store) == kept


def test_the_index_lists_every_kept_report_and_nothing_pruned(store, tmp_path):
    folder = tmp_path / "reports"
    _keep_reports(store, folder, _days(dt.date(2024, 1, 20), WRITTEN))
    index = reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    assert _listed(index) == sorted(f"{sid}/{d.isoformat()}.html" for sid in STATIONS
                                    for d in _days(OLDEST_KEPT, WRITTEN))


def test_a_round_after_the_first_pruning_lists_no_folder(store, tmp_path, monkeypatch):
    """Later rounds ask the store what is past retention; the folder is swept only once."""
    folder = tmp_path / "reports"
    _keep_reports(store, folder, _days(dt.date(2024, 1, 20), WRITTEN))
    reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    _keep_reports(store, folder, [WRITTEN + dt.timedelta(days=1)])

    def no_listing(*args, **kwargs):
        raise AssertionError("the reports folder was listed")

    monkeypatch.setattr(report_render, "prune_reports", no_listing)
    reporting.refresh_index(_config(folder), store, NOW + pd.Timedelta(days=1), WRITTEN + dt.timedelta(days=1))
    assert f"skq/{OLDEST_KEPT.isoformat()}.html" not in _files(folder)
    assert f"skq/{(OLDEST_KEPT + dt.timedelta(days=1)).isoformat()}.html" in _files(folder)


def test_the_first_pruning_also_removes_old_files_the_store_never_knew(store, tmp_path):
    folder = tmp_path / "reports"
    _keep_reports(store, folder, [WRITTEN])
    stray = folder / "skq" / "2023-12-01.html"        # written before report_runs kept rows
    stray.write_text("<!DOCTYPE html><p>old</p>")
    recent = folder / "skq" / f"{OLDEST_KEPT.isoformat()}.html"
    recent.write_text("<!DOCTYPE html><p>recent</p>")
    reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    assert not stray.exists() and recent.exists()


def test_a_store_pruned_by_the_folder_before_is_swept_once_too(store, tmp_path):
    # The pruning before this one listed the folder every day and left its mark in the meta.
    folder = tmp_path / "reports"
    _keep_reports(store, folder, [WRITTEN])
    store.set_meta(reporting.PRUNED_FOR, (WRITTEN - dt.timedelta(days=1)).isoformat())
    stray = folder / "skq" / "2023-12-01.html"
    stray.write_text("<!DOCTYPE html><p>old</p>")
    reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    assert not stray.exists()


def test_pruning_runs_once_a_day(store, tmp_path):
    folder = tmp_path / "reports"
    _keep_reports(store, folder, _days(dt.date(2024, 1, 20), WRITTEN))
    reporting.refresh_index(_config(folder), store, NOW, WRITTEN)
    # A report of a day past retention written again later the same day stays until tomorrow.
    _keep_reports(store, folder, [dt.date(2024, 1, 25)], stations=("skq",))
    reporting.refresh_index(_config(folder), store, NOW + pd.Timedelta(hours=1), WRITTEN)
    assert "skq/2024-01-25.html" in _files(folder)
    reporting.refresh_index(_config(folder), store, NOW + pd.Timedelta(days=1), WRITTEN + dt.timedelta(days=1))
    assert "skq/2024-01-25.html" not in _files(folder)


def test_keep_days_zero_keeps_every_report(store, tmp_path):
    folder = tmp_path / "reports"
    _keep_reports(store, folder, _days(dt.date(2020, 1, 1), dt.date(2020, 1, 3)) + [WRITTEN])
    config = SimpleNamespace(reports=ReportSettings(folder=folder, keep_days=0), base_dir=tmp_path)
    index = reporting.refresh_index(config, store, NOW, WRITTEN)
    assert len(_files(folder)) == len(_rows(store)) == len(_listed(index)) == 2 * 4
