"""Telemetry line parsing: configurable columns, ISO 8601 or epoch times, units, offsets.

Pure functions, no I/O. :func:`parse_lines` reads a batch at once and sorts every line
into one of three bins: an observation, a reject with a reason, or skipped (blank, comment
or header). :func:`parse_line` is the same for one line. A batch is read in two steps: the
fast path (:mod:`monitor.feeds.fastparse`, numpy over the joined batch) reads the lines of
the common shapes it is sure of; the general parser (vectorised with pandas, line by line
where it must) reads the rest and decides every reject and skip, with its reason. A line's
outcome never depends on the other lines of its batch: it is what :func:`parse_line`, the
general parser alone, gives for it.

Times come out as integer Unix seconds, UTC (rounded to the nearest second); levels in
metres on the station datum (reading x unit factor + sensor offset); a barometer in hPa.
A line whose time field is empty, or a format without a time column, takes the time the
line was received and is marked ``time_source = 'receive'``. With ``max_ahead``, a line
stamped further than that ahead of the time it was received is rejected: no gauge can
report the future, and a clock that does must not move anything downstream (QARTOD
Test 1, timing; U.S. IOOS 2021).
"""
from __future__ import annotations

import gc
import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from monitor.feeds.fastparse import T_MAX as _T_MAX
from monitor.feeds.fastparse import T_MIN as _T_MIN
from monitor.feeds.fastparse import read_batch
from predictor.timeutil import iso_utc


MAX_TEXT = 500  # characters of a rejected line kept in the store
# The tail of an ISO 8601 time carrying a UTC offset (the 'Z' designator is checked first).
_OFFSET_TAIL = re.compile(r"\d[+-]\d{2}(?::?\d{2})?$")


@dataclass(frozen=True)
class LineFormat:
    """How to read one telemetry line of a sensor.

    Columns are 1-based as a user counts them; ``time_column = 0`` means the line has
    no time and the receive time is used (stored with ``time_source = 'receive'``).
    ``scale`` converts the reading to metres (hPa for a barometer); ``offset`` is then
    added (sensor zero to station datum).
    """

    delimiter: str = ","
    time_column: int = 1
    value_column: int = 2
    time_format: str = "iso"
    naive_time_zone: str = ""
    comment: str = "#"
    header_lines: int = 0
    missing_marker: str = ""
    scale: float = 1.0
    offset: float = 0.0


def _is_aware(s: str) -> bool:
    """True when an ISO 8601 date-time string ends with 'Z' or a UTC offset."""
    return s[-1:] in ("Z", "z") or _OFFSET_TAIL.search(s[-7:]) is not None


@dataclass(frozen=True)
class Observation:
    """One parsed line: time [s, Unix UTC], value [m or hPa], where the time came from."""

    t: int
    value: float
    time_source: str
    lineno: int


@dataclass(frozen=True)
class Reject:
    """A line that could not be read, with its line number and the reason."""

    lineno: int
    text: str
    reason: str


@dataclass
class ParsedLines:
    """A parsed batch: arrays of the good lines, and the rejects."""

    t: np.ndarray            # int64 [s]
    value: np.ndarray        # float64 [m or hPa]
    time_source: np.ndarray  # object: 'sensor' or 'receive'
    lineno: np.ndarray       # int64
    rejects: list
    skipped: int
    index: np.ndarray | None = None  # int64: position of each good line in the input

    def __len__(self) -> int:
        return len(self.t)


def _clean_text(text: str | bytes) -> tuple[str | None, str]:
    """(text to parse or None, text safe to store)."""
    if isinstance(text, (bytes, bytearray)):
        try:
            s = bytes(text).decode("utf-8")
        except UnicodeDecodeError:
            return None, bytes(text)[:MAX_TEXT].decode("utf-8", "backslashreplace")
    else:
        s = str(text)
    safe = s if s.isascii() else s.encode("utf-8", "backslashreplace").decode("utf-8")
    return s, safe[:MAX_TEXT].rstrip("\r\n")


def parse_lines(texts: Sequence[str | bytes], fmt: LineFormat, received: float | Sequence[float],
                linenos: Sequence[int] | None = None, max_ahead: float | None = None) -> ParsedLines:
    """Parse a batch of telemetry lines.

    Parameters
    ----------
    texts : sequence of str or bytes
        The lines, with or without line endings.
    fmt : LineFormat
        Columns (1-based), delimiter, time format, unit factor ``scale`` and ``offset``.
    received : float or sequence of float
        When each line was received [s, Unix UTC]; used for lines without a time.
    linenos : sequence of int, optional
        Line numbers for messages (default 1, 2, ...).
    max_ahead : float, optional
        Tolerance [s]: a line stamped more than this after its receive time is rejected
        (the QARTOD timing test's time stamp check). Not checked when None.

    Returns
    -------
    ParsedLines
        Good lines as arrays (in input order), the rejects with reasons, and the count of
        skipped blank, comment and header lines. Never raises for any text.

    References
    ----------
    ISO 8601-1:2019, Date and time -- Representations for information interchange.
    U.S. IOOS (2021). Manual for Real-Time Quality Control of Water Level Data (QARTOD),
    version 2.1, Test 1 (timing/gap).
    """
    # Millions of small lists would otherwise trigger the cyclic collector over and over.
    was_enabled = gc.isenabled()
    gc.disable()
    try:
        return _parse_fast_then_general(texts, fmt, received, linenos, max_ahead)
    finally:
        if was_enabled:
            gc.enable()


def _parse_fast_then_general(texts, fmt: LineFormat, received, linenos, max_ahead) -> ParsedLines:
    """The fast path over the whole batch, the general parser over the lines it left."""
    n = len(texts)
    linenos, recv = _numbers_and_receive_times(n, received, linenos)
    fast = read_batch(texts, fmt, recv, linenos, max_ahead) if n else None
    if fast is None:
        return _parse_general(texts, fmt, recv, linenos, max_ahead)
    source = "sensor" if fmt.time_column > 0 else "receive"
    if fast.ok.all():
        return ParsedLines(fast.t, fast.value, _filled(n, source), linenos, [], 0, np.arange(n, dtype=np.int64))
    read = np.flatnonzero(fast.ok)
    left = np.flatnonzero(~fast.ok)
    rest = _parse_general([texts[i] for i in left.tolist()], fmt, recv[left], linenos[left], max_ahead)
    return _merged(read, fast, left, rest, source, linenos)


def _merged(read: np.ndarray, fast, left: np.ndarray, rest: ParsedLines, source: str,
            linenos: np.ndarray) -> ParsedLines:
    """One :class:`ParsedLines` in input order from the fast path's lines (positions ``read``)
    and the general parser's result ``rest`` over the lines at positions ``left``."""
    pos = np.concatenate((read, left[rest.index]))
    order = np.argsort(pos, kind="stable")
    t = np.concatenate((fast.t[read], rest.t))[order]
    value = np.concatenate((fast.value[read], rest.value))[order]
    src = np.concatenate((_filled(read.size, source), rest.time_source))[order]
    pos = pos[order]
    return ParsedLines(t, value, src, linenos[pos], rest.rejects, rest.skipped, pos)


def _filled(n: int, text: str) -> np.ndarray:
    """An object array of ``n`` times ``text`` (``np.full`` is ten times slower for objects)."""
    out = np.empty(n, dtype=object)
    out.fill(text)
    return out


def _to_float(fields: list[str]) -> np.ndarray:
    """Numbers from text, as ``float(text)`` reads each; NaN where a field is not a number.
    (Field by field once the whole list fails, so one bad field cannot change how another
    is read.)"""
    try:
        return np.array(fields, dtype=float)
    except (ValueError, TypeError, OverflowError):
        return np.array([_one_float(f) for f in fields], dtype=float)


def _one_float(field: str) -> float:
    try:
        return float(field)
    except (ValueError, TypeError, OverflowError):
        return np.nan


def _parse_general(texts, fmt: LineFormat, received, linenos, max_ahead=None) -> ParsedLines:
    """The general parser, each line on its own (:func:`parse_line` is this for one line):
    the steps in order. The first reason found for a line wins: its value, its time, the
    time's range, then ``max_ahead``."""
    n = len(texts)
    linenos, recv = _numbers_and_receive_times(n, received, linenos)
    stripped, keep, unreadable = _lines_to_read(texts, fmt, linenos)
    skipped = n - len(keep) - len(unreadable)
    keep, tfield, vfield, short = _split_columns(texts, stripped, keep, fmt, linenos)
    if not keep:
        return ParsedLines(np.empty(0, np.int64), np.empty(0), np.empty(0, object), np.empty(0, np.int64),
                           sorted(unreadable + short, key=lambda r: r.lineno), skipped, np.empty(0, np.int64))
    idx = np.asarray(keep, dtype=np.int64)
    recv_sel = recv[idx]
    value, value_reasons = _read_values(vfield, fmt)
    t, source, has, time_reasons = _read_times(tfield, recv_sel, fmt)
    ahead_reasons = _ahead_of_clock(t, recv_sel, has, max_ahead)
    reasons: dict[int, str] = {}
    for found in (value_reasons, time_reasons, ahead_reasons):
        for j, r in found.items():
            reasons.setdefault(j, r)
    return _sorted_out(texts, linenos, idx, t, value, source, reasons, unreadable + short, skipped)


def _numbers_and_receive_times(n: int, received, linenos) -> tuple[np.ndarray, np.ndarray]:
    """Line numbers (int64; default 1..n) and receive times [s, Unix UTC] (float64), one per line."""
    if linenos is None:
        linenos = range(1, n + 1)
    if isinstance(linenos, range):
        linenos = np.arange(linenos.start, linenos.stop, linenos.step, dtype=np.int64)
    elif isinstance(linenos, np.ndarray):
        linenos = linenos.astype(np.int64)
    else:
        linenos = np.asarray(list(linenos), dtype=np.int64)
    if np.ndim(received) == 0:
        recv = np.full(n, float(received))
    else:
        recv = np.asarray(received, dtype=float)
    return linenos, recv


def _lines_to_read(texts, fmt: LineFormat, linenos: np.ndarray) -> tuple[list, list[int], list[Reject]]:
    """(stripped text of each line, or None where not UTF-8; positions of the lines to read;
    rejects of the lines that are not UTF-8). Blank, comment and header lines are skipped."""
    comment, header = fmt.comment, fmt.header_lines
    if all(x.__class__ is str for x in texts):
        stripped: list = [x.strip() for x in texts]
    else:
        stripped = []
        for raw in texts:
            s, _ = _clean_text(raw)
            stripped.append(None if s is None else s.strip())
    keep: list[int] = []
    rejects: list[Reject] = []
    if comment and not header and None not in stripped:
        keep = [i for i, s in enumerate(stripped) if s and not s.startswith(comment)]
    else:
        for i, s in enumerate(stripped):
            if s is None:
                rejects.append(Reject(int(linenos[i]), _clean_text(texts[i])[1], "not valid UTF-8 text"))
            elif s and not (comment and s.startswith(comment)) and not (header and 0 < linenos[i] <= header):
                keep.append(i)
    return stripped, keep, rejects


def _split_columns(texts, stripped: list, keep: list[int], fmt: LineFormat,
                   linenos: np.ndarray) -> tuple[list[int], list[str], list[str], list[Reject]]:
    """(positions of the lines with enough columns, their time fields ('' without a time
    column), their value fields, rejects of the lines with too few columns)."""
    tcol, vcol = fmt.time_column - 1, fmt.value_column - 1
    need = max(tcol, vcol) + 1
    delim = None if fmt.delimiter == "whitespace" else fmt.delimiter
    parts = [stripped[i].split(delim) for i in keep]
    short = [k for k, p in enumerate(parts) if len(p) < need]
    rejects: list[Reject] = []
    if short:
        for k in short:
            i = keep[k]
            rejects.append(Reject(int(linenos[i]), _clean_text(texts[i])[1],
                                  f"expected at least {need} columns, found {len(parts[k])}"))
        bad = set(short)
        keep = [i for k, i in enumerate(keep) if k not in bad]
        parts = [p for k, p in enumerate(parts) if k not in bad]
    vfield = [p[vcol].strip() for p in parts]
    tfield = [p[tcol].strip() for p in parts] if tcol >= 0 else [""] * len(parts)
    return keep, tfield, vfield, rejects


def _read_values(vfield: list[str], fmt: LineFormat) -> tuple[np.ndarray, dict[int, str]]:
    """Values [m or hPa] (reading x ``scale`` + ``offset``) and {index: reason} where a field is
    empty, the missing-value marker, or not a finite number."""
    m = len(vfield)
    reasons: dict[int, str] = {}
    num = _to_float(vfield)
    value = num * fmt.scale + fmt.offset
    bad_v = ~np.isfinite(value)
    if fmt.missing_marker:
        marker = np.asarray(vfield, dtype=object) == fmt.missing_marker
    else:
        marker = np.zeros(m, bool)
    for j in np.flatnonzero(bad_v | marker):
        v = vfield[j]
        if marker[j]:
            reasons[j] = f"value is the missing-value marker {fmt.missing_marker!r}"
        elif v == "":
            reasons[j] = "value field is empty"
        elif np.isnan(num[j]) and v.lower() not in ("nan", "+nan", "-nan"):
            reasons[j] = f"value {_short(v)} is not a number"
        else:
            reasons[j] = f"value {_short(v)} is not a finite number"
    return value, reasons


def _read_times(tfield: list[str], recv_sel: np.ndarray,
                fmt: LineFormat) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict[int, str]]:
    """Times [s, Unix UTC] (int64; an empty field takes the receive time, rounded), their source
    ('sensor' or 'receive'), which lines carry a time, and {index: reason} where a time is
    unreadable or outside the years 1900 to 2200."""
    m = len(tfield)
    reasons: dict[int, str] = {}
    t = np.zeros(m, dtype=np.int64)
    source = np.full(m, "sensor", dtype=object)
    tarr = np.asarray(tfield, dtype=object)
    empty = tarr == ""
    if empty.any():
        t[empty] = np.floor(recv_sel[empty] + 0.5).astype(np.int64)
        source[empty] = "receive"
    has = ~empty
    if has.any():
        ts, treasons = _parse_times(tarr[has], fmt)
        t[has] = ts
        pos = np.flatnonzero(has)
        for k, r in treasons.items():
            reasons.setdefault(pos[k], r)
    out_of_range = (t < _T_MIN) | (t > _T_MAX)
    for j in np.flatnonzero(out_of_range):
        reasons.setdefault(j, "time is outside the years 1900 to 2200")
    return t, source, has, reasons


def _ahead_of_clock(t: np.ndarray, recv_sel: np.ndarray, has: np.ndarray,
                    max_ahead: float | None) -> dict[int, str]:
    """{index: reason} for lines stamped more than ``max_ahead`` [s] after they were received
    (the QARTOD timing test); none when ``max_ahead`` is None. Only times within the years
    1900 to 2200 are looked at (the others are refused already)."""
    if max_ahead is None:
        return {}
    ahead = t - recv_sel
    in_range = (t >= _T_MIN) & (t <= _T_MAX)
    return {j: (f"time {iso_utc(int(t[j]))} is {_span(float(ahead[j]))} ahead of the clock "
                f"when received (more than {_span(max_ahead)} is refused: QARTOD timing test)")
            for j in np.flatnonzero((ahead > max_ahead) & has & in_range)}


def _sorted_out(texts, linenos: np.ndarray, idx: np.ndarray, t: np.ndarray, value: np.ndarray,
                source: np.ndarray, reasons: dict[int, str], rejects: list[Reject],
                skipped: int) -> ParsedLines:
    """The good lines as arrays in input order; every reject (those given first) by line number."""
    good = np.ones(idx.size, dtype=bool)
    good[list(reasons)] = False
    rejects = list(rejects)
    for j in np.flatnonzero(~good):
        i = int(idx[j])
        rejects.append(Reject(int(linenos[i]), _clean_text(texts[i])[1].rstrip("\r\n"), reasons[j]))
    rejects.sort(key=lambda r: r.lineno)
    return ParsedLines(t[good], value[good], source[good], linenos[idx[good]], rejects, skipped, idx[good])


def _span(seconds: float) -> str:
    """A duration for a message: seconds, minutes, hours or days."""
    for unit, size in (("years", 365.25 * 86400), ("days", 86400), ("h", 3600), ("min", 60)):
        if seconds >= 2 * size:
            return f"{seconds / size:.0f} {unit}"
    return f"{seconds:.0f} s"


def _short(s: str) -> str:
    return repr(s if len(s) <= 40 else s[:37] + "...")


def _parse_times(tarr: np.ndarray, fmt: LineFormat) -> tuple[np.ndarray, dict[int, str]]:
    """Parse time fields to Unix seconds; returns (seconds, {index: reason}) for failures."""
    n = len(tarr)
    out = np.zeros(n, dtype=np.int64)
    reasons: dict[int, str] = {}
    ser = pd.Series(tarr, dtype=object)
    if fmt.time_format in ("epoch", "epoch_ms"):
        num = _to_float(list(tarr))
        if fmt.time_format == "epoch_ms":
            num = num / 1000.0
        ok = np.isfinite(num) & (num >= _T_MIN) & (num <= _T_MAX)
        out[ok] = np.floor(num[ok] + 0.5).astype(np.int64)
        for j in np.flatnonzero(~ok):
            what = "seconds" if fmt.time_format == "epoch" else "milliseconds"
            if np.isfinite(num[j]):
                reasons[j] = "time is outside the years 1900 to 2200"
            else:
                reasons[j] = f"time {_short(str(tarr[j]))} is not a number of {what} since 1970-01-01 UTC"
        return out, reasons

    aware = np.fromiter((_is_aware(s) for s in tarr), dtype=bool, count=n)
    # a bare date (no time of day) is refused: a gauge sample needs a time
    timed = np.fromiter(("T" in s or " " in s or "t" in s for s in tarr), dtype=bool, count=n)
    ns = np.full(n, np.iinfo(np.int64).min, dtype=np.int64)
    if aware.any():
        ns[aware] = _to_ns(pd.to_datetime(ser[aware], format="ISO8601", utc=True, errors="coerce"))
    naive = ~aware
    if naive.any() and fmt.naive_time_zone:
        local = pd.to_datetime(ser[naive], format="ISO8601", errors="coerce")
        try:
            local = local.dt.tz_localize(fmt.naive_time_zone, ambiguous="NaT", nonexistent="NaT")
            ns[naive] = _to_ns(local.dt.tz_convert("UTC"))
        except (TypeError, AttributeError, ValueError):
            pass  # every field unreadable: left as NaT, reasons below
    nat = np.iinfo(np.int64).min
    for j in range(n):
        if ns[j] == nat or not timed[j]:
            s = str(tarr[j])
            if not timed[j]:
                reasons[j] = f"time {_short(s)} is not an ISO 8601 date and time"
            elif naive[j] and not fmt.naive_time_zone:
                reasons[j] = (f"time {_short(s)} has no UTC offset or 'Z' (set the sensor's "
                              f"line.naive_time_zone to read local times)")
            elif naive[j] and pd.notna(pd.to_datetime(s, format="ISO8601", errors="coerce")):
                reasons[j] = f"local time {_short(s)} is ambiguous or skipped at a daylight-saving change"
            else:
                reasons[j] = f"time {_short(s)} is not an ISO 8601 date and time"
    ok = ns != nat
    # round to the nearest second
    out[ok] = (ns[ok] + 500_000_000) // 1_000_000_000
    return out, reasons


def _to_ns(values: pd.Series) -> np.ndarray:
    """Nanoseconds since the epoch, with NaT as int64 min."""
    if getattr(values.dt, "tz", None) is not None:
        values = values.dt.tz_convert("UTC").dt.tz_localize(None)
    return values.to_numpy(dtype="datetime64[ns]").view(np.int64)


def parse_line(text: str | bytes, fmt: LineFormat, received: float, lineno: int = 1,
               max_ahead: float | None = None) -> Observation | Reject | None:
    """Parse one line: an :class:`Observation`, a :class:`Reject` with a reason, or ``None``
    for a blank, comment or header line. Never raises for any text. ``received`` [Unix s,
    UTC] is when it arrived; a time stamped more than ``max_ahead`` [s] after it is refused.
    The observation's ``t`` is [Unix s, UTC], its value [m] (or [hPa]) after ``fmt``'s scale
    and offset."""
    res = _parse_general([text], fmt, received, [lineno], max_ahead)
    if len(res):
        return Observation(int(res.t[0]), float(res.value[0]), str(res.time_source[0]), int(res.lineno[0]))
    if res.rejects:
        return res.rejects[0]
    return None
