"""Alert rule configuration and the per-rule episode state machine.

A rule watches one quantity at one station (the surge residual, the water level on a
named datum, the next high water forecast, the age of the feed, or the count of active
equipment faults) against one or more named steps. The state machine here is pure: it
takes the state and one value and returns the new state and the events to announce;
``alerts.engine`` keeps the state in the store and turns events into messages.

Configuration keys (a list of tables under a station, ``[[stations.rules]]``)::

    id       = "surge"            # unique per station; episodes are keyed by station + id
    when     = "residual_above"   # residual_above | residual_below | level_above |
                                  # level_below | next_high_water_above | feed_silent |
                                  # equipment_fault
    datum    = "chart"            # level_* and next_high_water_above: a named datum
    series   = "residual"         # residual_* only: "residual" or "smoothed"
    hold     = "10min"            # minimum time beyond a step before it counts
    settle   = "20min"            # minimum time back inside the band before a step clears
                                  # (default: same as hold)
    band     = 0.05               # hysteresis [m] (feed_silent: [s]) below a step to clear it
    notify   = ["duty@port.example"]   # recipients for every step (added to per-step lists)
    all_clear = true              # send a message when the episode ends
    use_suspect = true            # count QARTOD-suspect samples (3); fail (4) and missing (9)
                                  # never count
    note     = "free text shown in the message"
    action   = "Keep off the quay wall."   # one line: what readers of the brief form should do
    clear_horizon = "12h"         # level_above: no all-clear while the forecast range of a
                                  # high water within this time reaches the lowest step
    [[stations.rules.steps]]
    name   = "raised"             # operator's own names
    at     = 0.30                 # metres on the datum (feed_silent: a duration)
    notify = ["volunteers@port.example"]
"""
from __future__ import annotations

import math
import re
import warnings
from dataclasses import dataclass, field
from typing import Any

from predictor.timeutil import parse_duration  # the one duration parser; re-exported

# Kinds of rule, and the sign that turns each into an "above" comparison.
KINDS = {
    "residual_above": +1,
    "residual_below": -1,
    "level_above": +1,
    "level_below": -1,
    "next_high_water_above": +1,
    "feed_silent": +1,
    "equipment_fault": +1,
}
SAMPLE_KINDS = {"residual_above", "residual_below", "level_above", "level_below"}
CONTEXT_KINDS = {"next_high_water_above", "feed_silent", "equipment_fault"}

# Our own step names; they deliberately avoid the vocabulary of official warning services.
DEFAULT_STEP_NAMES = ("raised", "high", "very high", "extreme high")
DEFAULT_LOW_STEP_NAMES = ("low", "very low", "extreme low")

# Words official weather and flood services use for their own warnings; a configured step
# name containing one is refused so that an email can never be mistaken for an official one.
RESERVED_WORDS = ("watch", "warning", "advisory", "alert", "severe", "emergency",
                  "red", "amber", "orange", "yellow")

#: The former name of a rule's ``when`` key (still read, with a deprecation notice).
OLD_KIND_KEY = "watch"

_STATION_DATUM_NAMES = ("station", "station_datum", "sd")

#: A level rule's all-clear waits while a high water within this time may reach its lowest
#: step again [s] (12 h: the next high water of a semidiurnal tide; common practice, no source).
DEFAULT_CLEAR_HORIZON = 12 * 3600.0
#: Longest such wait [s]: the forecast learns lead times up to a day.
MAX_CLEAR_HORIZON = 24 * 3600.0
_ADDR_RE = re.compile(r"^[^@\s<>,;\"\r\n]+@[^@\s<>,;\"\r\n]+\.[^@\s<>,;\"\r\n]+$")


@dataclass(frozen=True)
class StationView:
    """What the alert engine needs to know of a station (built by the daemon).

    Attributes
    ----------
    id : str
        Station identifier used as a key in the store.
    name : str
        Display name.
    tz : str
        IANA time zone name for local times in messages.
    datums : dict[str, float]
        Datum name -> height of that datum above the station datum [m].
    notes, url : str
        Optional text and link shown in messages.
    display_datum : str
        The one datum every level in a message is shown on (a key of ``datums``, or
        ``"station"``); default ``"chart"`` when the station has a chart datum, else
        ``"station"``.
    datum_note : str
        Said under the levels when they are not on chart datum for want of its offset.
    marks : tuple of (str, float)
        The port's own marks, (name, level [m, station datum]): the steps of the station's
        ``level_above`` rules (``alerts.engine.evaluate`` fills them in when empty). The brief
        email form tells the level now against them.
    forms : tuple of (str, str)
        (address, form name) pairs: the form of alert email each address gets
        (``[mail.forms]``, see :mod:`alerts.mail.forms`); others get ``full``.
    """

    id: str
    name: str
    tz: str = "UTC"
    datums: dict = field(default_factory=dict)
    notes: str = ""
    url: str = ""
    display_datum: str = ""
    datum_note: str = ""
    marks: tuple = ()
    forms: tuple = ()

    @property
    def display(self) -> str:
        """Name of the display datum."""
        if self.display_datum:
            return self.display_datum
        return "chart" if "chart" in self.datums else "station"

    @property
    def display_offset(self) -> float:
        """Height of the display datum's zero above the station datum [m]."""
        return float(self.datums.get(self.display, 0.0))


@dataclass(frozen=True)
class Step:
    """One named step of a rule: a threshold and who hears about it."""

    name: str
    at: float
    notify: tuple[str, ...] = ()


@dataclass(frozen=True)
class Rule:
    """A validated alert rule.

    ``steps`` are sorted from the mildest to the most extreme. ``at`` values are in the
    rule's own units: metres on ``datum`` for level rules, metres for residual rules,
    seconds for ``feed_silent``, a count of faults for ``equipment_fault``.
    """

    id: str
    watch: str
    steps: tuple[Step, ...]
    datum: str = "station"
    datum_offset: float = 0.0
    series: str = "residual"
    hold: float = 0.0
    settle: float = 0.0
    band: float = 0.0
    notify: tuple[str, ...] = ()
    all_clear: bool = True
    use_suspect: bool = True
    fault_kinds: tuple[str, ...] = ()
    note: str = ""
    action: str = ""            # one line the operator writes: what readers of the brief form should do
    clear_horizon: float = 0.0  # [s] level_above: the all-clear waits on high waters within this time

    @property
    def sign(self) -> int:
        return KINDS[self.watch]

    @property
    def unit(self) -> str:
        return {"feed_silent": "s", "equipment_fault": ""}.get(self.watch, "m")

    def recipients_up_to(self, index: int) -> tuple[str, ...]:
        """Recipients of every step up to and including ``index``, rule-wide ones first."""
        seen: dict[str, None] = dict.fromkeys(self.notify)
        for step in self.steps[: index + 1]:
            seen.update(dict.fromkeys(step.notify))
        return tuple(seen)


def _as_addresses(value: Any, where: str, errors: list[str]) -> tuple[str, ...]:
    if value is None:
        return ()
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list):
        errors.append(f"{where}: expected a list of email addresses, got {value!r}")
        return ()
    out = []
    for i, addr in enumerate(value):
        if not isinstance(addr, str) or not _ADDR_RE.match(addr.strip()):
            errors.append(f"{where}[{i}]: not a plain email address: {addr!r}")
        else:
            out.append(addr.strip())
    return tuple(out)


def _reserved_word(name: str) -> str | None:
    words = re.findall(r"[a-z]+", name.lower())
    for w in RESERVED_WORDS:
        if w in words:
            return w
    return None


def _default_steps(watch: str) -> list[dict]:
    if watch == "feed_silent":
        return [{"name": "feed silent", "at": "30min"}]
    if watch == "equipment_fault":
        return [{"name": "equipment fault", "at": 1}]
    return []


_RULE_KEYS = frozenset({"id", "when", "datum", "series", "hold", "settle", "band", "notify", "all_clear",
                        "use_suspect", "faults", "note", "action", "steps", "clear_horizon"})


def _one_rule(raw: Any, kp: str, datums: dict[str, float], errors: list[str]) -> Rule | None:
    """One rule table checked: the Rule, or None with the problems appended to ``errors``."""
    if not isinstance(raw, dict):
        errors.append(f"{kp}: expected a table, got {type(raw).__name__}")
        return None
    n_before = len(errors)
    for key in raw:
        if key not in _RULE_KEYS and key != OLD_KIND_KEY:
            errors.append(f"{kp}.{key}: unknown key (known: {', '.join(sorted(_RULE_KEYS))})")
    rid = _rule_id(raw, kp, errors)
    watch = _rule_kind(raw, kp, errors)
    if watch is None:
        return None
    datum, offset = _rule_datum(raw, kp, watch, datums, errors)
    series = raw.get("series", "residual")
    if series not in ("residual", "smoothed"):
        errors.append(f"{kp}.series: 'residual' or 'smoothed' (got {series!r})")
    hold, settle, clear_horizon, band = _rule_timing(raw, kp, watch, errors)
    notify, flags, faults, note = _rule_extras(raw, kp, watch, errors)
    action = _rule_action(raw, kp, errors)
    steps = _rule_steps(raw, kp, watch, errors)
    if steps and not notify and not any(s.notify for s in steps):
        errors.append(f"{kp}.notify: nobody to tell; give notify on the rule or on a step")
    if len(errors) > n_before or rid is None:
        return None
    return Rule(id=rid, watch=watch, steps=tuple(steps), datum=datum, datum_offset=offset,
                series=series, hold=hold, settle=settle, band=float(band), notify=notify,
                all_clear=flags["all_clear"], use_suspect=flags["use_suspect"],
                fault_kinds=tuple(faults), note=note, action=action, clear_horizon=clear_horizon)


def _rule_kind(raw: dict, kp: str, errors: list[str]) -> str | None:
    """The rule's kind from ``when``; the former key ``watch`` (a word official warning
    services use) is still read, with a deprecation notice naming the new key."""
    if OLD_KIND_KEY in raw:
        if "when" in raw:
            errors.append(f"{kp}.{OLD_KIND_KEY}: renamed to 'when'; give only when")
            return None
        old = raw[OLD_KIND_KEY]
        example = f" (write when = \"{old}\")" if isinstance(old, str) and old in KINDS else ""
        deprecated(f"{kp}.{OLD_KIND_KEY}: renamed to 'when'{example}; "
                   f"the old key is read for now and will be refused in a later version")
        kind = raw[OLD_KIND_KEY]
    else:
        kind = raw.get("when")
    if not isinstance(kind, str) or kind not in KINDS:
        errors.append(f"{kp}.when: one of {', '.join(KINDS)} (got {kind!r})")
        return None
    return kind


def _rule_action(raw: dict, kp: str, errors: list[str]) -> str:
    """The one line the operator writes for the brief email form (``""`` when not given)."""
    action = raw.get("action", "")
    if not isinstance(action, str) or len(action) > 300 or re.search(r"[\x00-\x1f\x7f]", action):
        errors.append(f"{kp}.action: one line of text (at most 300 characters) saying what readers "
                      f"should do, got {action!r}")
        return ""
    return action.strip()


def deprecated(message: str) -> None:
    """Say that a configuration key is deprecated, as a ``DeprecationWarning`` (the
    configuration loader turns it into a warning on the log, shown by the command line)."""
    warnings.warn(message, DeprecationWarning, stacklevel=3)


def _rule_id(raw: dict, kp: str, errors: list[str]) -> str | None:
    rid = raw.get("id")
    if not isinstance(rid, str) or not re.fullmatch(r"[A-Za-z0-9_.-]{1,64}", rid or ""):
        errors.append(f"{kp}.id: required; letters, digits, '_', '-', '.' (got {rid!r})")
        return None
    return rid


def _rule_datum(raw: dict, kp: str, watch: str, datums: dict[str, float], errors: list[str]) -> tuple[str, float]:
    """The datum a level rule counts from and its height above the station datum [m]."""
    datum, offset = "station", 0.0
    if watch in ("level_above", "level_below", "next_high_water_above"):
        datum = raw.get("datum", "station")
        if not isinstance(datum, str):
            errors.append(f"{kp}.datum: expected a datum name, got {datum!r}")
        elif datum in datums:
            offset = float(datums[datum])
        elif datum.lower() in _STATION_DATUM_NAMES:
            datum = "station"
        else:
            names = ", ".join(sorted(set(datums) | {"station"}))
            errors.append(f"{kp}.datum: {datum!r} is not a datum of this station (known: {names})")
    elif "datum" in raw:
        errors.append(f"{kp}.datum: only level_above, level_below and next_high_water_above use a datum")
    return datum, offset


def _duration(raw: dict, kp: str, key: str, default: float, errors: list[str]) -> float:
    """A duration key [s] (``"10min"``, ``"2h"``, a number of seconds), or ``default``."""
    if key not in raw:
        return default
    try:
        return parse_duration(raw[key])
    except ValueError as exc:
        errors.append(f"{kp}.{key}: {exc}")
        return default


def _rule_timing(raw: dict, kp: str, watch: str, errors: list[str]) -> tuple[float, float, float, float]:
    """hold [s], settle [s], clear_horizon [s] and the hysteresis band ([m]; [s] for a silent feed)."""
    hold = _duration(raw, kp, "hold", 0.0 if watch in CONTEXT_KINDS else 600.0, errors)
    settle = _duration(raw, kp, "settle", hold, errors)
    clear_horizon = 0.0
    if watch == "level_above":
        clear_horizon = _duration(raw, kp, "clear_horizon", DEFAULT_CLEAR_HORIZON, errors)
        if not 0 <= clear_horizon <= MAX_CLEAR_HORIZON:
            errors.append(f"{kp}.clear_horizon: from 0 (no wait) to {MAX_CLEAR_HORIZON / 3600:g} h, "
                          f"got {raw.get('clear_horizon')!r}")
    elif "clear_horizon" in raw:
        errors.append(f"{kp}.clear_horizon: only level_above rules wait on the high water forecast")
    if watch == "feed_silent":
        band = _duration(raw, kp, "band", 0.0, errors)
    else:
        band = raw.get("band", 0.0)
        if isinstance(band, bool) or not isinstance(band, (int, float)) or not math.isfinite(band) or band < 0:
            errors.append(f"{kp}.band: expected a non-negative number of metres, got {band!r}")
            band = 0.0
    return hold, settle, clear_horizon, band


def _rule_extras(raw: dict, kp: str, watch: str, errors: list[str]) -> tuple[tuple[str, ...], dict, list, str]:
    """notify, the all_clear and use_suspect switches, the fault kinds, the note."""
    notify = _as_addresses(raw.get("notify"), f"{kp}.notify", errors)
    flags = {}
    for key, default in (("all_clear", True), ("use_suspect", True)):
        v = raw.get(key, default)
        if not isinstance(v, bool):
            errors.append(f"{kp}.{key}: expected true or false, got {v!r}")
            v = default
        flags[key] = v
    faults = raw.get("faults", [])
    if watch != "equipment_fault" and "faults" in raw:
        errors.append(f"{kp}.faults: only equipment_fault rules filter by fault kind")
    if not (isinstance(faults, list) and all(isinstance(f, str) for f in faults)):
        errors.append(f"{kp}.faults: expected a list of fault kinds, got {faults!r}")
        faults = []
    note = raw.get("note", "")
    if not isinstance(note, str):
        errors.append(f"{kp}.note: expected text, got {note!r}")
        note = ""
    return notify, flags, faults, note


def _rule_steps(raw: dict, kp: str, watch: str, errors: list[str]) -> list[Step]:
    """The rule's steps in the order the watched value reaches them, each checked."""
    raw_steps = raw.get("steps", _default_steps(watch))
    if not isinstance(raw_steps, list) or not raw_steps:
        errors.append(f"{kp}.steps: at least one step, e.g. {{ name = \"high\", at = 0.5 }}")
        raw_steps = []
    sign = KINDS[watch]
    defaults = DEFAULT_LOW_STEP_NAMES if sign < 0 or watch == "residual_below" else DEFAULT_STEP_NAMES
    steps = [s for i, rs in enumerate(raw_steps) if (s := _one_step(rs, i, f"{kp}.steps[{i}]", watch, defaults, errors))]
    steps.sort(key=lambda s: sign * s.at)
    for a, b in zip(steps, steps[1:]):
        if a.at == b.at:
            errors.append(f"{kp}.steps: {a.name!r} and {b.name!r} share the level {a.at}")
        if a.name == b.name:
            errors.append(f"{kp}.steps: the name {a.name!r} is used twice")
    return steps


def _one_step(rs: Any, i: int, skp: str, watch: str, defaults, errors: list[str]) -> Step | None:
    """One step table: its name and level ``at`` ([m]; [s] for a silent feed; a count of faults)."""
    if not isinstance(rs, dict):
        errors.append(f"{skp}: expected a table with name and at")
        return None
    for key in rs:
        if key not in ("name", "at", "notify"):
            errors.append(f"{skp}.{key}: unknown key (known: at, name, notify)")
    name = rs.get("name", defaults[i] if i < len(defaults) else f"step {i + 1}")
    if not isinstance(name, str) or not name.strip() or len(name) > 40 or re.search(r"[\x00-\x1f\x7f]", name):
        errors.append(f"{skp}.name: a short single-line name (got {name!r})")
        name = f"step {i + 1}"
    elif (word := _reserved_word(name)) is not None:
        errors.append(f"{skp}.name: {name!r} uses {word!r}, a word official warning "
                      f"services use; choose a name of your own (e.g. 'raised', 'high')")
    at = rs.get("at")
    if at is None:
        errors.append(f"{skp}.at: required")
        return None
    if watch == "feed_silent":
        try:
            at = parse_duration(at)
        except ValueError as exc:
            errors.append(f"{skp}.at: {exc}")
            return None
    elif isinstance(at, bool) or not isinstance(at, (int, float)) or not math.isfinite(at):
        errors.append(f"{skp}.at: expected a number (metres), got {at!r}")
        return None
    if watch == "equipment_fault" and at < 1:
        errors.append(f"{skp}.at: a count of active faults, at least 1 (got {at!r})")
    return Step(name=name.strip(), at=float(at), notify=_as_addresses(rs.get("notify"), f"{skp}.notify", errors))


def rules_from_config(raw_list: Any, keypath: str, datums: dict[str, float]) -> tuple[list[Rule], list[str]]:
    """Validate a station's list of rule tables.

    Parameters
    ----------
    raw_list : list of dict
        The parsed TOML array of tables (``[[stations.rules]]``).
    keypath : str
        Where the list sits in the configuration, e.g. ``"stations[0].rules"``.
    datums : dict[str, float]
        The station's datum name -> height above station datum [m].

    Returns
    -------
    rules : list of Rule
        The valid rules.
    errors : list of str
        Each starts with the key path of the problem; empty when all is well.
    """
    if raw_list is None:
        return [], []
    if not isinstance(raw_list, list):
        return [], [f"{keypath}: expected an array of tables ([[...rules]]), got {type(raw_list).__name__}"]
    rules: list[Rule] = []
    errors: list[str] = []
    seen: set[str] = set()
    for i, raw in enumerate(raw_list):
        rule = _one_rule(raw, f"{keypath}[{i}]", datums, errors)
        if rule is None:
            continue
        if rule.id in seen:
            errors.append(f"{keypath}[{i}].id: {rule.id!r} is used by another rule of this station")
            continue
        seen.add(rule.id)
        rules.append(rule)
    return rules, errors


# --------------------------------------------------------------------------- state machine

@dataclass(frozen=True)
class RuleState:
    """Persisted state of one rule at one station.

    ``level`` is the index of the step in force (-1 for none). ``above_since[i]`` is the
    start of the current unbroken run beyond step ``i``; ``inside_since[i]`` the start of
    the current unbroken run back inside the band of step ``i``. ``held`` is true once the
    episode's all-clear has been held back (and said so) because a high water may reach the
    lowest step again. Times are Unix seconds UTC.
    """

    level: int = -1
    top_sent: int = -1
    above_since: tuple = ()
    inside_since: tuple = ()
    watermark: int | None = None
    held: bool = False


@dataclass(frozen=True)
class Event:
    """Something to announce: an episode ``opened``, ``escalated``, ``held`` (its all-clear
    waits on a high water forecast to reach the lowest step again) or ``cleared``."""

    kind: str
    level: int
    t: int
    value: float


def _fit(seq: tuple, n: int) -> tuple:
    return tuple(seq[:n]) + (None,) * max(0, n - len(seq))


def advance(rule: Rule, state: RuleState, t: int, value: float,
            hold_clear: bool = False) -> tuple[RuleState, list[Event]]:
    """Advance a rule's state machine by one counted value.

    Parameters
    ----------
    rule : Rule
    state : RuleState
    t : int
        Time of the value, Unix seconds UTC [s]; must be later than ``state.watermark``.
    value : float
        The watched quantity in the rule's units (already on the rule's datum).
    hold_clear : bool
        The episode may not end now: a high water forecast still reaches the lowest step
        (level rules; the engine decides). The lowest step stays in force instead.

    Returns
    -------
    state : RuleState
        The new state (watermark set to ``t``).
    events : list of Event
        At most one: an episode opened, escalated past every step announced so far,
        held (the first time in the episode its all-clear is held back), or cleared (back
        inside the band of the lowest step for ``settle`` seconds, and not held).

    Notes
    -----
    A step is reached when the value has stayed at or beyond it for ``hold`` seconds; it
    is left when the value has stayed beyond the hysteresis band (``band`` inside the
    step) for ``settle`` seconds. Stepping down within an episode is quiet, and
    returning to a step already announced in the same episode is not announced again.
    Hysteresis with a minimum dwell time is common practice in alarm handling (no
    single published source).
    """
    n = len(rule.steps)
    x = rule.sign * value
    above = list(_fit(state.above_since, n))
    inside = list(_fit(state.inside_since, n))
    for i, step in enumerate(rule.steps):
        thr = rule.sign * step.at
        if x >= thr:
            above[i] = above[i] if above[i] is not None else t
        else:
            above[i] = None
        if x < thr - rule.band:
            inside[i] = inside[i] if inside[i] is not None else t
        else:
            inside[i] = None
    level = min(state.level, n - 1)
    top = min(state.top_sent, n - 1)
    held = state.held
    events: list[Event] = []
    reached = max((i for i in range(n) if above[i] is not None and t - above[i] >= rule.hold), default=-1)
    if reached > level:
        if level < 0:
            events.append(Event("opened", reached, t, value))
            top = reached
            held = False
        elif reached > top:
            events.append(Event("escalated", reached, t, value))
            top = reached
        level = reached
    else:
        while level >= 0 and inside[level] is not None and t - inside[level] >= rule.settle:
            if level == 0 and hold_clear:
                if not held:
                    events.append(Event("held", top, t, value))
                    held = True
                break
            level -= 1
        if level < 0 and state.level >= 0:
            events.append(Event("cleared", top, t, value))
            top = -1
            held = False
    return RuleState(level=level, top_sent=top, above_since=tuple(above),
                     inside_since=tuple(inside), watermark=t, held=held), events


def with_watermark(state: RuleState, t: int) -> RuleState:
    """The same state with the watermark moved to ``t`` [Unix s, UTC] (a skipped, uncounted sample)."""
    # every field named (dataclasses.replace looks them up at each call: the pass's hot path)
    return RuleState(level=state.level, top_sent=state.top_sent, above_since=state.above_since,
                     inside_since=state.inside_since, watermark=t, held=state.held)
