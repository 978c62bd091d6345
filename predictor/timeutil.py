"""Times in one place: conversion to Unix seconds and ISO text, and durations written by people.

The one home of time conversion (:func:`to_unix_seconds`, :func:`iso_utc`) and the one
duration parser (``"90s"``, ``"10min"``, ``"2h"``, ``"1d"``, ``"1h30min"``) of the project.
It sits in :mod:`predictor` because imports go ``monitor -> alerts -> predictor``: every layer
can use it from here.
"""
from __future__ import annotations

import datetime as dt
import math
import re
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["parse_duration", "parse_step", "UNIT_SECONDS", "to_unix_seconds", "iso_utc", "utc_timestamp",
           "utc_index", "index_seconds", "silences"]

# Seconds in each unit name a person may write. "m" is minutes (as in "10m"): months and
# metres never mean a duration here.
UNIT_SECONDS = {
    "s": 1.0, "sec": 1.0, "secs": 1.0, "second": 1.0, "seconds": 1.0,
    "m": 60.0, "min": 60.0, "mins": 60.0, "minute": 60.0, "minutes": 60.0,
    "h": 3600.0, "hr": 3600.0, "hrs": 3600.0, "hour": 3600.0, "hours": 3600.0,
    "d": 86400.0, "day": 86400.0, "days": 86400.0,
    "w": 604800.0, "week": 604800.0, "weeks": 604800.0,
}
_NUMBER = r"(?:\d+(?:\.\d*)?|\.\d+)"
_TERM = re.compile(rf"\s*({_NUMBER})\s*([a-z]+)\s*")
_BARE = re.compile(rf"^\s*({_NUMBER})\s*$")
_CLOCK = re.compile(r"^\s*(\d+):([0-5]\d)(?::([0-5]\d(?:\.\d*)?))?\s*$")
_EXAMPLES = "'90s', '10min', '2h', '1d' or '1h30min'"


def _text_seconds(text: str) -> float | None:
    """Seconds in a written duration, or None when it is not one."""
    low = text.lower()
    m = _BARE.match(low)
    if m:
        return float(m.group(1))
    m = _CLOCK.match(low)
    if m:
        return int(m.group(1)) * 3600.0 + int(m.group(2)) * 60.0 + float(m.group(3) or 0.0)
    pos, total, terms = 0, 0.0, 0
    low = low.strip()
    while pos < len(low):
        m = _TERM.match(low, pos)
        if not m or m.group(2) not in UNIT_SECONDS:
            return None
        total += float(m.group(1)) * UNIT_SECONDS[m.group(2)]
        pos, terms = m.end(), terms + 1
    return total if terms else None


def parse_duration(value: Any, *, positive: bool = False, maximum: float | None = None) -> float:
    """A duration in seconds from a number, a timedelta, or text a person wrote.

    Parameters
    ----------
    value : int, float, str, datetime.timedelta or numpy.timedelta64
        A number is seconds [s]. Text is one or more ``<number><unit>`` terms (``"90s"``,
        ``"10min"``, ``"2h"``, ``"1.5d"``, ``"1h30min"``; units s, min or m, h, d, w and
        their long names), a bare number of seconds (``"600"``) or a clock ``"H:MM[:SS]"``.
    positive : bool
        Refuse zero (a step or a period, not a hold time).
    maximum : float, optional
        Largest duration accepted [s].

    Returns
    -------
    float
        Seconds [s], finite and not negative.

    Raises
    ------
    ValueError
        With a message that reads well after a key path or an option name.
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a duration such as {_EXAMPLES}, got {value!r}")
    if isinstance(value, (int, float, np.integer, np.floating)):
        secs = float(value)
    elif isinstance(value, dt.timedelta):
        secs = value.total_seconds()
    elif isinstance(value, np.timedelta64):
        if np.isnat(value):
            raise ValueError(f"expected a duration such as {_EXAMPLES}, got NaT")
        secs = float(value / np.timedelta64(1, "ns")) * 1e-9
    elif isinstance(value, str):
        found = _text_seconds(value)
        if found is None:
            raise ValueError(f"expected a duration such as {_EXAMPLES}, got {value!r}")
        secs = found
    else:
        raise ValueError(f"expected a duration such as {_EXAMPLES}, got {value!r}")
    if not math.isfinite(secs) or secs < 0:
        raise ValueError(f"expected a finite duration of zero or more, got {value!r}")
    if positive and secs == 0:
        raise ValueError(f"expected a duration above zero, got {value!r}")
    if maximum is not None and secs > maximum:
        raise ValueError(f"expected a duration of at most {maximum / 86400:g} days, got {value!r}")
    return secs


def parse_step(step: Any) -> float:
    """A time step [s] above zero (``parse_duration(step, positive=True)``)."""
    return parse_duration(step, positive=True)


def to_unix_seconds(times) -> np.ndarray:
    """Convert times to Unix seconds UTC.

    Parameters
    ----------
    times : array_like
        ``datetime64`` array (UTC), pandas DatetimeIndex or Series (tz-aware converted
        to UTC, naive taken as UTC), a sequence of datetimes or ISO strings, a single
        time, or numbers already in Unix seconds.

    Returns
    -------
    numpy.ndarray
        Unix seconds [s] as float, 1-D; NaT becomes NaN.
    """
    if isinstance(times, (pd.Series,)):
        times = pd.DatetimeIndex(times)
    if not isinstance(times, pd.DatetimeIndex):
        arr = np.atleast_1d(np.asarray(times))
        if np.issubdtype(arr.dtype, np.number):
            return arr.astype(float).ravel()
        if np.issubdtype(arr.dtype, np.datetime64):
            ns = arr.astype("datetime64[ns]").astype(np.int64).astype(float)
            ns[np.isnat(arr)] = np.nan
            return ns.ravel() / 1e9
        times = pd.DatetimeIndex(pd.to_datetime(list(arr.ravel()), utc=True))
    if times.tz is not None:
        times = times.tz_convert("UTC").tz_localize(None)
    ns = times.as_unit("ns").asi8.astype(float)
    ns[np.asarray(times.isna())] = np.nan
    return ns / 1e9


def iso_utc(t: float) -> str:
    """Unix seconds [s] as ISO 8601 text in UTC with ``Z``, to the second."""
    return dt.datetime.fromtimestamp(float(t), dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def utc_timestamp(t: Any) -> pd.Timestamp | None:
    """Unix seconds [s] as a tz-aware UTC Timestamp; None (or NaN) stays None."""
    if t is None or (isinstance(t, float) and math.isnan(t)):
        return None
    return pd.Timestamp(float(t), unit="s", tz="UTC")


def utc_index(index: pd.Index) -> pd.DatetimeIndex:
    """The index as a UTC DatetimeIndex (naive taken as UTC).

    Raises
    ------
    TypeError
        The index holds no times.
    """
    if not isinstance(index, pd.DatetimeIndex):
        raise TypeError("a series of times needs a DatetimeIndex")
    return index.tz_localize("UTC") if index.tz is None else index.tz_convert("UTC")


def index_seconds(index: pd.Index) -> np.ndarray:
    """Unix seconds [s] (float) of a DatetimeIndex (naive taken as UTC)."""
    return utc_index(index).as_unit("ns").asi8 / 1e9


def silences(t, limit: float, start: float | None = None, end: float | None = None):
    """Gaps: the one definition of the project. A gap is a span longer than ``limit`` with no
    sample, between two consecutive samples.

    Parameters
    ----------
    t : array_like of numbers
        Sample times, in any one unit (Unix seconds [s], or nanoseconds for exact times);
        sorted here.
    limit : float
        The longest silence that is not a gap, in the unit of ``t`` (quality control uses its
        ``gap_limit``; the daily report twice the sampling interval).
    start, end : float, optional
        The edges of a window, taken as samples, so a silence at either edge counts too.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        For each gap, the time of the sample before it and of the sample after it (or the
        window edge), in the unit and type of ``t``.

    References
    ----------
    U.S. IOOS (2021), QARTOD water level manual v2.1, Test 1 (timing/gap): a sample is due
    within a set time of the one before it.
    """
    edges = np.sort(np.asarray(t).ravel())
    if start is not None:
        edges = np.concatenate([np.asarray([start], dtype=edges.dtype), edges])
    if end is not None:
        edges = np.concatenate([edges, np.asarray([end], dtype=edges.dtype)])
    d = np.diff(edges)
    at = np.flatnonzero(d > limit)
    return edges[at], edges[at + 1]
