"""One bad sample moves nothing that only good samples may move.

A line stamped far in the future, a sample that fails quality control, a lone line stamped
decades early or a burst of garbage must leave the alert rules' marks, the feed's age, the
processing window and mark, and the fit span as they would have been without it, and must
show in the reject log or the quality-control record. The record is invented: one
constituent (M2) on an invented port.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pandas as pd
import sqlite_utils

from alerts.engine import evaluate
from alerts.rules import StationView, rules_from_config
from units import minute, hour, day

# Data time: whole hours, two days back, so the record is behind the clock.
T0 = (int(time.time()) // hour - 48) * hour
FAR = int(pd.Timestamp("2099-01-01", tz="UTC").timestamp())
CONSTANTS = """mean = 2.0
[[constituents]]
name = "M2"
amplitude = 1.0
phase = 40.0
"""


def _iso(t: float) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(int(t)))


# --------------------------------------------------------------------------- the rule engine

STATION = StationView(id="testport", name="Test Port (invented)", tz="UTC", datums={"chart": 0.0})


def _rules(**over):
    raw = {"id": "surge", "when": "residual_above", "hold": "10min", "band": 0.05,
           "notify": ["duty@testport.example"], "steps": [{"name": "raised", "at": 0.30}], **over}
    out, errors = rules_from_config([raw], "stations[0].rules", STATION.datums)
    assert errors == []
    return out


def _frame(times, residual, flags):
    idx = pd.to_datetime(np.asarray(times, dtype=np.int64), unit="s", utc=True)
    r = np.asarray(residual, dtype=float)
    return pd.DataFrame({"observed": 2.0 + r, "predicted": 2.0, "residual": r, "smoothed": r,
                         "flag": np.asarray(flags)}, index=idx)


def _storm():
    """An hour calm, then 40 min at 0.5 m, then calm: one alert and one all-clear."""
    t = T0 + minute * np.arange(180)
    r = np.where((t >= T0 + hour) & (t < T0 + hour + 40 * minute), 0.5, 0.0)
    return t, r


def _queued(db):
    return [(r["kind"], r["recipient"], r["subject"], r["event_at"])
            for r in db.query("SELECT * FROM outbox ORDER BY id")]


def _run_engine(path: Path, extra: pd.DataFrame | None, rules) -> list:
    """The storm in two batches (the first with ``extra`` in it), as the daemon hands it over."""
    db = sqlite_utils.Database(path)
    t, r = _storm()
    first, second = _frame(t[:50], r[:50], 1), _frame(t[50:], r[50:], 1)
    if extra is not None:
        first = pd.concat([first, extra]).sort_index()
    evaluate(db, STATION, rules, first, now=T0 + 50 * minute)
    evaluate(db, STATION, rules, second, now=T0 + 180 * minute)
    return _queued(db)


def test_a_failed_sample_stamped_far_ahead_moves_no_rule_watermark(tmp_path):
    rules = _rules()
    clean = _run_engine(tmp_path / "a.db", None, rules)
    far = _frame([FAR], [0.9], [4])  # QC failed it (timing test); it must not move the mark
    assert [k for k, *_ in clean] == ["alert", "all_clear"]
    assert _run_engine(tmp_path / "b.db", far, rules) == clean


def test_a_failed_sample_a_while_ahead_does_not_hide_the_samples_before_it(tmp_path):
    # a clock jump of two hours on one sample, flagged fail: the samples that follow in the
    # next batch (earlier than it) still count
    rules = _rules()
    clean = _run_engine(tmp_path / "a.db", None, rules)
    jump = _frame([T0 + 2 * hour + 30], [0.0], [4])
    assert _run_engine(tmp_path / "b.db", jump, rules) == clean


def test_a_suspect_sample_a_rule_ignores_moves_no_watermark(tmp_path):
    rules = _rules(use_suspect=False)
    clean = _run_engine(tmp_path / "a.db", None, rules)
    suspect = _frame([T0 + 2 * hour + 30], [0.0], [3])
    assert _run_engine(tmp_path / "b.db", suspect, rules) == clean


# --------------------------------------------------------------------------- the daemon, in process

def _config(tmp: Path, rules: str, constants: bool = True) -> Path:
    (tmp / "constants.toml").write_text(CONSTANTS)
    cfg = tmp / "config.toml"
    cfg.write_text(f"""
[store]
path = "q.db"
[[stations]]
id = "testport"
latitude = 50.0
longitude = -4.0
constants = {'"constants.toml"' if constants else '"history"'}
fit_min_days = 2
datums = {{ chart = 0.0 }}
[stations.sensors.primary]
line = {{ header_lines = 1 }}
feed = {{ kind = "file", path = "{tmp / 'gauge.csv'}" }}
{rules}
""")
    return cfg


HIGH_WATERS = """
[[stations.rules]]
id = "quay"
when = "level_above"
datum = "chart"
hold = "10min"
band = 0.10
notify = ["duty@testport.example"]
steps = [{ name = "quay wet", at = 2.8 }]
"""

SILENCE = """
[[stations.rules]]
id = "silent"
when = "feed_silent"
band = "1min"
notify = ["tech@testport.example"]
steps = [{ name = "quiet", at = "30min" }]
"""


def _tide_lines(minutes) -> str:
    from predictor import TideModel

    model = TideModel.from_dict({"mean": 2.0, "constituents": [{"name": "M2", "amplitude": 1.0, "phase": 40.0}]})
    t = T0 + minute * np.asarray(minutes)
    level = model.predict(pd.to_datetime(t, unit="s", utc=True))
    return "".join(f"{_iso(ti)},{v:.3f}\n" for ti, v in zip(t, level))


class _Daemon:
    """A daemon in this process, driven by hand: poll the feeds, then process."""

    def __init__(self, cfg_path: Path):
        from monitor.service.config import load_config
        from monitor.service.daemon import Daemon
        from monitor.store.database import Store

        self.cfg = load_config(cfg_path)
        self.store = Store.open(self.cfg.store_path)
        self.d = Daemon(self.cfg, self.store)
        self.d.open_feeds()

    def step(self) -> None:
        while self.d.poll():
            pass
        self.d.process()

    def outbox(self) -> list:
        return [(r["kind"], r["recipient"], r["subject"], r["event_at"])
                for r in self.store.db.query("SELECT * FROM outbox ORDER BY id")]

    def ingest(self, lines: list[str]) -> None:
        """Lines received now, as if from the feed (after its header line)."""
        from monitor.service.daemon import ingest_lines

        ingest_lines(self.store, self.cfg.stations[0].sensors["primary"], ["time,level", *lines],
                     received=time.time())

    def process_next_second(self) -> None:
        """Process once the clock has passed the second of the last pass (rules on the
        feed's age are evaluated once per second of their clock)."""
        last = int(time.time())
        while int(time.time()) <= last:
            time.sleep(0.02)
        self.d.process()

    def close(self) -> None:
        self.d.close_feeds()
        self.store.close()


def _play(tmp: Path, bad: str) -> tuple[list, "object"]:
    """Thirty hours of tide through a followed file in two parts, ``bad`` lines in the first."""
    cfg = _config(tmp, HIGH_WATERS)
    feed = tmp / "gauge.csv"
    first = _tide_lines(range(0, 240))
    feed.write_text("time,level\n" + first + bad)
    run = _Daemon(cfg)
    try:
        run.step()
        with open(feed, "a") as fh:
            fh.write(_tide_lines(range(240, 30 * 60)))
        run.step()
        return run.outbox(), run
    finally:
        run.close()


def test_a_far_future_line_a_failed_sample_and_garbage_leave_every_later_alert_as_it_was(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    clean, _ = _play(tmp_path / "a", "")
    garbage = "".join(f"\x00{i}\xff,@@,{'#' * (i % 7)}\n" for i in range(50))
    bad = (f"{_iso(FAR)},2.5\n"                        # a clock that stamps 2099
           f"{_iso(T0 + 239 * minute + 30)},99.0\n"     # a gross-range failure, 30 s after the last sample
           + garbage)
    dirty, run = _play(tmp_path / "b", bad)
    assert [k for k, *_ in clean].count("alert") >= 2  # the high waters of thirty hours
    assert dirty == clean
    with sqlite_utils.Database(tmp_path / "b" / "q.db") as db:
        reasons = [r["reason"] for r in db.query("SELECT reason FROM rejects")]
        flag = db.execute("SELECT flag FROM observations WHERE t = ?", [T0 + 239 * minute + 30]).fetchone()
        assert db.execute("SELECT count(*) FROM observations WHERE t > ?", [int(time.time()) + hour]).fetchone() == (0,)
    assert any("2099-01-01T00:00:00Z" in r and "ahead of the clock" in r for r in reasons)  # in the reject log
    assert len(reasons) == 51
    assert flag == (4,)  # the gross-range failure, in the QC record


def test_a_failed_sample_does_not_end_a_feed_silence(tmp_path):
    cfg = _config(tmp_path, SILENCE, constants=False)
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        now = time.time()
        last_good = int(now) // minute * minute - 2 * hour
        lines = [f"{_iso(last_good - minute * k)},2.0{k % 10}" for k in range(120, -1, -1)]
        run.ingest(lines)
        run.d.process()
        assert [k for k, *_ in run.outbox()] == ["alert"]  # silent for two hours

        run.ingest([f"{_iso(now - minute)},99.0"])
        run.process_next_second()
        assert run.store.db.execute("SELECT flag FROM observations WHERE t = ?",
                                    [int(now - minute)]).fetchone() == (4,)
        assert [k for k, *_ in run.outbox()] == ["alert"]  # still silent: no all-clear
        ctx = run.d._alert_context(run.d.stations["testport"], None, {}, time.time())
        assert ctx.feed_age > 2 * hour - minute           # the age runs from the last good sample

        run.ingest([f"{_iso(now)},2.05"])
        run.process_next_second()
        assert [k for k, *_ in run.outbox()] == ["alert", "all_clear"]  # a real sample ends it
    finally:
        run.close()


def test_a_stored_sample_from_the_future_moves_no_processing_window(tmp_path, monkeypatch):
    # a store written before the parser refused such lines may hold one
    cfg = _config(tmp_path, HIGH_WATERS)
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        windows = []
        real = run.d.process_window
        monkeypatch.setattr(run.d, "process_window",
                            lambda rt, a, b, *args, **kw: windows.append((a, b)) or real(rt, a, b, *args, **kw))
        t = T0 + minute * np.arange(600)
        run.store.write_batch("testport", "primary", np.append(t, FAR), np.append(np.full(600, 2.0), 2.5))
        run.d.process()
        mark = int(run.store.get_meta("processed.testport"))
        assert mark == t[-1]
        assert max(b for _, b in windows) == t[-1] and len(windows) == 1
        rt = run.d.stations["testport"]
        assert rt.extremes_span[1] < time.time() + 30 * day  # tide extremes not made to 2099
        assert run.d.data_now == t[-1]                       # the reports' data clock
        assert rt.diag_at <= t[-1]                           # the diagnostics' data clock
    finally:
        run.close()


def test_a_lone_line_stamped_decades_early_costs_one_more_window_not_thousands(tmp_path, monkeypatch):
    cfg = _config(tmp_path, HIGH_WATERS)
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        run.ingest(_tide_lines(range(0, 120)).splitlines())
        run.d.process()
        windows = []
        real = run.d.process_window
        monkeypatch.setattr(run.d, "process_window",
                            lambda rt, a, b, *args, **kw: windows.append((a, b)) or real(rt, a, b, *args, **kw))
        # a logger whose clock reset to 1970
        run.ingest(["1970-01-01T00:00:00Z,2.0"])
        run.d.process()
        assert 1 <= len(windows) <= 3
        assert int(run.store.get_meta("processed.testport")) == T0 + 119 * minute
    finally:
        run.close()


def test_a_far_future_sample_does_not_empty_the_fit_span(tmp_path):
    from monitor.service.daemon import refit_station

    cfg = _config(tmp_path, "", constants=False)
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        t = T0 - 3 * day + 10 * minute * np.arange(3 * 144 + 100)
        level = 2.0 + np.cos(2 * np.pi * (t - T0) / (12.42 * hour))
        run.store.write_batch("testport", "primary", np.append(t, FAR), np.append(level, 2.5))
        fit = refit_station(run.store, run.cfg.stations[0], now=time.time(), infer=None)
        assert (fit["start"], fit["end"], fit["n"]) == (t[0], t[-1], len(t))
    finally:
        run.close()


def test_a_lone_line_stamped_decades_early_does_not_make_a_history_to_fit(tmp_path, monkeypatch):
    cfg = _config(tmp_path, "", constants=False)  # fit_min_days = 2, fit_span_days 365
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        run.ingest(["1970-01-01T00:00:00Z,2.0", *_tide_lines(range(0, 600)).splitlines()])
        tried = []
        monkeypatch.setattr(run.d, "refit", lambda rt, now=None: tried.append(now))
        run.d._maybe_fit(run.d.stations["testport"], time.time())
        assert tried == []  # ten hours of record is no two-day history
    finally:
        run.close()


def test_status_shows_the_last_usable_sample_and_says_what_came_after(tmp_path, capsys):
    from monitor.cli import main

    cfg = _config(tmp_path, "")
    (tmp_path / "gauge.csv").write_text("")
    run = _Daemon(cfg)
    try:
        run.ingest(_tide_lines(range(0, 60)).splitlines())
        run.store.conn.execute("UPDATE observations SET flag = 4 WHERE t = ?", (T0 + 59 * minute,))
    finally:
        run.close()
    assert main(["status", str(cfg)]) == 0
    out = capsys.readouterr().out
    (last,) = [ln for ln in out.splitlines() if "last observation" in ln]
    assert time.strftime("%H:%MZ", time.gmtime(T0 + 58 * minute)) in last
    assert "1 later sample(s) failed quality control" in out
