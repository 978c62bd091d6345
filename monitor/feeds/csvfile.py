"""Reading a ``time,level`` CSV of observed levels (the input of ``quaywatch fit``).

The file has the header ``time,level``; ``time`` is ISO 8601 with ``Z`` or an offset (or
naive, in a zone given by the caller), ``level`` is in metres. Every problem is a
:class:`~monitor.errors.FeedError` naming the file and line.
"""
from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from pathlib import Path

import numpy as np
import pandas as pd

from monitor.errors import FeedError

__all__ = ["read_level_csv"]

# An explicit zone at the end of an ISO 8601 time: Z, +HH, +HHMM or +HH:MM.
_ZONE = re.compile(r"(?:[Zz]|[+-]\d{2}(?::?\d{2})?)$")
_MAX_LISTED = 5


def read_level_csv(path, tz: str | dt.tzinfo | None = None):
    """Read a ``time,level`` CSV of observed levels.

    Parameters
    ----------
    path : str or Path
        CSV file with the header ``time,level``; ``time`` ISO 8601 with ``Z`` or an offset,
        ``level`` in metres [m]. Blank lines and lines starting with ``#`` are skipped; an
        empty level is a missing value and is left out.
    tz : str or tzinfo, optional
        IANA zone for times written without a zone; without it such times are refused.

    Returns
    -------
    times : pandas.DatetimeIndex
        UTC, sorted, without duplicates.
    levels : ndarray
        Levels [m].
    notes : list of str
        What was changed (re-sorted rows, duplicates dropped, missing levels skipped).

    Raises
    ------
    FeedError
        Naming the file and line: unreadable file, wrong header, wrong number of columns,
        bad time or level, time without a zone, unknown zone, no data.
    """
    path = Path(path)
    zone = _zone(tz)
    lines = _read_lines(path)
    header_no = _check_header(path, lines)
    numbers, t_text, v_text = _split_rows(path, lines, header_no)
    levels = _levels(path, numbers, v_text)
    ns = _times(path, numbers, t_text, zone, tz)
    return _tidy(path, ns, levels)


def _zone(tz: str | dt.tzinfo | None) -> dt.tzinfo | None:
    if tz is None or isinstance(tz, dt.tzinfo):
        return tz
    try:
        return zoneinfo.ZoneInfo(str(tz))
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise FeedError(f"{tz!r}: unknown time zone (use an IANA name such as Europe/Dublin or UTC)") from None


def _bad(path: Path, lines: list, what: str) -> FeedError:
    """A FeedError naming the first bad line and counting the rest."""
    first = lines[0]
    more = ""
    if len(lines) > 1:
        shown = ", ".join(str(n) for n in lines[1:_MAX_LISTED])
        extra = len(lines) - _MAX_LISTED
        more = f" (also line{'s' if len(lines) > 2 else ''} {shown}" + (f" and {extra} more" if extra > 0 else "") + ")"
    return FeedError(f"{path} line {first}: {what}{more}")


def _read_lines(path: Path) -> list[str]:
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise FeedError(f"{path}: no such file") from None
    except UnicodeDecodeError as exc:
        raise FeedError(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except OSError as exc:
        raise FeedError(f"{path}: cannot read ({exc.strerror})") from None
    return text.splitlines()


def _check_header(path: Path, lines: list[str]) -> int:
    """Index of the header line (the first that is neither blank nor a comment)."""
    header_no = next((i for i, ln in enumerate(lines) if ln.strip() and not ln.lstrip().startswith("#")), None)
    if header_no is None:
        raise FeedError(f"{path}: empty file, expected a header 'time,level' and data")
    header = [h.strip().lower() for h in lines[header_no].split(",")]
    if header != ["time", "level"]:
        raise FeedError(f"{path} line {header_no + 1}: expected the header 'time,level', "
                        f"found {lines[header_no].strip()!r}")
    return header_no


def _split_rows(path: Path, lines: list[str], header_no: int) -> tuple[np.ndarray, list[str], list[str]]:
    """(line numbers, time texts, level texts) of the data rows."""
    numbers, t_text, v_text, malformed = [], [], [], []
    for i in range(header_no + 1, len(lines)):
        ln = lines[i].strip()
        if not ln or ln.startswith("#"):
            continue
        parts = ln.split(",")
        if len(parts) != 2:
            malformed.append(i + 1)
            continue
        numbers.append(i + 1)
        t_text.append(parts[0].strip())
        v_text.append(parts[1].strip())
    if malformed:
        raise _bad(path, malformed, "expected two fields 'time,level'")
    if not numbers:
        raise FeedError(f"{path}: no data rows after the header")
    return np.asarray(numbers), t_text, v_text


def _levels(path: Path, numbers: np.ndarray, v_text: list[str]) -> np.ndarray:
    """Levels [m]; an empty field (or 'nan') is NaN, anything else unreadable is refused."""
    v_series = pd.Series(v_text, dtype=object)
    empty = (v_series == "").to_numpy()
    levels = pd.to_numeric(v_series.where(~empty, "nan"), errors="coerce").to_numpy(dtype=float)
    bad_level = np.isnan(levels) & ~empty & ~v_series.str.lower().isin(["nan"]).to_numpy()
    if bad_level.any():
        first = v_text[int(np.flatnonzero(bad_level)[0])]
        raise _bad(path, list(numbers[bad_level]), f"level {first!r} is not a number (metres expected)")
    infinite = np.isinf(levels)
    if infinite.any():
        raise _bad(path, list(numbers[infinite]), "level is not finite")
    return levels


def _times(path: Path, numbers: np.ndarray, t_text: list[str], zone: dt.tzinfo | None, tz) -> np.ndarray:
    """Times as UTC nanoseconds; naive ones in ``zone`` (refused without one)."""
    t_series = pd.Series(t_text, dtype=object)
    has_zone = t_series.str.contains(_ZONE).to_numpy()
    naive = ~has_zone
    if naive.any() and zone is None:
        raise _bad(path, list(numbers[naive]), f"time {t_text[int(np.flatnonzero(naive)[0])]!r} has no "
                   "zone; write it with Z or an offset such as +01:00, or give --tz")
    ns = np.empty(len(t_text), dtype=np.int64)
    bad_time = np.zeros(len(t_text), dtype=bool)
    if has_zone.any():
        parsed = pd.to_datetime(t_series[has_zone], format="ISO8601", utc=True, errors="coerce")
        bad_time[has_zone] = parsed.isna().to_numpy()
        ns[has_zone] = pd.DatetimeIndex(parsed).as_unit("ns").asi8
    if naive.any():
        parsed = pd.to_datetime(t_series[naive], format="ISO8601", errors="coerce")
        bad_time[naive] = parsed.isna().to_numpy()
        if not bad_time[naive].any():
            ns[naive] = _localise(path, numbers[naive], [t_text[k] for k in np.flatnonzero(naive)],
                                  pd.DatetimeIndex(parsed), zone, tz)
    if bad_time.any():
        first = t_text[int(np.flatnonzero(bad_time)[0])]
        raise _bad(path, list(numbers[bad_time]), f"time {first!r} is not an ISO 8601 date and time")
    return ns


def _localise(path: Path, numbers, texts: list[str], local: pd.DatetimeIndex, zone: dt.tzinfo, tz) -> np.ndarray:
    """Naive local times in ``zone`` as UTC nanoseconds; a time the clock change makes
    ambiguous or skips is refused, naming its line."""
    try:
        return local.tz_localize(zone, ambiguous="raise", nonexistent="raise").tz_convert("UTC").as_unit("ns").asi8
    except (ValueError, OverflowError):  # pandas' clock-change errors are ValueErrors
        pass
    for number, text, stamp in zip(numbers, texts, local):
        try:
            pd.Timestamp(stamp).tz_localize(zone, ambiguous="raise", nonexistent="raise")
        except (ValueError, OverflowError):
            raise FeedError(f"{path} line {number}: local time {text!r} is ambiguous or does not exist in "
                            f"{getattr(zone, 'key', tz)} (clock change); write it with an offset") from None
    raise FeedError(f"{path}: local times cannot be placed in {getattr(zone, 'key', tz)}")


def _tidy(path: Path, ns: np.ndarray, levels: np.ndarray) -> tuple[pd.DatetimeIndex, np.ndarray, list[str]]:
    """Missing levels out, rows in time order, repeated times dropped (first kept), with notes."""
    notes = []
    keep = ~np.isnan(levels)
    if (~keep).any():
        notes.append(f"{path}: {int((~keep).sum())} row(s) without a level skipped")
    ns, levels = ns[keep], levels[keep]
    if ns.size == 0:
        raise FeedError(f"{path}: no levels in the file")
    if np.any(np.diff(ns) < 0):
        order = np.argsort(ns, kind="stable")
        notes.append(f"{path}: {int(np.sum(np.diff(ns) < 0))} row(s) out of time order; sorted")
        ns, levels = ns[order], levels[order]
    dup = np.concatenate([[False], np.diff(ns) == 0])
    if dup.any():
        notes.append(f"{path}: {int(dup.sum())} row(s) repeating an earlier time dropped (first kept)")
        ns, levels = ns[~dup], levels[~dup]
    times = pd.DatetimeIndex(ns.astype("datetime64[ns]")).tz_localize("UTC")
    return times, levels, notes
