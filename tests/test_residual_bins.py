"""The forecaster's history read from kept ten-minute means equals one grouped from the rows.

:func:`monitor.surge.forecast.read_history` takes the whole bins of the smoothed residual
from ``residual_bins``, kept by every write of ``derived``, and groups only the two bins cut
by its bounds. The reference here shares no code with it: the ``derived`` rows read raw and
grouped by pandas on bins floored by numpy. Writes come in any order, rewrite rows (a value,
then none), leave the smoothed column out, and reach before 1970.
"""
from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.quality import checks as qc
from monitor.quality import records as qc_records
from monitor.store import database
from monitor.store.database import Store
from monitor.surge import forecast as SF
from tests.units import day, hour, minute, mm

GRID = 10 * minute   # the forecaster's grid, written out (not read from the code under test)
#: Means of the same rows summed in another order may differ in the last bits [m].
ROUNDING = 1e-9 * mm


def reference(conn: sqlite3.Connection, station: str, start: int, end: int) -> pd.Series:
    """The smoothed residual's means on the grid, from the raw rows, by pandas."""
    raw = pd.read_sql_query("SELECT t, smoothed FROM derived WHERE station = ? AND t BETWEEN ? AND ? "
                            "AND smoothed IS NOT NULL", conn, params=(station, start, end))
    if raw.empty:
        return pd.Series(dtype=float)
    means = raw.groupby(np.floor_divide(raw["t"].to_numpy(), GRID) * GRID)["smoothed"].mean()
    full = np.arange(means.index[0], means.index[-1] + 1, GRID)
    return means.reindex(full).set_axis(pd.to_datetime(full, unit="s", utc=True))


def assert_same(got: pd.Series, want: pd.Series) -> None:
    assert len(got) == len(want)
    if len(want):
        assert (got.index == want.index).all()
        np.testing.assert_array_equal(np.isnan(got.to_numpy()), np.isnan(want.to_numpy()))
        np.testing.assert_allclose(got.to_numpy(), want.to_numpy(), rtol=0, atol=ROUNDING)


writes = st.lists(st.tuples(st.integers(-3 * hour, 3 * day), st.integers(1, 400), st.sampled_from(["value", "none", "other"]),
                            st.booleans()), min_size=1, max_size=8)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(writes=writes, bounds=st.tuples(st.integers(-4 * hour, 3 * day), st.integers(0, 3 * day)), seed=st.integers(0, 99),
       t0=st.sampled_from([1_700_000_000 - 1_700_000_000 % GRID + 7, -day - 293]))  # not aligned; before 1970
def test_the_history_equals_the_rows_grouped(tmp_path_factory, writes, bounds, seed, t0):
    rng = np.random.default_rng(seed)
    path = tmp_path_factory.mktemp("bins") / "store.sqlite"
    with Store.open(path) as store:
        for at, n, kind, shuffled in writes:
            t = t0 + at + np.arange(n) * rng.choice([minute, 1, 7 * minute])
            if shuffled:
                t = rng.permutation(t)
            values = rng.normal(0, 0.3, n)
            if kind == "none":      # a rewrite that takes the smoothed value away
                values[:] = np.nan
            elif kind == "value":
                values[rng.random(n) < 0.2] = np.nan
            cols = {"smoothed": values} if kind != "other" else {"residual": values}
            store.write_derived_rows("port", t, cols)
            store.write_derived_rows("other", t, {"smoothed": values + 5.0})  # a neighbour's rows
        start, length = t0 + bounds[0], bounds[1]
        got, _, _ = SF.read_history(store.conn, "port", start, start + length)
        assert_same(got, reference(store.conn, "port", start, start + length))


@pytest.mark.parametrize("start, end", [(-3 * day - 7, -1), (-5 * GRID, 5 * GRID), (-GRID + 1, GRID - 1),
                                        (-3 * minute, 2 * minute)])
def test_bins_before_1970_round_down(store, start, end):
    t = np.arange(-2 * day, 2 * hour, minute)
    store.write_derived_rows("port", t, {"smoothed": np.sin(t / 5000.0)})
    got, _, _ = SF.read_history(store.conn, "port", start, end)
    assert_same(got, reference(store.conn, "port", start, end))
    if len(got):
        seconds = (got.index - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(seconds=1)
        assert (seconds % GRID == 0).all()


def test_a_rewrite_without_values_empties_its_bins(store):
    t = 1_700_000_400 + np.arange(0, 6 * hour, minute)
    store.write_derived_rows("port", t, {"smoothed": np.full(len(t), 0.5)})
    store.write_derived_rows("port", t[60:120], {"smoothed": np.full(60, np.nan)})
    got, _, _ = SF.read_history(store.conn, "port", int(t[0]), int(t[-1]))
    hole = got[(got.index >= pd.Timestamp(t[60], unit="s", tz="UTC"))
               & (got.index < pd.Timestamp(t[120], unit="s", tz="UTC"))]
    assert len(hole) == 6 and hole.isna().all()
    assert got.drop(hole.index).eq(0.5).all()


def test_an_upgraded_store_has_the_means_of_its_rows(old_store):
    with Store.open(old_store) as store:
        span = store.conn.execute("SELECT min(t), max(t), count(smoothed) FROM derived WHERE station = 'testport'"
                                  ).fetchone()
        assert span[2] > 100
        got, _, _ = SF.read_history(store.conn, "testport", span[0], span[1])
        assert got.notna().sum() > 10
        assert_same(got, reference(store.conn, "testport", span[0], span[1]))


def pressure_reference(conn: sqlite3.Connection, station: str, start: int, end: int, grid: pd.Index) -> pd.Series:
    """The barometer's usable readings (flag not 4 or 9) as means on ``grid``, by pandas."""
    raw = pd.read_sql_query("SELECT t, value, flag FROM observations WHERE station = ? AND sensor = 'barometer' "
                            "AND t BETWEEN ? AND ?", conn, params=(station, start, end))
    raw = raw[~raw["flag"].isin([4, 9])]
    means = raw.groupby(np.floor_divide(raw["t"].to_numpy(), GRID) * GRID)["value"].mean()
    return means.set_axis(pd.to_datetime(means.index.to_numpy(), unit="s", utc=True)).reindex(grid)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(batches=st.lists(st.tuples(st.integers(-2 * hour, 2 * day), st.integers(1, 300), st.booleans()),
                        min_size=1, max_size=5),
       flagged=st.lists(st.tuples(st.integers(0, 2 * day), st.integers(0, 3 * hour), st.sampled_from([1, 3, 4, 9])),
                        max_size=4),
       bounds=st.tuples(st.integers(-3 * hour, 2 * day), st.integers(0, 2 * day)), seed=st.integers(0, 99),
       t0=st.sampled_from([-2 * day + 13, 1_700_000_000 + 7]))
def test_the_pressure_equals_its_usable_readings_grouped(tmp_path_factory, batches, flagged, bounds, seed, t0):
    rng = np.random.default_rng(seed)
    path = tmp_path_factory.mktemp("pbins") / "store.sqlite"
    with Store.open(path) as store:
        t = np.arange(t0 - 4 * hour, t0 + 3 * day, minute)
        store.write_derived_rows("port", t, {"smoothed": np.zeros(len(t))})  # the grid the pressure is put on
        for at, n, shuffled in batches:  # late, repeated and out-of-order batches
            tb = t0 + at + np.arange(n) * minute
            store.write_batch("port", "barometer", rng.permutation(tb) if shuffled else tb,
                              1013.0 + rng.normal(0, 5, n))
        stored = np.array([r[0] for r in store.conn.execute(
            "SELECT t FROM observations WHERE sensor = 'barometer' ORDER BY t")], dtype=np.int64)
        for at, length, flag in flagged:
            some = stored[(stored >= t0 + at) & (stored <= t0 + at + length)]
            if len(some):  # quality control's flags, and a technician's over part of them
                qc_records.write_rows(store, "port", "barometer", some, np.ones((len(some), len(qc.TESTS))), some,
                              np.full(len(some), flag))
                qc_records.set_override(store, "port", "barometer", float(some[0]), float(some[len(some) // 2]),
                                4 if flag != 4 else 1, "tech", "test")
        start, end = t0 + bounds[0], t0 + bounds[0] + bounds[1]
        resid, _, pressure = SF.read_history(store.conn, "port", start, end, barometer=True)
        want = pressure_reference(store.conn, "port", start, end, resid.index)
        if pressure is None:
            assert want.isna().all()
        else:
            assert_same(pressure, want)


def test_each_writer_of_the_barometer_keeps_its_means(store):
    t0 = 1_700_000_000 + 7
    t = t0 + np.arange(0, 6 * hour, minute)
    store.write_derived_rows("port", t, {"smoothed": np.zeros(len(t))})

    def check():
        resid, _, pressure = SF.read_history(store.conn, "port", int(t[0]), int(t[-1]), barometer=True)
        assert_same(pressure, pressure_reference(store.conn, "port", int(t[0]), int(t[-1]), resid.index))

    store.write_batch("port", "barometer", t[::2], 1000.0 + np.arange(len(t[::2])))
    check()
    store.write_batch("port", "barometer", t[1::2], 1020.0 + np.arange(len(t[1::2])))  # late rows between
    check()
    hour2 = t[(t >= t0 + hour) & (t < t0 + 2 * hour)]
    qc_records.write_rows(store, "port", "barometer", hour2, np.ones((len(hour2), len(qc.TESTS))), hour2,
                  np.full(len(hour2), 4))   # quality control fails an hour
    check()
    qc_records.set_override(store, "port", "barometer", float(t0 + 4 * hour), float(t0 + 5 * hour), 4, "tech", "leak")
    check()
    qc_records.set_override(store, "port", "barometer", float(hour2[0]), float(hour2[20]), 1, "tech", "fine after all")
    check()


def test_a_daemons_first_open_after_an_upgrade_by_another_program_makes_the_means_again(tmp_path):
    path = tmp_path / "store.sqlite"
    t = 1_700_000_000 + np.arange(0, 6 * hour, minute)
    with Store.open(path) as store:  # upgraded (made) by a verb without the lock ...
        store.write_derived_rows("port", t, {"smoothed": np.full(len(t), 0.2)})
        store.write_batch("port", "barometer", t, np.full(len(t), 1010.0))
        # ... while a daemon of the version before writes rows without their means
        store.conn.execute("UPDATE derived SET smoothed = 0.7 WHERE t >= ?", (int(t[120]),))
        store.conn.execute("UPDATE observations SET value = 990.0 WHERE t >= ?", (int(t[120]),))
        store.conn.execute("UPDATE observations SET flag = 4 WHERE t BETWEEN ? AND ?", (int(t[30]), int(t[60])))
    with Store.open(path, lock=True) as store:
        got, _, pressure = SF.read_history(store.conn, "port", int(t[0]), int(t[-1]), barometer=True)
        assert_same(got, reference(store.conn, "port", int(t[0]), int(t[-1])))
        assert got.iloc[-3] == pytest.approx(0.7)
        assert_same(pressure, pressure_reference(store.conn, "port", int(t[0]), int(t[-1]), got.index))
        assert pressure.iloc[-3] == pytest.approx(990.0)
        store.conn.execute("UPDATE derived SET smoothed = 0.9")  # behind the means' back again
    with Store.open(path, lock=True) as store:  # made again once only, not at every open
        got, _, _ = SF.read_history(store.conn, "port", int(t[0]), int(t[-1]))
        assert got.iloc[-3] == pytest.approx(0.7)   # a whole bin: the mean kept


def test_a_store_made_by_the_daemon_is_not_made_again(tmp_path, monkeypatch):
    made = []
    monkeypatch.setattr(database, "rebin_all", lambda conn: made.append(conn))
    path = tmp_path / "store.sqlite"
    with Store.open(path, lock=True) as store:   # made by the daemon: the migration made them
        assert store.get_meta("history_bins.whole") == "1"
    with Store.open(path, lock=True):
        pass
    with Store.open(path):
        pass
    assert made == []


def test_the_history_is_read_in_one_snapshot(store, tmp_path, monkeypatch):
    t = 1_700_000_000 + np.arange(0, 6 * hour, minute)
    store.write_derived_rows("port", t, {"smoothed": np.full(len(t), 0.2)})
    store.write_batch("port", "barometer", t, np.full(len(t), 1010.0))
    other = sqlite3.connect(store.real_path, isolation_level=None)
    real = SF._kept_means
    calls = []

    def meanwhile(conn, table, *args):
        rows = real(conn, table, *args)
        if not calls:  # another writer commits between the residual's read and the pressure's
            other.execute("UPDATE pressure_bins SET mean = mean + 100")
        calls.append(table)
        return rows

    monkeypatch.setattr(SF, "_kept_means", meanwhile)
    try:
        _, _, pressure = SF.read_history(store.conn, "port", int(t[0]), int(t[-1]), barometer=True)
    finally:
        other.close()
    assert calls == ["residual_bins", "pressure_bins"]
    assert pressure.dropna().eq(1010.0).all()


@pytest.mark.parametrize("t0", [1_700_000_400, -10 * GRID])
def test_a_bin_written_in_two_halves_and_read_across_its_edges(store, t0):
    # per-second rows, every value there (the writes that keep a bin without deleting it)
    t = t0 + np.arange(0, 3 * GRID)
    store.write_derived_rows("port", t[: GRID + GRID // 2], {"smoothed": np.sin(t[: GRID + GRID // 2] / 50.0)})
    store.write_derived_rows("port", t[GRID + GRID // 2:], {"smoothed": np.cos(t[GRID + GRID // 2:] / 50.0)})
    for start, end in [(t0 + GRID - 1, t0 + 2 * GRID), (t0 + GRID, t0 + 2 * GRID - 1), (t0 + GRID + 1, t0 + 3 * GRID),
                       (t0 - 1, t0 + 2 * GRID + 1), (t0 + GRID + 5, t0 + GRID + 9)]:
        got, _, _ = SF.read_history(store.conn, "port", start, end)
        assert_same(got, reference(store.conn, "port", start, end))
