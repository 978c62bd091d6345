"""Rendering a daily report: a self-contained HTML file, the index page, and the email form.

Output is a single self-contained HTML file (CSS and images inline, no network fetches),
readable on a phone and printable, plus an index page over stations and days, and an email
form (HTML with the chart as a Content-ID image, and a plain-text summary). The data come
from a :class:`alerts.reports.model.DayReport`; the images from :mod:`alerts.reports.charts`.
"""
from __future__ import annotations

import base64
import datetime as dt
import functools
import html
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable
from zoneinfo import ZoneInfo

import jinja2
import pandas as pd
from markupsafe import Markup
from markupsafe import escape as markup_escape

from alerts.reports import charts
from alerts.reports import rarity as rr
from alerts.reports.model import (
    CAUTION, CAUTION_LINE, FLAG_WORDS, QC_TEST_NAMES, DayFigures, DayReport, day_figures, offset_text, zone_label,
)

TEMPLATES = Path(__file__).resolve().parent.parent / "templates"


@functools.lru_cache(maxsize=1)
def _environment() -> jinja2.Environment:
    """The report templates' environment, made once: each template is compiled on its first
    use, not at every report (two compilations cost about a quarter of a second)."""
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(str(TEMPLATES)),
        autoescape=jinja2.select_autoescape(enabled_extensions=("html",), default_for_string=True,
                                            default=False),
        trim_blocks=True,
        lstrip_blocks=True,
        undefined=jinja2.StrictUndefined,
    )
    env.filters["m"] = lambda v, d=2: "\u2013" if v is None or _isnan(v) else f"{v:.{d}f} m"
    env.filters["sm"] = lambda v, d=2: "\u2013" if v is None or _isnan(v) else f"{v:+.{d}f} m".replace("-", "\u2212")
    env.filters["num"] = lambda v, d=2: "\u2013" if v is None or _isnan(v) else f"{v:.{d}f}".replace("-", "\u2212")
    env.filters["pct"] = lambda v: "\u2013" if v is None or _isnan(v) else f"{100 * v:.1f} %"
    env.filters["pct0"] = lambda v: "\u2013" if v is None or _isnan(v) else f"{100 * v:.0f} %"
    env.filters["pct2"] = lambda v: "\u2013" if v is None or _isnan(v) else f"{100 * v:.2f} %"
    env.filters["pct_signed"] = lambda v: "\u2013" if v is None or _isnan(v) else f"{100 * v:+.2f} %".replace("-", "\u2212")
    env.filters["duration"] = _duration_text
    return env


def _isnan(v: Any) -> bool:
    try:
        return math.isnan(v)
    except TypeError:
        return False


def _duration_text(td: pd.Timedelta | None) -> str:
    if td is None:
        return "\u2013"
    minutes = int(round(td.total_seconds() / 60))
    h, m = divmod(minutes, 60)
    return f"{h} h {m:02d} min" if h else f"{m} min"


class _Clock:
    """Formats UTC instants as the station's local time; on a day the clocks change,
    the UTC offset is added so a repeated hour is unambiguous."""

    def __init__(self, tz: str, start: pd.Timestamp, end: pd.Timestamp):
        self.zone = ZoneInfo(tz)
        self.changes = start.tz_convert(self.zone).utcoffset() != (end - pd.Timedelta(seconds=1)).tz_convert(self.zone).utcoffset()
        self.day = start.tz_convert(self.zone).date()

    def __call__(self, t: pd.Timestamp | None, date: bool = False) -> str:
        if t is None or t is pd.NaT:
            return "\u2013"
        local = pd.Timestamp(t).tz_convert(self.zone)
        text = local.strftime("%H:%M")
        if date or local.date() != self.day:
            text = local.strftime("%d %b ") + text
        if self.changes:
            text += f" ({offset_text(local.utcoffset())})"
        return text


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _summary(report: DayReport, figures: DayFigures) -> dict[str, Any]:
    """The few numbers the index page shows, kept inside each report file."""
    return {
        "station": report.station_id,
        "name": report.station_name,
        "day": report.day.isoformat(),
        "highest_level": figures.highest_level,
        "highest_residual": figures.highest_residual,
        "lowest_residual": figures.lowest_residual,
        "completeness": figures.completeness,
        "alerts": len(report.alerts),
        "water_alerts": sum(1 for a in report.alerts if a.kind != "gauge"),
        "gauge_alerts": sum(1 for a in report.alerts if a.kind == "gauge"),
        "failed": figures.failed,
        "datum": report.datum,
    }


def _verify_leads(report: DayReport) -> list[str]:
    """The lead times of the verification table's columns [h]."""
    for row in report.verification:
        leads = [f.lead_h for f in row.forecasts if f is not None]
        if len(leads) == len(row.forecasts):
            return [f"{x:g}" for x in leads]
    return ["6", "3", "1"]


def _forecast_margins(report: DayReport) -> list[tuple[str, float, float, bool]]:
    """For each operator level watched upwards: (name, level, forecast - level, reached),
    ``reached`` when the forecast or the top of its range is at or above the level [m]."""
    w = report.forecast
    if w is None:
        return []
    out = []
    for lv in report.alert_levels:
        if lv.quantity == "level" and lv.direction == "above":
            top = max(w.forecast, w.upper if w.upper is not None else w.forecast)
            out.append((lv.name, lv.value, w.forecast - lv.value, top >= lv.value))
    return out


def _context(report: DayReport, chart_src: str, trend_src: str | None,
             staff_src: str | None = None) -> dict[str, Any]:
    figures = day_figures(report)
    clock = _Clock(report.tz, figures.start, figures.end)
    tests = [t for t in QC_TEST_NAMES if t in report.qc_counts] + sorted(
        t for t in report.qc_counts if t not in QC_TEST_NAMES)
    generated = report.generated_at or pd.Timestamp.now(tz="UTC")
    return {
        "r": report,
        "f": figures,
        "t": clock,
        "caution": CAUTION,
        "caution_line": CAUTION_LINE,
        "zone": zone_label(report.tz, figures.start, figures.end),
        "day_text": report.day.strftime("%A %d %B %Y"),
        "chart_src": chart_src,
        "trend_src": trend_src,
        "staff_src": staff_src,
        "flag_words": FLAG_WORDS,
        "qc_tests": [(t, QC_TEST_NAMES.get(t, t)) for t in tests],
        "qc_flags": [3, 4, 9, 2, 1],
        "generated": clock(generated, date=True) + " local, " + pd.Timestamp(generated).tz_convert("UTC").strftime("%Y-%m-%d %H:%M UTC"),
        "summary_json": json.dumps(_summary(report, figures), sort_keys=True),
        "hw_levels": _forecast_margins(report),
        "verify_leads": _verify_leads(report),
    }


def _extra_charts(report: DayReport, charts: Any) -> dict[str, bytes | None]:
    """The report's smaller charts: diagnostic trends, the staff (Van de Casteele) diagram, and
    the return-level and sea-level charts (:mod:`alerts.reports.rarity`)."""
    sec = report.rarity
    return {"trend": charts.trend_chart(report.diagnostics),
            "staff": charts.staff_chart(report.staff) if report.staff is not None else None,
            "return_levels": rr.return_level_chart(sec, report.datum) if sec is not None else None,
            "sea_level": rr.sea_level_chart(sec, report.datum) if sec is not None else None}


def _page_charts(report: DayReport) -> dict[str, Any]:
    """The page's charts as inline SVG that scales with the column: the day chart in its wide
    (desktop) and narrow (phone) layouts, the trends and the staff diagram. matplotlib
    escapes every text it writes into the SVG, so the markup is safe to insert."""
    out = {"day_wide": charts.day_chart(report, fmt="svg", layout="wide"),
           "day_narrow": charts.day_chart(report, fmt="svg", layout="narrow"),
           "trend": charts.trend_chart(report.diagnostics, fmt="svg"),
           "staff": charts.staff_chart(report.staff, fmt="svg") if report.staff is not None else None}
    return {k: Markup(v) if v else None for k, v in out.items()}


def render_day_html(report: DayReport) -> str:
    """Render a station's day as one self-contained HTML page (charts inline as SVG)."""
    svg = _page_charts(report)
    sec = report.rarity
    extra = {"return_levels": rr.return_level_chart(sec, report.datum) if sec is not None else None,
             "sea_level": rr.sea_level_chart(sec, report.datum) if sec is not None else None}
    return _environment().get_template("report_day.html").render(
        **_context(report, "", "svg" if svg["trend"] else None, "svg" if svg["staff"] else None),
        svg=svg, for_email=False,
        return_levels_src=_data_uri(extra["return_levels"]) if extra["return_levels"] else None,
        sea_level_src=_data_uri(extra["sea_level"]) if extra["sea_level"] else None)


@dataclass(frozen=True)
class ReportEmail:
    """A report in the form mail clients show well.

    ``html`` refers to its images as ``cid:<key>``; ``images`` maps each key (a Content-ID
    without angle brackets, ``<file name>@quaywatch.invalid``) to PNG bytes. ``text`` is the
    plain-text summary part.
    """

    subject: str
    text: str
    html: str
    images: dict[str, bytes]

    def attachments(self) -> list[dict]:
        """The images as attachment dicts for :func:`alerts.mail.message.build_email` (through the
        outbox): ``filename``, ``content_type``, ``data`` and ``content_id``, so they go inline."""
        return [{"filename": cid.split("@", 1)[0], "content_type": "image/png", "data": png, "content_id": cid}
                for cid, png in self.images.items()]


def render_day_email(report: DayReport) -> ReportEmail:
    """Render a station's day for email: HTML part with Content-ID images, plain-text part.

    The image keys are ``<station>-<day>-<what>.png@quaywatch.invalid``: their local part is
    the file name, which lets the images go inline even through a queue that keeps only the
    file name of an attachment (see :func:`alerts.mail.message.build_email`).
    """
    stem = f"{report.station_id}-{report.day.isoformat()}"
    domain = "@quaywatch.invalid"
    pngs = {"chart": charts.day_chart(report), **_extra_charts(report, charts)}
    images = {f"{stem}-{what}.png{domain}": png for what, png in pngs.items() if png}
    sources = {what: f"cid:{stem}-{what}.png{domain}" if png else None for what, png in pngs.items()}
    env = _environment()
    context = _context(report, sources["chart"], sources.get("trend"), sources.get("staff"))
    html_part = env.get_template("report_day.html").render(
        **context, svg=dict.fromkeys(("day_wide", "day_narrow", "trend", "staff")), for_email=True,
        return_levels_src=sources.get("return_levels"), sea_level_src=sources.get("sea_level"))
    text = env.get_template("report_summary.txt").render(**context)
    f = context["f"]
    subject = f"Daily tide report: {report.station_name}, {report.day.isoformat()}"
    if f.highest_level is not None:
        subject += f" \u2014 high {f.highest_level:.2f} m above {report.datum}, residual {f.highest_residual:+.2f} m"
    if report.alerts:
        subject += f", {len(report.alerts)} alert episode{'s' if len(report.alerts) != 1 else ''}"
    return ReportEmail(subject=subject + " (automated, unofficial)", text=text, html=html_part, images=images)


def report_path(folder: Path, station_id: str, day: dt.date) -> Path:
    """``<folder>/<station>/<YYYY-MM-DD>.html``."""
    return Path(folder) / station_id / f"{day.isoformat()}.html"


def write_day_report(report: DayReport, folder: Path) -> Path:
    """Write the day's HTML report atomically and return its path."""
    path = report_path(folder, report.station_id, report.day)
    path.parent.mkdir(parents=True, exist_ok=True)
    _write_atomic(path, render_day_html(report))
    return path


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".part")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


# --------------------------------------------------------------------------- index

_SUMMARY_RE = re.compile(r'<meta name="quaywatch-summary" content="([^"]*)"')


def read_summary(path: Path) -> dict[str, Any] | None:
    """The index figures kept inside a report file, or ``None`` if it has none."""
    try:
        with open(path, encoding="utf-8") as fh:
            head = fh.read(8192)
    except OSError:
        return None
    match = _SUMMARY_RE.search(head)
    if not match:
        return None
    try:
        return json.loads(html.unescape(match[1]))
    except ValueError:
        return None


def render_index_html(folder: Path, generated_at: pd.Timestamp | None = None,
                      entries: Iterable[tuple[str, str, dict[str, Any] | None]] | None = None) -> str:
    """Render the index page over every report found under ``folder``, or over ``entries``
    (station id, day ``YYYY-MM-DD``, the report's summary as :func:`read_summary` gives it)
    when given: a caller that keeps the summaries (the daemon, in its store) reads no
    report file."""
    folder = Path(folder)
    if entries is None:
        entries = ((path.parent.name, path.stem, read_summary(path)) for path in sorted(folder.glob("*/*.html"))
                   if re.fullmatch(r"\d{4}-\d{2}-\d{2}", path.stem))
    stations: dict[str, dict[str, Any]] = {}
    for sid, day, found in entries:
        summary = {"name": sid, "highest_level": None, "highest_residual": None,
                   "completeness": None, "failed": None, "alerts": None,
                   **(found or {}), "day": day}
        entry = stations.setdefault(sid, {"id": sid, "name": summary.get("name") or sid, "days": []})
        summary["href"] = f"{sid}/{day}.html"
        entry["days"].append(summary)
    for entry in stations.values():
        entry["days"].sort(key=lambda s: s["day"], reverse=True)
        entry["rows"] = _index_rows(entry["days"])
    generated = (generated_at or pd.Timestamp.now(tz="UTC")).tz_convert("UTC")
    return _environment().get_template("report_index.html").render(
        stations=sorted(stations.values(), key=lambda e: e["name"].lower()),
        caution=CAUTION, caution_line=CAUTION_LINE,
        generated=generated.strftime("%Y-%m-%d %H:%M UTC"),
    )


def _index_rows(days: list[dict[str, Any]]) -> Markup:
    """The index table's rows of one station, newest first, as HTML.

    Made here rather than in the template: the index lists every kept report, and a row
    through the template's expressions cost about 50 microseconds (0.3 s for 6,000 kept
    reports, written each round); a row here costs a few.
    """
    return Markup("".join(_index_row(d) for d in days))


def _index_row(d: dict[str, Any]) -> str:
    """One day of the index: its link, highest level and residual, data received, QC
    failures and alert episodes (water and gauge apart when the summary splits them)."""
    def escape(value: Any) -> str:
        return str(value) if type(value) in (int, float) else str(markup_escape(value))

    def cell(label: str, text: str, cls: str = "n", extra: str = "") -> str:
        return f'      <td class="{cls}"{extra} data-label="{label}">{text}</td>\n'

    level, resid, received = d.get("highest_level"), d.get("highest_residual"), d.get("completeness")
    level_text = "&ndash;" if level is None else f"{level:.2f} m" + (
        f' <span class="muted">above {escape(d["datum"])}</span>' if d.get("datum") else "")
    failed = d.get("failed")
    row = ("    <tr>\n"
           + f'      <td data-label="Day"><a href="{escape(d["href"])}">{escape(d["day"])}</a></td>\n'
           + cell("Highest level", level_text)
           + cell("Highest residual", "&ndash;" if resid is None else f"{resid:+.2f} m")
           + cell("Data received", "&ndash;" if received is None else f"{100 * received:.1f} %")
           + cell("QC failed", "\u2013" if failed is None else escape(failed)))
    if d.get("water_alerts") is not None:
        row += (cell("Water alerts", escape(d["water_alerts"]), "n bad" if d["water_alerts"] else "n")
                + cell("Gauge faults", escape(d.get("gauge_alerts")),
                       "n fault" if d.get("gauge_alerts") else "n"))
    else:
        alerts = d.get("alerts")
        row += cell("Alert episodes", ("\u2013" if alerts is None else escape(alerts))
                    + ' <span class="muted">(not split)</span>', extra=' colspan="2"')
    return row + "    </tr>\n"


def write_index(folder: Path, generated_at: pd.Timestamp | None = None,
                entries: Iterable[tuple[str, str, dict[str, Any] | None]] | None = None) -> Path:
    """Write ``<folder>/index.html`` over all reports in the folder (or over ``entries``,
    see :func:`render_index_html`)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "index.html"
    _write_atomic(path, render_index_html(folder, generated_at, entries))
    return path


def prune_reports(folder: Path, keep_days: int, today: dt.date) -> list[Path]:
    """Delete reports older than ``keep_days`` [days] before ``today`` (local date); 0 keeps all.
    Returns what went."""
    if keep_days <= 0:
        return []
    cutoff = today - dt.timedelta(days=keep_days)
    removed = []
    for path in Path(folder).glob("*/*.html"):
        try:
            day = dt.date.fromisoformat(path.stem)
        except ValueError:
            continue
        if day < cutoff:
            path.unlink(missing_ok=True)
            removed.append(path)
    return removed


__all__ = [
    "ReportEmail",
    "prune_reports",
    "read_summary",
    "render_day_email",
    "render_day_html",
    "render_index_html",
    "report_path",
    "write_day_report",
    "write_index",
]
