"""Daily station report: the data it shows, its settings, and rendering to HTML and email.

A report covers one station and one *local* day (midnight to midnight in the station's
time zone, so 23 or 25 hours long on the days the clocks change). Everything it shows is
held in a :class:`DayReport` of plain Python and pandas values, so rendering needs no store:
``monitor.reporting`` fills one from the store, tests build one by hand.

Output is a single self-contained HTML file (CSS and images inline, no network fetches),
readable on a phone and printable, plus an index page over stations and days, and an email
form (HTML with the chart as a Content-ID image, and a plain-text summary).
"""
from __future__ import annotations

import base64
import dataclasses
import datetime as dt
import html
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

CAUTION = (
    "This report is automated and unofficial. Official warnings and the local emergency "
    "authorities come first, always. Levels, predictions and residuals here can be wrong "
    "(a faulty gauge, constants fitted to a short record, weather the tide model cannot know). "
    "Defer to local codes, official tide tables and licensed practice for any decision about "
    "navigation, berthing or safety."
)

TEMPLATES = Path(__file__).with_name("templates")

#: QARTOD flag values and the words we show for them (U.S. IOOS 2021, QARTOD water level v2.1).
FLAG_WORDS = {1: "pass", 2: "not evaluated", 3: "suspect", 4: "fail", 9: "missing"}

#: Per-test columns of the ``qc_tests`` table and how the report names them.
QC_TEST_NAMES = {
    "gap": "timing / gap (QARTOD 1)",
    "syntax": "syntax (QARTOD 2)",
    "location": "location (QARTOD 3)",
    "gross": "gross range (QARTOD 4)",
    "expected": "expected range (QARTOD 5, climatology)",
    "spike": "spike and jump (QARTOD 6)",
    "roc": "rate of change (QARTOD 7)",
    "flat": "flat line (QARTOD 8)",
    "atten": "attenuated signal (QARTOD 10)",
    "multi": "primary vs backup (QARTOD 11, neighbour)",
    "resid": "residual outlier (ours)",
}


# --------------------------------------------------------------------------- data


@dataclass(frozen=True)
class AlertLevel:
    """A level the operator named, drawn on the chart.

    ``quantity`` is ``"level"`` (metres on the report's datum) or ``"residual"`` (metres);
    ``direction`` is ``"above"`` or ``"below"``.
    """

    name: str
    value: float
    quantity: str = "level"
    direction: str = "above"


@dataclass(frozen=True)
class TideRow:
    """One predicted high or low water, what was observed, and the skew surge.

    ``skew`` (high waters only) is the skew surge: the highest observed level in the tide's
    cycle minus the predicted high water, in metres. Its low-water counterpart, the lowest
    observed level in the cycle minus the predicted low water, is ``low_departure`` (low waters
    only). Both are ``None`` when the cycle has no usable observations; ``partial`` is true
    when the cycle has gaps. ``stand`` describes a peak of a double high (low) water, whose
    stand is one tide (NOAA 2003): empty for an ordinary tide.
    """

    kind: str
    predicted_time: pd.Timestamp
    predicted_level: float
    observed_time: pd.Timestamp | None = None
    observed_level: float | None = None
    skew: float | None = None
    partial: bool = False
    low_departure: float | None = None
    stand: str = ""


@dataclass(frozen=True)
class QcEpisode:
    """A run of consecutive samples given the same non-pass flag by one test."""

    test: str
    flag: int
    start: pd.Timestamp
    end: pd.Timestamp
    samples: int
    sensor: str = "primary"


@dataclass(frozen=True)
class Diagnostic:
    """A technician's diagnostic: the latest value with its uncertainty, and its history.

    ``history`` is a pandas Series indexed by UTC time (one value per week, say); it may be
    empty. ``value`` and ``uncertainty`` are in ``unit``.
    """

    name: str
    unit: str
    value: float | None
    uncertainty: float | None = None
    history: pd.Series = field(default_factory=lambda: pd.Series(dtype=float))
    note: str = ""


@dataclass(frozen=True)
class Delivery:
    """One email the alert engine queued, and what became of it."""

    what: str
    queued_at: pd.Timestamp
    sent_at: pd.Timestamp | None = None
    attempts: int = 0
    error: str = ""
    recipients: int = 0


@dataclass(frozen=True)
class AlertEpisodeRow:
    """An alert episode that was open at some time during the day."""

    rule: str
    level: str
    started: pd.Timestamp
    cleared: pd.Timestamp | None = None
    peak: float | None = None
    unit: str = "m"
    deliveries: tuple[Delivery, ...] = ()
    signed: bool = False   # a residual (datum-free, shown with its sign); else a level on the report's datum


@dataclass(frozen=True)
class ConstituentRow:
    """One harmonic constituent in use: amplitude [m], Greenwich phase lag [deg]."""

    name: str
    amplitude: float
    phase: float
    amplitude_ci: float | None = None
    snr: float | None = None


@dataclass(frozen=True)
class ConstantsInfo:
    """The harmonic constants the prediction used, where they came from and how well they fit.

    ``mean`` [m] is on the report's datum (the constants file may record another; ``source``
    says how it was brought to the station's)."""

    source: str
    mean: float | None = None
    constituents: tuple[ConstituentRow, ...] = ()
    fitted_at: pd.Timestamp | None = None
    record_start: pd.Timestamp | None = None
    record_end: pd.Timestamp | None = None
    samples: int | None = None
    rms: float | None = None
    variance_explained: float | None = None


@dataclass(frozen=True)
class RejectRow:
    """A telemetry line that could not be read."""

    feed: str
    lineno: int | None
    reason: str
    text: str = ""


@dataclass(frozen=True)
class HighWaterForecast:
    """A high water forecast as issued: the predicted high water plus a forecast of the surge.

    Levels in metres on the report's datum. ``lower``/``upper`` bound the ``coverage`` range:
    conditioned on the storm at ``made_at`` (``method`` ``"conditioned"``), or a deliberately
    wide rule of thumb when the history holds too few storms (``"wide"``); ``note`` says
    which, and how, in words.
    """

    time: pd.Timestamp
    predicted: float
    residual_now: float
    forecast: float
    made_at: pd.Timestamp
    lower: float | None = None
    upper: float | None = None
    coverage: float | None = None
    note: str = ""
    method: str = ""            # "conditioned" (on the storm now) or "wide" (the rule of thumb)
    rising: float | None = None  # if the surge keeps rising at its current rate until then [m]
    rate: float | None = None    # the residual's rate over the last 3 h [m/h]
    pressure_note: str = ""      # said when a barometer gap left the pressure tendency out

    @property
    def lead(self) -> pd.Timedelta:
        return self.time - self.made_at


@dataclass(frozen=True)
class Verified:
    """One forecast of a high water issued ``lead_h`` hours before it; levels [m, report datum]."""

    lead_h: float
    made_at: pd.Timestamp
    forecast: float | None
    lower: float | None = None
    upper: float | None = None
    method: str = ""


@dataclass(frozen=True)
class VerificationRow:
    """A high water of the day against what was forecast for it 6, 3 and 1 h before.

    ``observed`` is what came: the highest observed level of its tidal cycle [m, report datum];
    ``forecasts`` one :class:`Verified` (or None when none was issued then) per lead.
    """

    time: pd.Timestamp
    predicted: float
    observed: float | None
    observed_time: pd.Timestamp | None = None
    forecasts: tuple = ()

    def verdict(self, f: "Verified | None") -> str:
        """``"inside"``, ``"above"``, ``"below"`` the forecast's range, or ``""`` when unknown."""
        if f is None or self.observed is None or f.lower is None or f.upper is None:
            return ""
        if self.observed > f.upper:
            return "above"
        if self.observed < f.lower:
            return "below"
        return "inside"


@dataclass(frozen=True)
class StaffCheck:
    """The Van de Casteele check of the gauge against tide-staff readings.

    The figures are those of the latest session of staff readings (``start`` to ``end``);
    ``sessions`` counts the sessions found in the recent weeks. ``offset_mm`` is gauge minus
    staff [mm]; ``scale_error`` [1] (0.01: the gauge shows ranges 1 % too large);
    ``timing_s`` [s] (positive: the gauge lags the sea). ``points`` has one row per reading
    of the latest session: ``staff`` [m, report datum], ``difference`` (gauge - staff) [m]
    and ``rate`` [m/s], for the diagram. ``history`` is each session's offset [mm].
    """

    start: pd.Timestamp
    end: pd.Timestamp
    readings: int
    sessions: int
    offset_mm: float | None
    offset_se_mm: float | None
    scale_error: float | None
    scale_se: float | None
    timing_s: float | None
    timing_se_s: float | None
    rms_mm: float | None = None
    points: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=["staff", "difference", "rate"]))
    history: pd.Series = field(default_factory=lambda: pd.Series(dtype=float))
    note: str = ""


@dataclass(frozen=True)
class BarometerPart:
    """How much of the day's residual the inverse barometer explains.

    ``mean_ib`` / ``min_ib`` / ``max_ib`` [m]: the inverse-barometer sea level over the day;
    ``mean_residual`` [m] over the same samples; ``variance_explained`` [1]:
    1 - var(residual - IB) / var(residual) (negative when removing the IB adds variance);
    ``samples``: samples with both a residual and a pressure.
    """

    samples: int
    mean_ib: float | None
    min_ib: float | None
    max_ib: float | None
    mean_residual: float | None
    variance_explained: float | None
    correlation: float | None = None


@dataclass
class DayReport:
    """Everything a station's daily report shows.

    Times are tz-aware UTC pandas Timestamps; levels are metres on ``datum``.

    ``samples`` is a DataFrame indexed by UTC time with columns ``observed``, ``residual``
    and ``flag`` (aggregate QARTOD flag) for the primary sensor; ``predicted`` is the
    predicted tide through the whole day (a Series indexed by UTC time), present even when
    no observation arrived. ``sample_interval`` is the sensor's nominal interval [s]
    (inferred from the samples when ``None``).
    """

    station_id: str
    station_name: str
    tz: str
    day: dt.date
    datum: str = "station datum"
    datum_note: str = ""
    note: str = ""
    samples: pd.DataFrame = field(default_factory=lambda: empty_samples())
    predicted: pd.Series = field(default_factory=lambda: pd.Series(dtype=float))
    sample_interval: float | None = None
    alert_levels: Sequence[AlertLevel] = ()
    tides: Sequence[TideRow] = ()
    rejected_lines: int = 0
    rejects: Sequence[RejectRow] = ()
    conflicts: int = 0  # conflicting repeats received that day (a time sent again with another value)
    qc_counts: Mapping[str, Mapping[int, int]] = field(default_factory=dict)
    qc_episodes: Sequence[QcEpisode] = ()
    diagnostics: Sequence[Diagnostic] = ()
    alerts: Sequence[AlertEpisodeRow] = ()
    constants: ConstantsInfo | None = None
    generated_at: pd.Timestamp | None = None
    forecast: HighWaterForecast | None = None
    staff: StaffCheck | None = None
    barometer: BarometerPart | None = None
    verification: Sequence["VerificationRow"] = ()
    rarity: Any = None  # alerts.rarity_report.RaritySection: how rare the day's water was, the trend


def empty_samples() -> pd.DataFrame:
    """An empty ``DayReport.samples`` frame with the right columns and a UTC index."""
    return pd.DataFrame(
        {"observed": pd.Series(dtype=float), "residual": pd.Series(dtype=float),
         "flag": pd.Series(dtype="int64")},
        index=pd.DatetimeIndex([], tz="UTC", name="time"),
    )


# --------------------------------------------------------------------------- settings


@dataclass(frozen=True)
class ReportSettings:
    """Where and when daily reports are written, and who gets them.

    ``folder`` as given in the configuration (``monitor.config`` resolves it against the
    configuration file's folder); ``write_at`` is the station's local time of day at which
    the previous day's report is written; ``keep_days`` 0 keeps reports for ever.
    """

    folder: Path = Path("reports")
    write_at: dt.time = dt.time(6, 0)
    recipients: tuple[str, ...] = ()
    keep_days: int = 400
    trend_weeks: int = 8
    email: bool = True


_REPORT_KEYS = {"folder", "write_at", "recipients", "keep_days", "trend_weeks", "email"}
_EMAIL_RE = re.compile(r"^[^@\s<>,;]+@[^@\s<>,;]+\.[^@\s<>,;]+$")


def report_settings_from(raw: Mapping[str, Any] | None, keypath: str) -> tuple[ReportSettings, list[str]]:
    """Validate the ``[report]`` configuration table.

    Returns the settings (defaults where a key is missing or wrong) and a list of problems,
    each starting with its key path.
    """
    errors: list[str] = []
    defaults = ReportSettings()
    if raw is None:
        return defaults, errors
    if not isinstance(raw, Mapping):
        return defaults, [f"{keypath}: expected a table of report settings"]
    for key in sorted(set(raw) - _REPORT_KEYS):
        errors.append(f"{keypath}.{key}: unknown key (known: {', '.join(sorted(_REPORT_KEYS))})")
    values: dict[str, Any] = {}

    if "folder" in raw:
        if isinstance(raw["folder"], str) and raw["folder"].strip():
            values["folder"] = Path(raw["folder"])
        else:
            errors.append(f"{keypath}.folder: expected a folder path as text")
    if "write_at" in raw:
        value = raw["write_at"]
        if isinstance(value, dt.time):
            values["write_at"] = value
        else:
            match = re.fullmatch(r"(\d{1,2}):(\d{2})", str(value).strip()) if isinstance(value, str) else None
            if match and int(match[1]) < 24 and int(match[2]) < 60:
                values["write_at"] = dt.time(int(match[1]), int(match[2]))
            else:
                errors.append(f"{keypath}.write_at: expected a local time of day as \"HH:MM\", got {value!r}")
    if "recipients" in raw:
        value = raw["recipients"]
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list):
            errors.append(f"{keypath}.recipients: expected a list of email addresses")
        else:
            good = []
            for i, address in enumerate(value):
                if isinstance(address, str) and _EMAIL_RE.match(address.strip()):
                    good.append(address.strip())
                else:
                    errors.append(f"{keypath}.recipients[{i}]: not an email address: {address!r}")
            values["recipients"] = tuple(good)
    for key, low in (("keep_days", 0), ("trend_weeks", 1)):
        if key in raw:
            value = raw[key]
            if isinstance(value, int) and not isinstance(value, bool) and value >= low:
                values[key] = value
            else:
                errors.append(f"{keypath}.{key}: expected a whole number >= {low}, got {value!r}")
    if "email" in raw:
        if isinstance(raw["email"], bool):
            values["email"] = raw["email"]
        else:
            errors.append(f"{keypath}.email: expected true or false, got {raw['email']!r}")
    return dataclasses.replace(defaults, **values), errors


# --------------------------------------------------------------------------- local time


def day_bounds(day: dt.date, tz: str) -> tuple[pd.Timestamp, pd.Timestamp]:
    """The UTC instants of local midnight starting ``day`` and the next local midnight."""
    zone = ZoneInfo(tz)

    def midnight(d: dt.date) -> pd.Timestamp:
        local = pd.Timestamp(d).tz_localize(zone, nonexistent="shift_forward", ambiguous=True)
        return local.tz_convert("UTC")

    return midnight(day), midnight(day + dt.timedelta(days=1))


def _offset_text(offset: dt.timedelta) -> str:
    minutes = int(offset.total_seconds() // 60)
    sign = "+" if minutes >= 0 else "\u2212"
    return f"UTC{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


def zone_label(tz: str, start: pd.Timestamp, end: pd.Timestamp) -> str:
    """Name the zone and its UTC offset over [start, end), saying when the clocks change.

    E.g. ``"Atlantic/Faroe, UTC+01:00"``, or on a change day
    ``"Atlantic/Faroe, UTC+01:00 until 02:00, then UTC+00:00 from 01:00 (clocks back: a 25-hour day)"``.
    """
    zone = ZoneInfo(tz)
    grid = pd.date_range(start, end, freq="1min", inclusive="left")
    first = start.tz_convert(zone).utcoffset()
    if len(grid) == 0:
        return f"{tz}, {_offset_text(first)}"
    local = grid.tz_convert(zone)
    offsets = (local.tz_localize(None) - grid.tz_localize(None)).total_seconds().to_numpy()
    changed = np.flatnonzero(offsets != offsets[0])
    if len(changed) == 0:
        return f"{tz}, {_offset_text(first)}"
    i = int(changed[0])
    old_clock = (grid[i] + pd.Timedelta(seconds=float(offsets[0]))).strftime("%H:%M")
    hours = (end - start) / pd.Timedelta(hours=1)
    direction = "back" if offsets[i] < offsets[0] else "forward"
    return (
        f"{tz}, {_offset_text(first)} until {old_clock}, then "
        f"{_offset_text(local[i].utcoffset())} from {local[i].strftime('%H:%M')} "
        f"(clocks {direction}: a {hours:g}-hour day)"
    )


# --------------------------------------------------------------------------- figures


@dataclass(frozen=True)
class Gap:
    start: pd.Timestamp
    end: pd.Timestamp

    @property
    def duration(self) -> pd.Timedelta:
        return self.end - self.start


@dataclass(frozen=True)
class DayFigures:
    """The day's figures derived from a :class:`DayReport` (failed and missing samples excluded)."""

    start: pd.Timestamp
    end: pd.Timestamp
    hours: float
    interval: float | None
    expected: int | None
    received: int
    usable: int
    suspect: int
    failed: int
    completeness: float | None
    highest_level: float | None
    highest_level_at: pd.Timestamp | None
    lowest_level: float | None
    lowest_level_at: pd.Timestamp | None
    highest_residual: float | None
    highest_residual_at: pd.Timestamp | None
    lowest_residual: float | None
    lowest_residual_at: pd.Timestamp | None
    gaps: tuple[Gap, ...]


def infer_interval(index: pd.DatetimeIndex) -> float | None:
    """The typical spacing of samples [s]: the median of their differences."""
    if len(index) < 2:
        return None
    diffs = np.diff(index.as_unit("ns").asi8) / 1e9
    diffs = diffs[diffs > 0]
    return float(np.median(diffs)) if len(diffs) else None


def find_gaps(index: pd.DatetimeIndex, start: pd.Timestamp, end: pd.Timestamp,
              interval: float | None) -> tuple[Gap, ...]:
    """Spans in [start, end) longer than two sample intervals with no sample.

    A day with no samples at all is one gap covering the whole day.
    """
    if len(index) == 0:
        return (Gap(start, end),)
    if interval is None:
        return ()
    step = pd.Timedelta(seconds=interval)
    # A virtual sample one step before the day and one at its end, so missing data at
    # either edge counts as a gap too.
    edges = [start - step, *index.sort_values(), end]
    return tuple(Gap(a + step, b) for a, b in zip(edges[:-1], edges[1:]) if b - a > 2 * step)


def day_figures(report: DayReport) -> DayFigures:
    """Compute the day's figures: extremes and when, completeness, flag counts, gaps.

    Samples flagged fail (4) or missing (9) never enter the extremes (the design's rule
    that failed data never reach statistics). Completeness is received samples over the
    expected count for the local day's true length (23, 24 or 25 h).
    """
    start, end = day_bounds(report.day, report.tz)
    samples = report.samples
    if len(samples):
        samples = samples[(samples.index >= start) & (samples.index < end)]
    hours = (end - start) / pd.Timedelta(hours=1)
    interval = report.sample_interval or infer_interval(samples.index)
    flags = samples["flag"].fillna(2).astype(int) if len(samples) else pd.Series(dtype=int)
    present = samples["observed"].notna() & (flags != 9) if len(samples) else pd.Series(dtype=bool)
    received = int(present.sum()) if len(samples) else 0
    usable_mask = present & (flags != 4) if len(samples) else pd.Series(dtype=bool)
    usable = samples[usable_mask] if len(samples) else samples
    expected = int(round(hours * 3600 / interval)) if interval else None

    def extreme(column: str, fn: str) -> tuple[float | None, pd.Timestamp | None]:
        values = usable[column].dropna() if len(usable) else pd.Series(dtype=float)
        if values.empty:
            return None, None
        at = values.idxmax() if fn == "max" else values.idxmin()
        return float(values[at]), at

    hl, hl_at = extreme("observed", "max")
    ll, ll_at = extreme("observed", "min")
    hr, hr_at = extreme("residual", "max")
    lr, lr_at = extreme("residual", "min")
    return DayFigures(
        start=start, end=end, hours=hours, interval=interval, expected=expected,
        received=received, usable=len(usable),
        suspect=int((flags[present] == 3).sum()) if received else 0,
        failed=int((flags[present] == 4).sum()) if received else 0,
        completeness=min(1.0, received / expected) if expected else (0.0 if not received else None),
        highest_level=hl, highest_level_at=hl_at, lowest_level=ll, lowest_level_at=ll_at,
        highest_residual=hr, highest_residual_at=hr_at, lowest_residual=lr, lowest_residual_at=lr_at,
        gaps=find_gaps(samples.index[present] if received else samples.index[:0], start, end, interval),
    )


# --------------------------------------------------------------------------- rendering


def _environment() -> "jinja2.Environment":
    # Imported here, like the charts (matplotlib): every command loads the configuration,
    # which reads this module's settings, and none of those needs a template or a figure.
    import jinja2

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
            text += f" ({_offset_text(local.utcoffset())})"
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
    the return-level and sea-level charts (alerts.rarity_report)."""
    from alerts import rarity_report as rr

    sec = report.rarity
    return {"trend": charts.trend_chart(report.diagnostics),
            "staff": charts.staff_chart(report.staff) if report.staff is not None else None,
            "return_levels": rr.return_level_chart(sec, report.datum) if sec is not None else None,
            "sea_level": rr.sea_level_chart(sec, report.datum) if sec is not None else None}


def render_day_html(report: DayReport) -> str:
    """Render a station's day as one self-contained HTML page (images inline as data URIs)."""
    from alerts import charts

    chart_src = _data_uri(charts.day_chart(report))
    extra = {k: _data_uri(v) if v else None for k, v in _extra_charts(report, charts).items()}
    return _environment().get_template("report_day.html").render(
        **_context(report, chart_src, extra["trend"], extra["staff"]), for_email=False,
        return_levels_src=extra["return_levels"], sea_level_src=extra["sea_level"])


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
        """The images as attachment dicts for :func:`alerts.message.build_email` (through the
        outbox): ``filename``, ``content_type``, ``data`` and ``content_id``, so they go inline."""
        return [{"filename": cid.split("@", 1)[0], "content_type": "image/png", "data": png, "content_id": cid}
                for cid, png in self.images.items()]


def render_day_email(report: DayReport) -> ReportEmail:
    """Render a station's day for email: HTML part with Content-ID images, plain-text part.

    The image keys are ``<station>-<day>-<what>.png@quaywatch.invalid``: their local part is
    the file name, which lets the images go inline even through a queue that keeps only the
    file name of an attachment (see :func:`alerts.message.build_email`).
    """
    from alerts import charts

    stem = f"{report.station_id}-{report.day.isoformat()}"
    domain = "@quaywatch.invalid"
    pngs = {"chart": charts.day_chart(report), **_extra_charts(report, charts)}
    images = {f"{stem}-{what}.png{domain}": png for what, png in pngs.items() if png}
    sources = {what: f"cid:{stem}-{what}.png{domain}" if png else None for what, png in pngs.items()}
    env = _environment()
    context = _context(report, sources["chart"], sources.get("trend"), sources.get("staff"))
    html_part = env.get_template("report_day.html").render(
        **context, for_email=True, return_levels_src=sources.get("return_levels"),
        sea_level_src=sources.get("sea_level"))
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


def render_index_html(folder: Path, generated_at: pd.Timestamp | None = None) -> str:
    """Render the index page over every report found under ``folder``."""
    folder = Path(folder)
    stations: dict[str, dict[str, Any]] = {}
    for path in sorted(folder.glob("*/*.html")):
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", path.stem):
            continue
        summary = {"name": path.parent.name, "highest_level": None, "highest_residual": None,
                   "completeness": None, "failed": None, "alerts": None,
                   **(read_summary(path) or {}), "day": path.stem}
        entry = stations.setdefault(path.parent.name, {"id": path.parent.name,
                                                       "name": summary.get("name") or path.parent.name,
                                                       "days": []})
        summary["href"] = f"{path.parent.name}/{path.name}"
        entry["days"].append(summary)
    for entry in stations.values():
        entry["days"].sort(key=lambda s: s["day"], reverse=True)
    generated = (generated_at or pd.Timestamp.now(tz="UTC")).tz_convert("UTC")
    return _environment().get_template("report_index.html").render(
        stations=sorted(stations.values(), key=lambda e: e["name"].lower()),
        caution=CAUTION,
        generated=generated.strftime("%Y-%m-%d %H:%M UTC"),
    )


def write_index(folder: Path, generated_at: pd.Timestamp | None = None) -> Path:
    """Write ``<folder>/index.html`` over all reports in the folder."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "index.html"
    _write_atomic(path, render_index_html(folder, generated_at))
    return path


def prune_reports(folder: Path, keep_days: int, today: dt.date) -> list[Path]:
    """Delete reports older than ``keep_days`` before ``today``; 0 keeps all. Returns what went."""
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


__all__: Iterable[str] = [
    "AlertEpisodeRow", "AlertLevel", "BarometerPart", "CAUTION", "HighWaterForecast", "Verified", "VerificationRow", "StaffCheck", "ConstantsInfo", "ConstituentRow", "DayFigures",
    "DayReport", "Delivery", "Diagnostic", "QcEpisode", "RejectRow", "ReportEmail",
    "ReportSettings", "TideRow", "day_bounds", "day_figures", "empty_samples", "prune_reports",
    "read_summary", "render_day_email", "render_day_html", "render_index_html",
    "report_path", "report_settings_from", "write_day_report", "write_index", "zone_label",
]
