"""Alert emails by reader: the form of the message each address gets.

Three forms, named here (``[mail.forms]`` in the configuration maps an address to one; an
address not listed gets ``full``):

``brief``
    For the public and volunteers, read in one glance on a phone: what is happening, the
    level now against the port's own marks in plain words, the next high water and whether
    it is forecast to reach them, the one action line the operator wrote for the rule, and
    the one-line caution. Nothing else.
``full``
    The harbour office's form (:func:`alerts.mail.message.compose_alert`): rule, step, readings,
    forecast method, faults.
``gauge``
    The technician's form: the equipment faults and their numbers first, then the readings.

Every form opens with its headline (the level, or the fault) so a phone's preview shows it,
then (after the faults in the gauge form) the one-line caution
(:data:`alerts.mail.message.CAUTION_LINE`, the start of the one caution text, ``CAUTION``); the
long forms end with the full caution, before the signature marker, never after it.
"""
from __future__ import annotations

import math
import re
from datetime import datetime, timezone
from typing import Any, Mapping

import jinja2

from alerts.mail.message import (CAUTION, CAUTION_LINE, _duration, _fault_line, _m, _zone,
                            _headline_and_subject, alert_subject, clean_line, compose_alert, datum_label,
                            facts_lines, format_times, step_text)
from alerts.rules import Event, Rule, StationView

#: Form names and what each is for.
FORMS = {
    "brief": "short public form: what is happening, level now, next high water, action line",
    "full": "operations form: rule, step, readings, forecast method, faults",
    "gauge": "technician's form: equipment faults and their numbers first",
}
DEFAULT_FORM = "full"

_ADDR_RE = re.compile(r"^[^@\s<>,;\"\r\n]+@[^@\s<>,;\"\r\n]+\.[^@\s<>,;\"\r\n]+$")

_env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)

_BRIEF_HTML = _env.from_string("""<!DOCTYPE html>
<html lang="en">
<head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1"><title>{{ subject }}</title></head>
<body style="font-family: sans-serif; max-width: 40em; margin: 0.5em;">
<p style="font-size: 1.2em; font-weight: bold; margin: 0 0 0.3em 0;">{{ lines[0] }}</p>
<p style="font-size: 0.85em; color: #333; margin: 0 0 0.8em 0;">{{ caution_line }}</p>
{% for line in lines[1:] %}<p style="margin: 0 0 0.6em 0;">{{ line }}</p>
{% endfor %}</body>
</html>
""")

_GAUGE_HTML = _env.from_string("""<!DOCTYPE html>
<html lang="en">
<head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1"><title>{{ subject }}</title></head>
<body style="font-family: sans-serif; max-width: 44em; margin: 0.5em;">
<p style="font-size: 1.2em; font-weight: bold; margin: 0 0 0.3em 0;">{{ headline }}</p>
{% if faults %}<h2 style="font-size: 1.05em;">Equipment faults ({{ faults|length }})</h2>
<ul>{% for f in faults %}<li>{{ f }}</li>{% endfor %}</ul>{% endif %}
<p style="font-size: 0.85em; color: #333; margin: 0 0 0.8em 0;">{{ caution_line }}</p>
<h2 style="font-size: 1.05em;">Gauge readings</h2>
<table style="border-collapse: collapse;">
{% for label, text in rows %}<tr><th style="text-align: left; padding-right: 1em; vertical-align: top;">{{ label }}</th><td>{{ text }}</td></tr>
{% endfor %}</table>
{% if note %}<p>Note: {{ note }}</p>{% endif %}
<p style="font-size: 0.9em;"><strong>Caution:</strong> {{ caution }}</p>
<hr>
<p style="font-size: 0.9em;">quaywatch station monitor, {{ station_name }}</p>
</body>
</html>
""")


class FormsError(ValueError):
    """A configured form mapping is not valid (the message starts with the key path)."""


def forms_from_config(raw: Any, keypath: str) -> tuple[dict[str, str], list[str]]:
    """Validate ``[mail.forms]``: a table of email address -> form name.

    Parameters
    ----------
    raw : dict
        The parsed TOML table, e.g. ``{"volunteers@port.example": "brief"}``.
    keypath : str
        Where it sits, e.g. ``"mail.forms"``.

    Returns
    -------
    forms : dict
        Address (lower case) -> form name; empty when there are errors.
    errors : list of str
        Each starts with the key path of the problem.

    References
    ----------
    None: the forms and their names are this project's own.
    """
    if raw is None:
        return {}, []
    if not isinstance(raw, dict):
        return {}, [f"{keypath}: expected a table of address = form name "
                    f"(e.g. \"volunteers@port.example\" = \"brief\")"]
    errors: list[str] = []
    out: dict[str, str] = {}
    for addr, form in raw.items():
        where = f'{keypath}."{addr}"'
        if not _ADDR_RE.match(str(addr).strip()):
            errors.append(f"{where}: not a plain email address")
        if not isinstance(form, str) or form not in FORMS:
            errors.append(f"{where}: unknown form {form!r} (known: {', '.join(FORMS)})")
            continue
        out[str(addr).strip().lower()] = form
    return ({} if errors else out), errors


def form_for(address: str, forms: Mapping[str, str] | Any) -> str:
    """The form an address gets: its entry in ``forms`` (address -> name), else ``full``."""
    table = dict(forms or ())
    return table.get(address.strip().lower(), DEFAULT_FORM)


def compose(form: str, station: StationView, rule: Rule, event: Event, facts: dict | None = None,
            step_index: int | None = None) -> tuple[str, str, str]:
    """Subject, plain text and HTML of an episode event in one form.

    Parameters
    ----------
    form : str
        ``brief``, ``full`` or ``gauge`` (see :data:`FORMS`).
    station, rule, event, facts, step_index
        As for :func:`alerts.mail.message.compose_alert`.

    Returns
    -------
    subject, text, html : str
    """
    if form == "full":
        return compose_alert(station, rule, event, facts, step_index)
    if form == "brief":
        return compose_brief(station, rule, event, facts, step_index)
    if form == "gauge":
        return compose_gauge(station, rule, event, facts, step_index)
    raise FormsError(f"unknown form {form!r} (known: {', '.join(FORMS)})")


# --------------------------------------------------------------------------- brief

def level_marks(station: StationView, rule: Rule) -> list[tuple[str, float]]:
    """The port's own marks a level is told against: (name, level [m, station datum]).

    The station's marks (the steps of its ``level_above`` rules, put on the view by the
    engine) and the rule's own steps when it counts levels; sorted from low to high."""
    marks: dict[str, float] = {str(n): float(v) for n, v in (station.marks or ())}
    if rule.watch in ("level_above", "next_high_water_above"):
        for s in rule.steps:
            marks.setdefault(s.name, s.at + rule.datum_offset)
    return sorted(marks.items(), key=lambda kv: kv[1])


def _against_marks(level: float, marks: list[tuple[str, float]], shift: float) -> str:
    """``0.05 m above "boards out" (4.00 m), 0.20 m below "over the quay" (4.25 m)``."""
    below = [(n, v) for n, v in marks if v <= level]
    above = [(n, v) for n, v in marks if v > level]
    parts = []
    if below:
        n, v = below[-1]
        parts.append(f'{_m(level - v)} above "{clean_line(n, 60)}" ({_m(v - shift)})')
    if above:
        n, v = above[0]
        parts.append(f'{_m(v - level)} below "{clean_line(n, 60)}" ({_m(v - shift)})')
    return ", ".join(parts)


def _clock(t: float, tz: str, ref: float) -> str:
    """``13:20 IST`` on the same local day as ``ref``, else ``Fri 24 Oct 01:10 IST``."""
    dt = datetime.fromtimestamp(float(t), tz=timezone.utc).astimezone(_zone(tz))
    same_day = dt.date() == datetime.fromtimestamp(float(ref), tz=timezone.utc).astimezone(_zone(tz)).date()
    return dt.strftime("%H:%M %Z" if same_day else "%a %d %b %H:%M %Z")


def _happening(station: StationView, rule: Rule, event: Event, facts: dict, step_name: str) -> str:
    sname = clean_line(station.name, 80)
    step = f'"{clean_line(step_name, 60)}"'
    lowest = f'"{clean_line(rule.steps[0].name, 60)}"'
    kind, w = event.kind, rule.watch
    if kind == "cleared":
        if w in ("level_above", "level_below", "next_high_water_above"):
            side = "above" if w == "level_below" else "below"
            return f"{sname}: all clear - the water is back {side} {lowest}"
        if w.startswith("residual"):
            return f"{sname}: all clear - the surge has eased"
        return f"{sname}: all clear - the gauge is working again"
    if kind == "held":
        return f"{sname}: not clear yet - the next high water may reach {lowest} again"
    if w == "level_above":
        return f"{sname}: the water has reached {step}"
    if w == "level_below":
        return f"{sname}: the water is down to {step}"
    if w == "residual_above":
        return f"{sname}: the sea stands {_m(abs(event.value))} above the predicted tide ({step})"
    if w == "residual_below":
        return f"{sname}: the sea stands {_m(abs(event.value))} below the predicted tide ({step})"
    if w == "next_high_water_above":
        return f"{sname}: the next high water is forecast to reach {step}"
    if w == "feed_silent":
        return f"{sname}: no data from the gauge for {_duration(event.value)}"
    return f"{sname}: the gauge has a fault, so its readings may be wrong"


def _level_sentence(station: StationView, marks, facts: dict, t: float) -> str:
    obs = facts.get("observed")
    if obs is None or not math.isfinite(obs):
        return "No level reading from the gauge now."
    shift = station.display_offset
    text = f"Now {_m(obs - shift)} above {datum_label(station.display)} at {_clock(t, station.tz, t)}"
    rel = _against_marks(obs, marks, shift)
    return f"{text}: {rel}." if rel else f"{text}."


def _high_water_sentence(station: StationView, marks, facts: dict, t: float) -> str | None:
    hw = facts.get("next_high_water")
    if not isinstance(hw, dict) or hw.get("level") is None or hw.get("time") is None:
        return None
    shift = station.display_offset
    level = float(hw["level"])
    top = hw.get("upper")
    if top is None and hw.get("uncertainty") is not None:
        top = level + float(hw["uncertainty"])
    text = (f"Next high water {_clock(hw['time'], station.tz, t)}: forecast {_m(level - shift)} "
            f"above {datum_label(station.display)}")
    reached = [(n, v) for n, v in marks if v <= level]
    missed = [(n, v) for n, v in marks if v > level]
    if reached:
        n, v = reached[-1]
        text += f', forecast to reach "{clean_line(n, 60)}" ({_m(v - shift)})'
        if missed and top is not None and math.isfinite(top) and top >= missed[0][1]:
            text += f' and it could reach "{clean_line(missed[0][0], 60)}" ({_m(missed[0][1] - shift)})'
    elif missed:
        n, v = missed[0]
        text += f', not forecast to reach "{clean_line(n, 60)}" ({_m(v - shift)})'
        if top is not None and math.isfinite(top) and top >= v:
            text += f", but it could: the forecast range goes up to {_m(top - shift)}"
    return text + "."


def brief_lines(station: StationView, rule: Rule, event: Event, facts: dict | None = None,
                step_index: int | None = None) -> list[str]:
    """The brief form's lines: headline with the level now, next high water, action.

    The one-line caution goes after the first line (see :func:`compose_brief`)."""
    facts = facts or {}
    index = event.level if step_index is None else step_index
    marks = level_marks(station, rule)
    first = _happening(station, rule, event, facts, rule.steps[index].name)
    lines = [f"{first}. {_level_sentence(station, marks, facts, event.t)}"]
    hw = _high_water_sentence(station, marks, facts, event.t)
    if hw and rule.watch not in ("feed_silent", "equipment_fault"):
        lines.append(hw)
    action = clean_line(rule.action, 300)
    if action and event.kind != "cleared":
        lines.append(f"What to do: {action}")
    return lines


def compose_brief(station: StationView, rule: Rule, event: Event, facts: dict | None = None,
                  step_index: int | None = None) -> tuple[str, str, str]:
    """The brief (public) form: a few lines a volunteer reads in one glance on a phone."""
    lines = brief_lines(station, rule, event, facts, step_index)
    subject = alert_subject(station, rule, event, facts or {}, step_index)
    text = "\n".join([lines[0], CAUTION_LINE, "", *lines[1:]]).rstrip() + "\n"
    html = _BRIEF_HTML.render(subject=subject, lines=lines, caution_line=CAUTION_LINE)
    return subject, text, html


# --------------------------------------------------------------------------- gauge

def compose_gauge(station: StationView, rule: Rule, event: Event, facts: dict | None = None,
                  step_index: int | None = None) -> tuple[str, str, str]:
    """The technician's form: the equipment faults and their numbers first."""
    facts = facts or {}
    index = event.level if step_index is None else step_index
    faults = [_fault_line(f, station.tz) for f in facts.get("faults") or []]
    sname = clean_line(station.name, 80)
    step = clean_line(rule.steps[index].name, 60)
    if rule.watch == "equipment_fault" and event.kind != "cleared" and faults:
        more = f" (+{len(faults) - 1} more)" if len(faults) > 1 else ""
        headline = f"{sname}: {faults[0]}{more}"
    else:
        headline = _headline_and_subject(station, rule, event, facts, step_index)[0]
    local, utc = format_times(event.t, station.tz)
    rows = facts_lines(rule, station, facts)
    rows = [r for r in rows if r[0] not in ("Forecast method", "If the surge keeps rising")]
    rows += [("Rule", f"{clean_line(rule.id, 60)} ({step}, at {step_text(rule, rule.steps[index].at, station)})"),
             ("Time", f"{local} / {utc}")]
    subject = alert_subject(station, rule, event, facts, step_index)
    out = [headline, ""]
    if faults:
        out.append(f"Equipment faults ({len(faults)})")
        out += [f"  - {f}" for f in faults]
        out.append("")
    out += [CAUTION_LINE, ""]
    out.append("Gauge readings")
    out += [f"  {label + ':':<27}{value}" for label, value in rows]
    if rule.note:
        out += ["", f"Note: {clean_line(rule.note, 1000)}"]
    out += ["", f"CAUTION: {CAUTION}", "", "-- ", f"quaywatch station monitor, {sname}"]
    html = _GAUGE_HTML.render(subject=subject, headline=headline, caution_line=CAUTION_LINE,
                              faults=faults, rows=rows, note=clean_line(rule.note, 1000),
                              caution=CAUTION, station_name=sname)
    return subject, "\n".join(out) + "\n", html


__all__ = ["FORMS", "DEFAULT_FORM", "FormsError", "forms_from_config", "form_for", "compose",
           "compose_brief", "compose_gauge", "brief_lines", "level_marks"]
