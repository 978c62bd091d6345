"""Times typed on the command line, and times shown back to people.

The one place where every ``cli_*`` module turns ``--from``, ``--to``, ``--at``, ``--start``
and ``--end`` into UTC, and formats stored times in a station's local zone. Input is ISO 8601
only (``2025-03-01``, ``2025-03-01T06:00``, ``2025-03-01T06:00Z``, ``2025-03-01T06:00+01:00``):
day-first and month-first dates are refused rather than guessed.
"""
from __future__ import annotations

import datetime as dt
import math
import re
import zoneinfo
from typing import Any

import pandas as pd

from monitor.cli.errors import UserError

__all__ = ["zone", "parse_time", "parse_range", "parse_date", "local_text", "offset_text", "EXAMPLES"]

EXAMPLES = "2025-03-01, 2025-03-01T06:00Z or 2025-03-01T06:00+01:00"
# Years pandas holds at nanosecond resolution, with a margin.
FIRST_YEAR, LAST_YEAR = 1700, 2200

_ISO = re.compile(
    r"^(?P<date>\d{4}-\d{2}-\d{2}|\d{8})"
    r"(?:[T ](?P<time>\d{2}(?::?\d{2}(?::?\d{2}(?:[.,]\d+)?)?)?))?"
    r"\s*(?P<zone>[Zz]|[+-]\d{2}(?::?\d{2})?)?$")
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")


def zone(name: Any, option: str = "--tz") -> dt.tzinfo:
    """An IANA time zone; ``option`` names where it came from in the message."""
    if isinstance(name, dt.tzinfo):
        return name
    try:
        return zoneinfo.ZoneInfo(str(name))
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise UserError(f"{option} {name!r}: unknown time zone (use an IANA name such as "
                        "Europe/Dublin or UTC)") from None


def asked_zone(text: Any, default: Any) -> dt.tzinfo:
    """The zone a time was typed in, to answer in it: UTC for ``Z``, the fixed offset for
    ``+01:00``, else ``default`` (the station's zone, for a time typed without one)."""
    m = _ISO.match(str(text).strip())
    z = m.group("zone") if m else None
    if not z:
        return zone(default)
    if z in ("Z", "z"):
        return dt.timezone.utc
    digits = z[1:].replace(":", "")
    minutes = int(digits[:2]) * 60 + (int(digits[2:4]) if len(digits) > 2 else 0)
    return dt.timezone(dt.timedelta(minutes=minutes if z[0] == "+" else -minutes))


def _key(z: dt.tzinfo) -> str:
    return getattr(z, "key", None) or str(z)


def offset_text(td: dt.timedelta | None) -> str:
    """A UTC offset written ``+01:00``."""
    minutes = int((td or dt.timedelta(0)).total_seconds() // 60)
    sign = "+" if minutes >= 0 else "-"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def parse_time(text: Any, option: str, tz: Any = None, *, hint: str = "") -> pd.Timestamp:
    """An ISO 8601 date or time as a UTC ``pandas.Timestamp``.

    Parameters
    ----------
    text : str
        ``YYYY-MM-DD`` (midnight), ``YYYY-MM-DDTHH:MM[:SS]``, optionally with ``Z`` or an
        offset such as ``+01:00``; the basic forms (``20250301T0600Z``) too.
    option : str
        The option or key the text came from (``--from``); every message starts with it.
    tz : str or ZoneInfo, optional
        Zone for a time written without one; without it such a time is refused.
    hint : str
        Said after "no time zone", e.g. ``"or give --tz"``.

    Raises
    ------
    UserError
        Not ISO 8601, not a real date, out of the years 1700 to 2200, no zone and no ``tz``,
        or a local time that a clock change skips or repeats.
    """
    raw = str(text).strip()
    m = _ISO.match(raw)
    if not m:
        raise UserError(f"{option} {text!r}: not an ISO 8601 date or time (examples: {EXAMPLES})")
    if m.group("time") is None and m.group("zone"):
        raw = m.group("date") + "T00:00" + m.group("zone")
    try:
        ts = pd.Timestamp(raw)
    except (ValueError, TypeError, OverflowError):
        raise UserError(f"{option} {text!r}: not a real date or time") from None
    if ts is pd.NaT:
        raise UserError(f"{option} {text!r}: not a real date or time")
    if not FIRST_YEAR <= ts.year <= LAST_YEAR:
        raise UserError(f"{option} {text!r}: outside the years {FIRST_YEAR} to {LAST_YEAR}")
    if ts.tzinfo is None:
        if tz is None:
            more = f", {hint}" if hint else ""
            raise UserError(f"{option} {text!r}: no time zone; add Z or an offset such as +01:00{more}")
        z = zone(tz)
        naive = ts.to_pydatetime()
        early, late = naive.replace(tzinfo=z, fold=0), naive.replace(tzinfo=z, fold=1)
        # a skipped local time does not survive the round trip through UTC
        back = early.astimezone(dt.timezone.utc).astimezone(z).replace(tzinfo=None)
        if back != naive:
            raise UserError(f"{option} {text!r}: this local time does not exist in {_key(z)} (the clocks "
                            "skip it); give an offset such as +01:00 or Z")
        if early.utcoffset() != late.utcoffset():
            raise UserError(f"{option} {text!r}: this local time happens twice in {_key(z)} (clock change); "
                            f"add {offset_text(early.utcoffset())} or {offset_text(late.utcoffset())}")
        ts = pd.Timestamp(early)
    return ts.tz_convert("UTC")


def parse_range(start: Any, end: Any, tz: Any = None, *, start_option: str = "--from",
                end_option: str = "--to", allow_equal: bool = True, hint: str = "",
                ) -> tuple[pd.Timestamp, pd.Timestamp]:
    """Two times (see :func:`parse_time`), refusing an end before the start."""
    a = parse_time(start, start_option, tz, hint=hint)
    b = parse_time(end, end_option, tz, hint=hint)
    if b < a or (b == a and not allow_equal):
        raise UserError(f"{start_option} {start} is {'after' if b < a else 'the same time as'} "
                        f"{end_option} {end}; the start must come first")
    return a, b


def parse_date(text: Any, option: str) -> dt.date:
    """A calendar date written ``YYYY-MM-DD``."""
    raw = str(text).strip()
    try:
        if not _DATE.match(raw):
            raise ValueError
        day = dt.date.fromisoformat(raw)
    except ValueError:
        raise UserError(f"{option} {text!r}: expected a date as YYYY-MM-DD, e.g. 2025-03-01") from None
    if not FIRST_YEAR <= day.year <= LAST_YEAR:
        raise UserError(f"{option} {text!r}: outside the years {FIRST_YEAR} to {LAST_YEAR}")
    return day


def local_text(t: Any, tz: Any, *, utc: bool = False) -> str:
    """``2025-10-20 06:10 IST``, a time in a zone with its abbreviation ("-" for none).

    ``t`` is Unix seconds, a ``datetime`` or a ``pandas.Timestamp`` (naive is UTC); with
    ``utc`` the UTC clock time follows in brackets, ``(05:10Z)``.
    """
    if t is None or (isinstance(t, float) and math.isnan(t)) or t is pd.NaT:
        return "-"
    if isinstance(t, (dt.datetime, pd.Timestamp)):
        ts = pd.Timestamp(t)
        ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    else:
        ts = pd.Timestamp(int(t), unit="s", tz="UTC")
    text = ts.tz_convert(zone(tz)).strftime("%Y-%m-%d %H:%M %Z")
    return f"{text} ({ts:%H:%MZ})" if utc else text
