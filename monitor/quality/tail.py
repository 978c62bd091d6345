"""Quality control of the newest rows only, with the record before them as context.

:func:`run_tests_tail` gives the rows of :func:`monitor.quality.checks.run_tests` from a
given row on, with the record before it as context, without evaluating the tests on the
context itself. The daemon judges a minute's sample against 25 hours of record; every test
is a function of a window around the sample, so here each window statistic (rolling
standard deviation, maximum, minimum, median, range, count) is taken only at the rows
asked for, with numpy, over the windows pandas' time-based rolling uses in the tests of
:mod:`monitor.quality.checks` -- (t - w, t], or [t - w, t] where they ask for
closed="both", or (t - w/2, t + w/2] centred -- so the flags equal those of a run over the
whole record (tests/test_qc_tail.py). Long tails (a backfill, `quaywatch qc`) take
run_tests itself: the windows as matrices would not fit.

:func:`tail_table` computes the single-sensor tests on plain arrays, and :class:`ResidMemo` keeps what it
may reuse from one call to the next on a record that grows at its end (the daemon's
in-memory context, :mod:`monitor.quality.context`). :func:`confirm_tail` and
:func:`confirm_on_arrays` make one-sample jumps that the co-located backup sensor shows
too suspect, not fail, at those rows, as the whole-record run does.

References
----------
U.S. IOOS (2021). Manual for Real-Time Quality Control of Water Level Data (QARTOD),
version 2.1 (Tests 1-8, 10 and 11).
"""
from __future__ import annotations

import bisect as _bisect
import math
from typing import Any

import numpy as np
import pandas as pd

from monitor.quality.checks import (_COL, FAIL, MISSING, NOT_EVALUATED, PASS, SUSPECT, TESTS, QcSettings, _aggregate,
                                    _bursts, aggregate_flags, difference_at, difference_on_arrays,
                                    jump_flags, run_tests, spike_flags_on_arrays)
from predictor.timeutil import index_seconds, utc_index

TAIL_ROWS_MAX = 5000       # rows evaluated one by one at most; more take run_tests over the record
_TAIL_CELLS_MAX = 4_000_000  # window values held at once (rows x widest window)


class _TooWide(Exception):
    """The windows of a tail are too large to hold as one matrix."""

_NS = 1_000_000_000


def _filled(shape: int | tuple, value: Any, dtype: Any) -> np.ndarray:
    """``np.full(shape, value, dtype=dtype)``, without its Python-level overhead (a steady
    pass makes a few dozen small ones: half their cost)."""
    out = np.empty(shape, dtype)
    out.fill(value)
    return out


def _ns(seconds_: float) -> int:
    """A window length [s] as pandas takes it (``f"{round(s)}s"``) in nanoseconds."""
    return int(round(seconds_)) * _NS


def _bounds(tn: np.ndarray, at: np.ndarray, lo: int, hi: int, lo_closed: bool = False) -> tuple:
    """Index ranges [a, b) of the samples with ``t - lo < tn <= t + hi`` (``<=`` on the left
    too with ``lo_closed``) for each ``t`` in ``at`` [ns]."""
    a = tn.searchsorted(at - lo, side="left" if lo_closed else "right")
    b = tn.searchsorted(at + hi, side="right")
    return a, b


def _padded(values: np.ndarray, a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``values[a_i:b_i]`` padded with NaN to one width, and each row's non-NaN count."""
    width = int((b - a).max()) if len(a) else 0
    if len(a) * width > _TAIL_CELLS_MAX:
        raise _TooWide
    if width == 0:
        return np.full((len(a), 0), np.nan), np.zeros(len(a), dtype=int)
    cols = a[:, None] + np.arange(width)[None, :]
    inside = cols < b[:, None]
    rows = np.where(inside, values[np.minimum(cols, len(values) - 1)], np.nan)
    return rows, np.isfinite(rows).sum(axis=1)


def _rolling_median(values: np.ndarray, a: np.ndarray, b: np.ndarray, min_periods: int) -> np.ndarray:
    """Median of the non-NaN values of each window (mean of the two middle ones for an even
    count, as pandas and numpy take it); NaN below ``min_periods`` values."""
    rows, count = _padded(values, a, b)
    if rows.shape[1] == 0:
        return _filled(len(a), np.nan, float)
    rows.sort(axis=1)  # NaN last
    r = np.arange(len(a))
    lo = rows[r, np.maximum((count - 1) // 2, 0)]
    hi = rows[r, np.maximum(count // 2, 0)]
    return np.where(count >= min_periods, (lo + hi) / 2, np.nan)


def _segments(values: np.ndarray, a: np.ndarray, b: np.ndarray, ufunc) -> np.ndarray:
    """``ufunc`` reduced over each ``values[a_i:b_i]`` (one pass with ``reduceat``; an
    empty window gives a value to be masked by its count)."""
    if len(a) == 0:
        return np.empty(0)
    if len(a) >= 8 and a.max() <= b.min():
        return _anchored(values, a, b, ufunc)
    padded = np.append(values, np.nan)  # so an index may equal len(values)
    idx = np.column_stack([np.minimum(a, len(values)), np.minimum(b, len(values))]).ravel()
    return ufunc.reduceat(padded, idx)[::2]


def _anchored(values: np.ndarray, a: np.ndarray, b: np.ndarray, ufunc) -> np.ndarray:
    """:func:`_segments` of windows that share a row ``c`` (every ``a_i <= c <= b_i``):
    each is ``[a_i, c)`` and ``[c, b_i)``, reduced by one running pass away from ``c`` each
    way, so the cost is the span's length, not the sum of the windows'. (Sums are added in
    another order than ``reduceat``'s: equal to rounding.)"""
    c, a0, b1 = int(b.min()), int(a.min()), int(b.max())
    empty = 0.0 if ufunc is np.add else np.nan
    left = np.append(ufunc.accumulate(values[a0:c][::-1])[::-1], empty)  # [j - a0]: values[j:c]
    right = np.concatenate([[empty], ufunc.accumulate(values[c:b1])])     # [j - c]: values[c:j]
    return ufunc(left[a - a0], right[b - c])


def _counts(finite: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    csum = np.concatenate([[0], np.cumsum(finite)])
    return csum[b] - csum[a]


def _rolling_extremes(values: np.ndarray, a: np.ndarray, b: np.ndarray, min_periods: int) -> tuple:
    """Maximum and minimum of the non-NaN values of each window; NaN below ``min_periods``."""
    if len(a) <= _FEW:  # each window on its own (the same values: extremes are exact)
        hi, lo = _filled(len(a), np.nan, float), _filled(len(a), np.nan, float)
        for i, (ai, bi) in enumerate(zip(a.tolist(), b.tolist())):
            w = values[ai:bi]
            if bi > ai and np.count_nonzero(np.isfinite(w)) >= min_periods:
                hi[i], lo[i] = np.fmax.reduce(w), np.fmin.reduce(w)
        return hi, lo
    few = _counts(np.isfinite(values), a, b) < min_periods
    hi = np.where(few, np.nan, _segments(values, a, b, np.fmax))
    lo = np.where(few, np.nan, _segments(values, a, b, np.fmin))
    return hi, lo


def _rolling_std(values: np.ndarray, a: np.ndarray, b: np.ndarray, min_periods: int) -> np.ndarray:
    """Sample standard deviation of the non-NaN values of each window; NaN below
    ``min_periods`` values. From the window sums of x and x^2 about the record's mean
    (which keeps the cancellation small: residuals of centimetres about a mean near zero)."""
    finite = np.isfinite(values)
    count = _counts(finite, a, b)
    centre = float(np.mean(values[finite])) if finite.any() else 0.0
    x = np.where(finite, values - centre, 0.0)
    s1 = _segments(x, a, b, np.add)
    s2 = _segments(x * x, a, b, np.add)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (s2 - s1 * s1 / np.maximum(count, 1)) / (count - 1)
        sd = np.sqrt(np.maximum(var, 0.0))
    return np.where((count >= min_periods) & (count > 1), sd, np.nan)


def spike_flags(r: np.ndarray, t: np.ndarray, suspect: float, fail: float, gap_limit: float,
                jump_ratio: float) -> np.ndarray:
    """:func:`monitor.quality.checks.spike_test` on plain arrays (residual [m], Unix seconds) [flags]."""
    if len(r) <= _SMALL:
        return _spike_flags_small(r, t, suspect, fail, gap_limit, jump_ratio)
    return spike_flags_on_arrays(r, t, suspect, fail, gap_limit, jump_ratio)


#: Rows up to which the spike test runs on Python floats (a steady pass re-judges a handful
#: of rows, where each of numpy's calls costs more than the arithmetic it does).
_SMALL = 24


def _sign(x: float) -> float:
    """``np.sign`` of one float (NaN for NaN)."""
    return x if x != x else float((x > 0) - (x < 0))


def _spike_flags_small(r: np.ndarray, t: np.ndarray, suspect: float, fail: float, gap_limit: float,
                       jump_ratio: float) -> np.ndarray:
    """:func:`spike_flags` of a few rows, one row at a time on Python floats: the same
    operations in the same order, so the same flags (``tests/test_qc_tests.py`` holds the
    two to each other on random records)."""
    rl, tl = r.tolist(), t.tolist()
    n = len(rl)
    nan = math.nan
    flags = [NOT_EVALUATED] * n
    if n >= 3:
        curv = [nan] + [rl[i] - 0.5 * (rl[i - 1] + rl[i + 1]) for i in range(1, n - 1)] + [nan]
        stat = [abs(c) for c in curv]
        sign = [_sign(c) for c in curv]
        for i in range(1, n - 1):
            st = stat[i]
            if not (0 < tl[i] - tl[i - 1] <= gap_limit and 0 < tl[i + 1] - tl[i] <= gap_limit and math.isfinite(st)):
                continue
            flags[i] = SUSPECT if st > suspect else PASS
            if st > fail:
                alone = not sign[i - 1] == sign[i] and not sign[i + 1] == sign[i]
                before = stat[i - 1] if stat[i - 1] == stat[i - 1] else 0.0  # fmax(x, 0) of x >= 0 or NaN
                after = stat[i + 1] if stat[i + 1] == stat[i + 1] else 0.0
                if alone and not before > st and not after > st:
                    flags[i] = FAIL
    good = [i for i in range(n) if math.isfinite(rl[i])]
    if len(good) >= 4:
        d = [rl[b] - rl[a] if tl[b] - tl[a] <= gap_limit else nan for a, b in zip(good[:-1], good[1:])]
        for j in range(1, len(d) - 1):
            before, step, after = d[j - 1], d[j], d[j + 1]
            if math.isfinite(before) and math.isfinite(after) and abs(step) > fail \
                    and abs(step) > jump_ratio * max(abs(before), abs(after)):
                flags[good[j + 1]] = FAIL
    return np.array(flags, dtype=np.int8)


def run_tests_tail(level: pd.Series, settings: QcSettings | None = None, predicted: Any = None,
                   other: pd.Series | None = None, now: float | None = None,
                   position: tuple[float, float] | None = None, start: int = 0) -> pd.DataFrame:
    """``monitor.quality.checks.run_tests(level, ...).iloc[start:]``, evaluated at those rows only.

    Parameters
    ----------
    level, settings, predicted, other, now, position
        As :func:`monitor.quality.checks.run_tests` (positions reported with the samples are not taken).
    start : int
        First row to evaluate; the rows before it are the context of the windows.

    Returns
    -------
    DataFrame with one int8 column per test of :data:`monitor.quality.checks.TESTS` and ``flag``,
    indexed like ``level.iloc[start:]``.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Tests 1-8, 10 and 11.
    """
    k = int(min(max(start, 0), len(level)))
    if len(level) - k <= TAIL_ROWS_MAX:
        try:
            return _tail(level, settings or QcSettings(), predicted, other, now, position, k)
        except _TooWide:
            pass
    return run_tests(level, settings, predicted, other, now, position).iloc[k:]


def _tail(level: pd.Series, s: QcSettings, predicted: Any, other: pd.Series | None, now: float | None,
          position: tuple[float, float] | None, k: int) -> pd.DataFrame:
    tn = utc_index(level.index).as_unit("ns").asi8
    v = level.to_numpy(dtype=float)
    p = None if predicted is None else np.asarray(predicted, dtype=float)
    table = tail_table(tn, v, p, s, now, position, k)
    n = len(v)
    if other is not None and not other.dropna().empty and n - k:
        dm = difference_at(level.iloc[k:], other, s.gap_limit)
        okm = np.isfinite(dm)
        multi = np.full(n - k, NOT_EVALUATED, dtype=np.int8)
        multi[okm] = PASS
        multi[okm & (np.abs(dm) > s.multi_suspect)] = SUSPECT
        table[:, _COL["multi"]] = np.where(table[:, _COL["syntax"]] == MISSING, NOT_EVALUATED, multi)
    frame = pd.DataFrame(table, index=level.index[k:], columns=list(TESTS))
    frame["flag"] = _aggregate(table)
    if other is not None:
        frame = confirm_tail(frame, level, v - p if p is not None else v, other, s, k)
    return frame


_IS_SYNTAX = np.array([c == "syntax" for c in TESTS])


def _median_step(t: np.ndarray) -> float:
    """``float(np.median(np.diff(t)))`` [s] of sorted times ``t`` [s] (no NaN), selected with
    ``np.partition`` as numpy's median does (the mean of the two middle steps for an even
    count, summed then halved as ``np.mean`` does), without ``np.median``'s overhead."""
    return _step_of(t)[0]


def _step_of(t: np.ndarray) -> tuple[float, bool]:
    """:func:`_median_step` of ``t`` and whether ``t`` keeps that one step throughout."""
    d = np.diff(t)
    lo = np.minimum.reduce(d)
    if lo == np.maximum.reduce(d):  # one step throughout (a steady feed): the median is it
        return float(lo), True
    half = len(d) // 2
    if len(d) % 2:
        return float(np.partition(d, half)[half]), False
    part = np.partition(d, (half - 1, half))
    return float((part[half - 1] + part[half]) / 2), False


def _step_kept(t: np.ndarray, memo: "ResidMemo | None") -> float:
    """:func:`_median_step` of ``t`` (two rows or more), from the memo when the record kept
    one step throughout at its last call and the rows added since keep it too (rows lost at
    the front leave such a record one step throughout)."""
    m = len(memo.ok) if memo is not None else 0
    u = memo.step if memo is not None else None
    if u is not None and 2 <= m <= len(t):
        if m == len(t) or (m + 1 == len(t) and t[m] - t[m - 1] == u) or bool((np.diff(t[m - 1:]) == u).all()):
            return u
    step, one = _step_of(t)
    if memo is not None:
        memo.step = step if one else None
    return step


def tail_table(tn: np.ndarray, v: np.ndarray, p: np.ndarray | None, s: QcSettings, now: float | None,
               position: tuple[float, float] | None, k: int, memo: "ResidMemo | None" = None) -> np.ndarray:
    """The single-sensor tests of rows ``k:`` on plain arrays (no co-located sensor: the
    ``multi`` column is 2), as :func:`run_tests_tail` computes them.

    Parameters
    ----------
    tn : array of int64
        Sample times [ns since 1970, UTC], sorted.
    v, p : array of float
        Levels and the predicted tide at those times [m] (``p`` None: no prediction).
    s, now, position
        As :func:`run_tests`.
    k : int
        First row evaluated; the rows before it are the windows' context.
    memo : ResidMemo, optional
        The residual outlier test's departures kept from the previous call on the same
        record (rows appended at the end, dropped at the front); updated in place.

    Returns
    -------
    array of int8, shape (n - k, len(TESTS))
    """
    t = tn / 1e9
    n = len(v)
    tail = slice(k, n)
    r = v - p if p is not None else v
    out: dict[str, np.ndarray] = {}

    # 1 timing/gap, 2 syntax, 3 location, 4 gross range, 5 expected range: per sample
    g = _filled(n - k, PASS, np.int8)
    if n - k:
        prev_t = t[k - 1:n - 1] if k > 0 else np.concatenate([[np.nan], t[:n - 1]])
        with np.errstate(invalid="ignore"):
            dt = t[tail] - prev_t
            g[dt > s.gap_limit] = MISSING
            g[dt <= 0] = FAIL
        if now is not None:
            g[t[tail] > now + s.future_tolerance] = FAIL
    out["gap"] = g
    finite = np.isfinite(v)
    out["syntax"] = np.where(finite[tail], PASS, MISSING).astype(np.int8)
    if position is None:
        out["location"] = _filled(n - k, NOT_EVALUATED, np.int8)
    else:
        lat, lon = float(position[0]), float(position[1])  # (one position: on floats)
        good = math.isfinite(lat) and math.isfinite(lon) and abs(lat) <= 90.0 and abs(lon) <= 180.0
        out["location"] = _filled(n - k, PASS if good else FAIL, np.int8)
    gross = _filled(n, PASS, np.int8)
    if s.gross_suspect_min is not None:
        gross[v < s.gross_suspect_min] = SUSPECT
    if s.gross_suspect_max is not None:
        gross[v > s.gross_suspect_max] = SUSPECT
    gross[(v < s.gross_fail_min) | (v > s.gross_fail_max)] = FAIL
    gross[~finite] = NOT_EVALUATED
    out["gross"] = gross[tail]
    if p is None:
        out["expected"] = _filled(n - k, NOT_EVALUATED, np.int8)
    else:
        d = v[tail] - p[tail]
        e = np.where(np.abs(d) > s.expected_margin, SUSPECT, PASS)
        out["expected"] = np.where(np.isfinite(d), e, NOT_EVALUATED).astype(np.int8)

    # 6 spike (on the residual without gross failures): over the whole context, cheap and
    # needed there: its failures are left out of the windows of the tests below
    gross_fail = gross == FAIL
    rc = np.where(gross_fail, np.nan, r)
    # (the reach matters only after the record lost rows at its front)
    spike = _spike_all(rc, t, s, memo, _reach(t, tn, k, s) if memo is not None and memo.lost and n - k else 0)
    out["spike"] = spike[tail]
    bad = gross_fail | (spike == FAIL)
    ok = np.isfinite(rc) & ~bad
    # Rows whose backward windows are as at the memo's last call: before the first row whose
    # usability changed (a spike's verdict waits for the next sample) or that is new.
    keep = memo.unchanged_rows(ok) if memo is not None else 0
    # a kept row's windows must not have reached rows the record has since lost (before t[0])
    if memo is not None and memo.dropped and not (
            n - k and k > 0 and t[k - 1] - s.roc_window >= t[0]
            and t[k] - max(s.atten_window, max(s.flat_suspect_after, s.flat_fail_after) + s.gap_limit) >= t[0]):
        keep = 0

    # 7 rate of change: against the last usable sample, limit from the previous window's sd
    roc = _kept(memo, "roc", n, k, keep)
    todo = (roc == -1).nonzero()[0] + k
    if len(todo):
        roc[todo - k] = _roc_rows(rc, t, tn, ok, todo, s)
    out["roc"] = _remember(memo, "roc", roc, n, k)

    # 8 flat line, on the level (its windows hold values only: every row kept)
    flat = _kept(memo, "flat", n, k, len(memo.ok) if memo is not None and keep else 0)
    todo = (flat == -1).nonzero()[0] + k
    if len(todo):
        flat[todo - k] = _flat_rows(v, t, tn, todo, s)
    out["flat"] = _remember(memo, "flat", flat, n, k)

    # 11 (neighbour) against the co-located sensor: by the caller
    out["multi"] = _filled(n - k, NOT_EVALUATED, np.int8)

    # 10 attenuated signal: observed range over the last tidal day against the predicted
    atten = _filled(n - k, NOT_EVALUATED, np.int8)
    if p is not None and n and n - k:
        # (ok: rc = v - p finite, no gross or spike failure -- v and p finite, as the ranges want)
        obs_range, pred_range, count = _atten_ranges(v, p, ok, tn, k, s, memo, keep)
        step = _step_kept(t, memo) if n > 1 else s.atten_window
        span_ok = (t[tail] - t[0]) >= s.atten_window - step
        covered = span_ok & (count * step >= 0.8 * s.atten_window)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = obs_range / pred_range
            ev = covered & np.isfinite(ratio) & (pred_range >= s.atten_min_range) & finite[tail]
            atten[ev] = PASS
            atten[ev & (ratio < s.atten_suspect)] = SUSPECT
            atten[ev & (ratio < s.atten_fail)] = FAIL
    out["atten"] = atten

    # residual outlier: departure from the centred median against the centred noise
    out["resid"] = _resid_tail(rc, t, tn, ok, k, s, memo, keep)
    if memo is not None:
        memo.ok = ok

    missing = out["syntax"] == MISSING
    if n - k == 0:
        return np.zeros((0, len(TESTS)), np.int8)
    table = np.empty((n - k, len(TESTS)), dtype=np.int8)
    for j, c in enumerate(TESTS):
        table[:, j] = out[c]
    if missing.any():  # a missing value: every test but syntax says not evaluated
        table[missing] = np.where(_IS_SYNTAX, MISSING, NOT_EVALUATED)
    return table


def _reach(t: np.ndarray, tn: np.ndarray, k: int, s: QcSettings) -> int:
    """The first row any window of the rows ``k:`` may use (the rate of change's sd, the
    attenuation ranges, the residual outlier test's departures and noise): the rows before
    it decide none of their flags. ``t`` [s], ``tn`` [ns], sorted."""
    back = t[k - 1] if k > 0 else t[k]
    # (the rate of change also looks for the last usable row before each: one further back
    # than the gap limit leaves the row unjudged whichever it is)
    # (the flat line runs on the levels, whatever the spike test says: no term here)
    earliest = min(back - s.roc_window, t[k] - s.gap_limit, t[k] - s.atten_window,
                   t[_resid_rows(tn, k, s)[1]] - s.resid_window / 2)
    return int(t.searchsorted(earliest, side="left"))


def _spike_all(rc: np.ndarray, t: np.ndarray, s: QcSettings, memo: "ResidMemo | None", reach: int = 0) -> np.ndarray:
    """:func:`spike_flags` over the whole record; with a memo, only the rows whose
    neighbours changed are evaluated: those within three rows (and three finite rows) of
    the newest rows held before, and of the record's first row when it lost rows -- unless
    every row whose flag that loss may change lies before ``reach`` (:func:`_reach`: no
    window of the rows judged uses them; their flags are then left as held)."""
    n = len(rc)
    held = None if memo is None else memo.spike
    if held is None or len(held) > n or len(held) < 8:
        sp = spike_flags(rc, t, s.spike_suspect, s.spike_fail, s.gap_limit, s.jump_ratio)
    else:
        m = len(held)
        # a row's flag depends on two rows either side and on two finite rows before and one after
        second = _finite_back(rc, m, 2)
        last = min(m - 3, second if second >= 0 else 0)
        first = 0
        if memo.lost:  # the record lost rows at its front: its first rows lost neighbours
            third = _finite_ahead(rc, 3)
            first = max(3, third + 1) if third >= 0 else n
            if first <= reach:
                first = 0  # none of them used by a window of the rows judged
        if first + 8 >= last:
            sp = spike_flags(rc, t, s.spike_suspect, s.spike_fail, s.gap_limit, s.jump_ratio)
        else:
            sp = held.copy() if m == n else np.concatenate([held, np.zeros(n - m, dtype=held.dtype)])
            if first:
                fifth = _finite_ahead(rc, 5)
                end = max(first + 3, fifth + 1 if fifth >= 0 else n)
                sp[:first] = spike_flags(rc[:end], t[:end], s.spike_suspect, s.spike_fail, s.gap_limit,
                                         s.jump_ratio)[:first]
            third = _finite_back(rc, last, 3)
            start = max(0, min(last - 3, third if third >= 0 else 0))
            sp[last:] = spike_flags(rc[start:], t[start:], s.spike_suspect, s.spike_fail, s.gap_limit,
                                    s.jump_ratio)[last - start:]
    if memo is not None:
        memo.spike, memo.lost = sp, False
    return sp


def _finite_back(values: np.ndarray, end: int, count: int) -> int:
    """The row of the ``count``-th finite value before row ``end`` counting back (1: the
    last one), -1 when there are fewer; looks at the few rows before ``end`` first."""
    lo = max(0, end - 4 * count)
    idx = np.isfinite(values[lo:end]).nonzero()[0]
    if len(idx) < count and lo:
        lo, idx = 0, np.isfinite(values[:end]).nonzero()[0]
    return int(idx[-count]) + lo if len(idx) >= count else -1


def _finite_ahead(values: np.ndarray, count: int) -> int:
    """The row of the ``count``-th finite value from the first row on (1: the first one),
    -1 when there are fewer; looks at the first few rows first."""
    idx = np.isfinite(values[:4 * count]).nonzero()[0]
    if len(idx) < count and len(values) > 4 * count:
        idx = np.isfinite(values).nonzero()[0]
    return int(idx[count - 1]) if len(idx) >= count else -1


def _roc_rows(rc: np.ndarray, t: np.ndarray, tn: np.ndarray, ok: np.ndarray, rows: np.ndarray,
              s: QcSettings) -> np.ndarray:
    """The rate-of-change flags at ``rows``: the change from the last usable sample before
    each against the sd of the usable residual over the window up to that sample's
    predecessor."""
    n = len(rc)
    out = _filled(len(rows), NOT_EVALUATED, np.int8)
    if n < 2:
        return out
    if len(rows) <= _FEW:
        return _roc_few(rc, t, tn, ok, rows, s)
    pos = np.where(ok, np.arange(n), -1)
    last = np.maximum.accumulate(pos)
    prev = np.concatenate([[-1], last[:-1]])[rows]
    has_prev = prev >= 0
    pi = np.where(has_prev, prev, 0)
    dv = rc[rows] - rc[pi]
    dtt = t[rows] - t[pi]
    with np.errstate(invalid="ignore"):
        evaluated = has_prev & (dtt > 0) & (dtt <= s.gap_limit) & np.isfinite(rc[rows])
    # the sd at the previous row (of the samples up to it)
    j = rows - 1
    sd = _filled(len(rows), np.nan, float)
    has = j >= 0
    if has.any():
        a, b = _bounds(tn, tn[j[has]], _ns(s.roc_window), 0)
        sd[has] = _rolling_std(np.where(ok, rc, np.nan), a, b, 10)
    limit = np.maximum(np.fmax(s.roc_n_dev * sd, 0.0), s.roc_floor)  # NaN: the floor
    out[evaluated] = PASS
    with np.errstate(invalid="ignore"):
        out[evaluated & (np.abs(dv) > limit)] = SUSPECT
    return out


_FEW = 4  # rows a steady pass recomputes: each on its own, not with whole-record arrays


def _roc_few(rc: np.ndarray, t: np.ndarray, tn: np.ndarray, ok: np.ndarray, rows: np.ndarray,
             s: QcSettings) -> np.ndarray:
    """:func:`_roc_rows` at a few rows, each from its own window (the sd by numpy's two-pass
    formula: equal to the window sums' to rounding)."""
    out = _filled(len(rows), NOT_EVALUATED, np.int8)
    width = _ns(s.roc_window)
    for i, row in enumerate(rows.tolist()):
        usable = ok[:row].nonzero()[0]
        if not len(usable) or row == 0:
            continue
        prev = int(usable[-1])
        dtt = t[row] - t[prev]
        if not (0 < dtt <= s.gap_limit and np.isfinite(rc[row])):
            continue
        a = int(tn.searchsorted(tn[row - 1] - width, side="right"))
        w = rc[a:row][ok[a:row]]
        sd = _sample_std(w) if len(w) >= 10 else math.nan
        limit = max(s.roc_n_dev * sd if math.isfinite(sd) else 0.0, s.roc_floor)
        out[i] = SUSPECT if abs(rc[row] - rc[prev]) > limit else PASS
    return out


def _sample_std(w: np.ndarray) -> float:
    """``np.std(w, ddof=1)`` of a 1-d float array, its two passes written out (the same sums
    in the same order, so the same float) without its general-case overhead."""
    x = w - np.add.reduce(w) / len(w)
    return math.sqrt(np.add.reduce(x * x) / (len(w) - 1))


def _flat_rows(v: np.ndarray, t: np.ndarray, tn: np.ndarray, rows: np.ndarray, s: QcSettings) -> np.ndarray:
    """The flat-line flags at ``rows``."""
    if len(rows) == 1:  # a steady pass's one new row
        return np.array([_flat_row(v, t, tn, int(rows[0]), s)], dtype=np.int8)
    n = len(v)
    out = _filled(len(rows), PASS, np.int8)
    tt, vt = t[rows], v[rows]
    for duration, code in ((s.flat_suspect_after, SUSPECT), (s.flat_fail_after, FAIL)):
        a, b = _bounds(tn, tn[rows], _ns(duration), 0, lo_closed=True)
        vmax, vmin = _rolling_extremes(v, a, b, 2)
        first = t.searchsorted(tt - duration, side="left")
        exact = t[np.minimum(first, n - 1)] == tt - duration
        before = t[np.maximum(first - 1, 0)]
        covered = exact | ((first > 0) & (before >= tt - duration - s.gap_limit))
        with np.errstate(invalid="ignore"):
            is_flat = (vmax - vt < s.flat_tolerance) & (vt - vmin < s.flat_tolerance) & covered
        out[is_flat] = code
    out[~np.isfinite(vt)] = NOT_EVALUATED
    return out


def _flat_row(v: np.ndarray, t: np.ndarray, tn: np.ndarray, row: int, s: QcSettings) -> int:
    """:func:`_flat_rows` at one row, on scalars where the whole-array form spends a numpy
    call on each one-element step (the same comparisons in the same order)."""
    vt, tt = float(v[row]), float(t[row])
    if not math.isfinite(vt):
        return NOT_EVALUATED
    n, out = len(v), PASS
    b = int(tn.searchsorted(tn[row], side="right"))
    for duration, code in ((s.flat_suspect_after, SUSPECT), (s.flat_fail_after, FAIL)):
        w = v[int(tn.searchsorted(tn[row] - _ns(duration), side="left")):b]
        if np.count_nonzero(np.isfinite(w)) < 2:
            continue
        first = int(t.searchsorted(tt - duration, side="left"))
        covered = t[min(first, n - 1)] == tt - duration or (first > 0 and t[first - 1] >= tt - duration - s.gap_limit)
        if np.fmax.reduce(w) - vt < s.flat_tolerance and vt - np.fmin.reduce(w) < s.flat_tolerance and covered:
            out = code
    return out


def _atten_ranges(v: np.ndarray, p: np.ndarray, oka: np.ndarray, tn: np.ndarray, k: int, s: QcSettings,
                  memo: "ResidMemo | None", keep: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Observed and predicted range [m] and the usable samples counted over each tail row's
    attenuation window (``(t - atten_window, t]``); rows before ``keep`` from the memo.
    ``oka``: the samples the ranges take (level and prediction finite, no gross or spike
    failure)."""
    n = len(v)
    # (the three per row, as one memo entry: observed range, predicted range, count)
    got = _kept(memo, "atten", n, k, keep, float, columns=3)
    todo = np.isnan(got[:, 2]).nonzero()[0] + k
    if 0 < len(todo) <= _FEW:  # each window on its own
        a, b = _bounds(tn, tn[todo], _ns(s.atten_window), 0)
        for row, ai, bi in zip(todo.tolist(), a.tolist(), b.tolist()):
            w = oka[ai:bi]
            count = int(np.count_nonzero(w))
            got[row - k, 2] = float(count)
            if count >= 2:
                ov, pv = v[ai:bi][w], p[ai:bi][w]
                got[row - k, 0] = np.maximum.reduce(ov) - np.minimum.reduce(ov)
                got[row - k, 1] = np.maximum.reduce(pv) - np.minimum.reduce(pv)
    elif len(todo):
        a, b = _bounds(tn, tn[todo], _ns(s.atten_window), 0)
        ohi, olo = _rolling_extremes(np.where(oka, v, np.nan), a, b, 2)
        phi, plo = _rolling_extremes(np.where(oka, p, np.nan), a, b, 2)
        csum = np.concatenate([[0], np.cumsum(oka)])
        got[todo - k, 0], got[todo - k, 1] = ohi - olo, phi - plo
        got[todo - k, 2] = csum[b] - csum[a]
    _remember(memo, "atten", got, n, k)
    return got[:, 0], got[:, 1], got[:, 2]


def _kept(memo: "ResidMemo | None", name: str, n: int, k: int, keep: int, kind: type = np.int8,
          columns: int = 0) -> np.ndarray:
    """Rows ``k:`` of a memo's per-row array (``columns`` > 0: that many values a row, as
    columns of a 2-D array), those from ``keep`` on (and any never computed) marked to do:
    -1 for flags, NaN for values."""
    blank = -1 if kind is np.int8 else np.nan
    out = _filled((n - k, columns) if columns else n - k, blank, kind)
    if memo is not None and name in memo.rows:
        k0, have = memo.rows[name]  # rows k0, k0 + 1, ... as at the last call
        lo, hi = max(k, k0), min(keep, k0 + len(have), n)
        if hi > lo:
            out[lo - k:hi - k] = have[lo - k0:hi - k0]
    return out


def _remember(memo: "ResidMemo | None", name: str, tail: np.ndarray, n: int, k: int) -> np.ndarray:
    """Keep rows ``k:`` of a per-row array in the memo (rows before ``k`` are not needed
    again: the tail only moves forward while the memo lives)."""
    if memo is not None:
        memo.rows[name] = (k, tail.copy())
    return tail


class ResidMemo:
    """What :func:`tail_table` keeps between calls on a record that grows at its end (and
    loses rows at its front): which rows the windows could use at the last call, each row's
    departure from its centred median (the residual outlier test), and the per-row results
    of the tests whose windows look back only (rate of change, flat line, attenuation
    ranges), and the record's step while it keeps one step throughout. A row's result is
    kept while no row of its windows changed: rows before the first row whose usability
    changed or that is new (for the flat line, whose windows hold values only, every row
    held before).

    The caller drops the front with :meth:`drop`; :func:`tail_table` does the rest.
    """

    def __init__(self) -> None:
        self.d = np.empty(0)              # departures [m], NaN where not computed
        self.ok = np.empty(0, dtype=bool)  # the rows the windows could use, at the last call
        self.start = 0                    # departures valid from this row on
        self.rows: dict[str, tuple] = {}  # test -> (first row, per-row results of the rows judged)
        self.dropped = False              # whether the record has lost rows at its front
        self.lost = False                 # ... since the last call
        self.spike: np.ndarray | None = None  # spike flags of every row at the last call
        self.step: float | None = None    # the record's one step [s] at the last call (None: not one)

    def drop(self, rows: int) -> None:
        """Forget the first ``rows`` rows (the record lost them at its front)."""
        if rows:
            self.dropped = self.lost = True
            if self.spike is not None:
                self.spike = self.spike[rows:]
            self.d, self.ok = self.d[rows:], self.ok[rows:]
            self.start = max(self.start - rows, 0)
            self.rows = {name: (k0 - rows, a) for name, (k0, a) in self.rows.items()}

    def keep_rows_from(self, row: int) -> None:
        """Forget the per-row results of rows before ``row`` (no later call judges them)."""
        for name, (k0, a) in list(self.rows.items()):
            if row > k0:
                self.rows[name] = (row, a[row - k0:].copy())

    def unchanged_rows(self, ok: np.ndarray) -> int:
        """How many leading rows are as at the last call: up to the first row whose
        usability changed, or the first new one (0 when the memo does not fit)."""
        m = len(self.ok)
        if m > len(ok):
            return 0
        changed = (self.ok != ok[:m]).nonzero()[0]
        return int(changed[0]) if changed.size else m


def _sliding_median(values: np.ndarray, a: np.ndarray, b: np.ndarray, min_periods: int) -> np.ndarray:
    """:func:`_rolling_median` for windows ``[a_i, b_i)`` whose ends never move back, kept
    as one sorted list slid along (each value enters and leaves it once)."""
    out = _filled(len(a), np.nan, float)
    if len(a) == 0:
        return out
    base = int(a[0])  # the windows' span only: a and b never move back
    values = values[base:int(b[-1])]
    vals = values.tolist()
    finite = np.isfinite(values)
    fin = finite.tolist()
    lo = hi = -1
    win: list[float] = []
    for i, (ai, bi) in enumerate(zip((a - base).tolist(), (b - base).tolist())):
        if ai >= hi:  # no overlap with the window before: sort afresh
            win = np.sort(values[ai:bi][finite[ai:bi]]).tolist()
            hi = bi
        else:
            for j in range(hi, bi):
                if fin[j]:
                    _bisect.insort(win, vals[j])
            hi = max(hi, bi)
            for j in range(lo, ai):
                if fin[j]:
                    del win[_bisect.bisect_left(win, vals[j])]
        lo = ai
        c = len(win)
        if c >= min_periods and c:
            out[i] = (win[(c - 1) // 2] + win[c // 2]) / 2
    return out


def _departures(rc: np.ndarray, clean: np.ndarray, tn: np.ndarray, j0: int, half: int,
                memo: ResidMemo | None, keep: int) -> np.ndarray:
    """``rc - median(clean over the centred window)`` at rows ``j0:`` (NaN before), from the
    memo where no row of a window changed since it was computed (``keep``: see
    :meth:`ResidMemo.unchanged_rows`)."""
    n = len(rc)
    d = _filled(n, np.nan, float)
    first = j0
    # a window reaching the first row may have held rows the record has since lost
    front = int(tn.searchsorted(tn[0] + half, side="left")) if n else 0
    if memo is not None and len(memo.ok) <= n and memo.start <= j0 and j0 >= front:
        m = len(memo.ok)
        c0 = keep
        if c0 < n:
            # rows whose window reaches a changed or a new row (the window is (t - half, t + half])
            first = max(j0, int(tn.searchsorted(tn[c0] - half, side="left")) - 1)
        else:
            first = n
        first = min(first, m)
        d[j0:first] = memo.d[j0:first]
    rows = np.arange(first, n)
    if len(rows):
        a, b = _bounds(tn, tn[rows], half, half)
        d[rows] = rc[rows] - _rolling_median(clean, a, b, 5)
    if memo is not None:
        memo.d, memo.start = d, j0
    return d


def _noise_where_needed(absd: np.ndarray, size: np.ndarray, tn: np.ndarray, e0: int, half: int,
                        limits: tuple[tuple[float, float], tuple[float, float]], k: int,
                        slide: bool) -> np.ndarray:
    """The residual outlier test's robust sigma (1.4826 times the median of ``absd`` over
    the centred noise window, NaN below 10 values) at rows ``e0:`` [m], exact only where
    its exact value could change a flag; elsewhere a value that gives the same flags.

    A row is judged against ``max(k_s * sigma, floor_s)`` and ``max(k_f * sigma, floor_f)``
    (``limits``: the suspect and the fail multiple and floor [m]); the rows before ``k``
    only against the fail limit (they are judged for the burst rule alone). So:

    - a row whose departure ``size`` [m] is within the floors passes whatever sigma is:
      sigma 0.0 where the window holds enough values (the limits are then the floors: the
      same flags) and NaN where it does not (not evaluated, as the exact median gives). On
      a calm day that is every row, and the 25 h median is not taken at all;
    - with ``slide`` (windows about sorted times: their ends never move back), the other
      rows' medians are first bounded by order statistics of the part every window shares
      (:func:`_median_bounds`); where the limits at both bounds give the same flags, the
      lower bound stands in for sigma. The rest take the exact median, one sorted list
      slid along (:func:`_sliding_median`).
    """
    n = len(absd)
    sigma = _filled(n, np.nan, float)
    rows = np.arange(e0, n)
    if not len(rows):
        return sigma
    a, b = _bounds(tn, tn[rows], half, half)
    # (windows about sorted times: a and b never move back) Each window's values, NaN
    # included, less the NaN of all of them: when that leaves 10 in every window, the
    # counts themselves are not needed (``width`` stands in for them as an upper bound)
    width = b - a
    span = absd[int(a[0]):int(b[-1])]
    if int(width.min()) - (len(span) - np.count_nonzero(span == span)) >= 10:
        count, enough = width, np.ones(len(rows), dtype=bool)
    else:
        count = _counts(np.isfinite(absd), a, b)
        enough = count >= 10
    floor = np.where(rows < k, limits[1][1], min(limits[0][1], limits[1][1]))
    with np.errstate(invalid="ignore"):
        need = enough & (size[rows] > floor)
    sigma[rows[enough & ~need]] = 0.0
    if not need.any():
        return sigma
    a, b, at, count = a[need], b[need], rows[need], count[need]
    if not slide:
        sigma[at] = 1.4826 * _rolling_median(absd, a, b, 10)
        return sigma
    lo, hi = _median_bounds(absd, a, b, count)  # (an upper bound on the counts will do)
    sig_lo, sig_hi = 1.4826 * lo, 1.4826 * hi
    size_at = size[at]
    same = np.ones(len(at), dtype=bool)
    with np.errstate(invalid="ignore"):
        for j, (mult, fl) in enumerate(limits):
            agree = (size_at > max(mult * sig_lo, fl)) == (size_at > max(mult * sig_hi, fl))
            same &= agree if j else (agree | (at < k))
    sigma[at[same]] = sig_lo
    if not same.all():
        sigma[at[~same]] = 1.4826 * _sliding_median(absd, a[~same], b[~same], 10)
    return sigma


def _median_bounds(values: np.ndarray, a: np.ndarray, b: np.ndarray, count: np.ndarray) -> tuple[float, float]:
    """Bounds on the median of the non-NaN values of every window ``[a_i, b_i)`` (``count``
    of them, or more: the bounds only widen; ``values`` not negative), from the part all
    windows share.

    The shared part ``[max a, min b)`` holds ``c`` finite values, sorted ``S``; a window
    holds ``x = count - c`` more. Its ``r``-th smallest value lies between ``S[r - x]``
    (at least ``r - x + 1`` values of ``S`` are at or below it) and ``S[r]`` (the ``r + 1``
    smallest of ``S`` are in the window). Its median, the mean of the ranks
    ``(count - 1) // 2`` and ``count // 2``, lies between those ranks' bounds (rounding is
    monotone), and all the windows' between the lowest and the highest of them, which
    the window with the most values gives: ``S[(m - 1) // 2 - (m - c)]`` and ``S[m // 2]``
    for ``m = max(count)`` (a larger ``m`` moves both ranks outwards). Ranks outside
    ``S``: 0 and infinity.
    """
    start, stop = int(a.max()), int(b.min())
    core = values[start:stop] if start < stop else values[:0]
    s = np.sort(core[np.isfinite(core)])
    c, m = len(s), int(count.max())
    below, above = (m - 1) // 2 - (m - c), m // 2
    return (float(s[below]) if below >= 0 else 0.0), (float(s[above]) if above < c else math.inf)


def _resid_rows(tn: np.ndarray, k: int, s: QcSettings) -> tuple[int, int]:
    """The rows the residual outlier test of rows ``k:`` judges from (``e0``) and takes
    departures from (``j0``); ``tn`` [ns], sorted, ``k < len(tn)``."""
    # Rows judged: the tail, and for the burst rule back to the last row more than one
    # burst before it (e0): a run of far departures through e0 that reaches the tail is too
    # long to fail, whatever came before e0.
    e0 = max(int(tn.searchsorted(tn[k] - _ns(s.resid_burst), side="left")) - 1, 0)
    # rows whose departure enters the noise window of a row judged
    j0 = max(0, int(tn.searchsorted(tn[e0] - _ns(s.resid_noise_window) // 2, side="left")) - 1)
    return e0, j0


def _resid_tail(rc: np.ndarray, t: np.ndarray, tn: np.ndarray, ok: np.ndarray, k: int, s: QcSettings,
                memo: ResidMemo | None = None, keep: int = 0) -> np.ndarray:
    """:func:`monitor.quality.checks.residual_outlier_test` at rows ``k:`` (``rc`` with gross failures
    as NaN, ``ok`` the samples its windows may use; ``memo`` see :class:`ResidMemo`)."""
    n = len(rc)
    flags = _filled(n - k, NOT_EVALUATED, np.int8)
    if n - k == 0:
        return flags
    half_noise = _ns(s.resid_noise_window) // 2
    half = _ns(s.resid_window) // 2
    e0, j0 = _resid_rows(tn, k, s)
    clean = np.where(ok, rc, np.nan)
    d = _departures(rc, clean, tn, j0, half, memo, keep)
    size = np.abs(d)
    absd = np.where(ok, size, np.nan)
    limits = ((s.resid_suspect_k, s.resid_suspect_floor), (s.resid_fail_k, s.resid_fail_floor))
    sigma = _noise_where_needed(absd, size, tn, e0, half_noise, limits, k, memo is not None)
    # rows e0: only (sigma is NaN before e0: nothing there is evaluated)
    de, se = size[e0:], sigma[e0:]
    part = _filled(n - e0, NOT_EVALUATED, np.int8)
    ev = np.isfinite(de) & np.isfinite(se)
    part[ev] = PASS
    with np.errstate(invalid="ignore"):
        part[ev & (de > np.maximum(s.resid_suspect_k * se, s.resid_suspect_floor))] = SUSPECT
        far_e = ev & (de > np.maximum(s.resid_fail_k * se, s.resid_fail_floor))
    part[far_e] = SUSPECT
    far = np.zeros(n, dtype=bool)
    far[e0:] = far_e
    # A run seen from e0 may have begun before it; one that reaches the tail spans more
    # than a burst from e0 anyway, so it is judged as in the whole record.
    part[_bursts(rc, t, far, s.resid_burst, s.resid_fail_floor, s.jump_ratio, s.gap_limit)[e0:]] = FAIL
    return part[k - e0:]


def confirm_tail(frame: pd.DataFrame, level: pd.Series, r: np.ndarray, other: pd.Series | None,
                 s: QcSettings, k: int) -> pd.DataFrame:
    """:func:`monitor.quality.checks._confirm` at rows ``k:``: ``frame`` holds those rows' tests,
    ``level`` and ``r`` (level minus prediction [m]) the whole record, ``other`` the other
    sensor's levels that may confirm a jump (within reach of the rows ``k:`` at least)."""
    if other is None:
        return frame
    other = other.dropna()
    table = frame[list(TESTS)].to_numpy(dtype=np.int8)
    confirmed = confirm_on_arrays(table, index_seconds(level.index), level.to_numpy(dtype=float), r,
                                  index_seconds(other.index), other.to_numpy(dtype=float), s, k)
    if confirmed is table:
        return frame
    frame = frame.copy()
    frame["spike"] = confirmed[:, _COL["spike"]]
    frame["flag"] = aggregate_flags(frame)
    return frame


def confirm_on_arrays(table: np.ndarray, t: np.ndarray, v: np.ndarray, r: np.ndarray, to: np.ndarray,
                      vo: np.ndarray, s: QcSettings, k: int) -> np.ndarray:
    """:func:`confirm_tail` on plain arrays: ``table`` the tests of rows ``k:`` (columns
    :data:`TESTS`), ``t`` [s], ``v`` and ``r`` (level, level minus prediction [m]) the whole
    record, ``to``, ``vo`` the other sensor's samples that may confirm a jump (no NaN).
    Returns ``table`` itself when nothing changes, else a copy with the confirmed jumps
    suspect."""
    n = len(v)
    f = table[:, _COL["spike"]]
    if len(to) == 0 or n < 3 or not (f == FAIL).any():  # (only a failed spike may be confirmed)
        return table
    # difference and its curvature one row either side of the tail
    j0 = max(0, k - 1)
    dd = difference_on_arrays(t[j0:], v[j0:], to, vo, s.gap_limit)
    curv = np.full(len(dd), np.nan)
    curv[1:-1] = dd[1:-1] - 0.5 * (dd[:-2] + dd[2:])
    step = np.concatenate([[np.nan], np.diff(dd)])
    with np.errstate(invalid="ignore"):
        same = np.isfinite(curv) & np.isfinite(step) & (np.abs(curv) < s.spike_suspect) & \
            (np.abs(step) < s.spike_suspect)
    same = same[k - j0:]
    if not (same & (f == FAIL)).any():
        return table
    rc = np.array(r, dtype=float)
    rc[k:][table[:, _COL["gross"]] == FAIL] = np.nan
    # gross failures before the tail: recomputed (they are per sample)
    rc[:k][(v[:k] < s.gross_fail_min) | (v[:k] > s.gross_fail_max)] = np.nan
    jumped = jump_flags(rc, t, s.spike_fail, s.jump_ratio, s.gap_limit)[k:]
    real = same & jumped & (f == FAIL)
    if not real.any():
        return table
    table = table.copy()
    table[real, _COL["spike"]] = SUSPECT
    return table
