"""The headline of a live snapshot in words: the same lines on the page and in ``quaywatch status``.

In the issue's order: STALE (when it is), the level now against the operator's marks and its
trend, the residual and its trend, the next high water forecast and its range against the
marks, open alert episodes, the gauge's health. Each line is ``(key, text, alarm)``; ``alarm``
is true when the line says something is wrong (STALE, a mark passed or within reach, an open
episode, a gauge fault), so the page can make it stand out.
"""
from __future__ import annotations

import datetime as dt
from typing import NamedTuple
from zoneinfo import ZoneInfo

from alerts.live.snapshot import Snapshot, age_words, trend_words

__all__ = ["Line", "headline", "local_time", "gauge_verdict"]


class Line(NamedTuple):
    key: str
    text: str
    alarm: bool


def local_time(t: float | None, tz: str, now: float | None = None) -> str:
    """``"03:10 GMT"``, with the weekday and date when not on the local day of ``now``
    (``"Tue 01 Dec 23:50 GMT"``); ``"-"`` for None."""
    if t is None:
        return "-"
    zone = ZoneInfo(tz)
    here = dt.datetime.fromtimestamp(float(t), dt.timezone.utc).astimezone(zone)
    if now is not None:
        today = dt.datetime.fromtimestamp(float(now), dt.timezone.utc).astimezone(zone).date()
        if here.date() == today:
            return here.strftime("%H:%M %Z")
    return here.strftime("%a %d %b %H:%M %Z")


def gauge_verdict(snap: Snapshot) -> tuple[str, bool]:
    """One line on whether the gauge can be trusted now, and whether that is an alarm."""
    h = snap.health or {}
    problems: list[str] = []
    for s in h.get("sensors", ()):
        age = None if s.get("last_t") is None else snap.now - s["last_t"]
        limit = snap.stale_after
        if age is None:
            problems.append(f"{s['role']} has no usable sample")
        elif age > limit:
            problems.append(f"{s['role']} silent {age_words(age)}")
    qc = h.get("qc") or {}
    if qc.get("fail"):
        problems.append(f"{qc['fail']} sample(s) failed quality control in the last {qc.get('hours', 6):g} h")
    if qc.get("suspect"):
        problems.append(f"{qc['suspect']} suspect")
    problems += [str(f) for f in h.get("faults", ())]
    if not problems:
        n = qc.get("total")
        return (f"Gauge OK: every sensor reporting, no quality-control failures"
                + (f" in {n} samples of the last {qc.get('hours', 6):g} h" if n else "") + "."), False
    return "Gauge: CHECK: " + "; ".join(problems) + ".", True


def _pick(marks: list[dict], compact: bool) -> list[dict]:
    """All marks; compact: those not clear, or else the nearest one (smallest margin)."""
    if not compact or not marks:
        return marks
    hit = [m for m in marks if m["state"] != "clear"]
    return hit or [min(marks, key=lambda m: m["margin"])]


def headline(snap: Snapshot, compact: bool = False) -> list[Line]:
    """The headline lines of a snapshot (see the module's docstring).

    With ``compact`` (the top of a phone page), a level names only the marks it has passed or
    may pass, or else the nearest one; the full comparison follows further down the page."""
    tz = snap.station.get("tz", "UTC")
    datum = snap.station.get("datum", "station datum")
    lines: list[Line] = []
    if snap.stale:
        if snap.last_sample_t is None:
            lines.append(Line("stale", "STALE: no usable sample has arrived from this gauge. "
                                       "Nothing below is a measurement of the water now.", True))
        elif compact:
            lines.append(Line("stale", f"STALE: the last usable sample is {age_words(snap.age)} old "
                                       f"({local_time(snap.last_sample_t, tz, snap.now)}; limit "
                                       f"{age_words(snap.stale_after)}). Everything below is that old.", True))
        else:
            lines.append(Line("stale", f"STALE: the last usable sample is {age_words(snap.age)} old "
                                       f"(from {local_time(snap.last_sample_t, tz, snap.now)}; the limit is "
                                       f"{age_words(snap.stale_after)}). The levels below are that old, "
                                       f"not the water now.", True))
    lv = snap.level
    if lv is None:
        lines.append(Line("level", "Level: no level yet.", False))
    else:
        marks = "; ".join(m["words"] for m in _pick(snap.marks_now, compact))
        past = any(m["state"] != "clear" for m in snap.marks_now)
        lines.append(Line("level", f"Level {lv['value']:.2f} m above {datum} at "
                                   f"{local_time(lv['t'], tz, snap.now)}, {trend_words(lv['rate'])}"
                                   + (f": {marks}." if marks else "."), past))
    rs = snap.residual
    if rs is not None:
        value = rs["smoothed"] if rs.get("smoothed") is not None else rs["value"]
        side = "above" if value >= 0 else "below"
        words = "" if compact else f" (the sea {abs(value):.2f} m {side} the predicted tide)"
        lines.append(Line("residual", f"Residual {value:+.2f} m{words}, {trend_words(rs['rate'])}.", False))
    fc = snap.forecast
    if fc is None:
        lines.append(Line("forecast", "Next high water: no forecast yet.", False))
    else:
        rng = ""
        if fc.get("lower") is not None and fc.get("upper") is not None:
            cov = f"{fc['coverage']:.0%} " if fc.get("coverage") else ""
            rng = f" ({cov}range {fc['lower']:.2f} to {fc['upper']:.2f} m)"
        marks = "; ".join(m["words"] for m in _pick(snap.marks_hw, compact))
        reach = any(m["state"] != "clear" for m in snap.marks_hw)
        tide = "" if compact else f", predicted tide {fc['predicted_high']:.2f} m"
        lines.append(Line("forecast", f"Next high water {local_time(fc['hw_t'], tz, snap.now)}: "
                                      f"{fc['forecast']:.2f} m{rng}{tide}"
                                      + (f": {marks}." if marks else "."), reach))
    if snap.episodes:
        parts = [f"{e.get('rule')}: {e.get('step_now') or e.get('top_step')} since "
                 f"{local_time(e.get('opened_at'), tz, snap.now)}" for e in snap.episodes]
        lines.append(Line("alerts", f"Alerts open ({len(parts)}): " + "; ".join(parts) + ".", True))
    else:
        lines.append(Line("alerts", "No alert open.", False))
    text, alarm = gauge_verdict(snap)
    lines.append(Line("gauge", text, alarm))
    return lines
