"""Email composition for alerts: subject, plain text and HTML bodies, the caution.

Nothing that comes from the configuration or the telemetry is trusted: header text is
stripped of control characters (no header injection), the HTML is rendered by Jinja2
with autoescaping, and the MIME structure is built by ``email.message.EmailMessage``.
"""
from __future__ import annotations

import math
import re
from datetime import datetime, timezone
from email.message import EmailMessage
from email.utils import format_datetime
from pathlib import Path
from typing import Any, Iterable
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import jinja2

from alerts.rules import Event, Rule, StationView
from predictor.caution import CAUTION as CAUTION_LINE  # the one line at the top of every form
from predictor.caution import MESSAGE as CAUTION        # the full text, below it

SUBJECT_PREFIX = "[quaywatch]"

_TEMPLATES = Path(__file__).resolve().parent.parent / "templates"
_env_html = jinja2.Environment(loader=jinja2.FileSystemLoader(_TEMPLATES), autoescape=True,
                               undefined=jinja2.StrictUndefined)
_env_text = jinja2.Environment(loader=jinja2.FileSystemLoader(_TEMPLATES), autoescape=False,
                               undefined=jinja2.StrictUndefined, keep_trailing_newline=True)

# C0/C1 controls, DEL and the Unicode line and paragraph separators.
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u2028\u2029]+")

_WHAT = {
    "residual_above": "surge residual above a step",
    "residual_below": "surge residual below a step",
    "level_above": "water level above a step",
    "level_below": "water level below a step",
    "next_high_water_above": "next high water forecast above a step",
    "feed_silent": "no data from the gauge",
    "equipment_fault": "equipment faults reported by quality control",
}


def clean_header(text: Any, limit: int = 200) -> str:
    """One safe header line: control characters (CR, LF, ...) become spaces, length capped."""
    s = _CONTROL.sub(" ", str(text))
    s = re.sub(r"\s+", " ", s).strip()
    return s[:limit]


def clean_line(text: Any, limit: int = 500) -> str:
    """Configured or telemetry text for a body line: control characters removed."""
    return clean_header(text, limit)


def datum_label(name: str) -> str:
    """``"chart"`` -> ``"chart datum"``; ``"station"`` -> ``"station datum"``."""
    name = clean_line(name, 60).replace("_", " ")
    return name if "datum" in name.lower() else f"{name} datum"


def _zone(tz: str):
    try:
        return ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError, TypeError):
        return timezone.utc


def format_times(t: int | float, tz: str) -> tuple[str, str]:
    """Local time with zone abbreviation and UTC, both to the minute, of ``t`` [Unix s, UTC]."""
    dt = datetime.fromtimestamp(float(t), tz=timezone.utc)
    local = dt.astimezone(_zone(tz))
    return (local.strftime("%Y-%m-%d %H:%M %Z (UTC%z)").replace("(UTC+0000)", "").strip(),
            dt.strftime("%Y-%m-%d %H:%M UTC"))


def _m(x: float | None, signed: bool = False) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "n/a"
    return f"{x:+.2f} m" if signed else f"{x:.2f} m"


def _duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _on_display(rule: Rule, station: StationView | None, value: float) -> tuple[float, str]:
    """A level in a rule's own units moved to the station's display datum, and its words."""
    if station is None:
        return value, datum_label(rule.datum)
    return value + rule.datum_offset - station.display_offset, datum_label(station.display)


def value_text(rule: Rule, value: float, station: StationView | None = None) -> str:
    """The watched quantity in words, e.g. ``"residual +0.62 m"``; ``value`` in the rule's unit
    ([m] on the rule's datum for levels and residuals, [s] for a silent feed).

    Levels are shown on the station's display datum (with ``station``; else on the rule's
    own datum); residuals are datum-free and carry their sign."""
    if rule.watch.startswith("residual"):
        return f"{rule.series} {_m(value, signed=True)}"
    if rule.watch.startswith("level"):
        v, d = _on_display(rule, station, value)
        return f"water level {_m(v)} above {d}"
    if rule.watch == "next_high_water_above":
        v, d = _on_display(rule, station, value)
        return f"next high water {_m(v)} above {d}"
    if rule.watch == "feed_silent":
        return f"no data for {_duration(value)}"
    n = int(value)
    return f"{n} equipment fault{'s' if n != 1 else ''}"


def step_text(rule: Rule, at: float, station: StationView | None = None) -> str:
    """A step's level in words, on the display datum; the rule's own datum beside it when
    the rule counts from another datum. ``at`` in the rule's unit ([m]; [s] for a silent
    feed; a count of faults)."""
    if rule.watch == "feed_silent":
        return _duration(at)
    if rule.watch == "equipment_fault":
        return f"{int(at)} fault{'s' if int(at) != 1 else ''}"
    if rule.watch.startswith("residual"):
        return _m(at, signed=True)
    v, d = _on_display(rule, station, at)
    text = f"{_m(v)} above {d}"
    if station is not None and rule.datum != station.display:
        text += f" ({_m(at, signed=True)} on {datum_label(rule.datum)})"
    return text


def _fault_line(f: Any, tz: str = "UTC") -> str:
    """``stuck_sensor on primary: 62 min (limit 30 min), since 2025-10-23 01:00 IST``."""
    if not isinstance(f, dict):
        return clean_line(f)
    text = str(f.get("kind", "fault")).replace("_", " ")
    if f.get("sensor"):
        text += f" on {f['sensor']}"
    unit = f" {f['unit']}" if f.get("unit") else ""
    if f.get("value") is not None:
        text += f": {f['value']}{unit}"
    if f.get("limit") is not None:
        text += f" (limit {f['limit']}{unit})"
    since = f.get("since")
    if since is not None:
        try:
            text += f", since {format_times(float(since), tz)[0]}"
        except (TypeError, ValueError, OverflowError, OSError):
            text += f", since {since}"
    return clean_line(text)


def facts_lines(rule: Rule, station: StationView, facts: dict) -> list[tuple[str, str]]:
    """Label/text pairs for the readings block; missing facts are left out.

    Every level is shown on the station's display datum and named; residuals carry their
    sign (observed minus predicted, no datum). ``facts`` keys (all optional):
    ``observed``, ``predicted``, ``residual`` [m, station datum], ``trend`` [m over
    ``trend_window`` s], ``next_high_water`` (dict with ``time`` [Unix s], ``level`` [m,
    station datum], ``lower``/``upper``/``coverage`` or ``uncertainty`` [m], ``note``,
    ``rising`` [m, station datum] and ``rate`` [m/h], ``pressure_note``), ``clear_check``
    (dict: the high water the all-clear waited on, see :func:`_clear_lines`),
    ``feed_age`` [s].
    """
    shift = station.display_offset
    dlabel = datum_label(station.display)
    out: list[tuple[str, str]] = []
    obs, pred, res = facts.get("observed"), facts.get("predicted"), facts.get("residual")
    if obs is not None and math.isfinite(obs):
        out.append(("Observed level", f"{_m(obs - shift)} above {dlabel}"))
    if pred is not None and math.isfinite(pred):
        out.append(("Predicted tide", f"{_m(pred - shift)} above {dlabel}"))
    if res is not None and math.isfinite(res):
        out.append(("Residual (surge)", f"{_m(res, signed=True)} (observed minus predicted tide)"))
    trend = facts.get("trend")
    if trend is not None and math.isfinite(trend):
        window = facts.get("trend_window", 3600)
        out.append((f"Change over last {_duration(window)}", _m(trend, signed=True)))
    hw = facts.get("next_high_water")
    if isinstance(hw, dict) and hw.get("level") is not None and hw.get("time") is not None:
        loc, _ = format_times(hw["time"], station.tz)
        unc, lo, hi = hw.get("uncertainty"), hw.get("lower"), hw.get("upper")
        if lo is not None and hi is not None and math.isfinite(lo) and math.isfinite(hi):
            cover = f"{hw['coverage']:.0%} " if hw.get("coverage") else ""
            spread = f" ({cover}range {_m(lo - shift)} to {_m(hi - shift)})"
        elif unc is not None and math.isfinite(unc):
            spread = f" \u00b1 {_m(unc)}"
        else:
            spread = " (no uncertainty range available)"
        out.append(("Next high water forecast",
                    f"{_m(hw['level'] - shift)} above {dlabel} at {loc}{spread}"))
        rising, rate = hw.get("rising"), hw.get("rate")
        if rising is not None and rate is not None and math.isfinite(rising) and rate > 0:
            out.append(("If the surge keeps rising",
                        f"at {rate:+.2f} m/h until then: {_m(rising - shift)} above {dlabel}"))
        if hw.get("note"):
            out.append(("Forecast method", clean_line(hw["note"], 400)))
        if hw.get("pressure_note"):
            out.append(("Barometer", clean_line(hw["pressure_note"], 300)))
    out += _clear_lines(rule, station, facts.get("clear_check"))
    age = facts.get("feed_age")
    if age is not None and math.isfinite(age):
        out.append(("Last data received", f"{_duration(age)} ago"))
    return out


def _clear_lines(rule: Rule, station: StationView, check: Any) -> list[tuple[str, str]]:
    """What the all-clear of a level rule waited on: the next high water within the
    rule's horizon and how far the top of its forecast range is from the lowest step.

    ``check``: ``time`` [Unix s], ``level`` and ``upper`` [m, station datum], ``step``
    (name), ``step_at`` [m, rule datum], ``horizon`` [s], ``reaches`` (bool)."""
    if not isinstance(check, dict) or check.get("time") is None:
        return []
    shift = station.display_offset
    dlabel = datum_label(station.display)
    loc, _ = format_times(check["time"], station.tz)
    top = check.get("upper")
    top = check.get("level") if top is None else top
    step_lv = float(check["step_at"]) + rule.datum_offset
    margin = float(top) - step_lv
    head = (f"at {loc}: forecast {_m(check['level'] - shift)}, its range reaching {_m(top - shift)} "
            f"above {dlabel}")
    if margin >= 0:
        return [("All-clear waits on", f"the high water {head}, {_m(margin)} above {clean_line(check['step'], 60)} "
                                       f"({_m(step_lv - shift)} above {dlabel}): the level may be reached again")]
    below = _m(-margin) if -margin >= 0.005 else "less than 0.01 m"
    return [("Next high water", f"{head}, {below} below {clean_line(check['step'], 60)} "
                                f"({_m(step_lv - shift)} above {dlabel})")]


def _fault_names(faults: Any, tz: str) -> str:
    """``stuck sensor on primary, clock offset on backup`` (the kinds, without numbers)."""
    return ", ".join(_fault_line(f, tz).split(":")[0] for f in faults or [])


def _headline_and_subject(station: StationView, rule: Rule, event: Event, facts: dict,
                          step_index: int | None = None) -> tuple[str, str]:
    """An event's headline and subject (with the prefix), each said once.

    An equipment-fault episode names its faults rather than counting them after a step name
    that already says "fault"; a "changed" event names the new ones and how many are active.
    """
    step = rule.steps[event.level if step_index is None else step_index]
    sname = clean_header(station.name, 80)
    vtext = value_text(rule, event.value, station)
    if rule.watch == "equipment_fault":
        n = int(event.value)
        named = _fault_names(facts.get("faults"), station.tz)
        vtext = named or f"{n} active"
        if named and n > 1:
            vtext = f"{n} active: {named}"
    if event.kind == "opened":
        headline = subject = f"{sname}: {step.name} - {vtext}"
    elif event.kind == "escalated":
        headline = f"{sname}: now {step.name} - {vtext}"
        subject = f"{sname}: up to {step.name} - {vtext}"
    elif event.kind == "changed":
        new = _fault_names(facts.get("new_faults"), station.tz) or "another fault"
        active = f"{int(event.value)} active" if rule.watch == "equipment_fault" else vtext
        headline = f"{sname}: {step.name} continues - new: {new} ({active})"
        subject = f"{sname}: {step.name} - new: {new} ({active})"
    elif event.kind == "cleared":
        vtext = "no fault active" if rule.watch == "equipment_fault" else vtext
        headline = f"{sname}: all clear for {rule.id} (highest step was {step.name}) - {vtext}"
        subject = f"{sname}: all clear after {step.name} - {vtext}"
    elif event.kind == "held":
        check = facts.get("clear_check") or {}
        lowest = clean_line(check.get("step") or rule.steps[0].name, 60)
        when = format_times(check["time"], station.tz)[0][11:16] if check.get("time") is not None else "?"
        headline = (f"{sname}: not clear yet for {rule.id} - {vtext}, back below {lowest}, but the "
                    f"high water at {when} may reach {lowest} again")
        subject = f"{sname}: not clear yet - the high water at {when} may reach {lowest} again ({vtext})"
    else:
        raise ValueError(f"unknown event kind {event.kind!r}")
    return clean_line(headline), clean_header(f"{SUBJECT_PREFIX} {subject}", 250)


def alert_subject(station: StationView, rule: Rule, event: Event, facts: dict | None = None,
                  step_index: int | None = None) -> str:
    """The subject of an episode event's email (the same in every form)."""
    return _headline_and_subject(station, rule, event, facts or {}, step_index)[1]


def summary_line(station: StationView, facts: dict, t: float) -> str:
    """``Now 4.05 m above chart datum at 13:00 IST; next high water 16:00 IST, forecast
    4.30 m.``: the level now and the coming high water, for the top of the long forms (so a
    phone's preview shows the level before the caution). Empty without readings."""
    shift, dlabel = station.display_offset, datum_label(station.display)
    zone = _zone(station.tz)
    parts = []
    obs = facts.get("observed")
    if obs is not None and math.isfinite(obs):
        at = datetime.fromtimestamp(float(t), tz=timezone.utc).astimezone(zone).strftime("%H:%M %Z")
        parts.append(f"Now {_m(obs - shift)} above {dlabel} at {at}")
    hw = facts.get("next_high_water")
    if isinstance(hw, dict) and hw.get("level") is not None and hw.get("time") is not None:
        when = datetime.fromtimestamp(float(hw["time"]), tz=timezone.utc).astimezone(zone).strftime("%H:%M %Z")
        parts.append(f"next high water {when}, forecast {_m(float(hw['level']) - shift)}"
                     + ("" if parts else f" above {dlabel}"))
    if not parts:
        return ""
    text = "; ".join(parts)
    return text[0].upper() + text[1:] + "."


def compose_alert(station: StationView, rule: Rule, event: Event, facts: dict | None = None,
                  step_index: int | None = None) -> tuple[str, str, str]:
    """Subject, plain text and HTML for an episode event.

    Parameters
    ----------
    station : StationView
    rule : Rule
    event : Event
        ``opened``, ``escalated``, ``changed`` (new equipment faults), ``held`` (a level
        rule's all-clear waits: the forecast range of a coming high water reaches its lowest
        step) or ``cleared``; ``event.value`` in the rule's units.
    facts : dict, optional
        Readings to show (see :func:`facts_lines`) and ``faults`` (list of dicts).

    Returns
    -------
    subject, text, html : str
    """
    facts = facts or {}
    step = rule.steps[event.level if step_index is None else step_index]
    headline, subject = _headline_and_subject(station, rule, event, facts, step_index)
    vtext = value_text(rule, event.value, station)
    local, utc = format_times(event.t, station.tz)
    ctx = dict(
        subject=subject, headline=headline, caution=CAUTION, caution_line=CAUTION_LINE,
        summary=summary_line(station, facts, event.t),
        station_name=clean_line(station.name, 120), station_id=clean_line(station.id, 80),
        rule_id=clean_line(rule.id, 80), what=_WHAT[rule.watch], step_name=clean_line(step.name, 60),
        step_at=step_text(rule, step.at, station), value_text=clean_line(vtext), local_time=local, utc_time=utc,
        levels_on=f"metres above {datum_label(station.display)}",
        datum_note=clean_line(station.datum_note, 300),
        held=event.kind == "held",
        facts=facts_lines(rule, station, facts),
        faults=[_fault_line(f, station.tz) for f in facts.get("faults") or []],
        note=clean_line(rule.note, 1000), station_notes=clean_line(station.notes, 1000),
        url=clean_line(station.url, 300),
    )
    text = _env_text.get_template("alert_event.txt").render(ctx)
    html = _env_html.get_template("alert_event.html").render(ctx)
    return ctx["subject"], text, html


def compose_test(now: int | float, host: str = "") -> tuple[str, str, str]:
    """Subject, plain text and HTML of the mail-settings test message, sent at ``now`` [Unix s, UTC]."""
    _, utc = format_times(now, "UTC")
    subject = f"{SUBJECT_PREFIX} test message ({utc})"
    ctx = dict(subject=subject, utc_time=utc, host=clean_line(host, 120), caution=CAUTION)
    return (subject, _env_text.get_template("alert_test.txt").render(ctx),
            _env_html.get_template("alert_test.html").render(ctx))


def _cid_references(html: str | None) -> list[str]:
    """The Content-IDs an HTML body cites as ``cid:`` URLs (RFC 2392), in order, once each."""
    if not html:
        return []
    return list(dict.fromkeys(_CID_REF.findall(html)))


_CID_REF = re.compile(r"""cid:([^"'\s)>]+)""", re.IGNORECASE)


def _inline_id(att: dict, cited: list[str]) -> str | None:
    """The Content-ID (without brackets) under which an attachment goes inline, or ``None``.

    An explicit ``content_id`` wins. An image without one goes inline when the HTML cites a
    ``cid:`` whose local part (before ``@``) is its file name, so a message that went through
    a store which kept only file name, type and data still shows its images in place.
    """
    cid = att.get("content_id") or att.get("cid")
    if cid:
        return clean_header(cid, 200).strip("<>")
    if not str(att.get("content_type") or "").lower().startswith("image/"):
        return None
    name = att.get("filename")
    for ref in cited:
        if name and (ref == name or ref.split("@", 1)[0] == name):
            return ref
    return None


def build_email(sender: str, recipient: str, subject: str, text: str, html: str | None,
                message_id: str, *, date: float | None = None, reply_to: str | None = None,
                attachments: Iterable[dict] = ()) -> EmailMessage:
    """A MIME message: plain text, optional HTML alternative with inline images, attachments.

    Parameters
    ----------
    sender, recipient, subject, message_id : str
        Header values; cleaned of control characters first, so nothing configured or
        received can add a header.
    text : str
        The plain-text body (always the first alternative).
    html : str or None
        The HTML alternative; it may cite images as ``cid:<id>``.
    attachments : iterable of dict
        ``filename``, ``content_type``, ``data`` (bytes) and optionally ``content_id``
        (without angle brackets). An attachment with a content id (or an image the HTML
        cites as ``cid:<filename>@...``) becomes an inline part of a ``multipart/related``
        around the HTML; every other attachment is a plain attachment.

    Returns
    -------
    EmailMessage
        ``multipart/alternative`` (text, then HTML or ``multipart/related`` of HTML and its
        images), wrapped in ``multipart/mixed`` when there are plain attachments.

    References
    ----------
    RFC 2046 section 5.1.4 (multipart/alternative); RFC 2387 (multipart/related);
    RFC 2392 (``cid:`` URLs and Content-ID).
    """
    msg = EmailMessage()
    msg["From"] = clean_header(sender)
    msg["To"] = clean_header(recipient)
    if reply_to:
        msg["Reply-To"] = clean_header(reply_to)
    msg["Subject"] = clean_header(subject, 250)
    msg["Message-ID"] = clean_header(message_id)
    msg["Date"] = format_datetime(datetime.fromtimestamp(date, tz=timezone.utc) if date is not None
                                  else datetime.now(timezone.utc))
    msg["Auto-Submitted"] = "auto-generated"  # RFC 3834: keeps auto-responders from replying
    msg.set_content(text)
    cited = _cid_references(html)
    inline: list[tuple[dict, str]] = []
    plain: list[dict] = []
    for att in attachments:
        cid = _inline_id(att, cited) if html else None
        (inline.append((att, cid)) if cid else plain.append(att))
    if html:
        msg.add_alternative(html, subtype="html")
        html_part = msg.get_payload()[1]
        for att, cid in inline:
            maintype, _, subtype = (att.get("content_type") or "application/octet-stream").partition("/")
            # add_related turns the HTML part into multipart/related (HTML first, the root).
            html_part.add_related(att["data"], maintype=maintype, subtype=subtype or "octet-stream",
                                  cid=f"<{cid}>", disposition="inline",
                                  filename=clean_header(att.get("filename") or cid.split("@")[0], 120))
    for att in plain:
        maintype, _, subtype = (att.get("content_type") or "application/octet-stream").partition("/")
        msg.add_attachment(att["data"], maintype=maintype, subtype=subtype or "octet-stream",
                           filename=clean_header(att.get("filename") or "attachment", 120))
    return msg
