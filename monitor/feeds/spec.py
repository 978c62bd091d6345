"""One feed table of the configuration: its keys, their checks, and the feed they open.

Keys
----
``kind`` (required)
    ``"file"`` follow a growing file; ``"folder"`` read each file dropped into a folder once;
    ``"serial"`` read a serial line; ``"replay"`` play back a recorded file at a chosen pace.
``path`` (file, folder, replay; required)
    The file to follow or play back, or the folder to watch. ``~`` is expanded; a relative
    path is taken relative to the configuration file's folder.
``pattern`` (folder; default ``"*"``)
    Glob of the files to take, relative to the folder (``"*.csv"``, ``"**/*.txt"``).
``settle`` (folder; default 2)
    Leave a file alone until it has not been modified for this long [s].
``port`` (serial; required)
    Device (``"/dev/ttyUSB0"``) or pyserial URL (``"socket://10.0.0.5:4001"``).
``baud`` (serial; default 9600)
    Line speed [bit/s].
``bytesize`` (serial; default 8)
    Data bits: 5, 6, 7 or 8.
``parity`` (serial; default ``"none"``)
    ``"none"``, ``"even"``, ``"odd"``, ``"mark"`` or ``"space"``.
``stopbits`` (serial; default 1)
    1, 1.5 or 2.
``flow`` (serial; default ``"none"``)
    Flow control: ``"none"``, ``"xonxoff"``, ``"rtscts"`` or ``"dsrdtr"``.
``reopen_after`` (serial; default 1) and ``reopen_max`` (serial; default 60)
    First and longest wait before opening a failed port again; the wait doubles [s].
``speedup`` (replay; default 1)
    Playback speed relative to the recorded timestamps; 0 plays as fast as possible.
``rate`` (replay; optional)
    Lines per second, instead of following timestamps [1/s]. Not together with ``speedup``.
``time_column`` (replay; needed when ``speedup`` > 0)
    The column holding each line's time: a number counting from 1, or its header name.
``time_format`` (replay; default ``"iso"``)
    ``"iso"`` (ISO 8601), ``"unix"`` (seconds since 1970 UTC) or a ``strptime`` pattern
    such as ``"%d/%m/%Y %H:%M"``.
``delimiter`` (replay; default ``","``)
    Column separator: one character, or ``"whitespace"``.
``max_pause`` (replay; optional)
    Longest wait between two lines, however far apart their timestamps [s].
``encoding`` (all kinds; default ``"utf-8"``)
    Text encoding; must write line ends as single bytes (utf-8, latin-1, ascii, cp1252, ...).
    Bytes that do not decode become U+FFFD and the parser rejects the line.
"""
from __future__ import annotations

import codecs
import os
from dataclasses import dataclass, fields
from pathlib import Path
from typing import Any, Iterable

from monitor.feeds.base import Feed
from monitor.feeds.dropfolder import FolderFeed
from monitor.feeds.filetail import FileFeed
from monitor.feeds.replay import ReplayFeed
from monitor.feeds.serialline import FLOWS
from monitor.feeds.serialline import PARITIES
from monitor.feeds.serialline import SerialFeed

KINDS = ("file", "folder", "serial", "replay")

# Which keys each kind takes (besides kind and encoding).
_KEYS_BY_KIND = {
    "file": ("path",),
    "folder": ("path", "pattern", "settle"),
    "serial": ("port", "baud", "bytesize", "parity", "stopbits", "flow",
               "reopen_after", "reopen_max"),
    "replay": ("path", "speedup", "rate", "time_column", "time_format", "delimiter",
               "max_pause"),
}
_REQUIRED = {"file": ("path",), "folder": ("path",), "serial": ("port",), "replay": ("path",)}


@dataclass(frozen=True)
class FeedSpec:
    """A validated feed table; fields not used by ``kind`` keep their defaults."""

    kind: str
    path: str | None = None
    pattern: str = "*"
    settle: float = 2.0
    port: str | None = None
    baud: int = 9600
    bytesize: int = 8
    parity: str = "none"
    stopbits: float = 1
    flow: str = "none"
    reopen_after: float = 1.0
    reopen_max: float = 60.0
    speedup: float = 1.0
    rate: float | None = None
    time_column: int | str | None = None
    time_format: str = "iso"
    delimiter: str = ","
    max_pause: float | None = None
    encoding: str = "utf-8"


ALL_KEYS = frozenset(f.name for f in fields(FeedSpec))


def _is_number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and value == value \
        and abs(value) != float("inf")


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _check_encoding(name: Any) -> str | None:
    if not isinstance(name, str) or not name:
        return "expected the name of a text encoding such as \"utf-8\""
    try:
        codecs.lookup(name)
        ascii_ends = "\n\r".encode(name) == b"\n\r"
    except (LookupError, UnicodeError, TypeError):
        return f"{name!r} is not a known text encoding; expected e.g. \"utf-8\" or \"latin-1\""
    except Exception:  # a codec that cannot encode at all (e.g. a bytes-to-bytes codec)
        ascii_ends = False
    if not ascii_ends:
        return (f"encoding {name!r} does not write line ends as single bytes; expected an "
                "ASCII-compatible encoding such as \"utf-8\", \"latin-1\" or \"ascii\"")
    return None


def feed_from_config(raw: dict, keypath: str, *, ignore: Iterable[str] = (),
                     base_dir: str | os.PathLike | None = None
                     ) -> tuple[FeedSpec | None, list[str]]:
    """Validate one feed table of the configuration.

    Parameters
    ----------
    raw : dict
        The table as read from TOML.
    keypath : str
        Where the table is in the configuration (``"feeds.quay"``), to start each message.
    ignore : iterable of str, optional
        Keys in the same table that belong to someone else (parsing, station); not checked.
    base_dir : path, optional
        Folder that relative paths are relative to (the configuration file's folder).

    Returns
    -------
    spec : FeedSpec or None
        None when there are errors.
    errors : list of str
        Each starts with the key path and says what is expected.
    """
    if not isinstance(raw, dict):
        return None, [f"{keypath}: expected a table of feed settings, got {type(raw).__name__}"]
    kind, allowed, errors = _kind_and_keys(raw, keypath, frozenset(ignore))
    if kind is None:
        return None, errors
    table = _Table(raw, allowed, keypath, errors)
    _file_keys(table, base_dir)
    _serial_keys(table)
    _replay_keys(table, kind)
    if errors:
        return None, errors
    return FeedSpec(kind=kind, **table.values), []


def _kind_and_keys(raw: dict, keypath: str, ignore: frozenset) -> tuple[str | None, set, list[str]]:
    """The feed's kind, the keys it allows, and the errors of unknown, misplaced or missing keys."""
    errors: list[str] = []
    kind = raw.get("kind")
    if kind is None:
        errors.append(f"{keypath}: missing key 'kind'; expected one of "
                      + ", ".join(f'"{k}"' for k in KINDS))
    elif kind not in KINDS:
        errors.append(f"{keypath}.kind: expected one of {', '.join(repr(k) for k in KINDS)}, got {kind!r}")
        kind = None
    allowed = {"kind", "encoding", *(_KEYS_BY_KIND[kind] if kind else ALL_KEYS)}
    for key in sorted(set(raw) - ignore, key=str):
        if key in allowed:
            continue
        if key in ALL_KEYS:
            users = [k for k in KINDS if key in _KEYS_BY_KIND[k]]
            errors.append(f"{keypath}.{key}: not used by kind = {kind!r} (only by {', '.join(users)})")
        else:
            errors.append(f"{keypath}.{key}: unknown key; expected one of " + ", ".join(sorted(allowed)))
    if kind is not None:
        for key in _REQUIRED[kind]:
            if key not in raw:
                errors.append(f"{keypath}: missing key {key!r}, needed for kind = {kind!r}")
    return kind, allowed, errors


class _Table:
    """One feed table being checked: the keys given, the values taken, the errors found."""

    def __init__(self, raw: dict, allowed: set, keypath: str, errors: list[str]):
        self.get = {k: v for k, v in raw.items() if k in allowed and k != "kind"}
        self.values: dict[str, Any] = {}
        self.keypath = keypath
        self.errors = errors

    def err(self, key: str, message: str) -> None:
        self.errors.append(f"{self.keypath}.{key}: {message}")

    def text(self, key: str, what: str) -> None:
        if key in self.get:
            if isinstance(self.get[key], str) and self.get[key].strip():
                self.values[key] = self.get[key]
            else:
                self.err(key, f"expected {what}, got {self.get[key]!r}")

    def number(self, key: str, what: str, low: float, low_ok: bool) -> None:
        """A number [in the key's unit, seconds for durations] above ``low`` (or at it, when ``low_ok``)."""
        if key in self.get:
            v = self.get[key]
            if _is_number(v) and (v >= low if low_ok else v > low):
                self.values[key] = float(v)
            else:
                self.err(key, f"expected {what}, got {v!r}")

    def choice(self, key: str, options: Iterable[Any]) -> None:
        if key in self.get:
            options = tuple(options)
            v = self.get[key]
            if isinstance(v, str) and v in options:
                self.values[key] = v
            else:
                self.err(key, f"expected one of {', '.join(repr(o) for o in options)}, got {v!r}")


def _file_keys(t: _Table, base_dir: str | os.PathLike | None) -> None:
    """encoding, path (relative to ``base_dir``), pattern, settle [s]."""
    get, values = t.get, t.values
    if "encoding" in get:
        problem = _check_encoding(get["encoding"])
        if problem:
            t.err("encoding", problem)
        else:
            values["encoding"] = get["encoding"]
    if "path" in get:
        p = get["path"]
        if isinstance(p, str) and p.strip() and "\0" not in p:
            path = Path(p).expanduser()
            if base_dir is not None and not path.is_absolute():
                path = Path(base_dir) / path
            values["path"] = str(path)
        else:
            t.err("path", f"expected a file or folder path as text, got {p!r}")
    t.text("pattern", "a glob pattern such as \"*.csv\"")
    t.number("settle", "a number of seconds, 0 or more", 0, True)


def _serial_keys(t: _Table) -> None:
    """port, baud [bit/s], bytesize, parity, flow, stopbits, reopen_after and reopen_max [s]."""
    get, values = t.get, t.values
    t.text("port", "a serial device such as \"/dev/ttyUSB0\" or a pyserial URL")
    if "baud" in get:
        if _is_int(get["baud"]) and get["baud"] > 0:
            values["baud"] = get["baud"]
        else:
            t.err("baud", f"expected a line speed in bit/s such as 9600, got {get['baud']!r}")
    if "bytesize" in get:
        if _is_int(get["bytesize"]) and get["bytesize"] in (5, 6, 7, 8):
            values["bytesize"] = get["bytesize"]
        else:
            t.err("bytesize", f"expected 5, 6, 7 or 8 data bits, got {get['bytesize']!r}")
    t.choice("parity", PARITIES)
    t.choice("flow", FLOWS)
    if "stopbits" in get:
        v = get["stopbits"]
        if _is_number(v) and v in (1, 1.5, 2):
            values["stopbits"] = 1.5 if v == 1.5 else int(v)
        else:
            t.err("stopbits", f"expected 1, 1.5 or 2, got {v!r}")
    t.number("reopen_after", "a number of seconds above 0", 0, False)
    t.number("reopen_max", "a number of seconds above 0", 0, False)
    if values.get("reopen_max", 60.0) < values.get("reopen_after", 1.0):
        t.err("reopen_max", "must not be less than reopen_after")


def _replay_keys(t: _Table, kind: str) -> None:
    """speedup, rate [lines/s], max_pause [s], time_column, time_format, delimiter, and how a
    replay is paced."""
    get, values = t.get, t.values
    t.number("speedup", "a speed-up factor, 0 (as fast as possible) or more", 0, True)
    t.number("rate", "a number of lines per second above 0", 0, False)
    t.number("max_pause", "a number of seconds above 0", 0, False)
    if "time_column" in get:
        v = get["time_column"]
        if (_is_int(v) and v >= 1) or (isinstance(v, str) and v.strip()):
            values["time_column"] = v.strip() if isinstance(v, str) else v
        else:
            t.err("time_column", f"expected a column number counting from 1, or a column "
                                 f"name, got {v!r}")
    if "time_format" in get:
        v = get["time_format"]
        if isinstance(v, str) and (v in ("iso", "unix") or "%" in v):
            values["time_format"] = v
        else:
            t.err("time_format", f"expected \"iso\", \"unix\" or a strptime pattern such as "
                                 f"\"%Y-%m-%d %H:%M\", got {v!r}")
    if "delimiter" in get:
        v = get["delimiter"]
        if isinstance(v, str) and (len(v) == 1 and v not in "\r\n" or v == "whitespace"):
            values["delimiter"] = v
        else:
            t.err("delimiter", f"expected one character such as \",\" or \"whitespace\", "
                               f"got {v!r}")
    if kind == "replay":
        if "rate" in get and "speedup" in get:
            t.err("rate", "give either rate or speedup, not both")
        elif ("rate" not in get and values.get("speedup", 1.0) > 0
              and "time_column" not in get):
            t.err("time_column", "needed to pace the replay by its timestamps (or set "
                                 "speedup = 0 to play as fast as possible, or give rate)")


def open_feed(spec: FeedSpec, name: str, capture_dir: str | os.PathLike | None = None) -> Feed:
    """Open the feed a validated spec describes.

    ``capture_dir`` is the folder for a serial feed's raw capture files (other kinds can be
    read again from their files and keep none).

    Raises
    ------
    monitor.errors.FeedError
        When a replay file cannot be opened. Other kinds wait for their file, folder or
        device instead of failing.
    """
    if spec.kind == "file":
        return FileFeed(name, spec.path, encoding=spec.encoding)
    if spec.kind == "folder":
        return FolderFeed(name, spec.path, pattern=spec.pattern, settle=spec.settle,
                          encoding=spec.encoding)
    if spec.kind == "serial":
        return SerialFeed(name, spec.port, baud=spec.baud, bytesize=spec.bytesize,
                          parity=spec.parity, stopbits=spec.stopbits, flow=spec.flow,
                          encoding=spec.encoding, reopen_after=spec.reopen_after,
                          reopen_max=spec.reopen_max,
                          capture_dir=None if capture_dir is None else os.fspath(capture_dir))
    if spec.kind == "replay":
        return ReplayFeed(name, spec.path, speedup=spec.speedup, rate=spec.rate,
                          time_column=spec.time_column, time_format=spec.time_format,
                          delimiter=spec.delimiter, max_pause=spec.max_pause,
                          encoding=spec.encoding)
    raise ValueError(f"feed {name}: unknown kind {spec.kind!r}")
