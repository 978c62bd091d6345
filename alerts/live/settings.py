"""Configuration of the live pages: the ``[live]`` table and a station's ``[[stations.marks]]``.

Keys (``[live]``)::

    folder      = "live"     # where the pages and snapshots are written (relative: to the config file)
    stale_after = "30min"    # a station whose last usable sample is older than this is STALE
    refresh     = "1min"     # how often an open page reloads itself, and how often the daemon
                             # rewrites the page of a station that has gone silent

Keys (``[[stations.marks]]``, the operator's own levels, any number)::

    name  = "quay top"       # words of the operator's own, shown as written
    level = 4.25             # metres on ``datum``
    datum = "chart"          # a datum of the station (default: its display datum)
    side  = "above"          # "above": the water must stay under it (a quay top, boards out);
                             # "below": the water must stay over it (a lock sill at low water)

Validators return ``(value, errors)``; each error starts with its key path, as the rest of
the configuration's.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from predictor.timeutil import parse_duration

__all__ = ["LiveSettings", "Mark", "live_settings_from", "marks_from_config", "LIVE_KEYS", "MARK_KEYS", "SIDES"]

LIVE_KEYS = ("folder", "stale_after", "refresh")
MARK_KEYS = ("name", "level", "datum", "side")
SIDES = ("above", "below")
MAX_MARKS = 12


@dataclass(frozen=True)
class LiveSettings:
    """Where live pages go and how old a sample may be before a page says STALE.

    Attributes
    ----------
    folder : Path
        Folder of the pages and snapshots.
    stale_after : float
        Age of the last usable sample beyond which a station is STALE [s].
    refresh : float
        Reload interval of an open page, and rewrite interval of a silent station's page [s].
    """

    folder: Path = Path("live")
    stale_after: float = 1800.0
    refresh: float = 60.0


@dataclass(frozen=True)
class Mark:
    """One of the operator's levels, on the station datum.

    Attributes
    ----------
    name : str
        The operator's words for it.
    level : float
        Height above the station datum [m].
    side : str
        ``"above"``: the water should stay below it; ``"below"``: the water should stay above it.
    """

    name: str
    level: float
    side: str = "above"


def _duration(raw: Mapping, key: str, keypath: str, default: float, lo: float, hi: float,
              errors: list[str]) -> float:
    if key not in raw:
        return default
    try:
        seconds = parse_duration(raw[key], positive=True)
    except (ValueError, TypeError) as exc:
        errors.append(f"{keypath}.{key}: {exc}")
        return default
    if not lo <= seconds <= hi:
        errors.append(f"{keypath}.{key}: expected a duration from {lo:g} s to {hi:g} s, got {raw[key]!r}")
        return default
    return seconds


def live_settings_from(raw: Mapping[str, Any] | None, keypath: str) -> tuple[LiveSettings, list[str]]:
    """Validate the ``[live]`` table.

    Parameters
    ----------
    raw : mapping or None
        The parsed table.
    keypath : str
        Its key path, for messages.

    Returns
    -------
    (LiveSettings, list of str)
        Settings (defaults where a key is missing or wrong) and the problems found.

    References
    ----------
    The defaults are our choice (common practice, no source): a gauge reporting each minute that
    is silent for half an hour has stopped, and a page a minute old is fresh enough to act on.
    """
    errors: list[str] = []
    d = LiveSettings()
    if raw is None:
        return d, errors
    if not isinstance(raw, Mapping):
        return d, [f"{keypath}: expected a table of live page settings"]
    for key in sorted(set(raw) - set(LIVE_KEYS)):
        errors.append(f"{keypath}.{key}: unknown key (known: {', '.join(LIVE_KEYS)})")
    folder = d.folder
    if "folder" in raw:
        if isinstance(raw["folder"], str) and raw["folder"].strip():
            folder = Path(raw["folder"])
        else:
            errors.append(f"{keypath}.folder: expected a folder path as text, got {raw['folder']!r}")
    stale = _duration(raw, "stale_after", keypath, d.stale_after, 1.0, 30 * 86400.0, errors)
    refresh = _duration(raw, "refresh", keypath, d.refresh, 1.0, 3600.0, errors)
    return LiveSettings(folder=folder, stale_after=stale, refresh=refresh), errors


def marks_from_config(raw: Any, keypath: str, datums: Mapping[str, float],
                      display_datum: str = "station") -> tuple[tuple[Mark, ...], list[str]]:
    """Validate a station's ``marks`` array into :class:`Mark` s on the station datum.

    Parameters
    ----------
    raw : list of tables
        The parsed ``[[stations.marks]]`` array.
    keypath : str
        Its key path (``stations[0].marks``), for messages.
    datums : mapping
        Datum name -> height of its zero above the station datum [m]; ``"station"`` is 0.
    display_datum : str
        The datum a mark's ``level`` is on when it names none.

    Returns
    -------
    (tuple of Mark, list of str)
        The marks, in the order written, and the problems found.
    """
    errors: list[str] = []
    if raw is None:
        return (), errors
    if not isinstance(raw, list):
        return (), [f"{keypath}: expected an array of tables ([[stations.marks]]), got {type(raw).__name__}"]
    if len(raw) > MAX_MARKS:
        errors.append(f"{keypath}: at most {MAX_MARKS} marks, got {len(raw)}")
    marks: list[Mark] = []
    names: set[str] = set()
    for i, item in enumerate(raw):
        kp = f"{keypath}[{i}]"
        if not isinstance(item, Mapping):
            errors.append(f"{kp}: expected a table with name, level, datum and side")
            continue
        n0 = len(errors)
        for key in sorted(set(item) - set(MARK_KEYS)):
            errors.append(f"{kp}.{key}: unknown key (known: {', '.join(MARK_KEYS)})")
        name = item.get("name")
        if not isinstance(name, str) or not name.strip() or len(name) > 40 or any(c in name for c in "\r\n"):
            errors.append(f"{kp}.name: expected the level's name as one line of text of at most 40 characters")
        elif name.strip().lower() in names:
            errors.append(f"{kp}.name: {name!r} is used by an earlier mark")
        level = item.get("level")
        if isinstance(level, bool) or not isinstance(level, (int, float)) or not math.isfinite(level) \
                or abs(level) > 1000:
            errors.append(f"{kp}.level: expected a height in metres (within +-1000), got {level!r}")
        datum = item.get("datum", display_datum)
        if datum in ("station", "station_datum", "sd"):
            datum = "station"
        if not isinstance(datum, str) or (datum != "station" and datum not in datums):
            errors.append(f"{kp}.datum: expected a datum of this station ({', '.join(sorted(datums))}), "
                          f"got {datum!r}")
        side = item.get("side", "above")
        if side not in SIDES:
            errors.append(f"{kp}.side: expected \"above\" (the water should stay below it) or \"below\" "
                          f"(the water should stay above it), got {side!r}")
        if len(errors) > n0:
            continue
        names.add(name.strip().lower())
        offset = 0.0 if datum == "station" else float(datums[datum])
        marks.append(Mark(name=name.strip(), level=float(level) + offset, side=side))
    return tuple(marks), errors
