"""The rule engine: advances every rule over new samples and queues the messages.

State lives in the store, not the process: ``alert_state`` holds each rule's state
machine (keyed by station and rule id) with a watermark time, and ``alert_episodes``
one row per episode. A station's rules are evaluated in one write transaction, each rule
in a savepoint of its own (:class:`alerts.transactions.LazySavepoint`, set before a rule
writes more than its state row, one statement applied whole or not at all): a rule's state change,
episode change and queued messages are committed together, so a crash or restart at any
instant neither repeats a message already queued nor forgets an episode in progress, and
a rule that fails leaves nothing of its own written while the others' writes are kept;
re-evaluating samples at or before the watermark does nothing. A caller that is the one
writer of a station's rules (the daemon) may keep the state rows between evaluations
(:class:`StateMemo`): a copy of what is stored, never more, so a restart reads the store.
Reloading the configuration keeps the state: steps are matched by name.

Two clocks: the rules run on ``now`` (the data's own time when a record is replayed),
and the messages carry the data time of their event; the outbox queues them on the wall
clock, so its back-off and expiry count real time (see :mod:`alerts.mail.outbox`).
"""
from __future__ import annotations

import functools
import json
import logging
import math
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from typing import Any, Iterable

import numpy as np
import pandas as pd

from alerts.mail.forms import compose, form_for
from alerts.mail.outbox import enqueue, ensure_outbox_schema, unix_seconds
from alerts.rules import Event, Rule, RuleState, SAMPLE_KINDS, StationView, advance, with_watermark
from alerts.transactions import LazySavepoint, transaction

log = logging.getLogger(__name__)

# QARTOD flags (IOOS 2021): 1 pass, 2 not evaluated, 3 suspect, 4 fail, 9 missing.
COUNTED_FLAGS = (1, 2)
SUSPECT = 3

TREND_WINDOW = 3600  # [s] the "change over the last hour" shown in messages
_TREND_SLACK = 900   # [s] how far from an hour back the earlier sample may be


@dataclass(frozen=True)
class NextHighWater:
    """Forecast of the next high water: time [Unix s UTC], level [m, station datum],
    uncertainty [m] (a half-width, as the forecaster reports it)."""

    time: int
    level: float
    uncertainty: float | None = None


@dataclass
class AlertContext:
    """What the engine cannot read from the samples.

    Attributes
    ----------
    next_high_water : NextHighWater or dict or None
    feed_age : float or None
        Seconds since the station's last sample arrived [s].
    faults : list of dict
        Active equipment faults from quality control (``kind``, ``value``, ``limit``, ``since``).
    high_waters : list
        Forecasts of every predicted high water within the longest ``clear_horizon`` of the
        station's rules, in any form :meth:`hw_dict` accepts; default the next high water
        alone. Forecasts carrying ``made_t`` may come from several issue times through the
        window: a sample is judged by the latest set issued at or before it
        (:meth:`forecasts_at`). A level rule's all-clear waits on them.
    """

    next_high_water: Any = None
    feed_age: float | None = None
    faults: list = field(default_factory=list)
    high_waters: list = field(default_factory=list)

    def hw_dicts(self) -> list[dict]:
        """Every high water forecast as :meth:`hw_dict` gives the next, in time order."""
        items = self.high_waters or ([self.next_high_water] if self.next_high_water is not None else [])
        out = [d for d in (_as_hw_dict(hw) for hw in items) if d is not None]
        return sorted(out, key=lambda d: d["time"])

    def forecasts_at(self, t: int | None = None) -> list[dict]:
        """The high water forecasts as they stood at ``t`` [Unix s]: the set issued last at or
        before it (the first set for a time before any), in time order; all of them when
        they carry no issue time."""
        every = self.hw_dicts()
        made = sorted({d["made_t"] for d in every if d.get("made_t") is not None})
        if t is None or not made:
            return every
        pick = max((m for m in made if m <= t), default=made[0])
        return [d for d in every if d.get("made_t") == pick]

    def hw_dict(self) -> dict | None:
        """The forecast as ``time, level, uncertainty`` (or ``lower, upper``) in a dict.

        Accepts a :class:`NextHighWater`, a dict with those keys, or the forecast dict of
        ``monitor.surge.forecast.SurgeForecaster.forecast`` (``hw_t, forecast, lower, upper, ...``).
        """
        return _as_hw_dict(self.next_high_water)


def _as_hw_dict(hw: Any) -> dict | None:
    if hw is None:
        return None
    if isinstance(hw, dict):
        d = dict(hw)
        if "hw_t" in d:
            d.setdefault("time", d["hw_t"])
            d.setdefault("level", d.get("forecast"))
    else:
        d = {"time": hw.time, "level": hw.level, "uncertainty": hw.uncertainty}
    if d.get("time") is None:
        return None
    d["time"] = unix_seconds(d["time"])
    return d


def ensure_alert_schema(db) -> None:
    """Create ``alert_state``, ``alert_episodes`` and ``outbox`` if missing."""
    names = set(db.table_names())
    if "alert_state" not in names:
        db["alert_state"].create({
            "station": str, "rule": str, "level": int, "top_sent": int, "steps": str,
            "above_since": str, "inside_since": str, "watermark": int, "episode_id": int,
            "announced": str, "updated_at": int, "held": int,
        }, pk=("station", "rule"), if_not_exists=True)
    elif "held" not in db["alert_state"].columns_dict:
        db["alert_state"].add_column("held", int)  # stores from before the all-clear could wait
    if "alert_episodes" not in names:
        db["alert_episodes"].create({
            "id": int, "station": str, "rule": str, "watch": str, "datum": str, "unit": str,
            "opened_at": int, "closed_at": int, "top_step": str, "step_now": str,
            "peak": float, "peak_t": int, "last_value": float, "last_t": int, "messages": int,
        }, pk="id", if_not_exists=True)
        db["alert_episodes"].create_index(["station", "rule", "opened_at"], if_not_exists=True)
    ensure_outbox_schema(db)


# --------------------------------------------------------------------------- state I/O

def _state_rows(db, station: str, rules: list[Rule]) -> dict[str, dict] | None:
    """The ``alert_state`` rows of a station's rules, read at once (rule id -> row), or None
    when two rules share an id (each then reads its row after the other's writes)."""
    if len({r.id for r in rules}) != len(rules):
        return None
    cur = db.conn.execute("SELECT * FROM alert_state WHERE station = ?", (station,))
    names = [d[0] for d in cur.description]
    return {r["rule"]: r for r in (dict(zip(names, row)) for row in cur.fetchall())}


@functools.lru_cache(maxsize=4096)
def _json_tuple(text: str) -> tuple:
    """A JSON list of the state's columns as a tuple (parsed once per text seen)."""
    return tuple(json.loads(text))


@functools.lru_cache(maxsize=4096)
def _plain_json(values: tuple) -> str:
    return json.dumps(list(values))


def _json_list(values: tuple) -> str:
    """``json.dumps(list(values))``, kept for tuples of plain ints, None and text (equal keys
    of other types, 1.0 and True for 1, would share an entry but not their text)."""
    if all(v is None or type(v) is int or type(v) is str for v in values):
        return _plain_json(values)
    return json.dumps(list(values))


def _load_state(db, station: str, rule: Rule, rows: dict[str, dict] | None = None) -> tuple[RuleState, int | None]:
    if rows is not None:
        r = rows.get(rule.id)
    else:
        cur = db.conn.execute("SELECT * FROM alert_state WHERE station = ? AND rule = ?", (station, rule.id))
        row = cur.fetchone()
        r = None if row is None else dict(zip([d[0] for d in cur.description], row))
    if r is None:
        return RuleState(), None
    old_names = _json_tuple(r["steps"] or "[]")
    above_old = _json_tuple(r["above_since"] or "[]")
    inside_old = _json_tuple(r["inside_since"] or "[]")
    names = [s.name for s in rule.steps]

    def remap_index(i: int) -> int:
        if i is None or i < 0:
            return -1
        if i < len(old_names) and old_names[i] in names:
            return names.index(old_names[i])
        return min(i, len(names) - 1)  # a renamed step: keep the position

    def remap_times(old: list) -> tuple:
        by_name = dict(zip(old_names, old))
        return tuple(by_name.get(n) for n in names)

    state = RuleState(level=remap_index(r["level"]), top_sent=remap_index(r["top_sent"]),
                      above_since=remap_times(above_old), inside_since=remap_times(inside_old),
                      watermark=r["watermark"], held=bool(r.get("held")))
    return state, r["episode_id"]


#: The ``alert_state`` columns :func:`_save_state` writes, in its statement's order.
_SAVED = ("station", "rule", "level", "top_sent", "steps", "above_since", "inside_since", "watermark",
          "episode_id", "updated_at", "held")


#: The positions in ``_SAVED`` of the columns that stay as stored when only a rule's watermark moves.
_KEPT_AT = tuple(i for i, c in enumerate(_SAVED) if c not in ("station", "rule", "watermark", "updated_at"))


def _save_state(db, station: str, rule: Rule, state: RuleState, episode_id: int | None, now: int,
                stored: dict | None = None) -> tuple:
    """Store a rule's state row; returns the values written (in the order of ``_SAVED``).

    ``stored``: the row as the store holds it (read in this transaction, or kept by its one
    writer, :class:`StateMemo`). When every other column would be written as it stands
    there, only the watermark and ``updated_at`` are updated: the same row, in a cheaper
    statement than the upsert."""
    values = (station, rule.id, state.level, state.top_sent, _json_list(tuple(s.name for s in rule.steps)),
              _json_list(state.above_since), _json_list(state.inside_since),
              state.watermark, episode_id, now, int(state.held))
    if stored is not None and all(stored.get(_SAVED[i]) == values[i] for i in _KEPT_AT):
        cur = db.conn.execute("UPDATE alert_state SET watermark = ?, updated_at = ? WHERE station = ? AND rule = ?",
                              (state.watermark, now, station, rule.id))
        if cur.rowcount == 1:
            return values
    db.conn.execute(
        "INSERT INTO alert_state (station, rule, level, top_sent, steps, above_since, inside_since,"
        " watermark, episode_id, updated_at, held) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
        " ON CONFLICT (station, rule) DO UPDATE SET level = excluded.level, top_sent = excluded.top_sent,"
        " steps = excluded.steps, above_since = excluded.above_since, inside_since = excluded.inside_since,"
        " watermark = excluded.watermark, episode_id = excluded.episode_id, updated_at = excluded.updated_at,"
        " held = excluded.held", values)
    return values


class StateMemo:
    """A station's ``alert_state`` rows (rule id -> row, as :func:`_state_rows` reads them)
    as the last :func:`evaluate` that was given this memo left them, so the next one need
    not read them again. For the one writer of a station's rules (the daemon): nothing else
    may write them while it is kept.

    :func:`evaluate` takes the rows out at its start (the memo is then empty) and puts them
    back only when every rule ran and its transaction ended without an error. Inside a
    caller's transaction that is before the caller's commit: a caller whose transaction
    then fails calls :meth:`forget`.
    """

    def __init__(self) -> None:
        self.rows: dict[str, dict] | None = None

    def forget(self) -> None:
        """Read the rows from the store at the next evaluation."""
        self.rows = None


# --------------------------------------------------------------------------- samples

@dataclass(frozen=True)
class Samples:
    """A station's samples as plain arrays, the engine's own form of them.

    Attributes
    ----------
    t : array of int64
        Sample times [Unix s UTC], increasing.
    columns : dict
        Column name -> float array [m] (``observed``, ``predicted``, ``residual``,
        ``smoothed``, ``flag``), NaN where a value is missing.
    """

    t: np.ndarray
    columns: dict

    def __len__(self) -> int:
        return len(self.t)

    def __contains__(self, name: str) -> bool:
        return name in self.columns

    def __getitem__(self, name: str) -> np.ndarray:
        return self.columns[name]

    @classmethod
    def from_frame(cls, frame: pd.DataFrame | None) -> "Samples":
        """The samples of a DataFrame indexed by UTC time (sorted by time)."""
        if frame is None:
            return cls(np.empty(0, np.int64), {})
        if len(frame) and not frame.index.is_monotonic_increasing:
            frame = frame.sort_index()
        columns = {}
        for c in frame.columns:
            try:
                columns[c] = frame[c].to_numpy(dtype=float)
            except (TypeError, ValueError):  # a text column: no rule reads one
                continue
        return cls(_times(frame.index), columns)


def _times(index: pd.Index) -> np.ndarray:
    if isinstance(index, pd.DatetimeIndex):
        if index.tz is not None:
            index = index.tz_convert(None)
        return index.values.astype("datetime64[s]").astype(np.int64)
    return np.asarray(index, dtype=np.int64)


def _series(rule: Rule, samples: Samples) -> np.ndarray:
    if rule.watch.startswith("residual"):
        col = rule.series if rule.series in samples else "residual"
        return samples[col]
    return samples["observed"] - rule.datum_offset


def _counted(rule: Rule, samples: Samples) -> np.ndarray:
    if "flag" not in samples:
        return np.ones(len(samples), dtype=bool)
    flag = samples["flag"]
    ok = (flag == COUNTED_FLAGS[0]) | (flag == COUNTED_FLAGS[1]) | np.isnan(flag)  # no flag yet = not evaluated
    if rule.use_suspect:
        ok |= flag == SUSPECT
    return ok


def _record_events(db, station, rule, events, episode_id, samples, t_all, ok_all, at, context, t_now, clock,
                   results: list) -> int | None:
    """Record each event of one step of a rule (queueing its messages); returns the open episode."""
    for ev in events:
        facts = _facts(samples, t_all, ok_all, at, context)
        if ev.kind in ("held", "cleared") and rule.watch == "level_above" and rule.clear_horizon > 0:
            check = _clear_check(rule, context, at)
            if check is not None:
                facts["clear_check"] = check
        episode_id, info = _on_event(db, station, rule, ev, episode_id, facts, t_now, clock=clock)
        results.append(info)
        if ev.kind == "cleared":
            episode_id = None
    return episode_id


def _facts(samples: Samples, t_all: np.ndarray, ok_all: np.ndarray, t: int,
           context: AlertContext) -> dict:
    facts: dict[str, Any] = {}
    if len(samples):
        usable = ok_all & (t_all <= t)
        if usable.any():
            i = np.flatnonzero(usable)[-1]
            for key in ("observed", "predicted", "residual"):
                if key in samples and not np.isnan(samples[key][i]):
                    facts[key] = float(samples[key][i])
            if "observed" in samples and not np.isnan(samples["observed"][i]):
                observed = samples["observed"]
                back = usable & (t_all <= t_all[i] - TREND_WINDOW + _TREND_SLACK) & \
                    (t_all >= t_all[i] - TREND_WINDOW - _TREND_SLACK) & ~np.isnan(observed)
                if back.any():
                    cand = np.flatnonzero(back)
                    j = cand[np.argmin(np.abs(t_all[cand] - (t_all[i] - TREND_WINDOW)))]
                    facts["trend"] = float(observed[i]) - float(observed[j])
                    facts["trend_window"] = int(t_all[i] - t_all[j])
    coming = [d for d in context.forecasts_at(t) if d["time"] > t] if context.high_waters else []
    hw = coming[0] if coming else context.hw_dict()
    if hw is not None:
        facts["next_high_water"] = hw
    if context.feed_age is not None:
        facts["feed_age"] = float(context.feed_age)
    if context.faults:
        facts["faults"] = list(context.faults)
    return facts


def _reaching(rule: Rule, context: AlertContext | None, t: int) -> dict | None:
    """The first high water within the rule's ``clear_horizon`` after ``t`` whose forecast
    range reaches the rule's lowest step (its top, or the forecast itself without a range,
    on the rule's datum), or None: while there is one, a level rule's all-clear waits."""
    if context is None or rule.watch != "level_above" or rule.clear_horizon <= 0:
        return None
    for hw in context.forecasts_at(t):
        if not t < hw["time"] <= t + rule.clear_horizon:
            continue
        top = _top(hw)
        if top is not None and top - rule.datum_offset >= rule.steps[0].at:
            return hw
    return None


def _top(hw: dict) -> float | None:
    for key in ("upper", "level"):
        v = hw.get(key)
        if v is not None and math.isfinite(float(v)):
            return float(v)
    return None


def _clear_check(rule: Rule, context: AlertContext, t: int) -> dict | None:
    """What a held or cleared level rule tells: the high water that holds the all-clear back,
    else the next high water, with the top of its range [m, station datum]."""
    hw = _reaching(rule, context, t)
    if hw is None:
        later = [h for h in context.forecasts_at(t) if h["time"] > t]
        hw = later[0] if later else None
    if hw is None or hw.get("level") is None:
        return None
    return {"time": hw["time"], "level": float(hw["level"]), "upper": _top(hw), "step": rule.steps[0].name,
            "step_at": rule.steps[0].at, "horizon": rule.clear_horizon}


def _context_value(rule: Rule, context: AlertContext) -> float | None:
    if rule.watch == "feed_silent":
        return None if context.feed_age is None else float(context.feed_age)
    if rule.watch == "equipment_fault":
        faults = context.faults or []
        if rule.fault_kinds:
            faults = [f for f in faults if isinstance(f, dict) and f.get("kind") in rule.fault_kinds]
        return float(len(faults))
    hw = context.hw_dict()
    if hw is None or hw.get("level") is None or not math.isfinite(hw["level"]):
        return None
    return float(hw["level"]) - rule.datum_offset


# --------------------------------------------------------------------------- engine

def iso_utc(t: float) -> str:
    """Unix seconds as ISO 8601 UTC, ``2025-10-23T12:00:00Z`` (for log lines)."""
    return datetime.fromtimestamp(float(t), tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _kind_of(event: Event) -> str:
    return {"opened": "alert", "escalated": "alert", "changed": "alert", "held": "alert",
            "cleared": "all_clear"}[event.kind]


def _on_event(db, station: StationView, rule: Rule, event: Event, episode_id: int | None,
              facts: dict, now: int, key_suffix: str = "", clock=None) -> tuple[int | None, dict]:
    step = rule.steps[event.level]
    if event.kind == "opened":
        cur = db.conn.execute(
            "INSERT INTO alert_episodes (station, rule, watch, datum, unit, opened_at, top_step, step_now,"
            " peak, peak_t, last_value, last_t, messages) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, 0)",
            (station.id, rule.id, rule.watch, rule.datum, rule.unit, event.t, step.name, step.name,
             event.value, event.t, event.value, event.t))
        episode_id = cur.lastrowid
    elif episode_id is None:
        # State from before this table existed; keep going with a fresh episode row.
        cur = db.conn.execute(
            "INSERT INTO alert_episodes (station, rule, watch, datum, unit, opened_at, top_step, step_now,"
            " messages) VALUES (?, ?, ?, ?, ?, ?, ?, ?, 0)",
            (station.id, rule.id, rule.watch, rule.datum, rule.unit, event.t, step.name, step.name))
        episode_id = cur.lastrowid
    if event.kind == "escalated":
        db.conn.execute("UPDATE alert_episodes SET top_step = ?, step_now = ? WHERE id = ?",
                        (step.name, step.name, episode_id))
    if event.kind == "cleared":
        db.conn.execute("UPDATE alert_episodes SET closed_at = ?, step_now = NULL WHERE id = ?",
                        (event.t, episode_id))
    recipients = rule.recipients_up_to(event.level)
    ids: list[int] = []
    if event.kind != "cleared" or rule.all_clear:
        key = f"{station.id}/{rule.id}/episode-{episode_id}/{event.kind}/{step.name}"
        if key_suffix:
            key += f"/{key_suffix}"
        by_form: dict[str, list[str]] = {}
        for rcpt in recipients:
            by_form.setdefault(form_for(rcpt, station.forms), []).append(rcpt)
        for form, group in by_form.items():
            subject, text, html = compose(form, station, rule, event, facts)
            ids += enqueue(db, group, subject, text, html, _kind_of(event), key, event_time=event.t,
                           clock=clock)
        db.conn.execute("UPDATE alert_episodes SET messages = messages + ? WHERE id = ?",
                        (len(ids), episode_id))
    log.info("station %s rule %s: %s %s at %s (value %s), %d messages queued",
             station.id, rule.id, event.kind, step.name, iso_utc(event.t),
             f"{event.value:.3f} {rule.unit}".strip(), len(ids))
    return episode_id, {"station": station.id, "rule": rule.id, "event": event.kind,
                        "step": step.name, "t": event.t, "value": event.value,
                        "episode": episode_id, "outbox": ids}


def _track_peak(db, rule: Rule, episode_id: int, t: int, value: float) -> None:
    better = "<" if rule.sign > 0 else ">"
    db.conn.execute(
        f"UPDATE alert_episodes SET last_value = ?, last_t = ?,"
        f" peak_t = CASE WHEN peak IS NULL OR peak {better} ? THEN ? ELSE peak_t END,"
        f" peak = CASE WHEN peak IS NULL OR peak {better} ? THEN ? ELSE peak END WHERE id = ?",
        (value, t, value, t, value, value, episode_id))


def _fault_key(f: Any) -> str:
    return f"{f.get('kind')}/{f.get('sensor') or ''}" if isinstance(f, dict) else str(f)


def _fault_changes(db, station: StationView, rule: Rule, state: RuleState, events: list[Event],
                   episode_id: int | None, samples: Samples, t_all: np.ndarray, ok_all: np.ndarray,
                   t_now: int, context: AlertContext, clock=None) -> tuple[list[dict], list[str]]:
    """During an equipment-fault episode, one more message when a new kind of fault appears.

    Returns the events and the fault keys announced so far in the episode."""
    faults = [f for f in context.faults or []
              if not rule.fault_kinds or (isinstance(f, dict) and f.get("kind") in rule.fault_kinds)]
    keys = sorted({_fault_key(f) for f in faults})
    row = list(db.query("SELECT announced FROM alert_state WHERE station = ? AND rule = ?",
                        [station.id, rule.id]))
    announced = set(json.loads(row[0]["announced"] or "[]")) if row else set()
    results: list[dict] = []
    kinds = {e.kind for e in events}
    if "cleared" in kinds or state.level < 0:
        announced = set()
    elif "opened" in kinds:
        announced = set(keys)
    elif set(keys) - announced and episode_id is not None:
        ev = Event("changed", state.level, t_now, float(len(faults)))
        facts = _facts(samples, t_all, ok_all, t_now, context)
        facts["new_faults"] = [f for f in faults if _fault_key(f) not in announced]
        _, info = _on_event(db, station, rule, ev, episode_id, facts, t_now,
                            key_suffix="+".join(sorted(set(keys) - announced)), clock=clock)
        results.append(info)
        announced |= set(keys)
    return results, sorted(announced)


def _idle(state: RuleState) -> bool:
    # Below every step with no run in progress; the "back inside" timers only matter
    # while a step is in force, so they may be left as they are.
    return state.level < 0 and not any(x is not None for x in state.above_since)


def station_marks(rules: Iterable[Rule]) -> tuple[tuple[str, float], ...]:
    """The port's own marks from its ``level_above`` rules: (step name, level [m, station
    datum]) for each step, low to high (the brief email form tells levels against them)."""
    marks = {s.name: s.at + r.datum_offset for r in rules if r.watch == "level_above" for s in r.steps}
    return tuple(sorted(marks.items(), key=lambda kv: kv[1]))


def evaluate(db, station: StationView, rules: Iterable[Rule], samples: pd.DataFrame | Samples | None,
             now: Any = None, context: AlertContext | None = None, clock=None,
             schema_ready: bool = False, memo: StateMemo | None = None) -> list[dict]:
    """Advance every rule of a station and queue the messages its events call for.

    Parameters
    ----------
    db : sqlite_utils.Database
    station : StationView
    rules : iterable of Rule
    samples : pandas.DataFrame, Samples or None
        Indexed by UTC time, columns ``observed``, ``predicted``, ``residual``, ``smoothed``
        [m, station datum] and ``flag`` (aggregate QARTOD); or the same as :class:`Samples`
        (the daemon's pass, no pandas object made). Samples at or before a rule's
        watermark are not evaluated again; pass the last hour too so messages can show
        the trend. Flags 4 (fail) and 9 (missing) never count; 3 (suspect) counts unless
        the rule says ``use_suspect = false``.
    now : time, optional
        The evaluation time (default: the clock); context rules (next high water, feed
        silence, equipment faults) are evaluated once at ``now``.
    context : AlertContext, optional
    clock : callable, optional
        Wall clock for the outbox's queue time (default ``time.time``); ``now`` may be a
        replayed data time, the queue time never is.
    schema_ready : bool
        The caller knows the alert and outbox tables exist (the daemon: its store was
        migrated on open), so they are not looked for.
    memo : StateMemo, optional
        The station's state rows as the last evaluation given it stored them (the daemon,
        the rules' one writer): read from it instead of the store, and left in it again
        when every rule ran and the transaction ended without an error.

    Returns
    -------
    list of dict
        One per event: station, rule, event (opened/escalated/cleared), step, t, value,
        episode id, outbox ids queued.

    Notes
    -----
    The rules run in one write transaction, each in a savepoint (set only when the rule
    writes more than its state row, which one statement writes whole or not at all): a rule that raises is
    logged with its traceback and leaves nothing of its own written (its state, episodes
    and messages stay as they were, so it is evaluated again next time); the other rules'
    writes are committed.
    """
    if not schema_ready:
        ensure_alert_schema(db)
    rules = list(rules)
    if not rules:
        return []
    if not station.marks:
        station = replace(station, marks=station_marks(rules))
    t_now = unix_seconds(now)
    context = context or AlertContext()
    if not isinstance(samples, Samples):
        samples = Samples.from_frame(samples)
    t_all = samples.t
    out: list[dict] = []
    rows, whole = None, True
    if memo is not None:
        rows, memo.rows = memo.rows, None  # taken: left again only after a whole evaluation
    with transaction(db) as conn:  # one write transaction for the station's rules
        if rows is None:
            rows = _state_rows(db, station.id, rules)
        for rule in rules:
            try:
                # a rule that fails undoes its own writes alone: a savepoint before a rule's
                # writes, unless it writes its state row alone (one statement, whole or none)
                with LazySavepoint(conn) as part:
                    out.extend(_evaluate_rule(db, station, rule, samples, t_all, t_now, context, clock, rows,
                                              part))
            except Exception:
                whole = False
                if not conn.in_transaction:
                    raise  # the transaction itself is gone (an I/O error): nothing more can go in it
                log.exception("station %s rule %s: evaluation failed; nothing of this rule stored, "
                              "the other rules go on", station.id, rule.id)
    if memo is not None and whole:
        memo.rows = rows  # as written: each rule's writes copied into ``rows`` (_evaluate_rule)
    return out


def _evaluate_rule(db, station: StationView, rule: Rule, samples: Samples, t_all: np.ndarray,
                   t_now: int, context: AlertContext, clock=None, rows: dict[str, dict] | None = None,
                   part: LazySavepoint | None = None) -> list[dict]:
    """One rule over the samples and the context; its writes in ``part``, begun before
    any write but a lone state row."""
    begin = part.begin if part is not None else (lambda: None)
    state, episode_id = _load_state(db, station.id, rule, rows)
    wm = state.watermark if state.watermark is not None else -(2 ** 62)
    results: list[dict] = []
    before = state
    announced: list[str] | None = None  # equipment faults told of in the open episode

    if rule.watch in SAMPLE_KINDS:
        ok_all = _counted(rule, samples)
        values_all = _series(rule, samples) if len(samples) else np.empty(0)
        new = np.flatnonzero(t_all > wm)
        if len(new) == 0:
            return results
        counted = new[ok_all[new] & np.isfinite(values_all[new])]
        xs = rule.sign * values_all[counted]
        first = rule.sign * rule.steps[0].at
        k = 0
        while k < len(counted):
            if _idle(state):
                # Quiet water: jump straight to the next value beyond the first step.
                ahead = np.flatnonzero(xs[k:] >= first)
                if len(ahead) == 0:
                    break
                k += int(ahead[0])
            begin()  # events, episodes and messages may be written from here on
            i = counted[k]
            t, v = int(t_all[i]), float(values_all[i])
            hold = state.level >= 0 and _reaching(rule, context, t) is not None
            state, events = advance(rule, state, t, v, hold_clear=hold)
            episode_id = _record_events(db, station, rule, events, episode_id, samples, t_all, ok_all, t,
                                        context, t_now, clock, results)
            if episode_id is not None:
                _track_peak(db, rule, episode_id, t, v)
            k += 1
        # Only a sample that counts moves the watermark: one that does not (failed, missing,
        # or suspect where the rule ignores suspects) may be any time at all -- a clock
        # stamping 2099 -- and a watermark moved there would silence the rule for good.
        # Uncounted samples past the watermark are looked at again next time, and count
        # then if a technician's override or a re-run of quality control passes them.
        if len(counted):
            state = with_watermark(state, int(t_all[counted[-1]]))
    else:
        if t_now <= wm:
            return results
        value = _context_value(rule, context)
        if value is None:
            state = with_watermark(state, t_now)
        else:
            begin()  # events, episodes and messages may be written from here on
            state, events = advance(rule, state, t_now, value)
            ok_all = _counted(rule, samples)
            episode_id = _record_events(db, station, rule, events, episode_id, samples, t_all, ok_all, t_now,
                                        context, t_now, clock, results)
            if rule.watch == "equipment_fault":
                more, announced = _fault_changes(db, station, rule, state, events, episode_id, samples,
                                                 t_all, ok_all, t_now, context, clock)
                results += more
            if episode_id is not None:
                _track_peak(db, rule, episode_id, t_now, value)
    if announced is not None or ((state != before or results) and state.level >= 0):
        begin()  # more than the state row
    if state != before or results:
        if state.level >= 0 and episode_id is None:
            # An episode in progress without a row (state from a migration): give it one.
            cur = db.conn.execute(
                "INSERT INTO alert_episodes (station, rule, watch, datum, unit, opened_at, top_step,"
                " step_now, messages) VALUES (?, ?, ?, ?, ?, ?, ?, ?, 0)",
                (station.id, rule.id, rule.watch, rule.datum, rule.unit, state.watermark,
                 rule.steps[state.top_sent if state.top_sent >= 0 else state.level].name,
                 rule.steps[state.level].name))
            episode_id = cur.lastrowid
        if episode_id is not None and state.level >= 0:
            db.conn.execute("UPDATE alert_episodes SET step_now = ? WHERE id = ?",
                            (rule.steps[state.level].name, episode_id))
        saved = dict(zip(_SAVED, _save_state(db, station.id, rule, state, episode_id, t_now,
                                             None if rows is None else rows.get(rule.id))))
        if rows is not None:  # the row as now stored (``announced`` kept as it was)
            rows[rule.id] = {**rows.get(rule.id, {"announced": None}), **saved}
    if announced is not None:
        text = json.dumps(announced)
        db.conn.execute("UPDATE alert_state SET announced = ? WHERE station = ? AND rule = ?",
                        (text, station.id, rule.id))
        if rows is not None and rule.id in rows:
            rows[rule.id] = {**rows[rule.id], "announced": text}
    return results


def list_episodes(db, station: str | None = None, limit: int = 50) -> list[dict]:
    """Most recent episodes first (open ones have ``closed_at`` None)."""
    if "alert_episodes" not in db.table_names():
        return []
    where, params = ("WHERE station = ?", [station]) if station else ("", [])
    return [dict(r) for r in db.query(
        f"SELECT * FROM alert_episodes {where} ORDER BY opened_at DESC, id DESC LIMIT ?", params + [limit])]
