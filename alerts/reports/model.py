"""Daily station report: the data it shows (its model) and its settings.

A report covers one station and one *local* day (midnight to midnight in the station's
time zone, so 23 or 25 hours long on the days the clocks change). Everything it shows is
held in a :class:`DayReport` of plain Python and pandas values, so rendering needs no store:
``monitor.service.reporting`` fills one from the store, tests build one by hand.

Rendering (HTML file, index page, email form) is :mod:`alerts.reports.render`; the charts are
:mod:`alerts.reports.charts`. Both read this model; this module imports neither.
"""
from __future__ import annotations

import dataclasses
import datetime as dt
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd

from predictor.caution import CAUTION as CAUTION_LINE
from predictor.caution import REPORT as CAUTION
from predictor.timeutil import silences


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
    kind: str = "water"    # "water" (level, residual, forecast rules) or "gauge" (silent feed, equipment faults)

    @property
    def peak_text(self) -> str | None:
        """The peak in the rule's own unit: ``45 min`` of silence, ``2 faults``; None for metres
        (the template writes levels and residuals with the report's datum)."""
        if self.peak is None or self.unit == "m":
            return None
        if self.unit == "s":
            minutes = int(round(float(self.peak) / 60))
            h, m = divmod(minutes, 60)
            return f"{h} h {m:02d} min" if h else f"{m} min"
        n = int(round(self.peak))
        return f"{n} fault{'s' if n != 1 else ''}" if self.unit == "" else f"{self.peak:g} {self.unit}"


@dataclass(frozen=True)
class ConstituentRow:
    """One harmonic constituent in use: amplitude [m], Greenwich phase lag [deg]."""

    name: str
    amplitude: float
    phase: float
    amplitude_ci: float | None = None
    snr: float | None = None

    @property
    def resolved(self) -> bool:
        """The amplitude stands clear of its interval (the interval does not reach zero);
        without an interval, a signal-to-noise ratio of 2 or more; without either, shown."""
        if self.amplitude_ci is not None and math.isfinite(self.amplitude_ci):
            return self.amplitude > self.amplitude_ci
        if self.snr is not None and math.isfinite(self.snr):
            return self.snr >= 2.0
        return True


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

    @property
    def resolved(self) -> tuple[ConstituentRow, ...]:
        """The constituents that stand clear of the noise, largest first."""
        return tuple(sorted((c for c in self.constituents if c.resolved), key=lambda c: -c.amplitude))

    @property
    def weak(self) -> tuple[ConstituentRow, ...]:
        """The rest (too weak to tell from noise), largest first: folded away in the report."""
        return tuple(sorted((c for c in self.constituents if not c.resolved), key=lambda c: -c.amplitude))


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
    rarity: Any = None  # alerts.reports.rarity.RaritySection: how rare the day's water was, the trend


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

    ``folder`` as given in the configuration (``monitor.service.config`` resolves it against the
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


def offset_text(offset: dt.timedelta) -> str:
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
        return f"{tz}, {offset_text(first)}"
    local = grid.tz_convert(zone)
    offsets = (local.tz_localize(None) - grid.tz_localize(None)).total_seconds().to_numpy()
    changed = np.flatnonzero(offsets != offsets[0])
    if len(changed) == 0:
        return f"{tz}, {offset_text(first)}"
    i = int(changed[0])
    old_clock = (grid[i] + pd.Timedelta(seconds=float(offsets[0]))).strftime("%H:%M")
    hours = (end - start) / pd.Timedelta(hours=1)
    direction = "back" if offsets[i] < offsets[0] else "forward"
    return (
        f"{tz}, {offset_text(first)} until {old_clock}, then "
        f"{offset_text(local[i].utcoffset())} from {local[i].strftime('%H:%M')} "
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
    """Spans in [start, end) longer than two sample intervals with no sample: gaps as
    :func:`predictor.timeutil.silences` defines them, with the limit twice ``interval`` [s].

    Each gap starts when the next sample was due (one interval after the last one). A day with
    no samples at all is one gap covering the whole day.
    """
    if len(index) == 0:
        return (Gap(start, end),)
    if interval is None:
        return ()
    step = pd.Timedelta(seconds=interval)
    # A virtual sample one step before the day and one at its end, so missing data at
    # either edge counts as a gap too.
    ns = pd.DatetimeIndex(index).as_unit("ns").asi8
    before, after = silences(ns, 2 * step.value, start=(start - step).value, end=end.value)
    tz = start.tz
    return tuple(Gap(pd.Timestamp(a, tz="UTC").tz_convert(tz) + step, pd.Timestamp(b, tz="UTC").tz_convert(tz))
                 for a, b in zip(before.tolist(), after.tolist()))


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


__all__ = [
    "AlertEpisodeRow",
    "AlertLevel",
    "BarometerPart",
    "CAUTION",
    "CAUTION_LINE",
    "HighWaterForecast",
    "Verified",
    "VerificationRow",
    "StaffCheck",
    "ConstantsInfo",
    "ConstituentRow",
    "DayFigures",
    "DayReport",
    "Delivery",
    "Diagnostic",
    "QcEpisode",
    "RejectRow",
    "ReportSettings",
    "TideRow",
    "day_bounds",
    "day_figures",
    "empty_samples",
    "report_settings_from",
    "zone_label",
]
