"""Load and validate the quaywatch TOML configuration, listing every problem at once.

The loader is two steps: :func:`load_config` reads the file (a missing file or a TOML
syntax error is one :class:`~monitor.errors.ConfigError`), then :func:`validate_config`
checks the parsed table and returns either a :class:`Config` or a list of messages,
each starting with the key path (``stations[0].sensors.primary.units``) and saying what
is expected. It never raises for any input a TOML parser can produce.

Sections owned by other packages (feeds, quality control, alert rules, mail, reports)
are validated by functions there, called from here when they are installed; their
messages are merged into the same list.

Relative paths resolve against the folder holding the configuration file.
See ``config.example.toml`` for every key with a comment and its default.
"""
from __future__ import annotations

import dataclasses
import difflib
import logging
import math
import re
import warnings
import zoneinfo
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from alerts.live.settings import live_settings_from, marks_from_config
from alerts.mail.outbox import mail_settings_from
from alerts.mail.outbox import password_file_problem
from alerts.reports.model import report_settings_from
from alerts.rules import rules_from_config
from monitor.errors import ConfigError
from monitor.feeds import feed_from_config
from monitor.feeds.parse import LineFormat
from monitor.quality.checks import qc_settings_from
from predictor.tomlfile import read_toml

log = logging.getLogger(__name__)

# Conversion of each accepted unit to metres (levels) or hectopascals (pressure).
LEVEL_UNITS = {"m": 1.0, "cm": 0.01, "mm": 0.001, "ft": 0.3048}  # 1 ft = 0.3048 m exactly (international foot, 1959)
PRESSURE_UNITS = {"hPa": 1.0, "mbar": 1.0, "kPa": 10.0}
SENSOR_ROLES = ("primary", "backup", "barometer")
TIME_FORMATS = ("iso", "epoch", "epoch_ms")
HISTORY = "history"  # value of ``constants`` meaning "fit from the station's own history"

_ID_RE = re.compile(r"^[a-z0-9][a-z0-9_-]{0,39}$")
_REQUIRED = object()
#: Names that mean the station datum itself (the gauge zero, where levels are stored).
STATION_DATUM_NAMES = ("station", "station_datum", "sd")


def datum_words(name: str) -> str:
    """A datum's name in words: ``"chart"`` -> ``"chart datum"``, ``"quay"`` -> ``"quay datum"``."""
    text = str(name).replace("_", " ").strip()
    return text if "datum" in text.lower() else f"{text} datum"


@dataclass(frozen=True)
class SensorConfig:
    """One sensor of a station: its role, units, offset, line format and feed spec."""

    station: str
    role: str
    units: str
    offset: float
    label: str
    format: LineFormat
    feed: Any = None          # spec from monitor.feeds.feed_from_config, or None
    feed_raw: dict = field(default_factory=dict)

    @property
    def feed_name(self) -> str:
        """Name of this sensor's feed, also its checkpoint key in the store."""
        return f"{self.station}.{self.role}"

    @property
    def is_level(self) -> bool:
        return self.role != "barometer"


@dataclass(frozen=True)
class StationConfig:
    """One station: identity, place, time zone, datums, sensors, constants and settings."""

    id: str
    name: str
    latitude: float
    longitude: float
    tz: str
    datums: dict                      # datum name -> height of its zero above station datum [m]
    constants: Path | None            # constants file, or None when fitted from history
    fit_min_days: float
    fit_span_days: float
    sensors: dict                     # role -> SensorConfig
    qc: Any = None
    rules: Any = ()
    qc_raw: dict = field(default_factory=dict)
    rules_raw: list = field(default_factory=list)
    note: str = ""                    # free text shown (as text, never HTML) in reports and emails
    display_datum: str = "station"    # the one datum every level is shown on (a key of datums)
    marks: tuple = ()                 # the operator's levels (alerts.live.Mark, on the station datum)

    @property
    def display_offset(self) -> float:
        """Height of the display datum's zero above the station datum [m]."""
        return float(self.datums.get(self.display_datum, 0.0))

    @property
    def display_label(self) -> str:
        """The display datum in words, e.g. ``"chart datum"``."""
        return datum_words(self.display_datum)

    @property
    def datum_note(self) -> str:
        """Said beside the levels when there is no chart datum to show them on."""
        if self.display_datum == "station" and "chart" not in self.datums:
            return ("no chart datum offset is configured for this station, so levels are on the "
                    "station datum (the gauge zero)")
        return ""

    @property
    def fit_from_history(self) -> bool:
        return self.constants is None

    @property
    def primary(self) -> SensorConfig:
        return self.sensors["primary"]


@dataclass(frozen=True)
class DaemonSettings:
    # Feeds are read every poll_seconds; a station that got complete lines is processed at
    # once, after coalesce_seconds (lines of its other sensors arriving together are then
    # taken in one pass). process_seconds is the catch-up pass over every station.
    poll_seconds: float = 1.0
    coalesce_seconds: float = 0.5
    process_seconds: float = 60.0
    outbox_seconds: float = 30.0
    refit_days: float = 30.0
    idle_polls: int = 3
    # Sensor drift and clock offset are costly next to a processing pass: they run when
    # this much data time has passed since their last run [min].
    diagnostics_minutes: float = 60.0
    # Record over which the clock offset against the predicted tide is estimated [days]
    # (a week averages out the weather while catching a clock fault within days: common
    # practice, no source). The drift window is the station's qc.drift_window.
    clock_window_days: float = 7.0


@dataclass(frozen=True)
class LogSettings:
    level: str = "info"
    file: Path | None = None
    max_bytes: int = 5_000_000
    backups: int = 5
    repeat_minutes: float = 10.0


LOG_KEYS = ("level", "file", "max_bytes", "backups", "repeat_minutes")


@dataclass(frozen=True)
class ResidualSettings:
    median_minutes: float = 30.0
    mean_minutes: float = 10.0
    # Residual history the high water forecast learns from [days]: storms are seasonal and
    # rare, and about 20 of them are needed before the range is learnt (benchmarks/bench_forecast.py).
    history_days: float = 1095.0
    min_history_days: float = 14.0
    reference_pressure: float = 1013.25
    # Fewest storms in the history for a range conditioned on the storm now; with fewer the
    # range is the wide rule of thumb, said in words (monitor.surge.forecast).
    forecast_min_storms: int = 20


@dataclass(frozen=True)
class Config:
    """A validated configuration. ``raw`` keeps the parsed TOML for other packages."""

    path: Path | None
    base_dir: Path
    store_path: Path
    daemon: DaemonSettings
    logging: LogSettings
    residual: ResidualSettings
    stations: tuple
    mail: Any = None
    reports: Any = None
    raw: dict = field(default_factory=dict)
    capture_dir: Path | None = None   # store.captures; None: "captures" beside the store
    live: Any = None                  # alerts.live.LiveSettings ([live]), or None: no live pages

    @property
    def captures(self) -> Path:
        """Folder of the raw capture files of serial lines (one subfolder per feed)."""
        return self.capture_dir if self.capture_dir is not None else self.store_path.parent / "captures"

    def station(self, station_id: str) -> StationConfig:
        """The station with this id, or a ConfigError listing the known ones."""
        for st in self.stations:
            if st.id == station_id:
                return st
        known = ", ".join(s.id for s in self.stations) or "none"
        raise ConfigError(f"no station {station_id!r} in {self.path or 'the configuration'} (stations: {known})")


# --------------------------------------------------------------------------- helpers

class _Checker:
    """Collects messages while reading one table; each message starts with its key path."""

    def __init__(self, errors: list[str]):
        self.errors = errors

    def table(self, raw: Any, keypath: str, required: bool = False) -> dict | None:
        if raw is None:
            if required:
                self.errors.append(f"{keypath}: missing; expected a table")
            return {} if not required else None
        if not isinstance(raw, dict):
            self.errors.append(f"{keypath}: expected a table, got {_show(raw)}")
            return None
        return raw

    def unknown(self, raw: dict, keypath: str, known: tuple[str, ...]) -> None:
        for key in raw:
            if key not in known:
                hint = difflib.get_close_matches(str(key), known, n=1)
                more = f" (did you mean {hint[0]!r}?)" if hint else f" (known keys: {', '.join(known)})"
                self.errors.append(f"{_join(keypath, key)}: unknown key{more}")

    def value(self, raw: dict, keypath: str, key: str, kind: str, default: Any = _REQUIRED,
              check: Callable[[Any], bool] | None = None, expect: str = "") -> Any:
        """Read ``raw[key]`` of ``kind`` (str, number, int, bool); ``None`` when invalid."""
        path = _join(keypath, key)
        if key not in raw:
            if default is _REQUIRED:
                self.errors.append(f"{path}: missing; expected {expect or _KIND_TEXT[kind]}")
                return None
            return default
        val = raw[key]
        ok = {
            "str": isinstance(val, str),
            "number": isinstance(val, (int, float)) and not isinstance(val, bool),
            "int": isinstance(val, int) and not isinstance(val, bool),
            "bool": isinstance(val, bool),
        }[kind]
        if ok and kind == "number":
            val = float(val)
            ok = math.isfinite(val)
        if ok and check is not None:
            try:
                ok = bool(check(val))
            except Exception:  # a check on a strange value is a failed check, not a crash
                ok = False
        if not ok:
            self.errors.append(f"{path}: expected {expect or _KIND_TEXT[kind]}, got {_show(raw[key])}")
            return None
        return val


_KIND_TEXT = {"str": "a string", "number": "a number", "int": "an integer", "bool": "true or false"}


def _join(keypath: str, key: Any) -> str:
    key = str(key)
    if re.fullmatch(r"[A-Za-z0-9_-]+", key):
        return f"{keypath}.{key}" if keypath else key
    return f"{keypath}.{key!r}" if keypath else repr(key)


def _show(val: Any) -> str:
    text = repr(val)
    if len(text) > 60:
        text = text[:57] + "..."
    kind = {dict: "table", list: "array", str: "string", bool: "boolean", int: "integer",
            float: "number"}.get(type(val), type(val).__name__)
    return f"{kind} {text}"


def _is_zone(name: str) -> bool:
    if not name or name.startswith("/") or ".." in name:
        return False
    try:
        zoneinfo.ZoneInfo(name)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):
        return False
    return True


def _resolve(base_dir: Path, value: str) -> Path:
    p = Path(value).expanduser()
    return p if p.is_absolute() else (base_dir / p)


def _resolve_fields(obj: Any, base_dir: Path, names: tuple[str, ...]) -> Any:
    """Copy of a settings dataclass with its relative path fields resolved against base_dir."""
    if obj is None or not dataclasses.is_dataclass(obj):
        return obj
    changes = {}
    for name in names:
        val = getattr(obj, name, None)
        if val:
            p = _resolve(base_dir, str(val))
            changes[name] = p if isinstance(val, Path) else str(p)
    try:
        return dataclasses.replace(obj, **changes) if changes else obj
    except (TypeError, ValueError):
        return obj


def _validate_with(fn: Any, *args: Any) -> tuple[Any, list[str]]:
    """Call the owning package's validator: (value, errors)."""
    try:
        value, errs = fn(*args)
    except Exception as exc:  # a validator must not crash the whole check
        return None, [f"{args[1]}: could not be checked ({type(exc).__name__}: {exc})"]
    return value, [str(e) for e in errs]


# --------------------------------------------------------------------------- sections

_TOP_KEYS = ("store", "daemon", "logging", "residual", "stations", "mail", "reports", "live")


def validate_config(raw: Any, base_dir: Path | str = ".", path: Path | None = None) -> tuple[Config | None, list[str]]:
    """Check a parsed configuration table.

    Parameters
    ----------
    raw : dict
        The parsed TOML document.
    base_dir : Path
        Folder that relative paths resolve against (the configuration file's folder).
    path : Path, optional
        The configuration file, for messages.

    Returns
    -------
    (Config or None, list of str)
        A configuration and no messages, or ``None`` and every problem found, each message
        starting with the key path.
    """
    base_dir = Path(base_dir)
    errors: list[str] = []
    c = _Checker(errors)
    if not isinstance(raw, dict):
        return None, [f"configuration: expected a table, got {_show(raw)}"]
    c.unknown(raw, "", _TOP_KEYS)

    store_path = capture_dir = None
    st = c.table(raw.get("store"), "store")
    if st is not None:
        c.unknown(st, "store", ("path", "captures"))
        sp = c.value(st, "store", "path", "str", "quaywatch.db", check=lambda s: s.strip() != "",
                     expect="a file path")
        if sp is not None:
            store_path = _resolve(base_dir, sp)
        if "captures" in st:
            cp = c.value(st, "store", "captures", "str", None, check=lambda s: s.strip() != "",
                         expect="a folder path")
            if cp is not None:
                capture_dir = _resolve(base_dir, cp)

    daemon = _daemon(c, raw.get("daemon"))
    logs = _logging(c, raw.get("logging"), base_dir)
    resid = _residual(c, raw.get("residual"))

    stations: list[StationConfig] = []
    raw_st = raw.get("stations")
    if raw_st is None:
        errors.append("stations: missing; expected at least one [[stations]] table")
    elif not isinstance(raw_st, list) or not raw_st:
        errors.append(f"stations: expected an array of tables ([[stations]]), got {_show(raw_st)}")
    else:
        seen_ids: set[str] = set()
        for i, item in enumerate(raw_st):
            s = _station(c, item, f"stations[{i}]", base_dir)
            if s is None:
                continue
            if s.id in seen_ids:
                errors.append(f"stations[{i}].id: {s.id!r} is used by an earlier station; ids must be unique")
                continue
            seen_ids.add(s.id)
            stations.append(s)

    mail = reports = None
    if "mail" in raw:
        mt = c.table(raw.get("mail"), "mail")
        if mt is not None:
            mail, errs = _validate_with(mail_settings_from, mt, "mail")
            errors.extend(errs)
    if "reports" in raw:
        rt = c.table(raw.get("reports"), "reports")
        if rt is not None:
            reports, errs = _validate_with(report_settings_from, rt, "reports")
            errors.extend(errs)

    live = None
    if "live" in raw:
        lt = c.table(raw.get("live"), "live")
        if lt is not None:
            live, errs = _validate_with(live_settings_from, lt, "live")
            errors.extend(errs)

    mail = _resolve_fields(mail, base_dir, ("password_file", "save_dir", "ca_file"))
    live = _resolve_fields(live, base_dir, ("folder",))
    if mail is not None and mail.password_file:
        problem = password_file_problem(mail.password_file)
        if problem:
            errors.append(f"mail.password_file {problem}")
    reports = _resolve_fields(reports, base_dir, ("folder",))
    if errors:
        return None, errors
    return Config(path=path, base_dir=base_dir, store_path=store_path, daemon=daemon, logging=logs,
                  residual=resid, stations=tuple(stations), mail=mail, reports=reports, raw=raw,
                  capture_dir=capture_dir, live=live), []


def unsendable(cfg: "Config") -> list[str]:
    """Rules with recipients in a configuration without a ``[mail]`` table: their alerts
    could never be sent. One problem per station, by key path, naming the rules.

    ``check`` refuses such a configuration; ``run`` says so in its log and keeps the
    messages in the outbox, so they go out once a ``[mail]`` table is added."""
    if cfg.mail is not None:
        return []
    problems = []
    for i, st in enumerate(cfg.stations):
        named = [r.id for r in st.rules or () if r.recipients_up_to(len(r.steps) - 1)]
        if named:
            problems.append(f"mail: required: stations[{i}].rules ({', '.join(named)}) have recipients, "
                            f"but there is no [mail] table, so their alerts could never be sent; add "
                            f"[mail] (sender and host, or save_dir) or remove the rules' notify lists")
    return problems


def _daemon(c: _Checker, raw: Any) -> DaemonSettings:
    t = c.table(raw, "daemon")
    if t is None:
        return DaemonSettings()
    keys = tuple(f.name for f in dataclasses.fields(DaemonSettings))
    c.unknown(t, "daemon", keys)
    d = DaemonSettings()
    pos = lambda v: v > 0  # noqa: E731
    vals = {
        "poll_seconds": c.value(t, "daemon", "poll_seconds", "number", d.poll_seconds, pos, "a number of seconds > 0"),
        "coalesce_seconds": c.value(t, "daemon", "coalesce_seconds", "number", d.coalesce_seconds,
                                    lambda v: 0 <= v <= 60, "a number of seconds from 0 to 60"),
        "process_seconds": c.value(t, "daemon", "process_seconds", "number", d.process_seconds, pos,
                                   "a number of seconds > 0"),
        "outbox_seconds": c.value(t, "daemon", "outbox_seconds", "number", d.outbox_seconds, pos,
                                  "a number of seconds > 0"),
        "refit_days": c.value(t, "daemon", "refit_days", "number", d.refit_days, lambda v: v >= 0,
                              "a number of days >= 0 (0: never refit on a schedule)"),
        "idle_polls": c.value(t, "daemon", "idle_polls", "int", d.idle_polls, lambda v: 1 <= v <= 1000,
                              "an integer from 1 to 1000"),
        "diagnostics_minutes": c.value(t, "daemon", "diagnostics_minutes", "number", d.diagnostics_minutes,
                                       lambda v: 1 <= v <= 10080, "minutes from 1 to 10080"),
        "clock_window_days": c.value(t, "daemon", "clock_window_days", "number", d.clock_window_days,
                                     lambda v: 1 <= v <= 366, "days from 1 to 366"),
    }
    return DaemonSettings(**{k: v for k, v in vals.items() if v is not None})


def _logging(c: _Checker, raw: Any, base_dir: Path) -> LogSettings:
    t = c.table(raw, "logging")
    if t is None:
        return LogSettings()
    c.unknown(t, "logging", LOG_KEYS)
    d = LogSettings()
    level = c.value(t, "logging", "level", "str", d.level,
                    lambda v: v.lower() in ("debug", "info", "warning", "error"),
                    "one of debug, info, warning, error")
    f = c.value(t, "logging", "file", "str", "")
    mb = c.value(t, "logging", "max_bytes", "int", d.max_bytes, lambda v: v >= 1000, "an integer >= 1000")
    bk = c.value(t, "logging", "backups", "int", d.backups, lambda v: 0 <= v <= 100, "an integer from 0 to 100")
    rp = c.value(t, "logging", "repeat_minutes", "number", d.repeat_minutes, lambda v: 0 <= v <= 1440,
                 "minutes from 0 to 1440")
    return LogSettings(level=(level or d.level).lower(), file=_resolve(base_dir, f) if f else None,
                       max_bytes=mb or d.max_bytes, backups=d.backups if bk is None else bk,
                       repeat_minutes=d.repeat_minutes if rp is None else float(rp))


def _residual(c: _Checker, raw: Any) -> ResidualSettings:
    t = c.table(raw, "residual")
    if t is None:
        return ResidualSettings()
    keys = tuple(f.name for f in dataclasses.fields(ResidualSettings))
    c.unknown(t, "residual", keys)
    d = ResidualSettings()
    vals = {
        "median_minutes": c.value(t, "residual", "median_minutes", "number", d.median_minutes,
                                  lambda v: 0 < v <= 1440, "minutes, more than 0 and at most 1440"),
        "mean_minutes": c.value(t, "residual", "mean_minutes", "number", d.mean_minutes,
                                lambda v: 0 <= v <= 1440, "minutes from 0 to 1440 (0: no mean)"),
        "history_days": c.value(t, "residual", "history_days", "number", d.history_days,
                                lambda v: 1 <= v <= 36600, "days from 1 to 36600"),
        "min_history_days": c.value(t, "residual", "min_history_days", "number", d.min_history_days,
                                    lambda v: 0 <= v <= 36600, "days from 0 to 36600"),
        "reference_pressure": c.value(t, "residual", "reference_pressure", "number", d.reference_pressure,
                                      lambda v: 800 <= v <= 1100, "hPa between 800 and 1100"),
        "forecast_min_storms": c.value(t, "residual", "forecast_min_storms", "int", d.forecast_min_storms,
                                       lambda v: 5 <= v <= 10000, "a whole number of storms from 5 to 10000"),
    }
    return ResidualSettings(**{k: v for k, v in vals.items() if v is not None})


_STATION_KEYS = ("id", "name", "note", "latitude", "longitude", "tz", "datums", "display_datum", "constants",
                 "fit_min_days", "fit_span_days", "sensors", "qc", "rules", "marks")


def _station(c: _Checker, raw: Any, kp: str, base_dir: Path) -> StationConfig | None:
    errors = c.errors
    n0 = len(errors)
    t = c.table(raw, kp, required=True)
    if t is None:
        return None
    c.unknown(t, kp, _STATION_KEYS)
    sid = c.value(t, kp, "id", "str", check=lambda v: bool(_ID_RE.match(v)),
                  expect="an id of 1-40 lower-case letters, digits, '-' or '_', starting with a letter or digit")
    name = c.value(t, kp, "name", "str", sid or "")
    note = c.value(t, kp, "note", "str", "")
    lat = c.value(t, kp, "latitude", "number", check=lambda v: -90 <= v <= 90, expect="degrees from -90 to 90")
    lon = c.value(t, kp, "longitude", "number", check=lambda v: -180 <= v <= 180,
                  expect="degrees from -180 to 180")
    tz = c.value(t, kp, "tz", "str", "UTC", check=_is_zone, expect="an IANA time zone name such as 'Europe/Lisbon'")

    datums = {"station": 0.0}
    # Without a chart datum offset the station shows every level on its station datum, and says so.
    dt = c.table(t.get("datums"), f"{kp}.datums")
    if dt is not None:
        for key, val in dt.items():
            dk = _join(f"{kp}.datums", key)
            if not isinstance(key, str) or not _ID_RE.match(key):
                errors.append(f"{dk}: datum names are lower-case letters, digits, '-' or '_'")
            elif key in STATION_DATUM_NAMES:
                errors.append(f"{dk}: {key!r} is the station datum itself (height 0 by definition); "
                              f"name the datums that differ from it")
            elif isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(val) \
                    or abs(val) > 1000:
                errors.append(f"{dk}: expected the height of this datum above the station datum in metres "
                              f"(within +-1000), got {_show(val)}")
            else:
                datums[key] = float(val)
    display = c.value(t, kp, "display_datum", "str", "chart" if "chart" in datums else "station",
                      check=lambda v: v in datums or v in STATION_DATUM_NAMES,
                      expect="a datum of this station (" + ", ".join(sorted(datums)) + ")")
    display = "station" if display is None or display in STATION_DATUM_NAMES else display

    const = c.value(t, kp, "constants", "str", check=lambda v: v.strip() != "",
                    expect=f"a constants file path, or {HISTORY!r} to fit from the station's own history")
    const_path = None
    if const is not None and const != HISTORY:
        const_path = _resolve(base_dir, const)
        if not const_path.is_file():
            errors.append(f"{kp}.constants: file {str(const_path)!r} not found "
                          f"(or use {HISTORY!r} to fit from the station's own history)")
    fit_min = c.value(t, kp, "fit_min_days", "number", 30.0, lambda v: 1 <= v <= 36600, "days from 1 to 36600")
    fit_span = c.value(t, kp, "fit_span_days", "number", 365.0, lambda v: 1 <= v <= 36600, "days from 1 to 36600")

    sensors: dict[str, SensorConfig] = {}
    sk = f"{kp}.sensors"
    stab = c.table(t.get("sensors"), sk, required=True)
    if stab is not None:
        c.unknown(stab, sk, SENSOR_ROLES)
        if "primary" not in stab:
            errors.append(f"{sk}.primary: missing; every station needs a primary level sensor")
        for role in SENSOR_ROLES:
            if role in stab:
                s = _sensor(c, stab[role], f"{sk}.{role}", sid or "?", role)
                if s is not None:
                    sensors[role] = s

    qc_raw = t.get("qc", {})
    qc = None
    qt = c.table(qc_raw, f"{kp}.qc")
    if qt is not None:
        qc, errs = _validate_with(qc_settings_from, qt, f"{kp}.qc")
        errors.extend(errs)
    rules_raw = t.get("rules", [])
    rules: Any = ()
    if not isinstance(rules_raw, list):
        errors.append(f"{kp}.rules: expected an array of tables ([[stations.rules]]), got {_show(rules_raw)}")
    else:
        r, errs = _validate_with(rules_from_config, rules_raw, f"{kp}.rules", datums)
        errors.extend(errs)
        rules = r if r is not None else ()

    marks, errs = _validate_with(marks_from_config, t.get("marks"), f"{kp}.marks", datums, display)
    errors.extend(errs)

    if len(errors) > n0:
        return None
    return StationConfig(id=sid, name=name or sid, note=note or "", latitude=lat, longitude=lon, tz=tz, datums=datums,
                         constants=const_path, fit_min_days=fit_min, fit_span_days=fit_span, sensors=sensors,
                         qc=qc, rules=rules, qc_raw=qt or {}, rules_raw=rules_raw, display_datum=display,
                         marks=marks or ())


_SENSOR_KEYS = ("units", "offset", "label", "line", "feed")
_LINE_KEYS = ("delimiter", "time_column", "value_column", "time_format", "naive_time_zone", "comment",
              "header_lines", "missing_marker")


def _sensor(c: _Checker, raw: Any, kp: str, station: str, role: str) -> SensorConfig | None:
    errors = c.errors
    n0 = len(errors)
    t = c.table(raw, kp, required=True)
    if t is None:
        return None
    c.unknown(t, kp, _SENSOR_KEYS)
    table = PRESSURE_UNITS if role == "barometer" else LEVEL_UNITS
    units = c.value(t, kp, "units", "str", "hPa" if role == "barometer" else "m", lambda v: v in table,
                    "one of " + ", ".join(table))
    offset = c.value(t, kp, "offset", "number", 0.0, lambda v: abs(v) <= 1000,
                     "hPa within +-1000" if role == "barometer" else "metres within +-1000")
    label = c.value(t, kp, "label", "str", "")

    lk = f"{kp}.line"
    lt = c.table(t.get("line"), lk)
    fmt = None
    if lt is not None:
        c.unknown(lt, lk, _LINE_KEYS)
        d = LineFormat()
        delim = c.value(lt, lk, "delimiter", "str", d.delimiter,
                        lambda v: v == "whitespace" or (len(v) == 1 and v not in "\r\n"),
                        "one character, or 'whitespace'")
        tcol = c.value(lt, lk, "time_column", "int", d.time_column, lambda v: 0 <= v <= 100,
                       "a column number from 1 to 100, or 0 when lines carry no time")
        vcol = c.value(lt, lk, "value_column", "int", d.value_column, lambda v: 1 <= v <= 100,
                       "a column number from 1 to 100")
        tfmt = c.value(lt, lk, "time_format", "str", d.time_format, lambda v: v in TIME_FORMATS,
                       "one of " + ", ".join(TIME_FORMATS))
        naive = c.value(lt, lk, "naive_time_zone", "str", "", lambda v: v == "" or _is_zone(v),
                        "an IANA time zone name, or '' to refuse times without an offset")
        comment = c.value(lt, lk, "comment", "str", d.comment, lambda v: len(v) <= 4 and "\n" not in v,
                          "a prefix of at most 4 characters, or ''")
        header = c.value(lt, lk, "header_lines", "int", 0, lambda v: 0 <= v <= 1000, "an integer from 0 to 1000")
        missing = c.value(lt, lk, "missing_marker", "str", "")
        if tcol is not None and vcol is not None and tcol == vcol:
            errors.append(f"{lk}.value_column: the same column as time_column ({tcol})")
        if None not in (delim, tcol, vcol, tfmt, naive, comment, header, missing, units, offset):
            fmt = LineFormat(delimiter=delim, time_column=tcol, value_column=vcol, time_format=tfmt,
                             naive_time_zone=naive, comment=comment, header_lines=header,
                             missing_marker=missing.strip(), scale=table[units], offset=offset)

    feed_raw = t.get("feed")
    spec = None
    if feed_raw is not None:
        ft = c.table(feed_raw, f"{kp}.feed")
        if ft is not None:
            spec, errs = _validate_with(feed_from_config, ft, f"{kp}.feed")
            errors.extend(errs)
    if len(errors) > n0:
        return None
    return SensorConfig(station=station, role=role, units=units, offset=offset, label=label, format=fmt,
                        feed=spec, feed_raw=feed_raw if isinstance(feed_raw, dict) else {})


# --------------------------------------------------------------------------- file

def load_config(path: str | Path) -> Config:
    """Read and validate a configuration file.

    Raises
    ------
    ConfigError
        When the file cannot be read, is not valid TOML, or has any problem; the message
        lists every problem, one per line, each with its key path. A deprecated key still
        read is said as a warning on the log (the command line shows it on stderr).
    """
    path = Path(path)
    raw = read_toml(path, "configuration file", ConfigError)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", DeprecationWarning)
        cfg, errors = validate_config(raw, path.resolve().parent, path)
    for w in caught:
        if issubclass(w.category, DeprecationWarning):
            log.warning("%s: %s", path, w.message)   # a deprecated key: said, not refused
    if errors:
        listing = "\n".join(f"  {e}" for e in errors)
        n = len(errors)
        raise ConfigError(f"{path}: {n} problem{'s' if n > 1 else ''} in the configuration:\n{listing}")
    return cfg


def known_keys() -> dict[str, tuple[str, ...]]:
    """The keys this module accepts in each table it validates itself, by table.

    Tables validated elsewhere (feeds, qc, rules, mail, reports) are listed by their own
    modules; ``config.example.toml`` documents them all (checked by the tests).
    """
    return {
        "": _TOP_KEYS,
        "store": ("path",),
        "daemon": tuple(f.name for f in dataclasses.fields(DaemonSettings)),
        "logging": LOG_KEYS,
        "residual": tuple(f.name for f in dataclasses.fields(ResidualSettings)),
        "stations": _STATION_KEYS,
        "stations.sensors": SENSOR_ROLES,
        "stations.sensors.*": _SENSOR_KEYS,
        "stations.sensors.*.line": _LINE_KEYS,
    }
