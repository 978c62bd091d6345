"""Charts for the daily report, drawn with matplotlib (Agg backend).

Each chart comes as PNG bytes (the email's inline images) or as SVG text for the report page
(``fmt="svg"``): text kept as text, sized so that once the page scales the drawing to its
column no letter is smaller than :data:`MIN_TEXT_PX` CSS pixels. The day chart has a wide
layout for desktop widths and a narrow one for phones (:data:`LAYOUTS`); the page shows the
one that fits.

The day chart has two panels sharing a local-time axis: the water level (observed and
predicted, the operator's level lines, flagged samples marked, gaps shaded) and the
residual (observed minus predicted, with the residual lines). Colours are paired with line
styles and marker shapes so the chart still reads in greyscale print and for colour-blind
readers.
"""
from __future__ import annotations

import io
import re
from typing import Sequence
from zoneinfo import ZoneInfo

import matplotlib

matplotlib.use("Agg")  # no display, and no GUI toolkit import, in a daemon
import matplotlib.dates as mdates  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from alerts.reports.model import AlertLevel, DayReport, Diagnostic, StaffCheck, day_bounds, day_figures

# Palette of our own; each role also has a line style or marker shape.
OBSERVED = "#0b4f71"
PREDICTED = "#8a8f98"
RESIDUAL = "#6a3d9a"
SUSPECT = "#d98c00"
FAILED = "#c0262d"
LEVEL_ABOVE = "#b23a48"
LEVEL_BELOW = "#2f7d4a"
GAP = "#e9e4d8"


#: Smallest chart text on the report page [CSS px] (common practice for legible text on a phone,
#: no source).
MIN_TEXT_PX = 12.0

#: Layouts of the day chart: figure size [in], base and smallest font [pt = SVG user units],
#: legend columns, hours between time labels. ``print`` is the email's PNG; ``wide`` is shown
#: from a column of ``min_px`` CSS px (desktop), ``narrow`` below it (a 359 px column on a
#: 375 px phone: 12.5 pt in a 360 pt drawing is 12.5 px).
LAYOUTS = {
    "print": {"width": 9.6, "height": 6.0, "font": 10.0, "small": 8.0, "legend": 6, "hours": 3},
    "wide": {"width": 9.6, "height": 6.0, "font": 10.0, "small": 10.0, "legend": 6, "hours": 3, "min_px": 830},
    "narrow": {"width": 5.0, "height": 6.2, "font": 12.5, "small": 12.5, "legend": 2, "hours": 6},
}


def _output(fig: Figure, fmt: str, salt: str) -> bytes | str:
    """PNG bytes, or SVG text with its text kept as ``<text>`` (so it scales and reads) and
    without a fixed size (the page sets its width; the viewBox keeps the shape). ``salt``
    keeps the element ids of two drawings on one page apart."""
    buffer = io.BytesIO()
    if fmt == "png":
        fig.savefig(buffer, format="png", metadata={"Software": None})
        return buffer.getvalue()
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": salt}):
        fig.savefig(buffer, format="svg", metadata={"Date": None, "Creator": None})
    text = buffer.getvalue().decode("utf-8")
    text = text[text.index("<svg"):]
    head, rest = text.split(">", 1)
    head = re.sub(r'\s(width|height)="[^"]*"', "", head)
    return head + f' class="chart-svg" role="img" preserveAspectRatio="xMidYMid meet">' + rest


def _naive_utc(index: pd.DatetimeIndex) -> np.ndarray:
    """datetime64 values in UTC, which matplotlib takes as UTC."""
    if index.tz is not None:
        index = index.tz_convert("UTC").tz_localize(None)
    return index.to_numpy()


def _broken(series: pd.Series, interval: float | None) -> tuple[np.ndarray, np.ndarray]:
    """x, y with a NaN wherever samples are more than two intervals apart, so lines break at gaps."""
    series = series.dropna()
    x = _naive_utc(series.index)
    y = series.to_numpy(dtype=float)
    if len(x) < 2 or not interval:
        return x, y
    jumps = np.flatnonzero(np.diff(x).astype("timedelta64[ns]").astype(np.int64) > 2 * interval * 1e9)
    if len(jumps) == 0:
        return x, y
    x = np.insert(x, jumps + 1, x[jumps] + np.timedelta64(int(interval * 1e9), "ns"))
    y = np.insert(y, jumps + 1, np.nan)
    return x, y


def _draw_levels(ax, levels: Sequence["AlertLevel"], fontsize: float = 8) -> None:
    for level in levels:
        colour = LEVEL_ABOVE if level.direction == "above" else LEVEL_BELOW
        ax.axhline(level.value, color=colour, linestyle=(0, (6, 3)), linewidth=1.1, zorder=1)
        ax.annotate(
            f"{level.name} {level.value:+.2f} m" if level.quantity == "residual" else f"{level.name} {level.value:.2f} m",
            xy=(1.0, level.value), xycoords=("axes fraction", "data"), xytext=(-4, 3),
            textcoords="offset points", ha="right", va="bottom", fontsize=fontsize, color=colour,
        )


def _limits(values: list[np.ndarray], margin: float = 0.08) -> tuple[float, float] | None:
    finite = np.concatenate([np.asarray(v, dtype=float).ravel() for v in values]) if values else np.array([])
    finite = finite[np.isfinite(finite)]
    if finite.size == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    pad = max((hi - lo) * margin, 0.05)
    return lo - pad, hi + pad


def _clock_change(start: pd.Timestamp, end: pd.Timestamp, zone: ZoneInfo) -> pd.Timestamp | None:
    """The instant the UTC offset changes within [start, end), to the minute, or ``None``."""
    grid = pd.date_range(start, end, freq="1min", inclusive="left")
    if len(grid) == 0:
        return None
    offsets = (grid.tz_convert(zone).tz_localize(None) - grid.tz_localize(None)).to_numpy()
    changed = np.flatnonzero(offsets != offsets[0])
    return grid[int(changed[0])] if len(changed) else None


def day_chart(report: "DayReport", width: float | None = None, height: float | None = None, dpi: int = 110,
              fmt: str = "png", layout: str = "print") -> bytes | str:
    """Draw the day's level and residual chart: PNG bytes, or SVG text with ``fmt="svg"``
    (``width`` and ``height`` [in] default to the layout's, ``dpi`` [dots per inch]; levels [m]
    on the report's datum).

    Samples flagged fail (QARTOD 4) are marked but never set the axis range: a wild spike
    is drawn clipped at the panel's edge rather than squashing the tide flat. ``layout`` is
    a key of :data:`LAYOUTS`.
    """
    with matplotlib.rc_context({"font.size": LAYOUTS[layout]["font"]}):
        return _day_chart(report, width, height, dpi, fmt, layout)


def _day_chart(report, width, height, dpi, fmt, layout):
    lay = LAYOUTS[layout]
    width = lay["width"] if width is None else width
    height = lay["height"] if height is None else height
    small = lay["small"]
    start, end = day_bounds(report.day, report.tz)
    zone = ZoneInfo(report.tz)
    figures = day_figures(report)
    interval = figures.interval
    samples = report.samples
    if len(samples):
        samples = samples[(samples.index >= start) & (samples.index < end)]
    flags = samples["flag"].fillna(2).astype(int) if len(samples) else pd.Series(dtype=int)
    good = samples[flags.isin([1, 2, 3])] if len(samples) else samples
    predicted = report.predicted.dropna()
    if len(predicted):
        predicted = predicted[(predicted.index >= start - pd.Timedelta(minutes=30))
                              & (predicted.index <= end + pd.Timedelta(minutes=30))]

    # A fixed layout: constrained layout doubles the drawing time for no gain on a fixed design.
    fig = Figure(figsize=(width, height), dpi=dpi)
    ax_level, ax_resid = fig.subplots(2, 1, sharex=True, height_ratios=[2.2, 1])
    if layout == "narrow":
        fig.subplots_adjust(left=0.17, right=0.97, top=0.86, bottom=0.09, hspace=0.08)
    else:
        fig.subplots_adjust(left=0.08, right=0.985, top=0.93, bottom=0.085, hspace=0.07)
    x0, x1 = _naive_utc(pd.DatetimeIndex([start, end]))

    for gap in figures.gaps:
        for ax in (ax_level, ax_resid):
            ax.axvspan(*_naive_utc(pd.DatetimeIndex([gap.start, gap.end])), color=GAP, zorder=0,
                       label="no data" if ax is ax_level and gap is figures.gaps[0] else None)

    if len(predicted):
        ax_level.plot(_naive_utc(predicted.index), predicted.to_numpy(dtype=float), color=PREDICTED,
                      linestyle=(0, (4, 2)), linewidth=1.6, label="predicted tide")
    if len(good):
        ax_level.plot(*_broken(good["observed"], interval), color=OBSERVED, linewidth=1.8, label="observed")
        ax_resid.plot(*_broken(good["residual"], interval), color=RESIDUAL, linewidth=1.4, label="residual")

    level_lines = [lv for lv in report.alert_levels if lv.quantity == "level"]
    resid_lines = [lv for lv in report.alert_levels if lv.quantity == "residual"]
    level_range = _limits([good["observed"].to_numpy() if len(good) else np.array([]),
                           predicted.to_numpy(dtype=float), np.array([lv.value for lv in level_lines])])
    resid_range = _limits([good["residual"].to_numpy() if len(good) else np.array([]),
                           np.array([lv.value for lv in resid_lines]), np.array([0.0])])
    if level_range:
        ax_level.set_ylim(*level_range)
    if resid_range:
        ax_resid.set_ylim(*resid_range)
    _draw_levels(ax_level, level_lines, small)
    _draw_levels(ax_resid, resid_lines, small)
    ax_resid.axhline(0.0, color="#444444", linewidth=0.7, zorder=1)

    for flag, colour, marker, label in ((3, SUSPECT, "o", "suspect (QC)"), (4, FAILED, "x", "failed QC")):
        marked = samples[(flags == flag) & samples["observed"].notna()] if len(samples) else samples
        if len(marked):
            for ax, column, rng in ((ax_level, "observed", level_range), (ax_resid, "residual", resid_range)):
                y = marked[column].to_numpy(dtype=float)
                if rng:
                    inset = 0.03 * (rng[1] - rng[0])  # keep an off-scale marker whole
                    y = np.clip(y, rng[0] + inset, rng[1] - inset)
                style = {"facecolors": "none", "edgecolors": colour} if marker == "o" else {"c": colour}
                # Many markers would hide the line they mark: draw them smaller.
                size, width = (28, 1.4) if len(marked) <= 40 else (9, 0.8)
                ax.scatter(_naive_utc(marked.index), y, s=size, marker=marker, linewidths=width, zorder=5,
                           label=label if ax is ax_level else None, **style)

    change = _clock_change(start, end, zone)
    if change is not None:
        for ax in (ax_level, ax_resid):
            ax.axvline(_naive_utc(pd.DatetimeIndex([change]))[0], color="#444444", linewidth=0.8,
                       linestyle=":", zorder=1)
        ax_level.annotate("clocks change", xy=(_naive_utc(pd.DatetimeIndex([change]))[0], 1.0),
                          xycoords=("data", "axes fraction"), xytext=(3, -10), textcoords="offset points",
                          fontsize=small, color="#444444")

    if not len(good):
        ax_level.text(0.5, 0.5, "No usable observations for this day", transform=ax_level.transAxes,
                      ha="center", va="center", fontsize=max(12, small), color="#333333",
                      bbox={"facecolor": "white", "edgecolor": "#999999", "boxstyle": "round"})

    ax_level.set_ylabel(f"Level [m, {report.datum}]")
    ax_resid.set_ylabel("Residual [m]")
    ax_resid.set_xlim(x0, x1)
    hours = (end - start) / pd.Timedelta(hours=1)
    ax_resid.xaxis.set_major_locator(mdates.HourLocator(byhour=range(0, 24, lay["hours"]), tz=zone))
    ax_resid.xaxis.set_minor_locator(mdates.HourLocator(tz=zone))
    ax_resid.xaxis.set_major_formatter(mdates.DateFormatter("%H:%M", tz=zone))
    ax_resid.set_xlabel(f"Local time ({report.tz}; a {hours:g}-hour day)" if hours != 24 else f"Local time ({report.tz})")
    if layout == "narrow":
        ax_level.set_ylabel(f"Level [m, {report.datum}]", fontsize=small)
    for ax in (ax_level, ax_resid):
        ax.grid(True, which="major", color="#dddddd", linewidth=0.8)
        ax.spines[["top", "right"]].set_visible(False)
    handles, labels = ax_level.get_legend_handles_labels()
    h2, l2 = ax_resid.get_legend_handles_labels()
    if handles or h2:
        fig.legend(handles + h2, labels + l2, loc="upper center", bbox_to_anchor=(0.5, 1.0), fontsize=small,
                   ncols=lay["legend"], frameon=False)
    return _output(fig, fmt, f"day-{layout}")


def trend_chart(diagnostics: Sequence["Diagnostic"], dpi: int = 110, fmt: str = "png") -> bytes | str | None:
    """Small multiples of each diagnostic's recent history (in its own unit: mm, mm/day,
    minutes) as PNG bytes at ``dpi`` [dots per inch], or SVG text with ``fmt="svg"``; ``None``
    when there is none.

    As SVG (the report page) one column, its text at 12.5 pt in a 4.8 in (346 pt) drawing,
    so at a 359 px phone column no letter is under 12 px."""
    # A trend needs two points at least.
    with_history = [d for d in diagnostics if d.history is not None and len(d.history.dropna()) >= 2]
    if not with_history:
        return None
    n = len(with_history)
    cols = min(n, 2) if fmt == "png" else 1
    rows = (n + cols - 1) // cols
    title, ticks = (9, 7) if fmt == "png" else (12.5, 12.5)
    fig = Figure(figsize=(4.8 * cols, (2.0 if fmt == "png" else 2.6) * rows), dpi=dpi, layout="tight")
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    for ax, diag in zip(axes, with_history):
        history = diag.history.dropna().sort_index()
        index = pd.DatetimeIndex(history.index)
        if index.tz is None:
            index = index.tz_localize("UTC")
        ax.plot(_naive_utc(index), history.to_numpy(dtype=float), color=OBSERVED, marker="o",
                markersize=3.5, linewidth=1.3)
        ax.axhline(0.0, color="#999999", linewidth=0.7)
        ax.set_title(f"{diag.name} [{diag.unit}]", fontsize=title, loc="left")
        ax.tick_params(labelsize=ticks)
        ax.xaxis.set_major_formatter(mdates.DateFormatter("%d %b"))
        ax.xaxis.set_major_locator(mdates.AutoDateLocator(maxticks=5 if fmt == "png" else 4))
        ax.spines[["top", "right"]].set_visible(False)
        ax.grid(True, color="#eeeeee")
    for ax in axes[n:]:
        ax.set_visible(False)
    return _output(fig, fmt, "trend")


def staff_chart(staff: "StaffCheck", width: float = 4.2, height: float = 3.4, dpi: int = 110,
                fmt: str = "png") -> bytes | str | None:
    """The Van de Casteele diagram of the latest staff session; ``None`` without points.

    As SVG (the report page) its text is 12.5 pt in a 4.2 in (302 pt) drawing shown at least
    302 px wide, so no letter is under 12 px.

    Each staff reading is drawn at (gauge - staff [mm], staff level [m]); rising-tide
    readings as upward triangles, falling-tide readings as downward ones. A perfect gauge
    gives a vertical line on zero; an offset shifts it sideways, a scale error slants it,
    and a timing error opens it into a loop (rising and falling sides apart).

    References
    ----------
    IOC (1985, 2006). Manual on Sea Level Measurement and Interpretation, Vols. I and IV
    (the Van de Casteele test and diagram).
    """
    points = staff.points if staff is not None else None
    if points is None or len(points) == 0:
        return None
    label, title, ticks, legend = (8, 9, 7, 7) if fmt == "png" else (12.5, 12.5, 12.5, 12.5)
    if fmt != "png":
        height = height * 1.35
    fig = Figure(figsize=(width, height), dpi=dpi)
    ax = fig.subplots()
    fig.subplots_adjust(left=0.17 if fmt == "png" else 0.22, right=0.97, top=0.9, bottom=0.15)
    diff_mm = points["difference"].to_numpy(dtype=float) / 1e-3
    level = points["staff"].to_numpy(dtype=float)
    rising = points["rate"].to_numpy(dtype=float) >= 0
    ax.axvline(0.0, color="#444444", linewidth=0.8, zorder=1)
    ax.scatter(diff_mm[rising], level[rising], marker="^", s=30, color=OBSERVED, label="rising tide", zorder=3)
    ax.scatter(diff_mm[~rising], level[~rising], marker="v", s=30, facecolors="none", edgecolors=RESIDUAL,
               linewidths=1.2, label="falling tide", zorder=3)
    span = max(20.0, float(np.nanmax(np.abs(diff_mm))) * 1.25) if np.isfinite(diff_mm).any() else 20.0
    ax.set_xlim(-span, span)
    ax.set_xlabel("Gauge minus staff [mm]", fontsize=label)
    ax.set_ylabel("Staff level [m]", fontsize=label)
    ax.set_title("Van de Casteele diagram, latest session" if fmt == "png" else "Van de Casteele, latest",
                 fontsize=title, loc="left")
    ax.tick_params(labelsize=ticks)
    ax.grid(True, color="#eeeeee")
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=legend, frameon=False, loc="best")
    return _output(fig, fmt, "staff")
