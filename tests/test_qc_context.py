"""Quality control from the context kept in memory equals a run over the whole record.

An invented station (a one-minute tide with red noise, a primary and a backup sensor) is
streamed one sample per sensor per pass, as the daemon sees a live feed, through
``run_station_qc(..., context=QcContext())``. The record holds lone spikes, a stuck float,
a 20-minute gap, a one-sample step, a backup that disagrees for an hour,
backup rows that arrive late, and a technician's override set mid-stream. After every pass
the rows it wrote (``qc_tests`` and ``observations.flag``, read back from the store) are
compared with a second store driven by the pass without a context, and, every few passes
and around each feature, with the tests run over the whole record stored so far with
pandas' rolling windows (``run_tests`` and ``_confirm``, code the context path does not use).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.quality import checks as qc
from monitor.quality import context as qc_context
from monitor.quality import diagnostics
from monitor.quality import records as qc_records
from monitor.quality import tail as qc_tail
from monitor.quality.checks import QcSettings
from monitor.quality.context import QcContext, QcRows
from monitor.quality.records import run_station_qc, set_override
from monitor.service.daemon import PredictionMemo
from monitor.store.database import Store
from reference_qc import whole_record_tests
from units import cm, hour, minute, mm

T0 = 1_761_000_000 - 1_761_000_000 % 60
HISTORY = 26 * hour // minute    # samples before the stream (QC looks 25 h back)
STREAM = 300                     # samples streamed one per pass
STATION = "harbour"


class _Tide:
    """The invented port's tide, evaluated sample by sample (no blocks, so the prediction
    of a time does not depend on which times are asked for with it)."""

    def predict(self, times):
        t = pd.DatetimeIndex(times).as_unit("ns").asi8 / 1e9
        return 2.1 + 1.3 * np.cos(2 * np.pi * t / 44714.16 + 0.4) + 0.35 * np.cos(2 * np.pi * t / 43200.0 + 1.1)


def _record(seed: int = 11):
    """Times [Unix s] and the two sensors' levels [m]; features in the streamed part."""
    rng = np.random.default_rng(seed)
    n = HISTORY + STREAM
    t = T0 + minute * np.arange(n)
    sea = _Tide().predict(pd.to_datetime(t, unit="s", utc=True)) + np.cumsum(rng.normal(0, 0.002, n))
    primary = np.round((sea + rng.normal(0, 0.003, n)) * 1000) / 1000
    backup = np.round((sea + 0.004 + rng.normal(0, 0.003, n)) * 1000) / 1000
    s = HISTORY
    primary[s + 10] += 0.30                    # a lone spike
    primary[s + 30:s + 100] = primary[s + 30]  # a stuck float, 70 min
    primary[s + 120:] += 0.30                  # a bore passing both gauges: one step in each
    backup[s + 120:] += 0.30
    keep = np.ones(n, bool)
    keep[s + 140:s + 160] = False              # a 20-minute gap in the primary
    backup[s + 180:s + 240] += 8 * cm          # the backup disagrees for an hour
    primary[s + 200:] += 0.25                  # a one-sample step that stays
    backup[s + 280] -= 0.35                    # a spike in the backup
    return t, primary, backup, keep


def _reference(store: Store, model, s: QcSettings, now: float) -> dict[str, pd.DataFrame]:
    """Every test over the whole record stored so far, both sensors combined as the station
    pass combines them, with pandas' rolling windows; the technician's overrides applied."""
    obs = {sn: qc_records.read_observations(store, STATION, sn)["value"] for sn in ("primary", "backup")}
    out = whole_record_tests(obs, model, s, now, position=(50.2, -4.1))
    for sn, tests in out.items():
        ov = store.conn.execute("SELECT t, flag FROM qc_overrides WHERE station = ? AND sensor = ?",
                                (STATION, sn)).fetchall()
        for t_ov, f_ov in ov:
            tests.loc[pd.Timestamp(t_ov, unit="s", tz="UTC"), "flag"] = f_ov
    return out


def _stored(store: Store, sensor: str, lo: int, hi: int) -> pd.DataFrame:
    """The ``qc_tests`` rows and ``observations.flag`` of one sensor in ``[lo, hi]``."""
    rows = store.conn.execute(
        f"SELECT q.t, {', '.join('q.' + c for c in qc.TESTS)}, o.flag FROM qc_tests q JOIN observations o "
        "ON o.station = q.station AND o.sensor = q.sensor AND o.t = q.t "
        "WHERE q.station = ? AND q.sensor = ? AND q.t BETWEEN ? AND ? ORDER BY q.t", (STATION, sensor, lo, hi)).fetchall()
    frame = pd.DataFrame(rows, columns=["t", *qc.TESTS, "flag"])
    return frame.set_index(pd.to_datetime(frame.pop("t"), unit="s", utc=True))


class _Station:
    """A store fed and processed as the daemon does it: batches lower the processing mark
    (``take_touched``), a pass runs from the mark to the last sample stored."""

    def __init__(self, path, context: QcContext | None):
        self.store = Store.open(path)
        self.context = context
        self.cfg = type("St", (), {"id": STATION, "latitude": 50.2, "longitude": -4.1, "sensors": None})()

    def write(self, sensor: str, t: np.ndarray, v: np.ndarray) -> None:
        if len(t):
            self.store.write_batch(STATION, sensor, t.astype(np.int64), v)

    def process(self, model, s: QcSettings) -> tuple[int, int]:
        mark = self.store.take_touched(STATION)
        ends = [self.store.last_time(STATION, sn) for sn in ("primary", "backup")]
        end = max(e for e in ends if e is not None)
        start = (mark + 1) if mark is not None else min(self.store.first_time(STATION, sn) for sn in ("primary", "backup"))
        run_station_qc(self.store, self.cfg, s, start, end, model, now=end + 30, context=self.context)
        self.store.set_meta(f"processed.{STATION}", str(end))
        return start, end


def _same(a: pd.DataFrame, b: pd.DataFrame, what: str) -> None:
    assert list(a.index) == list(b.index), f"{what}: other rows written"
    diff = (a.to_numpy() != b.to_numpy()).any(axis=1)
    assert not diff.any(), f"{what}: rows differ at {list(a.index[diff][:5])}\n{a[diff].T}\n{b[diff].T}"


def test_streamed_one_sample_per_pass_the_flags_equal_a_whole_record_run(tmp_path):
    t, primary, backup, keep = _record()
    model, s = _Tide(), QcSettings()
    ctx = QcContext()
    live, plain = _Station(tmp_path / "live.db", ctx), _Station(tmp_path / "plain.db", None)
    stations = (live, plain)
    for st in stations:  # the day of history, in one pass
        st.write("primary", t[:HISTORY][keep[:HISTORY]], primary[:HISTORY][keep[:HISTORY]])
        st.write("backup", t[:HISTORY], backup[:HISTORY])
        st.process(model, s)
    feature_at = {10, 30, 60, 90, 100, 120, 160, 180, 200, 240, 255, 270, 280}
    rebuilt_at = []
    try:
        for j in range(STREAM):
            i = HISTORY + j
            rebuilds = ctx.rebuilds
            for st in stations:
                if keep[i]:
                    st.write("primary", t[i:i + 1], primary[i:i + 1])
                if j == 255:      # the backup's last six rows arrive late, together
                    st.write("backup", t[i - 5:i + 1], backup[i - 5:i + 1])
                elif not 250 <= j < 255:
                    st.write("backup", t[i:i + 1], backup[i:i + 1])
                if j == 270:      # a technician fails a primary sample written five passes ago
                    set_override(st.store, STATION, "primary", float(t[i - 5]), None, qc.FAIL, "tech", "fouled")
                start, end = st.process(model, s)
            if ctx.rebuilds > rebuilds:
                rebuilt_at.append(j)
            lo = int(start - s.resid_window)
            for sn in ("primary", "backup"):
                _same(_stored(live.store, sn, lo, end), _stored(plain.store, sn, lo, end),
                      f"pass {j} {sn}: with and without the context")
            if j % 25 == 0 or any(abs(j - f) <= 1 for f in feature_at):
                ref = _reference(live.store, model, s, end + 30)
                for sn in ("primary", "backup"):
                    got = _stored(live.store, sn, lo, end)
                    _same(got, ref[sn].loc[got.index, [*qc.TESTS, "flag"]], f"pass {j} {sn}: against the whole record")
        for sn in ("primary", "backup"):
            _same(_stored(live.store, sn, 0, 2 ** 40), _stored(plain.store, sn, 0, 2 ** 40), f"whole store {sn}")
            flags = [st.store.conn.execute("SELECT t, flag FROM observations WHERE sensor = ? ORDER BY t",
                                           (sn,)).fetchall() for st in stations]
            assert flags[0] == flags[1]
        final = _stored(live.store, "primary", int(t[HISTORY]), int(t[-1]))
    finally:
        for st in stations:
            st.store.close()
    # the features the stream must have met, so the comparison above is not of a calm sea
    assert (final["flat"] == qc.FAIL).any() and (final["spike"] == qc.FAIL).any()
    assert (final["gap"] == qc.MISSING).any()
    assert (final["multi"] == qc.SUSPECT).any()
    assert final.loc[pd.Timestamp(int(t[HISTORY + 265]), unit="s", tz="UTC"), "flag"] == qc.FAIL
    # the bore: each sensor's step alone fails; confirmed by the other, it is suspect
    assert final.loc[pd.Timestamp(int(t[HISTORY + 120]), unit="s", tz="UTC"), "spike"] == qc.SUSPECT
    assert final.loc[pd.Timestamp(int(t[HISTORY + 200]), unit="s", tz="UTC"), "spike"] == qc.FAIL
    # rebuilt after the gap (first row after it), the late rows and the override; else steady
    assert rebuilt_at == [160, 255, 270]


@pytest.fixture
def streaming(tmp_path):
    """A station with a day of history processed through a context, and one more pass."""
    t, primary, backup, keep = _record(12)
    st = _Station(tmp_path / "s.db", QcContext())
    late = np.arange(HISTORY) != HISTORY - 30  # a primary row held back, to arrive late
    st.write("primary", t[:HISTORY][late], primary[:HISTORY][late])
    st.write("backup", t[:HISTORY], backup[:HISTORY])
    tide = _Tide()
    st.process(tide, QcSettings())

    def step(i: int, settings: QcSettings | None = None, model=None):
        st.write("primary", t[i:i + 1], primary[i:i + 1])
        st.write("backup", t[i:i + 1], backup[i:i + 1])
        return st.process(model or tide, settings or QcSettings())

    st.late = (t[HISTORY - 30:HISTORY - 29], primary[HISTORY - 30:HISTORY - 29])
    yield st, t, step
    st.store.close()


def test_a_steady_pass_does_not_rebuild(streaming):
    st, t, step = streaming
    n = st.context.rebuilds
    for i in range(HISTORY, HISTORY + 5):
        step(i)
    assert st.context.rebuilds == n


def test_a_late_row_rebuilds_the_context(streaming):
    st, t, step = streaming
    step(HISTORY)
    n = st.context.rebuilds
    st.write("primary", *st.late)  # a row inside the span held, after its time was processed
    step(HISTORY + 1)
    assert st.context.rebuilds == n + 1


def test_an_override_rebuilds_the_context(streaming):
    st, t, step = streaming
    step(HISTORY)
    n = st.context.rebuilds
    set_override(st.store, STATION, "backup", float(t[HISTORY - 3]), None, qc.SUSPECT, "tech", "check")
    step(HISTORY + 1)
    assert st.context.rebuilds == n + 1
    assert st.store.conn.execute("SELECT flag FROM observations WHERE sensor = 'backup' AND t = ?",
                                 (int(t[HISTORY - 3]),)).fetchone()[0] == qc.SUSPECT


def test_a_pass_without_the_context_rebuilds_it(streaming):
    """`quaywatch qc` (no context) rewrites flags while the daemon runs."""
    st, t, step = streaming
    step(HISTORY)
    n = st.context.rebuilds
    run_station_qc(st.store, st.cfg, QcSettings(), float(t[HISTORY - 600]), float(t[HISTORY - 300]), _Tide())
    step(HISTORY + 1)
    assert st.context.rebuilds == n + 1


def test_other_settings_or_model_rebuild_the_context(streaming):
    st, t, step = streaming
    step(HISTORY)
    n = st.context.rebuilds
    step(HISTORY + 1, settings=QcSettings(spike_suspect=0.07))
    assert st.context.rebuilds == n + 1
    step(HISTORY + 2, settings=QcSettings(spike_suspect=0.07), model=_Tide())
    assert st.context.rebuilds == n + 2


def test_an_error_inside_a_pass_forgets_the_context(streaming):
    st, t, step = streaming
    step(HISTORY)

    class Broken:
        def predict(self, times):
            raise RuntimeError("no tide")

    with pytest.raises(RuntimeError):
        step(HISTORY + 1, model=Broken())
    assert st.context.end_t is None and not st.context.sensors


def test_flat_since_of_the_rows_equals_the_diagnostics_on_a_frame():
    t = T0 + minute * np.arange(8)
    flat = np.array([1, 3, 4, 1, 3, 4, 4, 4], dtype=np.int8)
    tests = np.ones((8, len(qc.TESTS)), dtype=np.int8)
    tests[:, qc.TESTS.index("flat")] = flat
    rows = QcRows(t, tests, np.ones(8, dtype=np.int8))
    frame = rows.frame()
    assert rows.flat_since() == diagnostics.flat_since(frame["flat"]).timestamp() == t[5]
    tests[-1, qc.TESTS.index("flat")] = 1
    assert QcRows(t, tests, np.ones(8, dtype=np.int8)).flat_since() is None


@pytest.mark.parametrize("seed, suffixes", [(1, False), (2, False), (3, True), (4, True)])
def test_the_sliding_median_equals_numpy_over_each_window(seed, suffixes):
    """Against ``np.median`` of each window's finite values (min_periods and NaN as pandas);
    windows sliding both ends, and windows all ending at the newest value (the live tail)."""
    rng = np.random.default_rng(seed)
    values = np.abs(rng.normal(0, 1, 400)).round(2)  # ties on purpose
    values[rng.integers(0, 400, 40)] = np.nan
    a = np.sort(rng.integers(0, 300, 120))
    b = np.minimum(np.maximum(a + rng.integers(0, 60, 120), np.maximum.accumulate(a + 5)), 400)
    b = np.maximum.accumulate(b)
    if suffixes:
        a, b = np.sort(rng.integers(300, 395, 80)), np.full(80, 400)
    got = qc_tail._sliding_median(values, a, b, 10)
    for i in range(len(a)):
        w = values[a[i]:b[i]]
        w = w[np.isfinite(w)]
        want = np.median(w) if len(w) >= 10 else np.nan
        assert (np.isnan(want) and np.isnan(got[i])) or got[i] == want, i


@settings(max_examples=200, deadline=None)
@given(seed=st.integers(0, 2 ** 32 - 1), spread=st.sampled_from([0.002, 0.008, 0.03]),
       step=st.sampled_from([0.001, 0.005]), judged=st.integers(2, 90),
       half_min=st.sampled_from([12 * 60, 10, 6]))
def test_the_noise_bound_gives_the_flags_of_the_exact_median(seed, spread, step, judged, half_min):
    """The residual outlier test's sigma from order-statistic bounds (exact only where the
    bounds leave a flag open) gives the suspect and fail verdicts of the exact 25 h median,
    taken here with ``np.median`` over each centred window's finite values, one window at
    a time. Departures are drawn near the limits on purpose, values rounded to make ties;
    the rows before ``k`` are judged on the fail limit only (the burst rule's). Windows of
    25 h, and short ones where some hold fewer than 10 values (not evaluated)."""
    rng = np.random.default_rng(seed)
    n = 900
    tn = (1_760_000_000 + 60 * np.arange(n)).astype(np.int64) * 1_000_000_000
    absd = np.round(np.abs(rng.normal(0, spread, n)) / step) * step
    absd[rng.integers(0, n, 60)] = np.nan
    limits = ((6.0, 0.05), (12.0, 0.20))
    half = half_min * 60 * 1_000_000_000  # 25 h windows, and short ones (some below 10 values)
    e0, k = n - judged, n - judged * 3 // 4
    size = absd.copy()
    # departures of the rows judged around each limit the exact sigma would set
    exact = np.full(n, np.nan)
    for i in range(e0, n):
        w = absd[(tn > tn[i] - half) & (tn <= tn[i] + half)]
        w = w[np.isfinite(w)]
        exact[i] = 1.4826 * np.median(w) if len(w) >= 10 else np.nan
    mult = rng.choice([6.0, 12.0], n)
    size[e0:] = np.fmax(mult[e0:] * exact[e0:] * rng.uniform(0.8, 1.25, n - e0),
                        rng.choice([0.05, 0.20, 0.0], n - e0) * rng.uniform(0.9, 1.1, n - e0))
    got = qc_tail._noise_where_needed(absd, size, tn, e0, half, limits, k, True)

    def verdicts(sigma):
        ev = np.isfinite(sigma)
        with np.errstate(invalid="ignore"):
            return [ev & (size > np.maximum(m * sigma, f)) for m, f in limits]
    (sus_got, far_got), (sus_want, far_want) = verdicts(got), verdicts(exact)
    assert np.array_equal(far_got[e0:], far_want[e0:])
    assert np.array_equal(sus_got[k:], sus_want[k:])
    assert np.array_equal(np.isfinite(got[k:]), np.isfinite(exact[k:]))


def test_windows_too_wide_for_matrices_take_the_pass_without_the_context(tmp_path, monkeypatch):
    """Very fine sampling makes the tail's window matrices too large: the pass falls back to
    the pass without a context (whole-record tests for such tails) and says the same rows;
    the passes after it go straight there (no read of the context to find it too wide
    again) until the context is tried again, WIDE_PASSES later."""
    t, primary, backup, keep = _record(13)
    monkeypatch.setattr(qc_tail, "_TAIL_CELLS_MAX", 1000)
    monkeypatch.setattr(qc_context, "WIDE_PASSES", 3)
    model, s = _Tide(), QcSettings()
    live, plain = _Station(tmp_path / "live.db", QcContext()), _Station(tmp_path / "plain.db", None)
    try:
        for st in (live, plain):
            st.write("primary", t[:HISTORY + 3], primary[:HISTORY + 3])
            st.write("backup", t[:HISTORY + 3], backup[:HISTORY + 3])
            st.process(model, s)
        for sn in ("primary", "backup"):
            _same(_stored(live.store, sn, 0, 2 ** 40), _stored(plain.store, sn, 0, 2 ** 40), sn)
        assert live.context.end_t is None  # forgotten: the next pass reads the store again
        rebuilds = []
        for i in range(HISTORY + 3, HISTORY + 8):
            for st in (live, plain):
                st.write("primary", t[i:i + 1], primary[i:i + 1])
                st.write("backup", t[i:i + 1], backup[i:i + 1])
                st.process(model, s)
            rebuilds.append(live.context.rebuilds)
        for sn in ("primary", "backup"):
            _same(_stored(live.store, sn, 0, 2 ** 40), _stored(plain.store, sn, 0, 2 ** 40), sn)
        # three passes without the context, then one that tries it (a rebuild) and falls back
        assert rebuilds == [1, 1, 1, 2, 2]
    finally:
        for st in (live, plain):
            st.store.close()


@pytest.mark.parametrize("seed, reach", [(5, 0), (6, 0), (5, 6), (6, 10)])
def test_spike_flags_kept_between_calls_equal_those_of_the_whole_record(seed, reach):
    """The spike test evaluated only near the newest rows and the first (after the record lost
    rows at its front) equals it over the whole record, with spikes, jumps and missing runs
    near both ends; from row ``reach`` on where the rows before it are used by no window of
    the rows judged (their flags may be left as held)."""
    rng = np.random.default_rng(seed)
    n = 3000
    t = (T0 + minute * np.arange(n)).astype(float)
    r = np.cumsum(rng.normal(0, 0.003, n))
    r[rng.integers(0, n, 60)] += rng.choice([-1, 1], 60) * 0.3    # spikes
    r[rng.integers(0, n, 20)] += 0.4                              # jumps (two-sample steps)
    for a in rng.integers(0, n - 10, 25):
        r[a:a + rng.integers(1, 8)] = np.nan                      # missing runs
    t[rng.integers(0, n, 15)] += 400                              # a few late stamps (gaps)
    t = np.sort(t)
    s, memo = QcSettings(), qc_tail.ResidMemo()
    lo, hi = 0, 200
    while hi < n:
        got = qc_tail._spike_all(r[lo:hi], t[lo:hi], s, memo, reach)
        want = qc_tail.spike_flags(r[lo:hi], t[lo:hi], s.spike_suspect, s.spike_fail, s.gap_limit, s.jump_ratio)
        assert np.array_equal(got[reach:], want[reach:]), (lo, hi, np.flatnonzero(got != want))
        step, cut = int(rng.integers(1, 4)), int(rng.integers(0, 3))
        hi += step
        lo += cut
        memo.drop(cut)


class _Counted(_Tide):
    def __init__(self):
        self.calls = 0

    def predict(self, times):
        self.calls += 1
        return super().predict(times)


def test_the_daemons_prediction_memo_is_asked_an_hour_ahead(tmp_path):
    """Through the daemon's memo the model runs once for an hour of one-minute passes, and
    the flags are those of a pass without a context with the model itself."""
    t, primary, backup, keep = _record(14)
    tide, s = _Counted(), QcSettings()
    memo = PredictionMemo(tide)
    live, plain = _Station(tmp_path / "live.db", QcContext()), _Station(tmp_path / "plain.db", None)
    try:
        for st, model in ((live, memo), (plain, _Tide())):
            st.write("primary", t[:HISTORY], primary[:HISTORY])
            st.write("backup", t[:HISTORY], backup[:HISTORY])
            st.process(model, s)
        calls = tide.calls
        for i in range(HISTORY, HISTORY + 30):
            for st, model in ((live, memo), (plain, _Tide())):
                st.write("primary", t[i:i + 1], primary[i:i + 1])
                st.write("backup", t[i:i + 1], backup[i:i + 1])
                st.process(model, s)
        assert tide.calls == calls + 1
        for sn in ("primary", "backup"):
            _same(_stored(live.store, sn, 0, 2 ** 40), _stored(plain.store, sn, 0, 2 ** 40), sn)
    finally:
        for st in (live, plain):
            st.store.close()


def test_without_the_stores_meta_table_every_pass_rebuilds(tmp_path):
    # A bare database (no ``meta``) cannot record a pass without a context (note_edit has
    # nowhere to count it), so a context over one must never trust what it holds.
    t, primary, backup, keep = _record(12)
    st = _Station(tmp_path / "s.db", None)
    st.write("primary", t[:HISTORY + 3], primary[:HISTORY + 3])
    st.write("backup", t[:HISTORY + 3], backup[:HISTORY + 3])
    st.store.conn.execute("DROP TABLE meta")
    ctx, tide = QcContext(), _Tide()
    run_station_qc(st.store.db, st.cfg, QcSettings(), float(t[0]), float(t[HISTORY - 1]), tide,
                   now=float(t[HISTORY - 1]) + 30, context=ctx)
    n = ctx.rebuilds
    for i in range(HISTORY, HISTORY + 3):
        run_station_qc(st.store.db, st.cfg, QcSettings(), float(t[i - 1] + 1), float(t[i]), tide,
                       now=float(t[i]) + 30, context=ctx)  # the window right after the last, as the daemon's
    assert ctx.rebuilds == n + 3
    st.store.close()


def test_the_memo_is_asked_ahead_at_the_stations_own_step(tmp_path):
    """A six-minute gauge: the hour asked ahead is at six-minute steps, so thirty passes
    (three hours) need one model run, not one a pass (a one-minute step guessed for a
    single new row never met the gauge's times)."""
    t, primary, backup, keep = _record(14)
    t, primary, backup = t[::6], primary[::6], backup[::6]
    h = HISTORY // 6
    assert len(t) >= h + 30
    tide, s = _Counted(), QcSettings(gap_limit=15 * minute)  # a gap is over two missed samples
    memo = PredictionMemo(tide)
    st = _Station(tmp_path / "six.db", QcContext())
    try:
        st.write("primary", t[:h], primary[:h])
        st.write("backup", t[:h], backup[:h])
        st.process(memo, s)
        calls = tide.calls
        for i in range(h, h + 30):
            st.write("primary", t[i:i + 1], primary[i:i + 1])
            st.write("backup", t[i:i + 1], backup[i:i + 1])
            st.process(memo, s)
        assert st.context.rebuilds == 1
        assert tide.calls == calls + 1
    finally:
        st.store.close()


def test_on_a_noisy_sea_the_noise_sigma_decides_as_in_a_whole_record_run(tmp_path):
    """A seiche of a few centimetres with white noise: the residual outlier test's robust
    sigma is some 3-4 cm, so its limit (6 sigma) is far above the 5 cm floor and the exact
    25 h median decides rows departing 5-20 cm (they pass) and the bursts beyond it (they
    do not). Streamed one sample per pass through the context and compared with the whole
    record (pandas' rolling windows): a pass that took the floor for such rows, or a wrong
    sigma, flags them otherwise."""
    rng = np.random.default_rng(21)
    n = HISTORY + 40
    t = T0 + minute * np.arange(n)
    tide = _Tide().predict(pd.to_datetime(t, unit="s", utc=True))
    sea = tide + 4 * cm * np.sin(2 * np.pi * t / (11 * minute)) + rng.normal(0, 2 * cm, n)
    primary = np.round(sea * 1000) / 1000
    backup = np.round((sea + rng.normal(0, 3 * mm, n)) * 1000) / 1000
    for j in (8, 9, 10, 25, 26):  # two short bursts far beyond the noise, in the primary
        primary[HISTORY + j] += 0.6
    # lone departures either side of the suspect limit (6 sigma, about 25 cm here)
    primary[HISTORY + 15] += 0.20
    primary[HISTORY + 32] += 0.30
    model, s = _Tide(), QcSettings()
    st = _Station(tmp_path / "noisy.db", QcContext())
    try:
        st.write("primary", t[:HISTORY], primary[:HISTORY])
        st.write("backup", t[:HISTORY], backup[:HISTORY])
        st.process(model, s)
        for i in range(HISTORY, n):
            st.write("primary", t[i:i + 1], primary[i:i + 1])
            st.write("backup", t[i:i + 1], backup[i:i + 1])
            start, end = st.process(model, s)
            if (i - HISTORY) % 10 == 9:
                ref = _reference(st.store, model, s, end + 30)
                lo = int(start - s.resid_window)
                for sn in ("primary", "backup"):
                    got = _stored(st.store, sn, lo, end)
                    _same(got, ref[sn].loc[got.index, [*qc.TESTS, "flag"]], f"pass {i - HISTORY} {sn}")
        got = _stored(st.store, "primary", int(t[HISTORY - 60]), int(t[-1]))
    finally:
        st.store.close()
    # the rows the comparison is about: departures past the floor that pass, and rows that do not
    resid = pd.Series(primary - tide, index=pd.to_datetime(t, unit="s", utc=True)).loc[got.index]
    departure = (resid - resid.rolling("3600s", center=True).median()).abs()
    calm = got["resid"] == qc.PASS
    assert ((departure > s.resid_suspect_floor) & calm).sum() >= 10
    assert (got["resid"] >= qc.SUSPECT).any()
    at = got.index.get_indexer(pd.to_datetime(t[[HISTORY + 15, HISTORY + 32]], unit="s", utc=True))
    assert departure.iloc[at[0]] > 15 * cm and got["resid"].iloc[at[0]] == qc.PASS
    assert got["resid"].iloc[at[1]] == qc.SUSPECT


@pytest.mark.parametrize("step_s, seed", [(minute, 7), (15 * minute, 8), (15 * minute, 9)])
def test_the_table_kept_between_calls_equals_a_call_without_the_memo(step_s, seed):
    """The single-sensor tests with the memo (spike flags kept, the first rows' flags left as
    held where no window of the rows judged reaches them) equal a call that evaluates every
    row afresh, while the record grows at its end and loses rows at its front, as the
    context's does; spikes, jumps and missing runs throughout, at one-minute and at
    fifteen-minute steps (where the first rows do lie in the windows)."""
    rng = np.random.default_rng(seed)
    n = int(30 * hour // step_s) + 400
    t = (T0 + step_s * np.arange(n)).astype(float)
    p = 2.0 + 1.2 * np.cos(2 * np.pi * t / 44714.16)
    v = p + np.cumsum(rng.normal(0, 0.004, n))
    v[rng.integers(0, n, n // 20)] += rng.choice([-1, 1], n // 20) * rng.uniform(0.1, 0.5, n // 20)
    for a in rng.integers(0, n - 5, n // 60):
        v[a:a + rng.integers(1, 4)] = np.nan
    s, memo = QcSettings(), qc_tail.ResidMemo()
    span = s.context_seconds() + s.resid_window + 2 * s.gap_limit
    lo, hi = 0, int(span // step_s)
    while hi < n:
        k = int(np.searchsorted(t[lo:hi], t[hi - 1] - s.resid_window - 2 * s.gap_limit))
        tn = (t[lo:hi] * 1e9).astype(np.int64)
        got = qc_tail.tail_table(tn, v[lo:hi], p[lo:hi], s, t[hi - 1] + 30, None, k, memo)
        want = qc_tail.tail_table(tn, v[lo:hi], p[lo:hi], s, t[hi - 1] + 30, None, k)
        assert np.array_equal(got, want), (lo, hi, np.argwhere(got != want)[:5])
        hi += 1
        cut = int(np.searchsorted(t, t[hi - 1] - span)) - lo
        if cut > 0:
            lo += cut
            memo.drop(cut)


@pytest.mark.parametrize("step_s", [minute, 15 * minute, hour])
def test_the_rows_before_the_reach_decide_no_flag_of_the_rows_judged(step_s, monkeypatch):
    """Whatever the spike test said of the rows before ``_reach`` (randomised here), the
    table of the rows judged is the same; randomised from it to the rows judged, the table
    changes (the rows the windows do use are seen). Spikes and gaps in an invented record, at one-minute,
    fifteen-minute and hourly steps (the gap limit two steps)."""
    rng = np.random.default_rng(step_s)
    s = QcSettings(gap_limit=2.0 * step_s, resid_burst=max(300.0, 2.0 * step_s))
    span = s.context_seconds() + s.resid_window + 2 * s.gap_limit
    n = int(span // step_s) + 5
    t = (T0 + step_s * np.arange(n)).astype(float)
    p = 2.0 + 1.2 * np.cos(2 * np.pi * t / 44714.16)
    v = p + np.cumsum(rng.normal(0, 0.01, n))
    v[rng.integers(0, n, n // 10)] += 0.4
    tn = (t * 1e9).astype(np.int64)
    k = int(np.searchsorted(t, t[-1] - s.resid_window - 2 * s.gap_limit))
    spike_all = qc_tail._spike_all
    changed = {}

    def table(where: str | None):
        def randomised(rc, tt, settings, memo, reach=0):
            sp = spike_all(rc, tt, settings, memo, reach)
            if where is not None:
                rows = np.arange(0, reach) if where == "before" else np.arange(reach, k)
                sp[rows] = rng.choice([qc.PASS, qc.FAIL], len(rows))
                changed[where] = len(rows)
            return sp
        monkeypatch.setattr(qc_tail, "_spike_all", randomised)
        memo = qc_tail.ResidMemo()
        memo.lost = True  # as after the record lost rows at its front: the reach is asked for
        return qc_tail.tail_table(tn, v, p, s, t[-1] + 30, None, k, memo)

    plain = table(None)
    for _ in range(5):
        assert np.array_equal(table("before"), plain)     # every row before the reach
    assert changed["before"] > 0
    assert any(not np.array_equal(table("after"), plain) for _ in range(5))  # from the reach to the rows judged


def test_the_step_kept_between_calls_follows_a_change_of_sampling():
    """The attenuation test's coverage takes the record's median step; kept between calls
    while the record keeps one step throughout, it must follow the record when the gauge
    goes from one-minute to two-minute sampling (and back) as a call without the memo does:
    at two minutes a tidal day holds 745 samples, covered only if the step is taken as
    two minutes (745 x 60 s is under 80 % of the day)."""
    s, memo = QcSettings(), qc_tail.ResidMemo()
    t = list(T0 + minute * np.arange(int(s.context_seconds() // minute)))
    seen = set()
    for step in [minute] * 30 + [2 * minute] * 1900 + [minute] * 400:
        t.append(t[-1] + step)
        tt = np.array(t, dtype=float)
        lo = int(np.searchsorted(tt, tt[-1] - s.context_seconds()))
        if lo:
            del t[:lo]
            memo.drop(lo)
            tt = tt[lo:]
        p = 2.0 + 1.2 * np.cos(2 * np.pi * tt / 44714.16)
        v = p + 0.01 * np.sin(tt / 977.0)
        k = len(tt) - 3
        tn = (tt * 1e9).astype(np.int64)
        got = qc_tail.tail_table(tn, v, p, s, tt[-1] + 30, None, k, memo)
        want = qc_tail.tail_table(tn, v, p, s, tt[-1] + 30, None, k)
        assert np.array_equal(got, want), (len(t), np.argwhere(got != want)[:5])
        seen.update(got[:, qc._COL["atten"]].tolist())
    assert {qc.PASS, qc.NOT_EVALUATED} <= seen  # both sides of the coverage were met


@pytest.mark.parametrize("seed", [1, 2])
def test_a_growing_column_holds_what_concatenation_and_slicing_would(seed):
    """The context's columns grow in a buffer with room to spare; each step they must hold
    what ``np.concatenate`` and slicing give, and a view taken before a step must not see
    what the step wrote (only the rows past its end are written, or a new buffer)."""
    rng = np.random.default_rng(seed)
    want = rng.normal(size=300)
    col = qc_context._Column(want.copy())
    kept = []
    for _ in range(400):
        before = col.view()
        kept.append((before, before.copy()))
        if rng.random() < 0.5:
            new = rng.normal(size=int(rng.integers(0, 4)))
            got, want = col.append(new), np.concatenate([want, new])
        elif rng.random() < 0.8:
            cut = int(rng.integers(0, 3))
            got, want = col.drop(cut), want[cut:]
        else:
            got, want = col.append(count=2, fill=-1.0), np.concatenate([want, [-1.0, -1.0]])
        assert np.array_equal(got, want) and np.array_equal(col.view(), want)
    assert all(np.array_equal(a, b) for a, b in kept)
