"""The daemon's steady pass from memory (issue 16) stores what the full way stores.

An invented port with a primary, a backup and a barometer, two rules and mail, followed one
sample a pass through a storm (an alert opens and clears), a spike, a silence, late rows of
each level sensor, a refit and a restart. The same run is made twice, once with the pass from memory
and once with every pass the full way (reading the store, pandas): every table the passes
write must come out the same. A third run stores the whole record at once and processes it
in one pass: its derived rows and skew surges must equal the sample-a-pass run's.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.service.config import validate_config
from monitor.quality.records import set_override
from monitor.quality.context import QcContext
from monitor.service.daemon import REWRITE_BACK, Daemon, TideTurns
from monitor.store.database import Store
from predictor import TideModel
from units import hour, minute, mm

T0 = 1_767_225_600           # 2026-01-01T00:00Z (invented)
STEP = 2 * minute            # the gauge's step
HISTORY = 26 * hour          # stored before the run (quality control looks 25 h back)
LIVE = 9 * hour              # followed a sample a pass
MODEL = TideModel(mean=3.0, constituents=[{"name": "M2", "amplitude": 1.2, "phase": 30.0},
                                          {"name": "S2", "amplitude": 0.4, "phase": 60.0}], datum="station")
REFIT = TideModel(mean=3.01, constituents=[{"name": "M2", "amplitude": 1.21, "phase": 31.0},
                                           {"name": "S2", "amplitude": 0.39, "phase": 60.0}], datum="station")
LIVE_START = T0 + HISTORY
SPIKE_AT = LIVE_START + 100 * minute
OVERRIDE_AT = LIVE_START + 160 * minute  # a technician fails a primary sample of 80 min before
OVERRIDDEN = OVERRIDE_AT - 80 * minute    # (in the residual's lookback, before QC's rewritten hour)
SILENT = (LIVE_START + 200 * minute, LIVE_START + 240 * minute)      # neither level sensor reports
BACKUP_LATE = (LIVE_START + 290 * minute, LIVE_START + 300 * minute)  # delivered at the end of the span
PRIMARY_LATE = (LIVE_START + 350 * minute, LIVE_START + 356 * minute)
REFIT_AT = LIVE_START + 420 * minute
RESTART_AT = LIVE_START + 470 * minute  # a new daemon on the same store


def _surge(t: np.ndarray) -> np.ndarray:
    """A storm: 0.6 m at its peak, four hours into the run."""
    return 0.6 * np.exp(-0.5 * ((t - (LIVE_START + 4 * hour)) / (1.2 * hour)) ** 2)


def _record():
    """Every sample of the invented gauge: (sensor, t, value)."""
    t = np.arange(T0, LIVE_START + LIVE + 1, STEP)
    t = t[(t < SILENT[0]) | (t >= SILENT[1])]
    level = MODEL.predict(t.astype("datetime64[s]")) + _surge(t) + 0.004 * np.sin(t / 377.0)
    primary = level + np.where(t == SPIKE_AT, 1.0, 0.0)
    backup = level + 0.003
    tp = np.arange(T0, LIVE_START + LIVE + 1, 10 * minute)
    pressure = 1012.0 - 25.0 * _surge(tp)
    return {"primary": (t, primary), "backup": (t, backup), "barometer": (tp, pressure)}


def _site(tmp_path):
    MODEL.save(tmp_path / "c.toml")
    rules = [{"id": "surge", "when": "residual_above", "hold": 0, "notify": ["duty@port.invalid"],
              "steps": [{"name": "raised", "at": 0.3}]},
             {"id": "quay", "when": "level_above", "datum": "chart", "hold": 0, "notify": ["duty@port.invalid"],
              "steps": [{"name": "quay edge", "at": 5.6}], "clear_horizon": "12h"}]
    raw = {"store": {"path": "q.db"}, "mail": {"sender": "gauge@port.invalid", "save_dir": "mail"},
           "stations": [{"id": "port", "latitude": 54.0, "longitude": -10.0, "constants": "c.toml",
                         "datums": {"chart": -1.0}, "sensors": {"primary": {}, "backup": {}, "barometer": {}},
                         "rules": rules}]}
    cfg, errors = validate_config(raw, tmp_path)
    assert errors == [], errors
    store = Store.open(cfg.store_path)
    return store, Daemon(cfg, store)


def _write(store, sensor, t, v):
    if len(t):
        store.write_batch("port", sensor, np.asarray(t), np.asarray(v), now=int(t[-1]))


def _refit(d):
    # what Daemon.refit does once a new fit is in use
    rt = d.stations["port"]
    rt.model, rt.model_source = REFIT, "refit for the test"
    rt.extremes, rt.extremes_span = None, (math.inf, -math.inf)


def _run_a_sample_a_pass(tmp_path, monkeypatch, steady: bool):
    if not steady:
        monkeypatch.setattr(Daemon, "_steady", lambda *a, **k: False)
    calls = {"memory": 0, "full": 0, "primary read": 0}
    read = Store.observation_arrays
    inside = []  # which pass is running (the hourly diagnostics read the primary too)

    def reading(self, station, sensor, *a, **k):
        calls["primary read"] += sensor == "primary" and bool(inside) and inside[-1] == "memory"
        return read(self, station, sensor, *a, **k)

    def counting(name, method):
        def counted(self, *a, **k):
            calls[name] += 1
            inside.append(name)
            try:
                return method(self, *a, **k)
            finally:
                inside.pop()
        return counted

    monkeypatch.setattr(Daemon, "_pass_in_memory", counting("memory", Daemon._pass_in_memory))
    monkeypatch.setattr(Daemon, "_pass_full", counting("full", Daemon._pass_full))
    monkeypatch.setattr(Store, "observation_arrays", reading)
    store, d = _site(tmp_path)
    rec = _record()
    rt = d.stations["port"]
    for sensor, (t, v) in rec.items():
        _write(store, sensor, t[t < LIVE_START], v[t < LIVE_START])
    d.process_station(rt, now=LIVE_START)
    late = {"backup": BACKUP_LATE, "primary": PRIMARY_LATE}
    for now in range(LIVE_START, LIVE_START + LIVE + 1, STEP):
        for sensor, (t, v) in rec.items():
            span = late.get(sensor)
            due = t == now
            if span is not None and span[0] <= now < span[1]:
                due[:] = False  # held back ...
            if span is not None and now == span[1]:
                due |= (t >= span[0]) & (t < span[1])  # ... and delivered late, all at once
            _write(store, sensor, t[due], v[due])
        if now == REFIT_AT:
            _refit(d)
        if now == OVERRIDE_AT:
            set_override(store, "port", "primary", OVERRIDDEN, None, 4, "technician", "float fouled",
                         at=OVERRIDE_AT)
        if now == RESTART_AT:
            d = Daemon(d.cfg, store)
            rt = d.stations["port"]
            rt.model = REFIT  # the fit in use, as load_model would give it after the refit
        d.process_station(rt, now=now + 30)
    return store, calls


def _tables(store) -> dict[str, list]:
    con = store.conn
    q = {
        "derived": "SELECT t, observed, predicted, residual, smoothed, barometric FROM derived ORDER BY t",
        "skew_surges": "SELECT hw_t, predicted_high, observed_high, observed_t, skew_surge FROM skew_surges "
                       "ORDER BY hw_t",
        "hw_forecasts": "SELECT * FROM hw_forecasts ORDER BY hw_t",
        "hw_forecast_log": "SELECT * FROM hw_forecast_log ORDER BY hw_t, slot",
        "alert_state": "SELECT * FROM alert_state ORDER BY rule",
        "alert_episodes": "SELECT id, rule, opened_at, closed_at, top_step, step_now, peak, peak_t, last_value, "
                          "last_t, messages FROM alert_episodes ORDER BY id",
        "outbox": "SELECT kind, key, recipient, subject, text, event_at FROM outbox ORDER BY id",
        "flags": "SELECT sensor, t, flag FROM observations ORDER BY sensor, t",
        "processed": "SELECT value FROM meta WHERE key = 'processed.port'",
    }
    return {name: con.execute(sql).fetchall() for name, sql in q.items()}


def _same_rows(a: list, b: list, tol: float = 0.0) -> bool:
    if len(a) != len(b):
        return False
    for ra, rb in zip(a, b):
        for x, y in zip(ra, rb):
            if isinstance(x, float) and isinstance(y, float):
                if not (x == y or abs(x - y) <= tol or (math.isnan(x) and math.isnan(y))):
                    return False
            elif x != y:
                return False
    return True


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    mp = pytest.MonkeyPatch()
    try:
        memory, n_memory = _run_a_sample_a_pass(tmp_path_factory.mktemp("memory"), mp, steady=True)
        mp.undo()
        full, n_full = _run_a_sample_a_pass(tmp_path_factory.mktemp("full"), mp, steady=False)
    finally:
        mp.undo()
    yield {"memory": _tables(memory), "full": _tables(full), "n_memory": n_memory, "n_full": n_full}
    memory.close()
    full.close()


def test_every_pass_goes_from_memory_but_after_the_history_late_rows_the_refit_and_a_restart(runs):
    silent = (SILENT[1] - SILENT[0]) // STEP  # passes with nothing new
    passes = LIVE // STEP + 1 - silent
    assert runs["n_memory"] == {"memory": passes - 4, "full": 5, "primary read": 0}
    assert runs["n_full"] == {"memory": 0, "full": passes + 1, "primary read": 0}


def test_the_pass_from_memory_reads_the_primary_from_the_store_when_quality_control_kept_none(runs, tmp_path,
                                                                                            monkeypatch):
    # the same run with the QC context forgotten after each pass: the residual's lookback is
    # read from the store (Store.observation_arrays), and what is stored stays the same
    forget = QcContext.run

    def run_then_forget(self, *a, **k):
        try:
            return forget(self, *a, **k)
        finally:
            self.reset()
    monkeypatch.setattr(QcContext, "run", run_then_forget)
    store, calls = _run_a_sample_a_pass(tmp_path, monkeypatch, steady=True)
    silent = (SILENT[1] - SILENT[0]) // STEP
    assert calls["memory"] == LIVE // STEP + 1 - silent - 4 and calls["primary read"] == calls["memory"]
    derived = _tables(store)["derived"]
    store.close()
    # quality control, reading its day afresh at each pass, asks the prediction memo in other
    # batches, and the fast predictor's block sums then differ by up to 3e-9 m (measured)
    assert _same_rows(derived, runs["full"]["derived"], tol=1e-5 * mm)


def test_the_run_has_a_storm_alert_a_spike_and_skew_surges(runs):
    # the scenario reaches what it is meant to reach (else the comparisons prove little)
    t = runs["memory"]
    assert {row[1] for row in t["alert_episodes"]} >= {"surge"}
    assert any(row[3] is not None for row in t["alert_episodes"])  # closed: an all-clear
    assert len(t["skew_surges"]) >= 1 and len(t["hw_forecast_log"]) >= 10
    assert ("primary", SPIKE_AT, 4) in t["flags"]
    assert ("primary", OVERRIDDEN, 4) in t["flags"]


@pytest.mark.parametrize("table", ["skew_surges", "hw_forecasts", "hw_forecast_log", "alert_state",
                                   "alert_episodes", "outbox", "flags", "processed"])
def test_the_pass_from_memory_stores_what_the_full_way_stores(runs, table):
    # Floats to a nanometre: the prediction memo predicts in other batches on each way (quality
    # control asks an hour ahead), and the tide model's sums differ in their last bits with the
    # batch (about 1e-11 m); every other field, and every flag, step and message, exactly.
    assert _same_rows(runs["memory"][table], runs["full"][table], tol=1e-9)


def test_derived_rows_from_memory_equal_the_full_way_to_the_last_bits(runs):
    # numpy sums each window where pandas keeps running sums: equal to far below a micrometre
    a, b = runs["memory"]["derived"], runs["full"]["derived"]
    assert len(a) > HISTORY // STEP and _same_rows(a, b, tol=1e-9 * mm)


def test_a_sample_a_pass_stores_the_derived_rows_of_one_pass_over_the_whole_record(runs, tmp_path):
    store, d = _site(tmp_path)
    rec = _record()
    for sensor, (t, v) in rec.items():
        keep = t < REFIT_AT  # before the refit, which changes the predicted tide from then on
        _write(store, sensor, t[keep], v[keep])
    set_override(store, "port", "primary", OVERRIDDEN, None, 4, "technician", "float fouled", at=OVERRIDE_AT)
    d.process_station(d.stations["port"], now=REFIT_AT - 1)
    whole = _tables(store)
    # the passes after the refit rewrite the hour before them with the new tide; the rows the
    # technician's flag moves before the hour rewritten after it keep what they were given live
    moved = (OVERRIDDEN, OVERRIDE_AT - REWRITE_BACK)
    cut = lambda rows: [r for r in rows if r[0] < REFIT_AT - 2 * hour  # noqa: E731
                        and not moved[0] <= r[0] < moved[1]]
    # the fast predictor's blocks fall differently when the times come a few at a time: the
    # predicted tide agrees to about 1e-11 m, far below a nanometre
    assert _same_rows(cut(runs["memory"]["derived"]), cut(whole["derived"]), tol=1e-6 * mm)
    assert len(cut(whole["skew_surges"])) >= 1
    assert _same_rows(cut(runs["memory"]["skew_surges"]), cut(whole["skew_surges"]))
    store.close()


def _double_highs() -> pd.DataFrame:
    """Turning points with stands of two and three peaks (equal peaks among them), by hand."""
    rows = [("high", 3.0, 0), ("high", 3.2, 0), ("low", 1.0, 1), ("high", 3.1, 2), ("low", 0.9, 3),
            ("high", 3.3, 4), ("high", 3.3, 4), ("high", 3.25, 4), ("low", 1.1, 5), ("high", 2.9, 6),
            ("low", 1.0, 7), ("high", 3.0, 8), ("high", 2.8, 8)]
    t = T0 + 3 * hour * np.arange(len(rows))
    return pd.DataFrame({"time": pd.to_datetime(t, unit="s", utc=True), "level": [r[1] for r in rows],
                         "kind": [r[0] for r in rows], "stand": [r[2] for r in rows], "principal": True})


_TURNS = [TideTurns(MODEL.high_low(pd.Timestamp(T0, unit="s", tz="UTC"),
                                   pd.Timestamp(T0 + 4 * 86400, unit="s", tz="UTC"))),
          TideTurns(_double_highs())]


@settings(max_examples=300, deadline=None)
@given(which=st.sampled_from([0, 1]),
       t=st.one_of(st.integers(T0 - hour, T0 + 2 * 86400), st.floats(T0 - hour, T0 + 2 * 86400),
                   st.sampled_from([T0 + 3 * hour * k for k in range(14)])),
       horizon_s=st.one_of(st.just(0), st.integers(0, 86400), st.floats(0, 86400),
                           st.sampled_from([3 * hour * k for k in range(8)])))
def test_the_coming_high_waters_from_seconds_are_those_from_timestamps(which, t, horizon_s):
    # Reference: TideTurns.high_waters (numpy over the table, pandas Timestamps), as the pass
    # asked before; on a tide's turning points and on stands of several peaks made by hand
    turns = _TURNS[which]
    now = pd.Timestamp(t, unit="s", tz="UTC")
    horizon = pd.Timedelta(seconds=horizon_s)
    want = turns.high_waters(now, now + horizon)
    assert turns.high_waters_after(t, horizon.value) == want
    assert turns.high_waters_after(float(t), horizon.value) == want
