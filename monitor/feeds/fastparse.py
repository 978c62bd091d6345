"""The fast path of :func:`monitor.feeds.parse.parse_lines`: a whole batch read at C speed.

The batch is joined into one byte buffer and read with numpy: line and field boundaries
from the positions of the newline and delimiter bytes, fixed-width ISO 8601 times and
plain decimal numbers turned into integers by digit arithmetic. The fast path only
*accepts* lines; it never rejects or skips one. A line it is not certain about (a blank,
comment or header line, a byte outside printable ASCII, too few columns, a time or number
of any other shape, the missing-value marker, a time outside the years 1900 to 2200 or
ahead of the clock, a local time at a clock change) is left undecided, and the caller
reads it with the general parser, which gives it its outcome and reason. So every line's
outcome is the general parser's (``tests/test_parse_fast.py`` checks this against
:func:`monitor.feeds.parse.parse_line` over random mixes of good and bad lines).

What it reads:

- times ``YYYY-MM-DDTHH:MM:SSZ``, ``YYYY-MM-DDTHH:MM:SS+HH:MM`` (or ``-HH:MM``) and, with a
  naive time zone, ``YYYY-MM-DDTHH:MM:SS`` (localised by pandas, ambiguous and skipped local
  times left undecided); epoch seconds or milliseconds written as plain decimals;
- values written as plain decimals (``-1.234``, ``12``, ``.5``; at most 15 digits): a
  decimal of at most 15 digits is an integer below 2**53 divided by a power of ten that
  is exact in binary, and an IEEE 754 division rounds the exact quotient once, so the
  result is the double nearest the decimal: the very double ``float(text)`` gives, since
  Python converts decimal text with correct rounding (IEEE 754-2019 clause 5.1 and
  CPython's use of D. Gay's correctly rounded conversion, both from memory; checked
  against ``float`` bit for bit by the property test);
- a one-character delimiter (or ``whitespace``, read as single spaces) and no time column
  (receive times).

Days from a civil date follow H. Hinnant's ``days_from_civil`` algorithm ("chrono-
Compatible Low-Level Date Algorithms", 2013), proleptic Gregorian calendar as ISO 8601.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

#: Plausible epoch range: 1900-01-01 .. 2200-01-01 [s]; outside it a clock or a format is wrong.
T_MIN, T_MAX = -2208988800, 7258118400
#: Most digits of a number read on the fast path (below 2**53, and 10**15 exact in binary).
MAX_DIGITS = 15
#: Widest field read on the fast path [characters]; wider ones go to the general parser.
MAX_FIELD = 24
_POW10_FLOAT = np.array([float(10 ** k) for k in range(MAX_DIGITS + 1)])
_PAD = MAX_FIELD + 32  # zero bytes after the buffer: more than any column read past a field
_NL, _DOT, _PLUS, _MINUS, _ZERO = 10, ord("."), ord("+"), ord("-"), ord("0")


@dataclass(frozen=True)
class FastRead:
    """What the fast path decided: for each input line whether it was read (``ok``), and
    the time [s, Unix UTC] and value [m or hPa] of the lines read (undefined elsewhere)."""

    ok: np.ndarray      # bool
    t: np.ndarray       # int64
    value: np.ndarray   # float64


def read_batch(texts, fmt: Any, recv: np.ndarray, linenos: np.ndarray, max_ahead: float | None) -> FastRead | None:
    """Read the lines the fast path is sure of.

    Parameters
    ----------
    texts : sequence of str or bytes
        The batch (all str or all bytes), without line endings.
    fmt : monitor.feeds.parse.LineFormat
        The feed's line format (its ``delimiter``, ``time_column``, ``value_column``,
        ``time_format``, ``naive_time_zone``, ``comment``, ``header_lines``,
        ``missing_marker``, ``scale`` and ``offset`` are read; the type is not imported
        here, since the parser imports this module and imports go one way).
    recv : ndarray of float
        Receive time of each line [s, Unix UTC].
    linenos : ndarray of int
        Line number of each line (header lines are left undecided).
    max_ahead : float or None
        Lines stamped more than this [s] after their receive time are left undecided.

    Returns
    -------
    FastRead or None
        None when the batch cannot be joined into one buffer (mixed types, a line with a
        newline in it, text that cannot be encoded): the caller reads it all the general way.
    """
    buf = _join(texts)
    delim = _delimiter_byte(fmt.delimiter)
    time_format = fmt.time_format
    if buf is None or delim is None or time_format not in ("iso", "epoch", "epoch_ms"):
        return None
    # zero bytes past the end, so that a column read past a field near the end stays inside
    padded = np.frombuffer(buf + bytes(_PAD), dtype=np.uint8)
    a = padded[:len(buf)]
    n = len(texts)
    nl = np.flatnonzero(a == _NL)
    if nl.size != n - 1:
        return None
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [a.size]))
    ok = _plain_lines(a, starts, ends, delim, fmt.comment, fmt.header_lines, linenos)
    tcol, vcol = fmt.time_column - 1, fmt.value_column - 1
    fields = _Fields(a, starts, ends, delim, max(tcol, vcol) + 1)
    a = padded
    ok &= fields.enough
    vs, ve = fields.span(vcol)
    num, good = _decimals(a, vs, ve, ok)
    ok &= good
    if fmt.missing_marker:
        ok &= ~_equals(a, vs, ve, fmt.missing_marker.encode("utf-8", "surrogatepass"))
    value = num * fmt.scale + fmt.offset
    ok &= np.isfinite(value)
    if tcol < 0:
        with np.errstate(invalid="ignore"):
            t = np.floor(recv + 0.5).astype(np.int64)
        return FastRead(ok & (t >= T_MIN) & (t <= T_MAX), t, value)
    ts, te = fields.span(tcol)
    if time_format == "iso":
        t, good = _iso_times(a, ts, te, ok, fmt.naive_time_zone)
    else:
        t, good = _epoch_times(a, ts, te, ok, time_format == "epoch_ms")
    ok &= good
    if max_ahead is not None:
        ok &= ~(t - recv > max_ahead)
    return FastRead(ok, t, value)


# ------------------------------------------------------------------------------ the buffer

def _join(texts) -> bytes | None:
    """The batch as one UTF-8 buffer, lines joined by newlines; None if it cannot be."""
    kinds = set(map(type, texts))
    if kinds == {str}:
        try:
            return "\n".join(texts).encode("utf-8")
        except UnicodeEncodeError:  # lone surrogates: the general parser deals with them
            return None
    if kinds == {bytes}:
        return b"\n".join(texts)
    return None


def _delimiter_byte(delimiter: str) -> int | None:
    """The delimiter as one byte (``whitespace`` read as a single space); None if the fast
    path cannot split on it (more than one character, or one that numbers and times use)."""
    d = " " if delimiter == "whitespace" else delimiter
    if len(d) != 1 or not (d == "\t" or " " <= d <= "~") or d.isalnum() or d in "+-.:":
        return None
    return ord(d)


def _plain_lines(a: np.ndarray, starts: np.ndarray, ends: np.ndarray, delim: int, comment: str,
                 header_lines: int, linenos: np.ndarray) -> np.ndarray:
    """Lines the fast path may read: not empty, printable ASCII and the delimiter only, the
    first and last byte not white space (so stripping changes nothing), no comment, no header."""
    ok = ends > starts
    odd = ((a < 0x21) | (a > 0x7E)) & (a != delim) & (a != _NL)
    where = np.flatnonzero(odd)
    if where.size:
        ok[np.searchsorted(starts, where, side="right") - 1] = False
    if delim <= 0x20 and a.size:
        # a white-space delimiter at either end would be stripped off, and two in a row are
        # one to a split on white space
        ok &= (a[np.minimum(starts, a.size - 1)] != delim) & (a[np.maximum(ends - 1, 0)] != delim)
        twice = np.flatnonzero((a[1:] == delim) & (a[:-1] == delim))
        if twice.size:
            ok[np.searchsorted(starts, twice, side="right") - 1] = False
    if comment:
        ok &= ~_starts_with(a, starts, ends, comment.encode("utf-8", "surrogatepass"))
    if header_lines:
        ok &= ~((linenos > 0) & (linenos <= header_lines))
    return ok


def _starts_with(a: np.ndarray, starts: np.ndarray, ends: np.ndarray, prefix: bytes) -> np.ndarray:
    """Lines whose bytes begin with ``prefix``."""
    hit = (ends - starts) >= len(prefix)
    if not hit.any():
        return hit
    for k, byte in enumerate(prefix):
        hit &= a[np.minimum(starts + k, a.size - 1)] == byte
    return hit


def _equals(a: np.ndarray, s: np.ndarray, e: np.ndarray, text: bytes) -> np.ndarray:
    """Fields (from ``s`` to ``e``) that are exactly ``text``."""
    hit = (e - s) == len(text)
    if not hit.any():
        return hit
    for k, byte in enumerate(text):
        hit &= a[np.minimum(s + k, a.size - 1)] == byte
    return hit


class _Fields:
    """Where each field of each line starts and ends, from the delimiter positions."""

    def __init__(self, a: np.ndarray, starts: np.ndarray, ends: np.ndarray, delim: int, need: int):
        self.starts, self.ends = starts, ends
        self.pos = np.flatnonzero(a == delim)
        line = np.searchsorted(starts, self.pos, side="right") - 1
        count = np.bincount(line, minlength=starts.size)
        self.first = np.cumsum(count) - count  # index in pos of each line's first delimiter
        self.count = count
        self.enough = count >= need - 1

    def span(self, col: int) -> tuple[np.ndarray, np.ndarray]:
        """(start, end) of field ``col`` (0-based) of every line; meaningful where ``enough``."""
        if self.pos.size == 0:
            return self.starts.copy(), self.ends.copy()
        last = self.pos.size - 1
        if col == 0:
            s = self.starts.copy()
        else:
            s = self.pos[np.minimum(self.first + col - 1, last)] + 1
        e = np.where(self.count > col, self.pos[np.minimum(self.first + col, last)], self.ends)
        return s, e


# ------------------------------------------------------------------------------ numbers

def _column(a: np.ndarray, s: np.ndarray, k: int) -> np.ndarray:
    """Byte ``k`` of each field starting at ``s`` (any byte where a field is shorter; ``a``
    is padded with ``_PAD`` zero bytes, and no field read is longer)."""
    return a[s + k]


def _decimals(a: np.ndarray, s: np.ndarray, e: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Plain decimals ``[+-]digits[.digits]`` (at most 15 digits) as doubles, equal to
    ``float(text)``; and which fields were read so. Read column by column (Horner's rule)."""
    n = s.size
    num = np.full(n, np.nan)
    good = np.zeros(n, dtype=bool)
    length = e - s
    cand = np.flatnonzero(ok & (length > 0) & (length <= MAX_FIELD))
    if cand.size == 0:
        return num, good
    s, length = s[cand], length[cand]
    m = cand.size
    mantissa = np.zeros(m, dtype=np.int64)
    ndig = np.zeros(m, dtype=np.int64)
    frac = np.zeros(m, dtype=np.int64)
    seen_dot = np.zeros(m, dtype=bool)
    fine = np.ones(m, dtype=bool)
    c = _column(a, s, 0)
    negative = c == _MINUS
    signed = negative | (c == _PLUS)
    for k in range(int(length.max())):
        if k:
            c = _column(a, s, k)
        inside = k < length
        d = c - np.uint8(_ZERO)  # wraps round below '0': one comparison finds the digits
        digit = inside & (d <= 9)
        dot = inside & (c == _DOT)
        other = inside & ~digit & ~dot
        if k == 0:
            other &= ~signed
        fine &= ~other & ~(dot & seen_dot)
        seen_dot |= dot
        mantissa = np.where(digit, mantissa * 10 + d, mantissa)
        ndig += digit
        frac += digit & seen_dot
    fine &= (ndig >= 1) & (ndig <= MAX_DIGITS)
    q = mantissa.astype(np.float64) / _POW10_FLOAT[np.clip(frac, 0, MAX_DIGITS)]
    num[cand] = np.where(fine, np.where(negative, -q, q), np.nan)
    good[cand] = fine
    return num, good


def _digits(a: np.ndarray, s: np.ndarray, cols: range) -> tuple[np.ndarray, np.ndarray]:
    """The number written by the digit columns ``cols`` of fields starting at ``s``, and
    whether they are all digits."""
    value = np.zeros(s.size, dtype=np.int64)
    fine = np.ones(s.size, dtype=bool)
    for k in cols:
        d = _column(a, s, k) - np.uint8(_ZERO)
        fine &= d <= 9
        value = value * 10 + d
    return value, fine


# ------------------------------------------------------------------------------ times

# a fixed-width ISO 8601 date and time: the separators at their columns
_ISO_MARKS = {4: ord("-"), 7: ord("-"), 10: ord("T"), 13: ord(":"), 16: ord(":")}
_MONTH_DAYS = np.array([0, 31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31], dtype=np.int64)


def _iso_times(a: np.ndarray, s: np.ndarray, e: np.ndarray, ok: np.ndarray,
               naive_time_zone: str) -> tuple[np.ndarray, np.ndarray]:
    """Unix seconds of ``YYYY-MM-DDTHH:MM:SS`` followed by ``Z``, an offset ``+HH:MM``, or
    (with a naive time zone) nothing; and which fields were read so."""
    n = s.size
    t = np.zeros(n, dtype=np.int64)
    good = np.zeros(n, dtype=bool)
    length = e - s
    shapes = [(20, "Z"), (25, "offset")] + ([(19, "naive")] if naive_time_zone else [])
    for width, kind in shapes:
        rows = np.flatnonzero(ok & (length == width))
        if rows.size == 0:
            continue
        at = s[rows]
        secs, fine = _civil_seconds(a, at)
        if kind == "Z":
            fine &= _column(a, at, 19) == ord("Z")
        elif kind == "offset":
            mark = _column(a, at, 19)
            fine &= ((mark == _PLUS) | (mark == _MINUS)) & (_column(a, at, 22) == ord(":"))
            hh, f1 = _digits(a, at, range(20, 22))
            mm, f2 = _digits(a, at, range(23, 25))
            fine &= f1 & f2 & (hh <= 23) & (mm <= 59)
            secs = secs - np.where(mark == _MINUS, -1, 1) * (hh * 3600 + mm * 60)
        else:
            secs, localised = _localise(secs, fine, naive_time_zone)
            fine &= localised
        fine &= (secs >= T_MIN) & (secs <= T_MAX)
        t[rows] = secs
        good[rows] = fine
    return t, good


def _civil_seconds(a: np.ndarray, at: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Seconds since 1970-01-01T00:00:00 of ``YYYY-MM-DDTHH:MM:SS`` starting at ``at``, and
    whether it is a real date and time (hours 0-23, minutes and seconds 0-59)."""
    fine = np.ones(at.size, dtype=bool)
    for col, mark in _ISO_MARKS.items():
        fine &= _column(a, at, col) == mark
    parts = []
    for cols in (range(0, 4), range(5, 7), range(8, 10), range(11, 13), range(14, 16), range(17, 19)):
        value, f = _digits(a, at, cols)
        fine &= f
        parts.append(value)
    y, mo, d, hh, mi, ss = parts
    leap = ((y % 4 == 0) & (y % 100 != 0)) | (y % 400 == 0)
    dim = _MONTH_DAYS[np.clip(mo, 0, 12)] + ((mo == 2) & leap)
    fine &= (mo >= 1) & (mo <= 12) & (d >= 1) & (d <= dim) & (hh <= 23) & (mi <= 59) & (ss <= 59)
    fine &= (y >= _YEAR0) & (y <= 2200)
    month = np.clip((y - _YEAR0) * 12 + mo - 1, 0, _MONTH_START.size - 1)
    return (_MONTH_START[month] + d - 1) * 86400 + hh * 3600 + mi * 60 + ss, fine


def _days_from_civil(y: np.ndarray, m: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of a proleptic Gregorian date (Hinnant 2013)."""
    y = y - (m <= 2)
    era = np.floor_divide(y, 400)
    yoe = y - era * 400
    mp = (m + 9) % 12
    doy = (153 * mp + 2) // 5 + d - 1
    doe = yoe * 365 + yoe // 4 - yoe // 100 + doy
    return era * 146097 + doe - 719468


#: Days from 1970-01-01 to the first of each month of the years the fast path reads
#: (1900 to 2200; a time outside them is refused by the general parser), by table lookup.
_YEAR0 = 1900
_MONTH_START = _days_from_civil(np.repeat(np.arange(_YEAR0, 2201), 12), np.tile(np.arange(1, 13), 2201 - _YEAR0),
                                np.ones((2201 - _YEAR0) * 12, dtype=np.int64)).astype(np.int64)


def _localise(secs: np.ndarray, fine: np.ndarray, zone: str) -> tuple[np.ndarray, np.ndarray]:
    """Local wall-clock seconds in ``zone`` to Unix seconds; False where the local time is
    ambiguous or skipped at a clock change (the general parser says which)."""
    out = np.zeros(secs.size, dtype=np.int64)
    done = np.zeros(secs.size, dtype=bool)
    use = np.flatnonzero(fine)
    if use.size == 0:
        return out, done
    local = pd.DatetimeIndex(secs[use].astype("datetime64[s]"))
    try:
        utc = local.tz_localize(zone, ambiguous="NaT", nonexistent="NaT").tz_convert("UTC")
    except (TypeError, ValueError, KeyError):
        return out, done
    stamps = utc.tz_localize(None).to_numpy(dtype="datetime64[s]")
    read = ~np.isnat(stamps)
    out[use[read]] = stamps[read].astype(np.int64)
    done[use[read]] = True
    return out, done


def _epoch_times(a: np.ndarray, s: np.ndarray, e: np.ndarray, ok: np.ndarray,
                 millis: bool) -> tuple[np.ndarray, np.ndarray]:
    """Unix seconds of epoch seconds (or milliseconds) written as plain decimals, rounded to
    the nearest second as the general parser rounds them; and which fields were read so."""
    num, good = _decimals(a, s, e, ok)
    if millis:
        num = num / 1000.0
    good &= np.isfinite(num) & (num >= T_MIN) & (num <= T_MAX)
    t = np.zeros(s.size, dtype=np.int64)
    t[good] = np.floor(num[good] + 0.5).astype(np.int64)
    return t, good

