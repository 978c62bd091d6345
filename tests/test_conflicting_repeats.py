"""Conflicting repeats: a line that repeats a stored time with another value keeps the first
value, goes to the reject log with both values, and is counted in `status`, `qc` and the
daily report. An exact repeat stays a plain duplicate. Invented data."""
from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest

from monitor.cli import main
from monitor.feeds.parse import LineFormat
from monitor.service.daemon import row_lines
from monitor.feeds.parse import parse_lines
from monitor.store.database import Store
from units import m, mm


def _write(store, lines):
    p = parse_lines(lines, LineFormat(), 1_800_000_000.0, range(10, 10 + len(lines)))
    return store.write_batch("st", "primary", p.t, p.value, p.time_source, p.rejects, feed="st.primary",
                             lines=row_lines(p, lines))


def _conflicts(store):
    return store.conn.execute("SELECT lineno, text, t, kept, value, reason FROM rejects WHERE kind = 'conflict'"
                              ).fetchall()


def test_a_repeat_with_another_value_keeps_the_first_and_is_logged_with_both(store):
    _write(store, ["2025-01-01T00:00:00Z,1.000", "2025-01-01T00:01:00Z,1.010"])
    res = _write(store, ["2025-01-01T00:01:00Z,1.250"])
    assert (res.stored, res.duplicates, res.conflicts) == (0, 0, 1)
    assert store.observations("st")["value"].tolist() == pytest.approx([1.000 * m, 1.010 * m], abs=0.001 * mm)
    ((lineno, text, t, kept, value, reason),) = _conflicts(store)
    assert (lineno, text, t) == (10, "2025-01-01T00:01:00Z,1.250", 1735689660)
    assert (kept, value) == pytest.approx((1.010 * m, 1.250 * m), abs=0.001 * mm)
    assert "1.010 m" in reason and "1.250 m" in reason


def test_an_exact_repeat_is_a_duplicate_not_a_conflict(store):
    _write(store, ["2025-01-01T00:00:00Z,1.000"])
    res = _write(store, ["2025-01-01T00:00:00Z,1.0"])
    assert (res.stored, res.duplicates, res.conflicts) == (0, 1, 0)
    assert _conflicts(store) == []


def test_within_one_batch_the_first_line_wins(store):
    res = _write(store, ["2025-01-01T00:00:00Z,1.000", "2025-01-01T00:00:00Z,2.000", "2025-01-01T00:00:00Z,1.000"])
    assert (res.stored, res.duplicates, res.conflicts) == (1, 1, 1)
    assert store.observations("st")["value"].tolist() == pytest.approx([1.000 * m], abs=0.001 * mm)
    ((lineno, _, _, kept, value, _),) = _conflicts(store)
    assert lineno == 11 and (kept, value) == pytest.approx((1.0 * m, 2.0 * m), abs=0.001 * mm)


def test_conflicts_are_not_counted_as_unreadable_lines(store):
    _write(store, ["2025-01-01T00:00:00Z,1.000", "garbage"])
    _write(store, ["2025-01-01T00:00:00Z,1.500"])
    assert store.reject_counts() == {"st.primary": 1}
    assert store.reject_counts(conflicts=True) == {"st.primary": 1}
    assert store.conflict_count("st") == 1 and store.conflict_count("st", "backup") == 0


def test_a_version_1_store_gains_the_conflict_columns(tmp_path):
    import sqlite_utils

    from monitor.store.migrations import _create_v1

    path = tmp_path / "old.db"
    db = sqlite_utils.Database(path)
    db.execute("CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT)")
    _create_v1(db)
    db.execute("INSERT INTO meta VALUES ('schema_version', '1')")
    db.execute("INSERT INTO rejects (feed, station, sensor, lineno, text, reason, at) "
               "VALUES ('f', 'st', 'primary', 3, 'x', 'unreadable', 0)")
    db.conn.commit()
    db.close()
    with Store.open(path) as s:
        assert {"kind", "t", "kept", "value"} <= set(s.db["rejects"].columns_dict)
        assert s.reject_counts() == {"f": 1}
        _write(s, ["2025-01-01T00:00:00Z,1.000"])
        _write(s, ["2025-01-01T00:00:00Z,1.100"])
        assert s.conflict_count("st") == 1


# --------------------------------------------------------------------------- the verbs

def _setup(tmp_path: Path, constants: str = "history") -> Path:
    (tmp_path / "constants.toml").write_text('mean = 1.2\n[[constituents]]\nname = "M2"\namplitude = 0.5\n'
                                             'phase = 40.0\n')
    cfg = tmp_path / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = "{constants}"
datums = {{ chart = -1.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
""")
    (tmp_path / "a.csv").write_text("time,level\n" + "".join(
        f"2025-01-01T00:{k:02d}:00Z,{1.0 + 0.01 * k:.3f}\n" for k in range(30)))
    # the logger sends minutes 10 to 14 again, two of them with other values
    (tmp_path / "b.csv").write_text("time,level\n" + "".join(
        f"2025-01-01T00:{k:02d}:00Z,{1.0 + 0.01 * k + (0.3 if k in (11, 13) else 0):.3f}\n" for k in range(10, 15)))
    return cfg


def test_ingest_status_and_qc_count_conflicting_repeats(tmp_path, capsys):
    cfg = _setup(tmp_path)
    assert main(["ingest", str(cfg), "--station", "testport", str(tmp_path / "a.csv")]) == 0
    capsys.readouterr()
    assert main(["ingest", str(cfg), "--station", "testport", str(tmp_path / "b.csv")]) == 0
    out = capsys.readouterr().out
    assert "3 duplicates, 0 rejected, 2 conflicting repeats" in out
    assert main(["status", str(cfg), "--rejects", "5"]) == 0
    out = capsys.readouterr().out
    assert "2 line(s) repeated a stored time with another value" in out
    assert "conflicting repeat of 2025-01-01T00:13:00Z: 1.430 m here, 1.130 m stored first" in out
    assert main(["qc", str(cfg), "--station", "testport", "--from", "2025-01-01T00:00Z",
                 "--to", "2025-01-01T01:00Z"]) == 0
    assert "2 conflicting repeats" in capsys.readouterr().out
    with sqlite3.connect(tmp_path / "q.db") as con:
        assert con.execute("SELECT value FROM observations WHERE t = 1735690380").fetchone() == (pytest.approx(1.13),)


def test_the_daily_report_counts_the_day_s_conflicting_repeats(tmp_path):
    import datetime as dt

    from alerts.reports.render import render_day_email, render_day_html
    from monitor.service.config import load_config
    from monitor.service.reporting import gather_day

    cfg = load_config(_setup(tmp_path, "constants.toml"))
    st = cfg.stations[0]
    day = dt.date(2025, 1, 1)
    received = 1735732800  # 2025-01-01T12:00:00Z, within the day
    with Store.open(cfg.store_path) as s:
        for lines in (["2025-01-01T00:10:00Z,1.100", "2025-01-01T00:11:00Z,1.110"],
                      ["2025-01-01T00:11:00Z,1.410", "not a line"]):
            p = parse_lines(lines, st.sensors["primary"].format, received, range(2, 2 + len(lines)))
            s.write_batch(st.id, "primary", p.t, p.value, p.time_source, p.rejects, feed="f",
                          now=received, lines=row_lines(p, lines))
        report = gather_day(s, st, day)
    assert (report.conflicts, report.rejected_lines) == (1, 1)
    html = render_day_html(report)
    assert "Conflicting repeats" in html and "conflicting repeat of 2025-01-01T00:11:00Z" in html
    assert "Repeat conflicts  1" in render_day_email(report).text
