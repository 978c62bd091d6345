"""Store glue of the live pages: gather a station's values from the store into an
:class:`alerts.live.Snapshot`, and keep each station's page fresh from the daemon.

:func:`gather` reads the last 48 h of derived series (samples that failed quality control or
are missing left out), the next high water as the forecast last issued it, the open alert
episodes with the messages queued for them, and the feeds' last usable samples with the
quality-control counts of the last hours. :class:`LivePages` rewrites a station's page after
each processing pass that gave it new data, and at least every ``live.refresh`` while it is
silent (so STALE shows when its feed stops), and the overview page with them.

During an event the page says how rare the water is: the highest QC-passed (flag 1) primary
level of the page's 48 h, read off the return-level curve of the station's latest row in
``extremes_cache`` (:mod:`monitor.service.extremes`; the same route the daily report reads). No
fit is ever made here: :class:`RarityCache` peeks at the row's ``made_t`` (one indexed row, no
JSON) and parses the result only when it changed; no row, no line. Whether it is an event is
decided by :func:`alerts.live.snapshot.rarity_line`.
"""
from __future__ import annotations

import json
import logging
import math
import os
import re
import time
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np
import pandas as pd

from alerts.live.render import CAUTION, write_overview, write_station
from alerts.live.settings import LiveSettings
from alerts.live.snapshot import Snapshot, build_snapshot
from monitor.service.config import Config, StationConfig
from monitor.service.extremes import PASSED, TABLE, on_todays_sea, readable_curve, result_curves
from monitor.store.database import to_unix

log = logging.getLogger(__name__)

__all__ = ["gather", "next_forecast", "open_episodes", "sensor_health", "event_peak", "RarityCache", "LivePages",
           "QC_HOURS", "AHEAD_HOURS", "EVENT_HOURS"]

#: Hours of quality-control flags counted in the gauge's health.
QC_HOURS = 6.0
#: How far ahead the predicted tide is drawn when no forecast says where the next high water is [h]
#: (a semidiurnal cycle and a little more).
AHEAD_HOURS = 13.0
#: Step of the predicted tide drawn ahead [s].
AHEAD_STEP = 600
#: Hours searched for the event's highest water: the page's 48 h (a storm's few tides).
EVENT_HOURS = 48.0


def _table(store, name: str) -> bool:
    return store.conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = ?",
                              (name,)).fetchone() is not None


def next_forecast(store, station: str, now: float) -> dict | None:
    """The next high water after ``now`` as the latest issue of the forecast made it (station datum)."""
    if not _table(store, "hw_forecasts"):
        return None
    cur = store.conn.execute(
        "SELECT * FROM hw_forecasts WHERE station = ? AND hw_t >= ? AND made_t = "
        "(SELECT max(made_t) FROM hw_forecasts WHERE station = ? AND hw_t >= ?) ORDER BY hw_t LIMIT 1",
        (station, int(now), station, int(now)))
    row = cur.fetchone()
    return dict(zip([d[0] for d in cur.description], row)) if row else None


def _subject_words(subject: str, name: str) -> str:
    """An alert subject without its ``[quaywatch] Station name:`` prefix."""
    text = re.sub(r"^\[[^\]]*\]\s*", "", subject or "")
    return text[len(name) + 2:] if name and text.startswith(name + ": ") else text


def _peak_text(st: StationConfig, e: dict) -> str:
    v, watch = e.get("peak"), e.get("watch") or ""
    if v is None or watch == "equipment_fault":
        return ""
    if e.get("unit") != "m":
        return f"{v / 60:.0f} min" if e.get("unit") == "s" else f"{v:g}"
    if watch.startswith("residual"):
        return f"{v:+.2f} m"
    level = v + float(st.datums.get(e.get("datum") or "station", 0.0)) - st.display_offset
    return f"{level:.2f} m above {st.display_label}"


def open_episodes(store, st: StationConfig) -> list[dict]:
    """The station's open alert episodes, each with the messages queued for it (who, what, state)."""
    if not _table(store, "alert_episodes"):
        return []
    rows = store.conn.execute(
        "SELECT id, rule, watch, datum, unit, opened_at, top_step, step_now, peak, peak_t FROM alert_episodes "
        "WHERE station = ? AND closed_at IS NULL ORDER BY opened_at", (st.id,)).fetchall()
    out = []
    has_outbox = _table(store, "outbox")
    for r in rows:
        e = dict(zip(("id", "rule", "watch", "datum", "unit", "opened_at", "top_step", "step_now", "peak",
                      "peak_t"), r))
        e["peak_text"] = _peak_text(st, e)
        msgs = []
        if has_outbox:
            key = f"{st.id}/{e['rule']}/episode-{e['id']}/%"
            msgs = [dict(zip(("recipient", "subject", "status", "sent_at", "kind"), m)) for m in store.conn.execute(
                "SELECT recipient, subject, status, sent_at, kind FROM outbox WHERE key LIKE ? ORDER BY id",
                (key,)).fetchall()]
        e["messages"] = msgs
        out.append(e)
    return out


def sensor_health(store, st: StationConfig, now: float, until: int) -> dict:
    """Each sensor's feed and last usable sample, the primary's quality-control counts over the
    last :data:`QC_HOURS`, and the open equipment and silence episodes as faults."""
    sensors = [{"role": role, "label": s.label, "kind": getattr(s.feed, "kind", "none"),
                "last_t": store.last_time(st.id, role, until=until, usable=True)}
               for role, s in st.sensors.items()]
    a = int(now - QC_HOURS * 3600)
    fail, suspect, total = store.conn.execute(
        "SELECT sum(flag = 4), sum(flag = 3), count(*) FROM observations WHERE station = ? AND sensor = 'primary' "
        "AND t BETWEEN ? AND ?", (st.id, a, int(until))).fetchone()
    faults = []
    if _table(store, "alert_episodes"):
        for ep, rule, step in store.conn.execute(
                "SELECT id, rule, coalesce(step_now, top_step) FROM alert_episodes WHERE station = ? "
                "AND closed_at IS NULL AND watch IN ('equipment_fault', 'feed_silent')", (st.id,)).fetchall():
            last = None
            if _table(store, "outbox"):
                last = store.conn.execute("SELECT subject FROM outbox WHERE key LIKE ? ORDER BY id DESC LIMIT 1",
                                          (f"{st.id}/{rule}/episode-{ep}/%",)).fetchone()
            faults.append(_subject_words(last[0], st.name) if last else f"{step} (alert {rule})")
    return {"sensors": sensors, "qc": {"hours": QC_HOURS, "fail": int(fail or 0), "suspect": int(suspect or 0),
                                       "total": int(total or 0)}, "faults": faults}


def event_peak(store, station: str, ref: float, until: int) -> tuple[int, float] | None:
    """The highest QC-passed primary sample of the :data:`EVENT_HOURS` up to ``ref``:
    (t [Unix s], level [m, station datum]), or None."""
    row = store.conn.execute(
        "SELECT t, value FROM observations WHERE station = ? AND sensor = 'primary' AND flag = ? "
        "AND t BETWEEN ? AND ? ORDER BY value DESC, t DESC LIMIT 1",
        (station, PASSED, int(ref - EVENT_HOURS * 3600), int(until))).fetchone()
    return None if row is None else (int(row[0]), float(row[1]))


class RarityCache:
    """The return-level curve of each station's latest ``extremes_cache`` row, kept in memory.

    :meth:`get` reads the row's key and ``made_t`` (one indexed row) on each call and parses
    its result only when they changed; ``reads`` counts the parses.
    """

    def __init__(self) -> None:
        self.kept: dict[str, tuple[tuple, dict | None]] = {}
        self.reads = 0

    def get(self, store, station: str) -> dict | None:
        """``{"route", "curve", "datum_offset_m", "trend_result", "note"}`` or None (no row, no curve)."""
        if not _table(store, TABLE):
            return None
        row = store.conn.execute(f"SELECT options, made_t, record_end FROM {TABLE} WHERE station = ? "
                                 "ORDER BY made_t DESC LIMIT 1", (station,)).fetchone()
        if row is None:
            self.kept.pop(station, None)
            return None
        sig = tuple(row)
        kept = self.kept.get(station)
        if kept is not None and kept[0] == sig:
            return kept[1]
        text = store.conn.execute(f"SELECT result FROM {TABLE} WHERE station = ? AND options = ?",
                                  (station, row[0])).fetchone()
        self.reads += 1
        info = None
        try:
            info = _curve_info(json.loads(text[0]), int(row[1]))
        except (TypeError, ValueError, KeyError, IndexError) as exc:
            log.warning("station %s: extremes_cache row made %s unreadable (%s); no rarity line on the live page",
                        station, pd.Timestamp(int(row[1]), unit="s", tz="UTC").isoformat(), exc)
        self.kept[station] = (sig, info)
        return info


def _curve_info(result: dict, made_t: int) -> dict | None:
    curves = result_curves(result)
    if not curves:
        return None
    route = next(iter(curves))
    rec = result.get("record") or {}
    note = (f"Read from the {route} curve of {rec.get('years_of_hours', 0):.0f} years of this station's "
            f"QC-passed record ({str(rec.get('first', ''))[:4]} to {str(rec.get('last', ''))[:4]}), analysed "
            f"{pd.Timestamp(made_t, unit='s', tz='UTC'):%Y-%m-%d}; an estimate, not an official flood-risk assessment.")
    return {"route": route, "curve": readable_curve(curves[route]), "datum_offset_m": float(result["datum_offset_m"]),
            "trend_result": {"sea_level": {"trend": (result.get("sea_level") or {}).get("trend")}}, "note": note}


def _rarity(store, st: StationConfig, cache: RarityCache, ref: float, until: int) -> dict | None:
    """What :func:`alerts.live.snapshot.build_snapshot` needs for the rarity line, or None."""
    info = cache.get(store, st.id)
    if info is None:
        return None
    peak = event_peak(store, st.id, ref, until)
    if peak is None:
        return None
    t, level = peak
    # the curve on today's display datum (a changed display datum moves the cached curve with it)
    move = info["datum_offset_m"] - float(st.display_offset)
    curve = {**info["curve"], **{k: [v + move for v in info["curve"][k]] for k in ("level", "lower", "upper")}}
    return {"peak": {"level": on_todays_sea(info["trend_result"], level, pd.Timestamp(t, unit="s", tz="UTC")),
                     "recorded": level, "t": t},
            "curve": curve, "note": info["note"]}


def _samples(store, st: StationConfig, ref: float, until: int) -> dict:
    a = int(ref - 48 * 3600)
    d = store.derived(st.id, a, until)
    if d.empty:
        return {}
    obs = store.observations(st.id, "primary", a, until)
    bad = obs.index[obs["flag"].isin((4, 9)).to_numpy()]
    d.loc[d.index.isin(bad), ["observed", "residual", "smoothed"]] = np.nan
    return {"t": to_unix(d.index).astype(float), "observed": d["observed"].to_numpy(), "predicted": d["predicted"].to_numpy(),
            "residual": d["residual"].to_numpy(), "smoothed": d["smoothed"].to_numpy()}


def _ahead(model, ref: float, forecast: dict | None) -> dict | None:
    if model is None:
        return None
    end = (forecast["hw_t"] + 3600) if forecast else ref + AHEAD_HOURS * 3600
    t = np.arange(math.floor(ref / AHEAD_STEP) * AHEAD_STEP, end + AHEAD_STEP, AHEAD_STEP, dtype=float)
    return {"t": t, "predicted": np.asarray(model.predict(pd.to_datetime(t, unit="s", utc=True)), dtype=float)}


def gather(store, st: StationConfig, settings: LiveSettings, *, now: float, until: int, model: Any = None,
           written_at: float | None = None, rarity: RarityCache | None = None) -> Snapshot:
    """A station's snapshot from the store.

    Parameters
    ----------
    store : monitor.store.Store
    st : StationConfig
    settings : LiveSettings
    now : float
        The monitor's clock [Unix s] (the replayed clock during a replay).
    until : int
        Latest sample time that counts [Unix s] (``now`` plus ``qc.future_tolerance``).
    model : TideModel, optional
        The constants in use, for the predicted tide ahead.
    written_at : float, optional
        Wall-clock time of writing [Unix s] (default: now on the wall clock).
    rarity : RarityCache, optional
        The cached curves kept between passes (default: read afresh).
    """
    last = store.last_time(st.id, "primary", until=until, usable=True)
    # A silent station shows its last 48 h of record and the forecast last made from it, under
    # its STALE banner; a live one, the 48 h up to now.
    ref = now if last is None or now - last <= settings.stale_after else last
    fc = next_forecast(store, st.id, ref)
    return build_snapshot(
        station={"id": st.id, "name": st.name, "tz": st.tz, "datum": st.display_label, "note": st.note,
                 "datum_note": st.datum_note},
        marks=st.marks, display_offset=st.display_offset, now=now,
        written_at=time.time() if written_at is None else written_at,
        stale_after=settings.stale_after, refresh=settings.refresh,
        last_sample_t=last, samples=_samples(store, st, ref, until), ahead=_ahead(model, ref, fc), forecast=fc,
        episodes=open_episodes(store, st), health=sensor_health(store, st, now, until), caution=CAUTION,
        rarity=_rarity(store, st, rarity if rarity is not None else RarityCache(), ref, until))


class LivePages:
    """Keeps the live folder of one daemon: a station's page after each pass that gave it new data
    and every ``refresh`` [s] of wall clock while it is silent; the overview with them."""

    def __init__(self, cfg: Config):
        self.cfg = cfg
        self.settings: LiveSettings = cfg.live
        self.folder = Path(cfg.live.folder)
        self.written: dict[str, float] = {}
        self.snaps: dict[str, Snapshot] = {}
        self.rarity = RarityCache()
        self.reports = ""
        if cfg.reports is not None and getattr(cfg.reports, "folder", None):
            try:
                self.reports = os.path.relpath(Path(cfg.reports.folder) / "index.html", self.folder)
            except ValueError:
                self.reports = ""

    def due(self, station: str, changed: bool, wall: float) -> bool:
        return changed or wall - self.written.get(station, -math.inf) >= self.settings.refresh

    def update(self, store, stations: Iterable[tuple[StationConfig, Any]], changed: set,
               clock: Callable[[StationConfig], tuple[float, int]]) -> int:
        """Rewrite the pages that are due; returns how many were written.

        ``stations`` gives each station with its model; ``clock(st)`` its (now, until)."""
        wall = time.time()
        n = 0
        for st, model in stations:
            if not self.due(st.id, st.id in changed, wall):
                continue
            now, until = clock(st)
            try:
                snap = gather(store, st, self.settings, now=now, until=until, model=model, written_at=wall,
                              rarity=self.rarity)
                write_station(snap, self.folder, self.reports)
            except Exception:
                log.exception("station %s: live page not written; will retry", st.id)
                continue
            self.snaps[st.id] = snap
            self.written[st.id] = wall
            n += 1
        if n:
            try:
                write_overview([self.snaps[st.id] for st in self.cfg.stations if st.id in self.snaps], self.folder,
                               wall, self.settings.refresh, self.cfg.stations[0].tz if self.cfg.stations else "UTC")
            except Exception:
                log.exception("live overview not written; will retry")
        return n
