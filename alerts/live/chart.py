"""The live page's chart as inline SVG: 48 h observed, the predicted tide, the forecast range
ahead to the next high water and the operator's marks.

The SVG scales with its box (``viewBox``), so its text size on screen is the font size times
the box's scale; the page carries two layouts (narrow for phones, wide for desks) chosen by a
media query, each sized so that its text stays at 12 CSS px or more where it is shown.
"""
from __future__ import annotations

import datetime as dt
import math
from html import escape
from zoneinfo import ZoneInfo

import numpy as np

from alerts.live.snapshot import Snapshot

__all__ = ["svg_chart", "NARROW", "WIDE"]

#: (viewBox width, height, font size) of each layout, in SVG user units. The narrow one is shown
#: up to 699 px of viewport, in a box at most 560 px wide (text 15 * 343 / 360 = 14.3 px at
#: 375 px); the wide one from 700 px, at least 640 px wide (text 14 * 640 / 720 = 12.4 px).
NARROW = (360, 300, 15)
WIDE = (720, 340, 14)


def _nice_step(span: float, most: int) -> float:
    """A 1-2-5 step giving at most ``most`` intervals over ``span``."""
    raw = span / max(most, 1)
    base = 10 ** math.floor(math.log10(raw)) if raw > 0 else 0.1
    for k in (1, 2, 5, 10):
        if k * base >= raw:
            return k * base
    return 10 * base


def _path(x: np.ndarray, y: np.ndarray) -> str:
    """An SVG path through the finite points, broken where a value is missing."""
    out, pen = [], False
    for xi, yi in zip(x, y):
        if not (math.isfinite(xi) and math.isfinite(yi)):
            pen = False
            continue
        out.append(f"{'L' if pen else 'M'}{xi:.1f},{yi:.1f}")
        pen = True
    return "".join(out)


def svg_chart(snap: Snapshot, layout: tuple[int, int, int] = NARROW, css_class: str = "") -> str:
    """The chart of a snapshot as an ``<svg>`` element.

    Parameters
    ----------
    snap : Snapshot
        Levels on the display datum [m], times [Unix s].
    layout : (int, int, int)
        viewBox width, height and font size [SVG user units].
    css_class : str
        Class of the ``<svg>`` element.

    Returns
    -------
    str
        SVG markup (text escaped), or a short paragraph when there is nothing to draw.
    """
    width, height, font = layout
    c = snap.chart or {}
    t = np.asarray(c.get("t", []), dtype=float)
    obs = np.asarray(c.get("observed", []), dtype=float)
    pred = np.asarray(c.get("predicted", []), dtype=float)
    at = np.asarray(c.get("ahead_t", []), dtype=float)
    ap = np.asarray(c.get("ahead_predicted", []), dtype=float)
    if not len(t) and not len(at):
        return '<p class="nochart">No samples in the last 48 hours to draw.</p>'
    tz = ZoneInfo(snap.station.get("tz", "UTC"))
    fc = snap.forecast
    end = snap.chart_end
    x0 = end - 48 * 3600
    x1 = max([end, *(at[-1:] if len(at) else []), *([fc["hw_t"]] if fc and fc.get("hw_t") else [])]) + 1800
    ys = [v for v in (*obs, *pred, *ap) if math.isfinite(v)]
    ys += [m["level"] for m in snap.marks]
    if fc:
        ys += [v for v in (fc.get("lower"), fc.get("upper"), fc.get("forecast")) if v is not None]
    y0, y1 = (min(ys), max(ys)) if ys else (0.0, 1.0)
    pad = max(0.1, 0.06 * (y1 - y0))
    y0, y1 = y0 - pad, y1 + pad
    left, right, top, bottom = 3.2 * font, 8, font * 0.8, 2.4 * font
    pw, ph = width - left - right, height - top - bottom

    def X(v):
        return left + (np.asarray(v, dtype=float) - x0) / (x1 - x0) * pw

    def Y(v):
        return top + (y1 - np.asarray(v, dtype=float)) / (y1 - y0) * ph

    parts = [f'<svg class="{escape(css_class)}" viewBox="0 0 {width} {height}" role="img" '
             f'aria-label="Level over the last 48 hours with the predicted tide, the forecast range to the '
             f'next high water and the operator\'s levels" font-size="{font}" '
             f'font-family="system-ui, sans-serif" xmlns="http://www.w3.org/2000/svg">']
    parts.append(f'<rect x="{left:.1f}" y="{top:.1f}" width="{pw:.1f}" height="{ph:.1f}" fill="#fff" stroke="#999"/>')
    # level axis
    step = _nice_step(y1 - y0, max(3, int(ph / (2.2 * font))))
    v = math.ceil(y0 / step) * step
    while v <= y1:
        yy = float(Y(v))
        parts.append(f'<line x1="{left:.1f}" x2="{left + pw:.1f}" y1="{yy:.1f}" y2="{yy:.1f}" stroke="#e3e3e3"/>')
        parts.append(f'<text x="{left - 4:.1f}" y="{yy + font * 0.35:.1f}" text-anchor="end" fill="#333">'
                     f'{v:.1f}</text>')
        v += step
    # time axis: local clock times every 6 h (12 h when narrow), the date under local midnight
    every = 12 if width < 500 else 6
    start = dt.datetime.fromtimestamp(x0, dt.timezone.utc).astimezone(tz).replace(minute=0, second=0, microsecond=0)
    tick = start + dt.timedelta(hours=(every - start.hour % every) % every or every)
    while tick.timestamp() < x1:
        xx = float(X(tick.timestamp()))
        label = tick.strftime("%a %d") if tick.hour == 0 else tick.strftime("%H:%M")
        parts.append(f'<line x1="{xx:.1f}" x2="{xx:.1f}" y1="{top:.1f}" y2="{top + ph:.1f}" stroke="#eee"/>')
        if xx + 1.5 * font <= width:  # a label cut by the edge is left out
            parts.append(f'<text x="{xx:.1f}" y="{top + ph + 1.2 * font:.1f}" text-anchor="middle" fill="#333">'
                         f'{escape(label)}</text>')
        tick = (tick + dt.timedelta(hours=every)).astimezone(tz)
        tick = tick.replace(minute=0)
    zone = dt.datetime.fromtimestamp(end, dt.timezone.utc).astimezone(tz).strftime("%Z")
    parts.append(f'<text x="{left + pw:.1f}" y="{top + ph + 2.3 * font:.1f}" text-anchor="end" fill="#333">'
                 f'local time ({escape(zone)}); m above {escape(snap.station.get("datum", ""))}</text>')
    # forecast range from now to the next high water: the predicted tide shifted by the range's
    # residuals at the high water, and the range itself at the high water
    if fc and fc.get("lower") is not None and fc.get("upper") is not None and len(at):
        sel = (at >= end - 1) & (at <= fc["hw_t"] + 1)
        if sel.sum() >= 2:
            lo = ap[sel] + (fc["lower"] - fc["predicted_high"])
            hi = ap[sel] + (fc["upper"] - fc["predicted_high"])
            xs = X(at[sel])
            pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(xs, Y(hi)))
            pts += " " + " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(xs[::-1], Y(lo)[::-1]))
            parts.append(f'<polygon class="range" points="{pts}" fill="#f3b26a" fill-opacity="0.45" stroke="none"/>')
        hx = float(X(fc["hw_t"]))
        parts.append(f'<line class="hwrange" x1="{hx:.1f}" x2="{hx:.1f}" y1="{float(Y(fc["upper"])):.1f}" '
                     f'y2="{float(Y(fc["lower"])):.1f}" stroke="#b35900" stroke-width="3"/>')
        parts.append(f'<circle cx="{hx:.1f}" cy="{float(Y(fc["forecast"])):.1f}" r="4" fill="#b35900"/>')
    # marks, labels moved to the right end when they would overlap the one below
    placed: list[float] = []
    for m in sorted(snap.marks, key=lambda m: m["level"]):
        yy = float(Y(m["level"]))
        parts.append(f'<line class="mark" x1="{left:.1f}" x2="{left + pw:.1f}" y1="{yy:.1f}" y2="{yy:.1f}" '
                     f'stroke="#c0392b" stroke-dasharray="6 4" stroke-width="1.5"/>')
        crowded = any(abs(yy - p) < 1.1 * font for p in placed)
        placed.append(yy)
        x, anchor = (left + pw - 4, "end") if crowded else (left + 4, "start")
        parts.append(f'<text x="{x:.1f}" y="{yy - 3:.1f}" text-anchor="{anchor}" fill="#a52714">'
                     f'{escape(m["name"])} {m["level"]:.2f}</text>')
    # predicted tide (past and ahead), observed
    if len(t):
        parts.append(f'<path class="predicted" d="{_path(X(t), Y(pred))}" fill="none" stroke="#1f6fb2" '
                     f'stroke-width="1.5" stroke-dasharray="5 3"/>')
    if len(at):
        parts.append(f'<path class="predicted" d="{_path(X(at), Y(ap))}" fill="none" stroke="#1f6fb2" '
                     f'stroke-width="1.5" stroke-dasharray="5 3"/>')
    if len(t):
        parts.append(f'<path class="observed" d="{_path(X(t), Y(obs))}" fill="none" stroke="#111" '
                     f'stroke-width="2"/>')
    nx = float(X(end))
    parts.append(f'<line x1="{nx:.1f}" x2="{nx:.1f}" y1="{top:.1f}" y2="{top + ph:.1f}" stroke="#555" '
                 f'stroke-width="1"/>')
    word = "now" if end == snap.now else "last sample"
    # at the foot of the line, clear of the marks' labels at its top right
    parts.append(f'<text x="{nx - 3:.1f}" y="{top + ph - 4:.1f}" text-anchor="end" fill="#333">{word}</text>')
    parts.append("</svg>")
    return "".join(parts)
