"""QC against a real store: flags written with each observation, overrides, staff readings."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from monitor.quality import checks as qc
from monitor.quality import records as qc_records
from monitor.errors import QcError
from monitor.store.database import Store
from test_qc_synthetic import SynthModel, record
from units import mm, minute


def _put(store, level: pd.Series, sensor: str = "primary", station: str = "harbour"):
    t = (level.index.as_unit("s").asi8).astype(np.int64)
    store.write_batch(station, sensor, t, level.to_numpy())


@pytest.fixture()
def filled(store):
    level, _ = record(days=3, seed=5)
    level = level.copy()
    level.iloc[2000] += 0.30  # a spike
    backup = level + np.random.default_rng(6).normal(0, 2 * mm, len(level))
    backup.iloc[2000] -= 0.30
    _put(store, level)
    _put(store, backup, "backup")
    return store, level


def _flags(store, sensor="primary"):
    return dict(store.conn.execute(
        "SELECT t, flag FROM observations WHERE station = 'harbour' AND sensor = ?", (sensor,)).fetchall())


def test_run_station_qc_writes_test_rows_and_aggregate_flags(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    spike_t = int(level.index[2000].timestamp())
    flags = _flags(store)
    assert flags[spike_t] == qc.FAIL
    assert sum(f >= qc.SUSPECT for f in flags.values()) <= 3  # the spike and its neighbours
    row = store.conn.execute("SELECT spike FROM qc_tests WHERE station='harbour' AND sensor='primary' "
                             "AND t = ?", (spike_t,)).fetchone()
    assert row == (qc.FAIL,)


def test_schema_is_idempotent(store):
    qc_records.ensure_qc_schema(store.db)
    qc_records.ensure_qc_schema(store)
    assert {"qc_tests", "qc_overrides", "staff_readings"} <= set(store.db.table_names())


def test_override_is_recorded_and_wins_when_qc_is_rerun(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    spike_t = level.index[2000].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    n = qc_records.set_override(store, "harbour", "primary", spike_t, None, qc.PASS, "tech A", "real seiche, checked", at=t1)
    assert n == 1
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    assert _flags(store)[int(spike_t)] == qc.PASS
    who = store.conn.execute("SELECT who, why, flag FROM qc_overrides").fetchall()
    assert who == [("tech A", "real seiche, checked", qc.PASS)]


def test_override_range_covers_every_sample_in_it(filled):
    store, level = filled
    a, b = level.index[100].timestamp(), level.index[109].timestamp()
    assert qc_records.set_override(store, "harbour", "backup", a, b, qc.FAIL, "tech B", "float fouled") == 10


def test_override_at_a_time_without_sample_names_the_nearest(filled):
    store, level = filled
    with pytest.raises(QcError, match="nearest: 2024-03-01T00:05:00Z"):
        qc_records.set_override(store, "harbour", "primary", level.index[5].timestamp() + 20, None, qc.FAIL, "x", "y")


def test_failed_samples_are_kept_in_the_store(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    assert store.observation_count("harbour", "primary") == len(level)


def test_incremental_pass_reevaluates_the_last_samples(filled):
    # The newest sample cannot be spike-tested (no next sample); the next pass fixes that.
    store, level = filled
    cut = level.index[1000].timestamp()
    qc_records.run_station_qc(store, "harbour", None, level.index[0].timestamp(), cut, SynthModel(), now=cut)
    before = store.conn.execute("SELECT spike FROM qc_tests WHERE sensor='primary' AND t = ?",
                                (int(cut),)).fetchone()
    qc_records.run_station_qc(store, "harbour", None, cut + minute, level.index[-1].timestamp(), SynthModel())
    after = store.conn.execute("SELECT spike FROM qc_tests WHERE sensor='primary' AND t = ?",
                               (int(cut),)).fetchone()
    assert before == (qc.NOT_EVALUATED,) and after == (qc.PASS,)


def test_staff_readings_round_trip(store):
    qc_records.add_staff_reading(store, "harbour", 1_900_000_000, 2.345, "tech A", "calm")
    df = qc_records.read_staff_readings(store, "harbour")
    assert df["reading"].tolist() == [2.345] and df["who"].tolist() == ["tech A"]
    assert df.index[0] == pd.Timestamp(1_900_000_000, unit="s", tz="UTC")


def test_rerun_over_an_unchanged_record_writes_nothing(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    before = store.conn.total_changes
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    assert store.conn.total_changes == before


def test_rerun_after_an_override_writes_only_the_overridden_sample(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    qc_records.set_override(store, "harbour", "primary", level.index[2000].timestamp(), None, qc.PASS, "tech A", "checked",
                    at=t1)
    before = store.conn.total_changes
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    # set_override already wrote the flag, so at most that one observation row changes
    assert store.conn.total_changes - before <= 1


def test_changed_test_results_are_rewritten(filled):
    store, level = filled
    t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    spike_t = int(level.index[2000].timestamp())
    store.conn.execute("UPDATE qc_tests SET spike = 1, gross = NULL WHERE sensor = 'primary' AND t = ?", (spike_t,))
    qc_records.run_station_qc(store, "harbour", None, t0, t1, SynthModel(), now=t1)
    row = store.conn.execute("SELECT spike, gross FROM qc_tests WHERE sensor = 'primary' AND t = ?",
                             (spike_t,)).fetchone()
    assert row == (qc.FAIL, qc.PASS)


@pytest.mark.parametrize("sql", [
    "UPDATE observations SET flag = 1 WHERE station = 'a' AND sensor = 'b' AND t = 0",
    "SELECT t, gap FROM qc_tests WHERE station = 'a' AND sensor = 'b' AND t BETWEEN 0 AND 9",
])
def test_qc_writes_find_their_rows_through_an_index(store, sql):
    # a full-table scan per row would make a year's pass quadratic
    plan = " ".join(str(r[-1]) for r in store.conn.execute("EXPLAIN QUERY PLAN " + sql).fetchall())
    assert "INDEX" in plan and "SCAN" not in plan


def test_a_store_made_before_the_location_and_attenuation_tests_gets_their_columns(tmp_path):
    # the qc_tests table of an earlier version had no location or atten column
    old = ("gap", "syntax", "gross", "expected", "spike", "roc", "flat", "multi", "resid")
    with Store.open(tmp_path / "old.sqlite") as s:
        for table in ("qc_tests", "qc_overrides", "staff_readings"):  # a new store has them: take them back
            s.db[table].drop()
        s.db["qc_tests"].create({"station": str, "sensor": str, "t": int, **{c: int for c in old}},
                                pk=("station", "sensor", "t"))
        s.db["qc_overrides"].create({"station": str, "sensor": str, "t": int, "flag": int, "who": str,
                                     "why": str, "at": int}, pk=("station", "sensor", "t"))
        s.db["staff_readings"].create({"station": str, "t": int, "reading": float, "who": str, "note": str},
                                      pk=("station", "t"))
        level, _ = record(days=2, seed=7)
        _put(s, level)
        t0, t1 = level.index[0].timestamp(), level.index[-1].timestamp()
        qc_records.run_station_qc(s, "harbour", None, t0, t1, SynthModel(), now=t1)
        assert set(qc.TESTS) <= set(s.db["qc_tests"].columns_dict)
        n = s.conn.execute("SELECT count(*) FROM qc_tests WHERE atten IS NOT NULL").fetchone()[0]
        assert n == len(level)
