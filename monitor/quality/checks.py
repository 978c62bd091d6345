"""Per-sample quality control of water-level records on the QARTOD flag scale.

Flags (U.S. IOOS QARTOD): 1 pass, 2 not evaluated, 3 suspect, 4 fail, 9 missing.
Each test is a pure, vectorised function of a pandas Series indexed by a UTC
``DatetimeIndex`` (a naive index is taken as UTC) and returns an ``int8`` Series of
flags on the same index. :func:`run_tests` runs them all for one sensor and adds the
aggregate (the worst evaluated flag). :mod:`monitor.quality.tail` gives the same flags at
the newest rows only; the glue to the store (:func:`~monitor.quality.records.ensure_qc_schema`,
:func:`~monitor.quality.records.run_station_qc`, overrides, staff readings) is
:mod:`monitor.quality.records`.

Tests are cited by the numbers of the QARTOD water-level manual v2.1: 1 timing/gap,
2 syntax, 3 location, 4 gross range, 5 climatology (here: the expected range about the
predicted tide), 6 spike, 7 rate of change, 8 flat line, 10 attenuated signal and 11
neighbour (applied here to a co-located backup sensor: "multi"). The residual outlier test
is our own addition. Test 9 (multi-variate, against other variables) is not made.

Tests that look for sudden changes (spike, rate of change, residual outlier) work on
the *residual* (observed minus predicted tide) so the tide's own curvature is never
taken for a fault, and a storm surge -- a smooth rise over hours -- passes. Real fast
water is never failed: a seiche or meteotsunami moves the level by decimetres a minute,
but coherently, over consecutive samples (and in the backup sensor too). Only what no
sea can do fails: a lone sample off its neighbours (a spike), a one-sample jump that the
changes either side do not share (unless the backup sensor shows the same step: a bore),
a short burst entered and left by such jumps. The rate-of-change test
gives no fail flag (QARTOD v2.1: "no fail flag is identified for this test").

Samples flagged fail (4) or missing (9) are kept in the store but never used for
alerts, fits or statistics: select with :func:`usable_mask` / :data:`USABLE_SQL`.
Suspect (3) samples stay usable but are marked.

The output is an automated, unofficial aid for gauge technicians: official warnings
and local emergency authorities come first; defer to local codes and licensed practice.

References
----------
U.S. IOOS (2021). Manual for Real-Time Quality Control of Water Level Data (QARTOD),
version 2.1. IOC (1985-2016). Manual on Sea Level Measurement and Interpretation,
Vols I-V. IOC Manuals and Guides 14.
"""
from __future__ import annotations

import difflib
import math
import warnings
from dataclasses import dataclass, fields
from typing import Any, Iterable, Mapping

import numpy as np
import pandas as pd

from predictor.timeutil import index_seconds, silences, utc_index
from predictor.timeutil import parse_duration as _parse_duration

PASS, NOT_EVALUATED, SUSPECT, FAIL, MISSING = 1, 2, 3, 4, 9
FLAG_NAMES = {PASS: "pass", NOT_EVALUATED: "not evaluated", SUSPECT: "suspect", FAIL: "fail", MISSING: "missing"}
#: Test names, in order; also the columns of the ``qc_tests`` table.
TESTS = ("gap", "syntax", "location", "gross", "expected", "spike", "roc", "flat", "multi", "atten", "resid")
#: The QARTOD water-level manual v2.1 number of each test (None: our own addition). "multi",
#: primary against a co-located backup, is the neighbour test's idea (Test 11).
#: Column of each test in a table of flags whose columns are :data:`TESTS` in order.
_COL = {c: i for i, c in enumerate(TESTS)}
#: A row's flags packed 4 bits each (QARTOD flags are 1..9), and the same packing in SQL over
#: ``qc_tests``: comparing stored rows moves two integers per sample, not ten.
PACK = 16 ** np.arange(len(TESTS), dtype=np.int64)
PACKED_SQL = " + ".join(f"{16 ** i} * {c}" for i, c in enumerate(TESTS))
QARTOD_NUMBER = {"gap": 1, "syntax": 2, "location": 3, "gross": 4, "expected": 5, "spike": 6, "roc": 7,
                 "flat": 8, "multi": 11, "atten": 10, "resid": None}
#: Flags a sample may carry and still be used for alerts, fits and statistics.
USABLE_FLAGS = (PASS, NOT_EVALUATED, SUSPECT)
#: The same as an SQL condition on ``observations.flag``.
USABLE_SQL = "flag IN (1, 2, 3)"
#: Flags a technician may set by hand.
OVERRIDE_FLAGS = (PASS, SUSPECT, FAIL)


# --------------------------------------------------------------------------- settings

@dataclass(frozen=True)
class QcSettings:
    """Thresholds of every test and equipment-fault limit, per station.

    Levels in metres, durations in seconds (written in TOML as ``"30min"``, ``"25h"``
    or a number of seconds). The source of each default is given beside it.
    """

    # Timing/gap, QARTOD Test 1: after a silence longer than this (TIM_INC, left to the
    # operator) the data are missing (9), marked on the first sample after it; five missed
    # one-minute samples: common practice, no source.
    gap_limit: float = 300.0
    # A time stamp this far ahead of the processing clock fails (QARTOD Test 1, TIM_STMP;
    # two minutes: common practice, no source).
    future_tolerance: float = 120.0
    # Location, QARTOD Test 3: a fixed gauge. The configured position is checked once (a
    # valid latitude and longitude); a position a feed reports is suspect further than this
    # from it [m] (a gauge does not move; 100 m: common practice, no source).
    location_radius: float = 100.0
    # Gross range, QARTOD Test 4: outside the sensor's measuring range fails, outside
    # the operator's range is suspect. Defaults wide on purpose -- set them to your
    # sensor's range (common practice, no source).
    gross_fail_min: float = -10.0
    gross_fail_max: float = 20.0
    gross_suspect_min: float | None = None
    gross_suspect_max: float | None = None
    # Expected range (QARTOD Test 5, climatology, which gives suspect only): observed
    # further than this from the predicted tide is suspect. Set above the largest
    # surge on record (common practice, no source).
    expected_margin: float = 1.5
    # Spike, QARTOD Test 6 formula |V(n) - (V(n-1)+V(n+1))/2| on the residual; QARTOD
    # leaves the two thresholds to the operator. 8 cm / 20 cm: common practice, no source
    # (well above the noise of a stilling well or radar one-minute mean). A sample fails
    # only when it stands alone (its curvature against both neighbours'): a seiche's crest,
    # seen over consecutive samples, is at most suspect. A one-sample jump larger than
    # spike_fail and jump_ratio times the changes either side fails too, unless the backup
    # shows the same step (a bore).
    spike_suspect: float = 0.08
    spike_fail: float = 0.20
    jump_ratio: float = 3.0
    # Rate of change, QARTOD Test 7: |V(n) - V(n-1)| above N_DEV standard deviations
    # of the previous TIM_DEV is suspect; the manual identifies no fail flag for it.
    # QARTOD example N_DEV = 3, TIM_DEV = 25 h (from memory). The floor keeps a very calm
    # residual from making every ripple suspect (common practice, no source).
    roc_n_dev: float = 3.0
    roc_window: float = 25 * 3600.0
    roc_floor: float = 0.05
    # Flat line, QARTOD Test 8: the last values within EPS of the current one for this
    # long (QARTOD counts repeats; we use durations so any sampling step works).
    # Half the usual 1 mm resolution; 30 min / 1 h: common practice, no source.
    flat_tolerance: float = 0.0005
    flat_suspect_after: float = 1800.0
    flat_fail_after: float = 3600.0
    # Primary against backup: the neighbour test's idea (QARTOD Test 11) applied to a
    # co-located sensor; suspect only, since the difference cannot tell which sensor is
    # wrong. IOC Manual Vol. IV asks for 1 cm accuracy (from memory); 5 cm between two
    # sensors: common practice, no source.
    multi_suspect: float = 0.05
    # Attenuated signal, QARTOD Test 10: the observed range over the last tidal day against
    # the predicted range of the same samples. A clogged stilling well or silted intake damps
    # the tide. Below atten_suspect of it suspect, below atten_fail fail; not judged where the
    # predicted range is under atten_min_range [m] or the day is less than 80 % covered
    # (ratios and range: common practice, no source; the tidal day, 24.84 h (Schureman 1958),
    # to the minute: 24 h 50 min).
    atten_window: float = 89400.0
    atten_suspect: float = 0.75
    atten_fail: float = 0.5
    atten_min_range: float = 0.3
    # Residual outlier (our addition, not a QARTOD test): |r - rolling median| against a
    # rolling robust sigma (1.4826 MAD). A departure past the fail limits fails only as a
    # burst no sea makes: at most resid_burst long, entered and left by one-sample jumps;
    # otherwise it is suspect. Window lengths and multiples: common practice, no source.
    resid_window: float = 3600.0
    resid_noise_window: float = 25 * 3600.0
    resid_suspect_k: float = 6.0
    resid_fail_k: float = 12.0
    resid_suspect_floor: float = 0.05
    resid_fail_floor: float = 0.20
    resid_burst: float = 300.0
    # Equipment faults for the alerts engine.
    # No sample for this long: silent feed (common practice, no source).
    silent_after: float = 1800.0
    # Primary-backup drift past this many mm/day (IOC Manual Vol. IV asks for 1 cm
    # accuracy over long periods, from memory; 1 mm/day: common practice, no source).
    drift_limit_mm_per_day: float = 1.0
    # Window over which the drift is estimated (common practice, no source).
    drift_window: float = 30 * 86400.0
    # Clock offset against the predicted tide past this many minutes. IOC Manual
    # Vol. IV asks for timing to within 1 minute (from memory).
    clock_limit_min: float = 1.0
    # Datum step in the residual reported from this size (common practice, no source).
    step_min_mm: float = 20.0

    def context_seconds(self) -> float:
        """Record before a window needed to evaluate its first sample [s]."""
        return max(self.roc_window, self.resid_noise_window / 2, self.flat_fail_after, self.gap_limit,
                   self.atten_window) + 600.0


_DURATION_KEYS = {"gap_limit", "future_tolerance", "roc_window", "flat_suspect_after", "flat_fail_after",
                  "resid_window", "resid_noise_window", "resid_burst", "silent_after", "drift_window",
                  "atten_window"}
# Keys that are shares of a range: above 0, at most 1.
_RATIO_KEYS = {"atten_suspect", "atten_fail"}
# Keys of earlier versions, with what to do instead.
_RETIRED = {
    "roc_fail_m_per_min": "the rate-of-change test no longer fails a sample (QARTOD v2.1 Test 7 identifies "
                          "no fail flag: surges and seiches move water fast); a one-sample jump fails in the "
                          "spike test (spike_fail, jump_ratio). Remove the key",
}
_OPTIONAL_KEYS = {"gross_suspect_min", "gross_suspect_max"}
# Keys that may be zero or negative (levels on the station datum).
_SIGNED_KEYS = {"gross_fail_min", "gross_fail_max", "gross_suspect_min", "gross_suspect_max"}
# (smaller, larger): the first must be below the second.
_ORDERED = (("spike_suspect", "spike_fail"), ("flat_suspect_after", "flat_fail_after"),
            ("resid_suspect_k", "resid_fail_k"), ("resid_suspect_floor", "resid_fail_floor"),
            ("atten_fail", "atten_suspect"),
            ("gross_fail_min", "gross_fail_max"), ("gross_suspect_min", "gross_suspect_max"),
            ("gross_fail_min", "gross_suspect_min"), ("gross_suspect_max", "gross_fail_max"))


def parse_duration(value: Any) -> float | None:
    """Seconds [s] from a positive duration of at most ten years, or None when it is not one."""
    try:
        return _parse_duration(value, positive=True, maximum=3650 * 86400)
    except ValueError:
        return None


def qc_settings_from(raw: Mapping[str, Any] | None, keypath: str) -> tuple[QcSettings, list[str]]:
    """Validate a station's ``qc`` table.

    Parameters
    ----------
    raw : dict
        The parsed TOML table (may be empty or None: all defaults).
    keypath : str
        Where the table sits, e.g. ``"stations[0].qc"``; every message starts with it.

    Returns
    -------
    (QcSettings, list of str)
        The settings (defaults where a value was bad) and the problems found.
    """
    errors: list[str] = []
    if raw is None:
        raw = {}
    if not isinstance(raw, Mapping):
        return QcSettings(), [f"{keypath}: expected a table of quality-control settings, got {type(raw).__name__}"]
    known = [f.name for f in fields(QcSettings)]
    values: dict[str, Any] = {}
    for key, val in raw.items():
        kp = f"{keypath}.{key}"
        if key in _RETIRED:
            errors.append(f"{kp}: {_RETIRED[key]}")
            continue
        if key not in known:
            near = difflib.get_close_matches(str(key), known, n=1)
            hint = f" (did you mean {near[0]!r}?)" if near else ""
            errors.append(f"{kp}: unknown key{hint}")
            continue
        if key in _DURATION_KEYS:
            secs = parse_duration(val)
            if secs is None:
                errors.append(f"{kp}: expected a positive duration such as \"30min\", \"25h\" or a number "
                              f"of seconds, got {val!r}")
            else:
                values[key] = secs
            continue
        if isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(float(val)):
            errors.append(f"{kp}: expected a number, got {val!r}")
            continue
        val = float(val)
        if key in _SIGNED_KEYS:
            if abs(val) > 1000:
                errors.append(f"{kp}: expected metres on the station datum within +-1000, got {val!r}")
                continue
        elif val <= 0:
            errors.append(f"{kp}: expected a positive number, got {val!r}")
            continue
        if key in _RATIO_KEYS and val > 1:
            errors.append(f"{kp}: expected a share of the predicted range, above 0 and at most 1, got {val!r}")
            continue
        values[key] = val
    settings = QcSettings(**values)
    for lo, hi in _ORDERED:
        a, b = getattr(settings, lo), getattr(settings, hi)
        if a is not None and b is not None and not a < b:
            which = hi if hi in values else lo
            errors.append(f"{keypath}.{which}: {lo} ({a:g}) must be below {hi} ({b:g})")
    if errors:
        # A bad value must not leave inconsistent thresholds behind.
        good = {k: v for k, v in values.items() if not any(e.startswith(f"{keypath}.{k}:") for e in errors)}
        try:
            settings = QcSettings(**good)
        except TypeError:
            settings = QcSettings()
    return settings, errors


# --------------------------------------------------------------------------- helpers

def _flags(index: pd.Index, values: np.ndarray, name: str) -> pd.Series:
    return pd.Series(np.asarray(values, dtype=np.int8), index=index, name=name)


def _neighbour_ok(t: np.ndarray, limit: float) -> tuple[np.ndarray, np.ndarray]:
    """Whether the previous / next sample exists within ``limit`` seconds."""
    dt = np.diff(t)
    close = (dt > 0) & (dt <= limit)
    prev_ok = np.concatenate([[False], close])
    next_ok = np.concatenate([close, [False]])
    return prev_ok, next_ok


def _window(seconds_: float) -> str:
    return f"{int(round(seconds_))}s"


# --------------------------------------------------------------------------- tests

def gap_test(level: pd.Series, gap_limit: float, now: float | None = None,
             future_tolerance: float = 120.0) -> pd.Series:
    """Timing/gap test (QARTOD Test 1).

    Parameters
    ----------
    level : Series
        Levels [m] on a UTC DatetimeIndex, sorted.
    gap_limit : float
        After a silence longer than this [s] the data are missing: the first sample after
        it is flagged 9 (missing data, as the manual flags data that did not arrive within
        TIM_INC). The flag records the gap; the sample's own value is judged by the other
        tests (:func:`aggregate_flags` leaves this 9 out).
    now : float, optional
        Processing time [Unix s]; samples stamped later than ``now + future_tolerance``
        fail (a wrong clock). Not checked when None.
    future_tolerance : float
        [s].

    Returns
    -------
    Series of int8 flags. Time stamps that do not increase fail.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 1 (timing/gap).
    """
    t = index_seconds(level.index)
    flags = np.full(len(t), PASS, dtype=np.int8)
    if len(t):
        dt = np.diff(t)
        after_gap = np.concatenate([[False], dt > gap_limit])
        flags[after_gap] = MISSING
        flags[np.concatenate([[False], dt <= 0])] = FAIL
        if now is not None:
            flags[t > now + future_tolerance] = FAIL
    return _flags(level.index, flags, "gap")


def find_gaps(index: pd.Index, gap_limit: float) -> pd.DataFrame:
    """Silences longer than ``gap_limit`` [s] (a gap as :func:`predictor.timeutil.silences`
    defines it): columns ``start`` (last sample before), ``end`` (first sample after) as UTC
    Timestamps and ``seconds`` [s]."""
    before, after = silences(utc_index(index).as_unit("ns").asi8, gap_limit * 1e9)
    return pd.DataFrame({"start": pd.to_datetime(before, utc=True), "end": pd.to_datetime(after, utc=True),
                         "seconds": (after - before) / 1e9})


def syntax_test(level: pd.Series) -> pd.Series:
    """Syntax (QARTOD Test 2): a stored sample already passed the parser; a missing
    value (NaN) is 9.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 2 (syntax).
    """
    v = level.to_numpy(dtype=float)
    return _flags(level.index, np.where(np.isfinite(v), PASS, MISSING), "syntax")


def location_test(index: pd.Index, latitude: float | None, longitude: float | None,
                  reported: pd.DataFrame | None = None, radius_m: float = 100.0) -> pd.Series:
    """Location (QARTOD Test 3) of a fixed gauge.

    The configured position is checked once: a latitude in [-90, 90] and a longitude in
    [-180, 180] pass every sample, anything else fails them all; no position configured
    leaves the test not evaluated (2). A position reported with a sample (``reported``:
    ``latitude``, ``longitude`` [deg] on the same index) fails outside those ranges and is
    suspect further than ``radius_m`` [m] from the configured one (a fixed gauge does not
    move; great-circle distance on a sphere of 6371 km).

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 3 (location). Mean Earth radius
    6371.0 km (IUGG, from memory).
    """
    n = len(index)
    if latitude is None or longitude is None:
        return _flags(index, np.full(n, NOT_EVALUATED), "location")
    ok = _valid_position(np.asarray([latitude], dtype=float), np.asarray([longitude], dtype=float))[0]
    flags = np.full(n, PASS if ok else FAIL, dtype=np.int8)
    if reported is not None and ok and len(reported):
        lat = reported["latitude"].reindex(index).to_numpy(dtype=float)
        lon = reported["longitude"].reindex(index).to_numpy(dtype=float)
        has = np.isfinite(lat) | np.isfinite(lon)
        valid = _valid_position(lat, lon)
        phi1, phi2 = np.radians(latitude), np.radians(lat)
        dlam = np.radians(lon - longitude)
        with np.errstate(invalid="ignore"):
            c = np.sin(phi1) * np.sin(phi2) + np.cos(phi1) * np.cos(phi2) * np.cos(dlam)
            dist = 6371.0e3 * np.arccos(np.clip(c, -1.0, 1.0))
        flags[has & valid & (dist > radius_m)] = SUSPECT
        flags[has & ~valid] = FAIL
    return _flags(index, flags, "location")


def _valid_position(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        return np.isfinite(lat) & np.isfinite(lon) & (np.abs(lat) <= 90.0) & (np.abs(lon) <= 180.0)


def gross_range_test(level: pd.Series, fail_min: float, fail_max: float,
                     suspect_min: float | None = None, suspect_max: float | None = None) -> pd.Series:
    """Gross range (QARTOD Test 4): outside the sensor limits fails, outside the
    operator's limits is suspect.

    Parameters
    ----------
    level : Series
        [m] on the station datum.
    fail_min, fail_max : float
        Sensor measuring range [m].
    suspect_min, suspect_max : float, optional
        Operator's range [m]; not checked when None.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 4 (gross range).
    """
    v = level.to_numpy(dtype=float)
    flags = np.full(len(v), PASS, dtype=np.int8)
    if suspect_min is not None:
        flags[v < suspect_min] = SUSPECT
    if suspect_max is not None:
        flags[v > suspect_max] = SUSPECT
    flags[(v < fail_min) | (v > fail_max)] = FAIL
    flags[~np.isfinite(v)] = NOT_EVALUATED
    return _flags(level.index, flags, "gross")


def expected_range_test(level: pd.Series, predicted: pd.Series | None, margin: float) -> pd.Series:
    """Expected range: further than ``margin`` [m] from the predicted tide is suspect.

    Not evaluated (2) without a prediction.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 5 (climatology), with the
    predicted tide as the expected value.
    """
    if predicted is None:
        return _flags(level.index, np.full(len(level), NOT_EVALUATED), "expected")
    d = level.to_numpy(dtype=float) - np.asarray(predicted, dtype=float)
    flags = np.where(np.abs(d) > margin, SUSPECT, PASS)
    flags = np.where(np.isfinite(d), flags, NOT_EVALUATED)
    return _flags(level.index, flags, "expected")


def spike_test(resid: pd.Series, suspect: float, fail: float, gap_limit: float,
               jump_ratio: float = 3.0) -> pd.Series:
    """Spike test (QARTOD Test 6) on the residual, and the one-sample jump.

    The statistic is ``|r(n) - (r(n-1) + r(n+1)) / 2|`` [m]; above ``suspect`` the sample is
    suspect. Above ``fail`` it fails only when it stands alone: its curvature has the
    opposite sign to that of both neighbours (a lone sample off the curve) and is no smaller
    than theirs (the spike, not a neighbour it pulls). At the crest of a
    seiche or meteotsunami the curvature keeps its sign over consecutive samples -- real water,
    at most suspect. A sample without both neighbours within ``gap_limit`` [s] (the newest
    one, say) is not evaluated (2).

    A one-sample jump fails too: the change from the previous sample is above ``fail`` and
    above ``jump_ratio`` times the changes just before and just after it (a step that neither
    side shares, which no sea makes at these steps; the sample after it stays on the new level,
    the diagnostics' datum-step search takes it from there).

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 6 (spike); applied to the
    residual rather than the level so the tide's curvature is not taken for a spike. The
    manual's section on thresholds warns that surges, tsunamis and strong winds move water
    quickly: hence the shape conditions before a fail.
    """
    return _flags(resid.index, spike_flags_on_arrays(resid.to_numpy(dtype=float), index_seconds(resid.index), suspect,
                                                     fail, gap_limit, jump_ratio), "spike")


def spike_flags_on_arrays(r: np.ndarray, t: np.ndarray, suspect: float, fail: float, gap_limit: float,
                          jump_ratio: float) -> np.ndarray:
    """:func:`spike_test` on plain arrays: residual ``r`` [m] at times ``t`` [Unix s] [flags]."""
    n = len(r)
    prev_ok, next_ok = _neighbour_ok(t, gap_limit)
    flags = np.full(n, NOT_EVALUATED, dtype=np.int8)
    if n >= 3:
        curv = np.full(n, np.nan)
        curv[1:-1] = r[1:-1] - 0.5 * (r[:-2] + r[2:])
        stat = np.abs(curv)
        ok = prev_ok & next_ok & np.isfinite(stat)
        before = np.concatenate([[np.nan], curv[:-1]])
        after = np.concatenate([curv[1:], [np.nan]])
        with np.errstate(invalid="ignore"):
            # a neighbour that cannot be judged does not vouch for the sample
            alone = ~(np.sign(before) == np.sign(curv)) & ~(np.sign(after) == np.sign(curv))
        # the spike itself, not its neighbours (whose curvature it makes half as large); a NaN
        # neighbour counts as 0 (fmax: as nan_to_num, at a fraction of its cost)
        peak = ~(np.fmax(np.concatenate([[0.0], stat[:-1]]), 0.0) > stat) & \
            ~(np.fmax(np.concatenate([stat[1:], [0.0]]), 0.0) > stat)
        flags[ok] = PASS
        flags[ok & (stat > suspect)] = SUSPECT
        flags[ok & (stat > fail) & alone & peak] = FAIL
    flags[jump_flags(r, t, fail, jump_ratio, gap_limit)] = FAIL
    return flags


def jumps(resid: pd.Series, size: float, ratio: float, gap_limit: float) -> np.ndarray:
    """Samples reached by a one-sample jump: a change from the previous sample above ``size``
    [m] and above ``ratio`` times the changes just before and just after it (all within
    ``gap_limit`` [s] of each other). NaN samples are skipped over.
    """
    return jump_flags(resid.to_numpy(dtype=float), index_seconds(resid.index), size, ratio, gap_limit)


def jump_flags(r: np.ndarray, t: np.ndarray, size: float, ratio: float, gap_limit: float) -> np.ndarray:
    """:func:`jumps` on plain arrays: residual ``r`` [m] at times ``t`` [Unix s] [bool]."""
    n = len(r)
    out = np.zeros(n, dtype=bool)
    good = np.isfinite(r).nonzero()[0]
    if good.size < 4:
        return out
    rv, tv = r[good], t[good]
    d = np.diff(rv)                     # change into sample k+1 of the good ones
    close = np.diff(tv) <= gap_limit
    d = np.where(close, d, np.nan)
    before = np.concatenate([[np.nan], d[:-1]])
    after = np.concatenate([d[1:], [np.nan]])
    with np.errstate(invalid="ignore"):
        big = (np.abs(d) > size) & (np.abs(d) > ratio * np.fmax(np.abs(before), np.abs(after)))
        big &= np.isfinite(before) & np.isfinite(after)
    out[good[1:][big]] = True
    return out


def rate_of_change_test(resid: pd.Series, n_dev: float, window: float, floor: float,
                        gap_limit: float, exclude: np.ndarray | None = None) -> pd.Series:
    """Rate of change (QARTOD Test 7) on the residual: suspect, never fail.

    The change from the previous usable sample is suspect when it exceeds
    ``max(n_dev * sd, floor)`` [m], ``sd`` the standard deviation of the residual over
    the previous ``window`` [s]. The manual identifies no fail flag for this test: surges,
    seiches and tsunamis move real water fast (a one-sample jump fails in :func:`spike_test`).
    Samples in ``exclude`` (already failed as spikes, say) are skipped as "previous
    sample", so the good sample after a spike is not blamed for the jump back.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 7 (rate of change: "no fail flag is
    identified for this test").
    """
    r = resid.to_numpy(dtype=float)
    t = index_seconds(resid.index)
    n = len(r)
    flags = np.full(n, NOT_EVALUATED, dtype=np.int8)
    if n < 2:
        return _flags(resid.index, flags, "roc")
    ok = np.isfinite(r)
    if exclude is not None:
        ok &= ~np.asarray(exclude, dtype=bool)
    # Last usable value strictly before each sample.
    pos = np.where(ok, np.arange(n), -1)
    last = np.maximum.accumulate(pos)
    prev = np.concatenate([[-1], last[:-1]])
    has_prev = prev >= 0
    pi = np.where(has_prev, prev, 0)
    dv = r - r[pi]
    dt = t - t[pi]
    evaluated = has_prev & (dt > 0) & (dt <= gap_limit) & np.isfinite(r)
    sd = pd.Series(np.where(ok, r, np.nan), index=utc_index(resid.index)).rolling(
        _window(window), min_periods=10).std().to_numpy()
    sd = np.concatenate([[np.nan], sd[:-1]])  # of the previous samples only
    limit = np.maximum(np.nan_to_num(n_dev * sd, nan=0.0), floor)
    flags[evaluated] = PASS
    flags[evaluated & (np.abs(dv) > limit)] = SUSPECT
    return _flags(resid.index, flags, "roc")


def flat_line_test(level: pd.Series, tolerance: float, suspect_after: float, fail_after: float,
                   gap_limit: float) -> pd.Series:
    """Flat line (QARTOD Test 8): a stuck float or frozen logger.

    A sample is suspect when every sample of the last ``suspect_after`` [s] lies
    within ``tolerance`` [m] of it, and fails after ``fail_after`` [s]. Runs on the
    level itself: a stuck sensor repeats its reading whatever the tide does.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 8 (flat line); durations in
    place of repeat counts.
    """
    v = level.to_numpy(dtype=float)
    t = index_seconds(level.index)
    idx = utc_index(level.index)
    flags = np.full(len(v), PASS, dtype=np.int8)
    frame = pd.DataFrame({"v": v, "t": t}, index=idx)
    for duration, code in ((suspect_after, SUSPECT), (fail_after, FAIL)):
        roll = frame["v"].rolling(_window(duration), closed="both", min_periods=2)
        vmax = roll.max().to_numpy()
        vmin = roll.min().to_numpy()
        # The record must reach back to t - duration: a sample exactly there, or the
        # one before the window no more than a gap away.
        first = t.searchsorted(t - duration, side="left")
        exact = t[np.minimum(first, len(t) - 1)] == t - duration
        before = t[np.maximum(first - 1, 0)]
        covered = exact | ((first > 0) & (before >= t - duration - gap_limit))
        flat = (vmax - v < tolerance) & (v - vmin < tolerance) & covered
        flags[flat] = code
    flags[~np.isfinite(v)] = NOT_EVALUATED
    return _flags(level.index, flags, "flat")


def multi_sensor_test(level: pd.Series, other: pd.Series | None, suspect: float,
                      gap_limit: float) -> pd.Series:
    """Primary against backup: suspect where this sensor and the other differ by more
    than ``suspect`` [m] -- the neighbour test's idea applied to a co-located sensor.

    The other sensor is interpolated to this one's times when it has samples on both
    sides within ``gap_limit`` [s]; elsewhere, or without another sensor, the test is
    not evaluated (2). Pass the other sensor's usable samples only.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 11 (neighbour test: comparison
    with a nearby sensor; here a co-located backup); IOC Manual Vol. IV on redundant sensors.
    """
    flags = np.full(len(level), NOT_EVALUATED, dtype=np.int8)
    if other is None or other.dropna().empty:
        return _flags(level.index, flags, "multi")
    d = difference_at(level, other, gap_limit)
    ok = np.isfinite(d)
    flags[ok] = PASS
    flags[ok & (np.abs(d) > suspect)] = SUSPECT
    return _flags(level.index, flags, "multi")


def difference_at(level: pd.Series, other: pd.Series, gap_limit: float) -> np.ndarray:
    """``level - other`` at ``level``'s times [m]; NaN where ``other`` has no sample on
    both sides within ``gap_limit`` [s] (an exact time match is always used)."""
    other = other.dropna()
    return difference_on_arrays(index_seconds(level.index), level.to_numpy(dtype=float),
                                index_seconds(other.index), other.to_numpy(dtype=float), gap_limit)


def difference_on_arrays(t: np.ndarray, v: np.ndarray, to: np.ndarray, vo: np.ndarray,
                         gap_limit: float) -> np.ndarray:
    """:func:`difference_at` on plain arrays: times [s] and levels [m] of this sensor, and of
    the other sensor's samples with a value (no NaN)."""
    if len(to) == 0:
        return np.full(len(t), np.nan)
    j = to.searchsorted(t)
    # (np.minimum/np.maximum, not np.clip: the same integers without clip's overhead)
    jl = np.maximum(j - 1, 0)
    jr = np.minimum(j, len(to) - 1)
    exact = to[jr] == t
    bracket = (j > 0) & (j < len(to)) & (t - to[jl] <= gap_limit) & (to[jr] - t <= gap_limit)
    interp = np.interp(t, to, vo)
    d = v - interp
    return np.where(exact | bracket, d, np.nan)


def residual_outlier_test(resid: pd.Series, window: float, noise_window: float, k_suspect: float,
                          k_fail: float, floor_suspect: float, floor_fail: float,
                          exclude: np.ndarray | None = None, burst: float = 300.0,
                          jump_ratio: float = 3.0, gap_limit: float = 300.0) -> pd.Series:
    """Residual outlier: robust statistics of the residual in rolling windows (our addition,
    not a QARTOD test).

    ``d = r - median(r over a centred window [s])``; its scale is
    ``sigma = 1.4826 * median(|d|)`` over a longer centred ``noise_window`` [s]. A sample is
    suspect when ``|d| > max(k_suspect * sigma, floor_suspect)``. Past
    ``max(k_fail * sigma, floor_fail)`` [m] it fails only as part of a burst no sea makes: a
    run of such samples at most ``burst`` [s] long, entered by a one-sample jump and left by
    one (each above ``floor_fail`` and ``jump_ratio`` times the change outside it). Water that
    rises into the departure over consecutive samples -- a seiche, a meteotsunami, a surge
    front -- stays suspect at worst. Centred windows follow a surge's rise.

    References
    ----------
    Hampel filter: Hampel, F. R. (1974). The influence curve and its role in robust
    estimation. JASA 69; MAD scale factor 1.4826 for a normal distribution.
    """
    idx = utc_index(resid.index)
    r = resid.to_numpy(dtype=float)
    ok = np.isfinite(r)
    if exclude is not None:
        ok &= ~np.asarray(exclude, dtype=bool)
    clean = pd.Series(np.where(ok, r, np.nan), index=idx)
    med = clean.rolling(_window(window), center=True, min_periods=5).median().to_numpy()
    d = r - med
    sigma = 1.4826 * pd.Series(np.abs(np.where(ok, d, np.nan)), index=idx).rolling(
        _window(noise_window), center=True, min_periods=10).median().to_numpy()
    flags = np.full(len(r), NOT_EVALUATED, dtype=np.int8)
    ev = np.isfinite(d) & np.isfinite(sigma)
    flags[ev] = PASS
    flags[ev & (np.abs(d) > np.maximum(k_suspect * sigma, floor_suspect))] = SUSPECT
    far = ev & (np.abs(d) > np.maximum(k_fail * sigma, floor_fail))
    flags[far] = SUSPECT
    flags[_bursts(r, index_seconds(resid.index), far, burst, floor_fail, jump_ratio, gap_limit)] = FAIL
    return _flags(resid.index, flags, "resid")


def _bursts(r: np.ndarray, t: np.ndarray, far: np.ndarray, burst: float, size: float, ratio: float,
            gap_limit: float) -> np.ndarray:
    """Samples of runs of ``far`` samples no longer than ``burst`` [s] that a one-sample jump
    enters and another leaves (see :func:`residual_outlier_test`)."""
    out = np.zeros(len(r), dtype=bool)
    if not far.any():
        return out
    pos = far.nonzero()[0]
    brk = np.concatenate([[True], np.diff(pos) > 1])
    starts, ends = pos[brk], pos[np.concatenate([brk[1:], [True]])]
    for a, b in zip(starts, ends):
        if t[b] - t[a] > burst or a < 2 or b > len(r) - 3:
            continue
        steps = np.abs(np.diff(r[a - 2:b + 3]))  # into a-1, a (entry), ..., b+1 (exit), b+2
        if not np.all(np.isfinite(steps)) or np.max(np.diff(t[a - 2:b + 3])) > gap_limit:
            continue
        entry, before = steps[1], steps[0]
        leave, after = steps[-2], steps[-1]
        if entry > size and leave > size and entry > ratio * before and leave > ratio * after:
            out[a:b + 1] = True
    return out


def attenuation_test(level: pd.Series, predicted: Any, window: float, suspect: float, fail: float,
                     min_range: float, exclude: np.ndarray | None = None) -> pd.Series:
    """Attenuated signal (QARTOD Test 10): the observed range over the last tidal day against
    the predicted range of the same samples.

    For each sample, the samples of the previous ``window`` [s] (a tidal day by default) that
    may be used (not in ``exclude``) give ``ratio = (max - min of the level) / (max - min of
    the prediction at those times)``. Below ``suspect`` the sample is suspect, below ``fail``
    it fails: a clogged stilling well or a silted intake damps the tide, the usual fault a
    technician misses because the record still looks like a tide. Not evaluated (2) without
    a prediction, where the predicted range is under ``min_range`` [m], or where the window
    is less than 80 % covered by samples.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 10 (attenuated signal), with the
    predicted tide's range as the expected variation. IOC Manual Vol. IV (stilling-well
    damping, from memory).
    """
    n = len(level)
    if predicted is None or n == 0:
        return _flags(level.index, np.full(n, NOT_EVALUATED), "atten")
    idx = utc_index(level.index)
    v = level.to_numpy(dtype=float)
    p = np.asarray(predicted, dtype=float)
    ok = np.isfinite(v) & np.isfinite(p)
    if exclude is not None:
        ok &= ~np.asarray(exclude, dtype=bool)
    w = _window(window)
    obs = pd.Series(np.where(ok, v, np.nan), index=idx).rolling(w, min_periods=2)
    pre = pd.Series(np.where(ok, p, np.nan), index=idx).rolling(w, min_periods=2)
    obs_range = (obs.max() - obs.min()).to_numpy()
    pred_range = (pre.max() - pre.min()).to_numpy()
    t = index_seconds(level.index)
    step = float(np.median(np.diff(t))) if n > 1 else window
    count = pd.Series(ok.astype(float), index=idx).rolling(w, min_periods=1).sum().to_numpy()
    span_ok = (t - t[0]) >= window - step  # a whole window of record behind the sample
    covered = span_ok & (count * step >= 0.8 * window)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = obs_range / pred_range
    ev = covered & np.isfinite(ratio) & (pred_range >= min_range) & np.isfinite(v)
    flags = np.full(n, NOT_EVALUATED, dtype=np.int8)
    flags[ev] = PASS
    flags[ev & (ratio < suspect)] = SUSPECT
    flags[ev & (ratio < fail)] = FAIL
    return _flags(level.index, flags, "atten")


def confirmed_by_other(level: pd.Series, other: pd.Series | None, suspect: float,
                       gap_limit: float) -> np.ndarray:
    """Where a co-located sensor shows the same water: the difference ``level - other`` has no
    spike and no jump there (both below ``suspect`` [m]). A fault of one sensor shows in the
    difference; a seiche, a surge front or a bore seen by both does not. False where the other
    sensor has no samples on both sides within ``gap_limit`` [s].
    """
    if other is None or other.dropna().empty or len(level) < 3:
        return np.zeros(len(level), dtype=bool)
    d = difference_at(level, other, gap_limit)
    curv = np.full(len(d), np.nan)
    curv[1:-1] = d[1:-1] - 0.5 * (d[:-2] + d[2:])
    step = np.concatenate([[np.nan], np.diff(d)])
    with np.errstate(invalid="ignore"):
        return np.isfinite(curv) & np.isfinite(step) & (np.abs(curv) < suspect) & (np.abs(step) < suspect)


def _confirm(tests: pd.DataFrame, level: pd.Series, resid: pd.Series, other: pd.Series | None,
             s: "QcSettings") -> pd.DataFrame:
    """One-sample jumps the other sensor shows too become suspect: a bore or a tsunami front
    passing both gauges, not a fault of one. A lone spike or a short burst fails whatever the
    other sensor says (a common-mode glitch of a shared logger shows in both); the aggregate
    is recomputed."""
    same = confirmed_by_other(level, other, s.spike_suspect, s.gap_limit)
    if not same.any():
        return tests
    jumped = jumps(resid.where(tests["gross"].to_numpy() != FAIL), s.spike_fail, s.jump_ratio, s.gap_limit)
    f = tests["spike"].to_numpy().copy()
    real = same & jumped & (f == FAIL)
    if not real.any():
        return tests
    tests = tests.copy()
    f[real] = SUSPECT
    tests["spike"] = f.astype(np.int8)
    tests["flag"] = aggregate_flags(tests)
    return tests


# What each flag code weighs in the aggregate (NOT_EVALUATED nothing; the gap test's
# MISSING nothing either), and the aggregate of a worst weight (nothing: NOT_EVALUATED).
_WORTH = np.array([0, PASS, 0, SUSPECT, FAIL, 5, 6, 7, 8, MISSING], dtype=np.int8)
_WORTH_GAP = np.where(np.arange(10) == MISSING, 0, _WORTH).astype(np.int8)
_FLAG_OF = np.where(np.arange(10) == 0, NOT_EVALUATED, np.arange(10)).astype(np.int8)


def _aggregate(table: np.ndarray) -> np.ndarray:
    """:func:`aggregate_flags` of an int8 table whose columns are :data:`TESTS` in order
    (codes 0-9), by table lookups."""
    if not table.shape[0]:
        return np.full(0, NOT_EVALUATED, dtype=np.int8)
    w = _WORTH[table]
    g = _COL["gap"]
    w[:, g] = _WORTH_GAP[table[:, g]]
    return _FLAG_OF[np.maximum.reduce(w, axis=1)]


def aggregate_flags(tests: pd.DataFrame) -> pd.Series:
    """Aggregate flag per sample: the worst evaluated test (4 > 3 > 1); 2 when no test
    was evaluated; 9 when the value is missing (a test other than the gap test says 9).

    The timing/gap test's 9 on the first sample after a silence says that data before it
    did not arrive; the sample's own value is judged by the other tests.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1 (aggregate flag).
    """
    cols = [c for c in TESTS if c in tests.columns]
    a = np.array(tests[cols].fillna(NOT_EVALUATED).to_numpy(dtype=np.int16))
    if "gap" in cols:
        g = cols.index("gap")
        a[:, g] = np.where(a[:, g] == MISSING, NOT_EVALUATED, a[:, g])
    a = np.where(a == NOT_EVALUATED, 0, a)
    worst = a.max(axis=1) if a.shape[1] else np.zeros(len(tests), dtype=np.int16)
    worst = np.where(worst == 0, NOT_EVALUATED, worst)
    return pd.Series(worst.astype(np.int8), index=tests.index, name="flag")


def apply_overrides(flags: pd.Series, overrides: pd.Series | None) -> pd.Series:
    """Flags with the technician's overrides (indexed by the same times) winning."""
    if overrides is None or overrides.empty:
        return flags
    out = flags.copy()
    ov = overrides.copy()
    ov.index = utc_index(ov.index)
    out.index = utc_index(out.index)
    common = out.index.intersection(ov.index)
    out.loc[common] = ov.loc[common].astype(np.int8).to_numpy()
    out.index = flags.index
    return out


def usable_mask(flags: Iterable[int] | pd.Series | np.ndarray) -> np.ndarray:
    """True where a sample may feed alerts, fits and statistics (flag 1, 2 or 3).

    Fail (4) and missing (9) are excluded; suspect (3) is kept but stays marked.
    """
    return np.isin(np.asarray(flags), USABLE_FLAGS)


def select_usable(frame: pd.DataFrame | pd.Series, flag_column: str = "flag"):
    """The rows of ``frame`` whose ``flag_column`` is usable (see :func:`usable_mask`)."""
    if isinstance(frame, pd.Series):
        raise TypeError("select_usable needs a DataFrame with a flag column")
    return frame[usable_mask(frame[flag_column].to_numpy())]


def run_tests(level: pd.Series, settings: QcSettings | None = None, predicted: Any = None,
              other: pd.Series | None = None, now: float | None = None,
              position: tuple[float, float] | None = None, reported: pd.DataFrame | None = None) -> pd.DataFrame:
    """All tests for one sensor.

    Parameters
    ----------
    level : Series
        Observed levels [m] on a sorted UTC DatetimeIndex (NaN = missing).
    settings : QcSettings
        Thresholds (defaults when None).
    predicted : array-like or Series, optional
        Predicted tide [m] at the same times. Without it the residual tests run on the
        level itself (fine at one-minute steps, coarse at longer ones) and the expected
        range and attenuated signal are not evaluated.
    other : Series, optional
        Usable levels of a co-located sensor [m]: the primary-against-backup comparison,
        and a one-sample jump both sensors show is real water (see :func:`confirmed_by_other`).
    now : float, optional
        Processing time [Unix s] for the future-time-stamp check.
    position : (latitude, longitude), optional
        The gauge's configured position [deg] for the location test.
    reported : DataFrame, optional
        Positions reported with the samples (``latitude``, ``longitude`` [deg]).

    Returns
    -------
    DataFrame with one int8 column per test in :data:`TESTS` and ``flag`` (aggregate).
    """
    s = settings or QcSettings()
    level = level.astype(float)
    pred = None
    if predicted is not None:
        pred = np.asarray(predicted, dtype=float)
        resid = level - pred
    else:
        resid = level
    out = pd.DataFrame(index=level.index)
    out["gap"] = gap_test(level, s.gap_limit, now, s.future_tolerance)
    out["syntax"] = syntax_test(level)
    lat, lon = position if position is not None else (None, None)
    out["location"] = location_test(level.index, lat, lon, reported, s.location_radius)
    out["gross"] = gross_range_test(level, s.gross_fail_min, s.gross_fail_max,
                                    s.gross_suspect_min, s.gross_suspect_max)
    out["expected"] = expected_range_test(level, pred, s.expected_margin)
    gross_fail = out["gross"].to_numpy() == FAIL
    # Gross failures would make their neighbours look like spikes: leave them out.
    resid_clean = resid.where(~gross_fail)
    out["spike"] = spike_test(resid_clean, s.spike_suspect, s.spike_fail, s.gap_limit, s.jump_ratio)
    bad = gross_fail | (out["spike"].to_numpy() == FAIL)
    out["roc"] = rate_of_change_test(resid_clean, s.roc_n_dev, s.roc_window, s.roc_floor, s.gap_limit,
                                     exclude=bad)
    out["flat"] = flat_line_test(level, s.flat_tolerance, s.flat_suspect_after, s.flat_fail_after, s.gap_limit)
    out["multi"] = multi_sensor_test(level, other, s.multi_suspect, s.gap_limit)
    out["atten"] = attenuation_test(level, pred, s.atten_window, s.atten_suspect, s.atten_fail,
                                    s.atten_min_range, exclude=bad)
    out["resid"] = residual_outlier_test(resid_clean, s.resid_window, s.resid_noise_window, s.resid_suspect_k,
                                         s.resid_fail_k, s.resid_suspect_floor, s.resid_fail_floor, exclude=bad,
                                         burst=s.resid_burst, jump_ratio=s.jump_ratio, gap_limit=s.gap_limit)
    missing = out["syntax"].to_numpy() == MISSING
    for c in TESTS:
        if c != "syntax":
            out.loc[missing, c] = NOT_EVALUATED
    out["flag"] = aggregate_flags(out)
    if other is not None:
        out = _confirm(out, level, resid, other, s)
    return out


def episodes(flags: pd.Series, at_least: int = SUSPECT, join_gap: float = 0.0) -> pd.DataFrame:
    """Runs of consecutive samples flagged ``at_least`` or worse (9 excluded).

    Returns a DataFrame with ``start``, ``end`` (UTC), ``samples`` and ``worst``,
    ordered by ``worst`` then length (longest first). Runs closer than ``join_gap`` [s]
    are joined.
    """
    f = flags.to_numpy()
    bad = (f >= at_least) & (f != MISSING) & (f != NOT_EVALUATED)
    idx = utc_index(flags.index)
    cols = ["start", "end", "samples", "worst"]
    if not bad.any():
        return pd.DataFrame(columns=cols)
    pos = bad.nonzero()[0]
    t = index_seconds(flags.index)[pos]
    brk = np.concatenate([[True], (np.diff(pos) > 1) & (np.diff(t) > join_gap)])
    gid = np.cumsum(brk) - 1
    df = pd.DataFrame({"i": pos, "g": gid, "f": f[pos]})
    agg = df.groupby("g").agg(first=("i", "min"), last=("i", "max"), samples=("i", "size"), worst=("f", "max"))
    out = pd.DataFrame({"start": idx[agg["first"].to_numpy()], "end": idx[agg["last"].to_numpy()],
                        "samples": agg["samples"].to_numpy(), "worst": agg["worst"].to_numpy()})
    return out.sort_values(["worst", "samples"], ascending=[False, False]).reset_index(drop=True)
