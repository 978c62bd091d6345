"""The fit read in chunks (issue 16): the design built by phasor steps against a plain
least-squares solve, the chunked entry point against the in-memory one, the residual's
spectrum on coarse cells, and the store's chunk reader.

The reference solve shares no code with predictor/: its design matrix is built here from
cos and sin of constituent speeds typed from Schureman (1958), Table 2 (from memory, seven
decimals), and solved by ``numpy.linalg.lstsq``; the phases are referred to Greenwich through
tests/reference_tide.py (pyerfa's mean longitudes, Schureman's V).
"""
from __future__ import annotations

import numpy as np
import pytest

import reference_tide as ref
from predictor import confidence as ci
from predictor import harmonic_fit, harmonic_fit_chunks
from predictor import nodal
from predictor.fit import _build_design
from predictor.errors import FitInputError
from units import mm, hour, day, degree

# Speeds [deg/h], Schureman (1958), Table 2, typed from memory.
SPEEDS = {"M2": 28.9841042, "S2": 30.0000000, "N2": 28.4397295, "K2": 30.0821373,
          "K1": 15.0410686, "O1": 13.9430356, "P1": 14.9589314, "M4": 57.9682084}
# Hand-made constants of an invented port: amplitude [m], Greenwich phase lag [deg].
PORT = {"M2": (1.10, 95.0), "S2": (0.38, 128.0), "N2": (0.22, 80.0), "K2": (0.10, 125.0),
        "K1": (0.12, 205.0), "O1": (0.09, 350.0), "P1": (0.04, 200.0), "M4": (0.06, 40.0)}
START = 1_924_992_000.0  # 2031-01-01T00:00Z [Unix s]


def record(days, step, seed=3, gap=True):
    """Times [s] with an outage and scattered missing samples, levels [m] with noise."""
    rng = np.random.default_rng(seed)
    t = START + np.arange(0.0, days * day, step)
    keep = rng.random(t.size) > 0.05
    if gap:
        keep[t.size // 3: t.size // 3 + t.size // 12] = False
    t = t[keep]
    return t, ref.tide(t, 2.45, PORT) + rng.normal(0.0, 0.04, t.size)


def chunked(t, y, sizes=(1000, 37, 4096, 5)):
    """``read()`` for harmonic_fit_chunks: the record in chunks of varying size."""
    def read():
        s, i = 0, 0
        while s < t.size:
            n = sizes[i % len(sizes)]
            yield t[s:s + n], y[s:s + n]
            s, i = s + n, i + 1
    return read


def test_fit_without_nodal_terms_equals_plain_least_squares():
    t, y = record(365, hour)
    names = list(SPEEDS)
    model = harmonic_fit(t, y, constituents=names, nodal=False, robust=False, infer=None)
    # reference: cos/sin of the typed speeds about the record's middle, numpy.linalg.lstsq
    mid = 0.5 * (t[0] + t[-1])
    arg = np.radians(np.outer((t - mid) / hour, [SPEEDS[n] for n in names]))
    X = np.column_stack([np.ones(t.size), np.cos(arg), np.sin(arg)])
    coef, *_ = np.linalg.lstsq(X, y, rcond=None)
    k = len(names)
    a, b = coef[1:1 + k], coef[1 + k:]
    got = {c["name"]: c for c in model.constituents}
    assert model.mean == pytest.approx(coef[0], abs=0.001 * mm)
    args = ref.arguments(np.array([mid]))
    for i, n in enumerate(names):
        amp = np.hypot(a[i], b[i])
        # h = H cos(w (t - mid) - phi) = H cos(V(t) - g), so g = phi + V(mid)
        g = (np.degrees(np.arctan2(b[i], a[i])) + ref.SCHUREMAN_V[n][0](args)[0]) % 360.0
        assert got[n]["amplitude"] == pytest.approx(amp, abs=0.001 * mm), n
        # 1e-3 deg: the typed speeds' last decimal over half a year (5e-8 deg/h * 4380 h) and
        # pyerfa's mean longitudes against the product's polynomials
        assert abs((got[n]["phase"] - g + 180.0) % 360.0 - 180.0) < 1e-3 * degree, n


def test_chunked_fit_equals_the_in_memory_fit():
    t, y = record(200, hour)
    y[2000:2100] += 0.6  # a storm: the robust fit, its histogram median and MAD, all passes
    whole = harmonic_fit(t, y, robust=True)
    parts = harmonic_fit_chunks(chunked(t, y), robust=True)
    assert [c["name"] for c in parts.constituents] == [c["name"] for c in whole.constituents]
    for p, w in zip(parts.constituents, whole.constituents):
        assert p["amplitude"] == pytest.approx(w["amplitude"], abs=1e-9)
        assert p["amplitude_ci"] == pytest.approx(w["amplitude_ci"], rel=1e-6)
    assert parts.mean == pytest.approx(whole.mean, abs=1e-9)
    assert parts.metadata["rms"] == pytest.approx(whole.metadata["rms"], rel=1e-6)
    assert parts.metadata["n_samples"] == whole.metadata["n_samples"] == t.size
    assert parts.metadata["method"] == whole.metadata["method"]


def test_chunks_out_of_time_order_are_refused():
    t, y = record(60, hour)

    def read():
        yield t[1000:], y[1000:]
        yield t[:1000], y[:1000]

    with pytest.raises(FitInputError, match="time order"):
        harmonic_fit_chunks(read)


def test_a_record_that_changes_between_passes_is_refused():
    t, y = record(60, hour)
    reads = []

    def read():
        reads.append(1)
        n = t.size if len(reads) == 1 else t.size - 10  # samples gone after the first pass
        yield t[:n], y[:n]

    with pytest.raises(FitInputError, match="changed"):
        harmonic_fit_chunks(read)


def test_coarse_cells_keep_the_white_noise_coefficient_variance():
    # White noise of variance s^2: least-squares cosine/sine coefficients from N evenly spaced
    # samples have variance 2 s^2 / N, (X'X)^-1 having diagonal 2 / N (classical
    # least-squares result). Cells of 3 samples must give the same per-sample variance.
    rng = np.random.default_rng(1)
    t = START + np.arange(0.0, 4 * 365 * day, hour)
    n, s = t.size, 0.05
    spec = ci.residual_band_spectrum(t, rng.normal(0.0, s, n), hour, max_cells=n // 3 + 1)
    assert spec.step_hours == pytest.approx(3.0)
    inv = np.full((2, 2), 2.0 / n)
    var_a, var_b = ci.coefficient_variance(spec, [28.984, 15.041], inv)
    assert 0.85 * 2 * s**2 / n < var_a.min() and var_a.max() < 1.15 * 2 * s**2 / n


def test_store_chunks_give_the_observations_in_order(store):
    t = np.arange(1000, 1000 + 60 * 100, 60, dtype=np.int64)
    v = np.linspace(0.0, 1.0, t.size)
    store.write_batch("st", "primary", t, v)
    parts = list(store.observation_chunks("st", "primary", int(t[10]), int(t[80]), rows=7))
    assert all(p[0].size <= 7 for p in parts)
    got_t = np.concatenate([p[0] for p in parts])
    got_v = np.concatenate([p[1] for p in parts])
    np.testing.assert_array_equal(got_t, t[10:81])
    np.testing.assert_allclose(got_v, v[10:81])
    assert store.observation_span("st", "primary", int(t[10]), int(t[80])) == (int(t[10]), int(t[80]), 71)
    store.conn.execute("UPDATE observations SET flag = 4 WHERE t = ?", (int(t[80]),))
    store.conn.execute("UPDATE observations SET flag = 1 WHERE t = ?", (int(t[79]),))
    assert store.observation_span("st", "primary", int(t[10]), int(t[80]), without=(4, 9)) == \
        (int(t[10]), int(t[79]), 70)


def test_design_rows_by_phasor_steps_equal_the_per_sample_formula():
    # The rows are built per day from the day's f and u ramps and a table of in-day rotations;
    # here each sample's f cos(V + u) and f sin(V + u) are evaluated on their own (f and u at
    # every sample, no daily interpolation, no table), so a wrong ramp (up to 5e-4 rad a day
    # for OO1) or a wrong table entry shows. Nodal terms themselves are checked against
    # published values in tests/test_nodal.py.

    names = ["M2", "K1", "OO1", "M1", "L2", "Mf", "Sa", "MK3"]
    t = START + 400 * day + np.arange(0.0, 3 * day, 60.0)
    t = np.concatenate([t[:2000], t[2500:], [t[-1] + 17.3]])  # a gap and one sample off the grid
    design = _build_design(names, t[0], t[-1], True, False, 0.0, (), 60.0)
    X = design.rows(t)
    vu, f = nodal.arguments(t, names, daily=False)
    arg = np.radians(vu)
    # 1e-6: f and u are interpolated linearly between midnights (as before issue 16), which
    # leaves up to 6e-7 for M1 and L2, whose u follows the perigee; a ramp left out would leave
    # 1e-5 for M2 and 5e-4 for OO1 by the day's end.
    np.testing.assert_allclose(X[:, 1::2], f * np.cos(arg), atol=1e-6)
    np.testing.assert_allclose(X[:, 2::2], f * np.sin(arg), atol=1e-6)


def test_design_rows_with_a_repeated_time_and_a_gap_in_one_day():
    # A repeated time and a missing sample in the same day leave the first and last grid
    # points as far apart as a run without either: the rows must still be each sample's own
    # (the rotations once came out of the table as one consecutive slice, 7e-3 off here).
    names = ["M2", "K1"]
    t = START + 400 * day + np.arange(0.0, 3 * hour, 60.0)
    t = np.sort(np.concatenate([np.delete(t, 100), [t[50]]]))  # one repeated, one missing
    on_grid = _build_design(names, t[0], t[-1], True, False, 0.0, (), 60.0).rows(t)
    direct = _build_design(names, t[0], t[-1], True, False, 0.0, (), None).rows(t)
    np.testing.assert_allclose(on_grid, direct, atol=1e-9)
