"""Rendering live snapshots to HTML (a station page, the overview of all stations) and writing
them, with the JSON snapshot, atomically (write to a temporary file, then rename)."""
from __future__ import annotations

import datetime as dt
import json
import os
import re
import tempfile
from pathlib import Path
from typing import Iterable, Sequence
from zoneinfo import ZoneInfo

import jinja2

from alerts.live.chart import NARROW, WIDE, svg_chart
from alerts.live.headline import gauge_verdict, headline, local_time
from alerts.live.snapshot import Snapshot, age_words, trend_words
from predictor.caution import LIVE as CAUTION

__all__ = ["render_station", "render_overview", "write_station", "write_overview", "caution_line",
           "overview_row", "atomic_write", "CAUTION"]

_env = jinja2.Environment(loader=jinja2.FileSystemLoader(Path(__file__).with_name("templates")),
                          autoescape=True, undefined=jinja2.StrictUndefined)


def caution_line(text: str = CAUTION) -> str:
    """The caution's sentence on who comes first, for the one line at the top of a page (the
    full text is one tap away)."""
    for sentence in re.split(r"(?<=\.)\s+", text):
        if "come first" in sentence or "comes first" in sentence:
            return sentence
    return text


def _what(snap: Snapshot):
    """A message's subject without the prefix every subject of this station shares."""
    name = snap.station.get("name", "")

    def short(subject: str) -> str:
        text = re.sub(r"^\[[^\]]*\]\s*", "", subject or "")
        return text[len(name) + 2:] if name and text.startswith(name + ": ") else text

    return short


def _zone(snap: Snapshot) -> str:
    tz = ZoneInfo(snap.station.get("tz", "UTC"))
    return dt.datetime.fromtimestamp(snap.now, dt.timezone.utc).astimezone(tz).strftime("%Z")


def render_station(snap: Snapshot, reports: str = "") -> str:
    """A station's live page (HTML, one file, no external resources).

    Parameters
    ----------
    snap : Snapshot
    reports : str
        Link to the daily reports (relative), or "" for none.
    """
    tz = snap.station.get("tz", "UTC")
    lines = headline(snap, compact=True)
    gauge_text, gauge_alarm = gauge_verdict(snap)
    return _env.get_template("live_station.html").render(
        snap=snap, lines=lines, refresh=max(1, int(round(snap.refresh))), caution_line=caution_line(snap.caution),
        asof=local_time(snap.now, tz), zone=_zone(snap), written=local_time(snap.written_at, tz, snap.written_at),
        local=lambda t: local_time(t, tz, snap.now), trend=trend_words, age=age_words,
        gauge_text=gauge_text, gauge_alarm=gauge_alarm, reports=reports, what=_what(snap),
        chart_narrow=svg_chart(snap, NARROW, "chart-narrow"), chart_wide=svg_chart(snap, WIDE, "chart-wide"))


def overview_row(snap: Snapshot) -> dict:
    """One row of the overview: name, level, residual, state in words, age of the last sample."""
    lines = {ln.key: ln for ln in headline(snap)}
    state = []
    if snap.stale:
        state.append("STALE")
    if any(m["state"] != "clear" for m in snap.marks_now):
        state.append("past a level")
    if any(m["state"] != "clear" for m in snap.marks_hw):
        state.append("next high water may reach a level")
    if snap.episodes:
        state.append(f"{len(snap.episodes)} alert(s) open")
    if lines["gauge"].alarm:
        state.append("gauge: check")
    return {"id": snap.station["id"], "name": snap.station.get("name", snap.station["id"]),
            "level": "-" if snap.level is None else f"{snap.level['value']:.2f}",
            "residual": "-" if snap.residual is None else f"{snap.residual['value']:+.2f}",
            "state": ", ".join(state) or "OK", "alarm": bool(state),
            "age": "-" if snap.age is None else f"{age_words(snap.age)} ago"}


def render_overview(snaps: Sequence[Snapshot], written_at: float, refresh: float, tz: str = "UTC") -> str:
    """The overview page of every station followed."""
    return _env.get_template("live_index.html").render(
        rows=[overview_row(s) for s in snaps], refresh=max(1, int(round(refresh))),
        written=local_time(written_at, tz), caution=CAUTION, caution_line=caution_line(CAUTION))


def atomic_write(path: Path, text: str) -> None:
    """Write ``text`` to ``path`` so a reader sees the old file or the new one, never a part:
    a temporary file in the same folder, flushed, then renamed over the old one."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def write_station(snap: Snapshot, folder: Path, reports: str = "") -> Path:
    """Write ``ID.json`` then ``ID.html`` into ``folder``, each atomically. Returns the page's path."""
    folder = Path(folder)
    sid = snap.station["id"]
    atomic_write(folder / f"{sid}.json", json.dumps(snap.to_json(), indent=1, allow_nan=False))
    page = folder / f"{sid}.html"
    atomic_write(page, render_station(snap, reports))
    return page


def write_overview(snaps: Iterable[Snapshot], folder: Path, written_at: float, refresh: float,
                   tz: str = "UTC") -> Path:
    """Write ``index.html`` (the overview) into ``folder`` atomically. Returns its path."""
    page = Path(folder) / "index.html"
    atomic_write(page, render_overview(list(snaps), written_at, refresh, tz))
    return page
