"""The live snapshot of one station: a plain data model built from values passed in.

Nothing here reads a store or a clock: :mod:`monitor` gathers the values (samples of the last
48 h, the next high water forecast, open alert episodes and their messages, feed ages, quality
control counts) and :func:`build_snapshot` turns them into a :class:`Snapshot` whose levels are
all on the station's display datum. The snapshot is what the page shows, what the JSON file
holds and what ``quaywatch status`` says in its headline.

Pure helpers: :func:`rate_per_hour` (least-squares slope), :func:`mark_now` and
:func:`mark_at_high_water` (a level against one of the operator's marks), :func:`age_words`.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from alerts.live.settings import Mark
from predictor.rarity import period_of_level, rarity_words

__all__ = ["Snapshot", "MarkState", "build_snapshot", "rate_per_hour", "mark_now", "mark_at_high_water",
           "age_words", "trend_words", "rarity_line", "RATE_WINDOW", "STEADY", "CHART_HOURS", "NOT_WATER"]

#: Span over which the rate of rise or fall is fitted [s]: half an hour smooths one-minute
#: noise and seiches of a few minutes yet follows the tide (common practice, no source).
RATE_WINDOW = 1800.0
#: A rate slower than this reads "steady" [m/h] (2 cm/h, our choice: below what a person
#: at the quay would notice within the page's refresh).
STEADY = 0.02
#: Hours of record the chart shows.
CHART_HOURS = 48.0
#: Most points kept per chart series (a 48 h record at one minute is thinned to this).
CHART_POINTS = 600
#: Alert kinds that say nothing about the water (an open episode of these is no event).
NOT_WATER = ("feed_silent", "equipment_fault")


@dataclass(frozen=True)
class MarkState:
    """One of the operator's levels against a level (now, or a high water forecast).

    Attributes
    ----------
    name, side : str
        As configured (``side`` "above": the water should stay below it).
    level : float
        The mark on the display datum [m].
    margin : float or None
        How far the water stays on the safe side [m]: positive is safe, negative is past it.
        At a high water: the margin of the range's unsafe end.
    state : str
        Now: ``"clear"`` or ``"past"``. At a high water: ``"clear"`` (the whole range is safe),
        ``"could"`` (the range reaches it, the forecast does not), ``"forecast"`` (the forecast
        reaches it), ``"certain"`` (the whole range is past it).
    words : str
        The comparison in words.
    """

    name: str
    side: str
    level: float
    margin: float | None
    state: str
    words: str


@dataclass
class Snapshot:
    """Everything a live page shows of one station at one moment. Levels on the display datum [m],
    times Unix seconds UTC, rates [m/h]."""

    station: dict
    written_at: float
    now: float
    stale_after: float
    refresh: float
    last_sample_t: float | None
    stale: bool
    level: dict | None
    residual: dict | None
    marks: list = field(default_factory=list)
    marks_now: list = field(default_factory=list)
    forecast: dict | None = None
    marks_hw: list = field(default_factory=list)
    episodes: list = field(default_factory=list)
    health: dict = field(default_factory=dict)
    chart: dict = field(default_factory=dict)
    caution: str = ""
    rarity: dict | None = None

    @property
    def chart_end(self) -> float:
        """Where the chart's record ends [Unix s]: now, or the last usable sample when STALE."""
        if self.stale and self.last_sample_t is not None:
            return min(self.now, self.last_sample_t)
        return self.now

    @property
    def age(self) -> float | None:
        """Age of the last usable sample at ``now`` [s] (None without one)."""
        return None if self.last_sample_t is None else max(0.0, self.now - self.last_sample_t)

    def to_json(self) -> dict:
        """A JSON-ready dict (NaN becomes None)."""
        return _clean(asdict(self))


def _clean(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (float, np.floating)):
        return None if not math.isfinite(obj) else round(float(obj), 4)
    if isinstance(obj, np.integer):
        return int(obj)
    return obj


# --------------------------------------------------------------------------- pure helpers

def rate_per_hour(t: Any, v: Any, end: float, window: float = RATE_WINDOW) -> float | None:
    """Least-squares slope of ``v`` over the ``window`` seconds up to ``end`` [m/h].

    Parameters
    ----------
    t : array of float
        Times [Unix s].
    v : array of float
        Values [m]; NaN is left out.
    end : float
        End of the window [Unix s].
    window : float
        Length of the window [s].

    Returns
    -------
    float or None
        The slope [m/h], or None with fewer than three values or when they span less than a
        third of the window.

    References
    ----------
    Ordinary least squares of a straight line (any statistics text).
    """
    t = np.asarray(t, dtype=float)
    v = np.asarray(v, dtype=float)
    keep = (t > end - window) & (t <= end) & np.isfinite(v)
    t, v = t[keep], v[keep]
    if len(t) < 3 or t.max() - t.min() < window / 3:
        return None
    x = (t - t.mean()) / 3600.0
    return float(np.sum(x * (v - v.mean())) / np.sum(x * x))


def trend_words(rate: float | None, rising: str = "rising", falling: str = "falling") -> str:
    """``"rising 0.31 m/h"``, ``"falling 0.05 m/h"``, ``"steady"`` or ``"trend unknown"``."""
    if rate is None or not math.isfinite(rate):
        return "trend unknown"
    if abs(rate) < STEADY:
        return "steady"
    return f"{rising if rate > 0 else falling} {abs(rate):.2f} m/h"


def age_words(seconds: float | None) -> str:
    """An age in words: ``"45 s"``, ``"12 min"``, ``"2 h 05 min"``, ``"3 days 4 h"``."""
    if seconds is None or not math.isfinite(seconds):
        return "unknown"
    s = max(0, int(round(seconds)))
    if s < 120:
        return f"{s} s"
    if s < 7200:
        return f"{s // 60} min"
    if s < 2 * 86400:
        return f"{s // 3600} h {(s % 3600) // 60:02d} min"
    return f"{s // 86400} days {(s % 86400) // 3600} h"


def mark_now(level: float, mark_level: float, name: str, side: str) -> MarkState:
    """The water now against one mark (all on one datum) [m].

    ``side`` "above": the water should stay below the mark, margin = mark - level;
    "below": the water should stay above it, margin = level - mark.
    """
    margin = (mark_level - level) if side == "above" else (level - mark_level)
    if side == "above":
        words = (f"{margin:.2f} m below {name}" if margin > 0 else
                 f"at {name}" if margin == 0 else f"{-margin:.2f} m OVER {name}")
    else:
        words = (f"{margin:.2f} m above {name}" if margin > 0 else
                 f"at {name}" if margin == 0 else f"{-margin:.2f} m UNDER {name}")
    return MarkState(name=name, side=side, level=mark_level, margin=margin,
                     state="clear" if margin > 0 else "past", words=words)


def mark_at_high_water(forecast: float, lower: float, upper: float, mark_level: float, name: str,
                       side: str) -> MarkState:
    """A high water forecast and its range against one mark (all on one datum) [m].

    For a mark the water should stay below (``side`` "above") the range's top decides the
    margin; for one it should stay above, the range's bottom.
    """
    if side == "above":
        margin = mark_level - upper
        if upper < mark_level:
            state, words = "clear", f"stays below {name} by {margin:.2f} m or more"
        elif forecast < mark_level:
            state, words = "could", f"COULD REACH {name}: the range's top is {-margin:.2f} m over it"
        elif lower < mark_level:
            state, words = "forecast", f"FORECAST OVER {name} by {forecast - mark_level:.2f} m"
        else:
            state, words = "certain", f"OVER {name} across the whole range, by {lower - mark_level:.2f} m or more"
    else:
        margin = lower - mark_level
        if lower > mark_level:
            state, words = "clear", f"stays above {name} by {margin:.2f} m or more"
        elif forecast > mark_level:
            state, words = "could", f"COULD FALL TO {name}: the range's bottom is {-margin:.2f} m under it"
        elif upper > mark_level:
            state, words = "forecast", f"FORECAST UNDER {name} by {mark_level - forecast:.2f} m"
        else:
            state, words = "certain", f"UNDER {name} across the whole range, by {mark_level - upper:.2f} m or more"
    return MarkState(name=name, side=side, level=mark_level, margin=margin, state=state, words=words)


def rarity_line(peak: Mapping[str, Any], curve: Mapping[str, Any], datum: str,
                episodes: Sequence[Mapping] = ()) -> dict | None:
    """The event's highest water read off a cached return-level curve, or None outside an event.

    An event is on when an alert episode about the water is open (any kind but
    :data:`NOT_WATER`), or when the highest water stands above the curve's lowest tabulated
    return level (its first row: a level reached about once a year or less often).

    Parameters
    ----------
    peak : mapping
        ``level`` [m] on the curve's datum and sea (what is read off the curve), ``recorded``
        [m] as measured on the same datum, ``t`` [Unix s].
    curve : mapping
        ``period`` [year], ``level``, ``lower``, ``upper`` [m] (see
        :func:`predictor.rarity.period_of_level`).
    datum : str
        The display datum in words.
    episodes : sequence of mapping
        Open alert episodes (``watch``).

    Returns
    -------
    dict or None
        ``words`` ("Highest water in this event so far, X m above DATUM: about a 1-in-N-year
        level, range A to B years"), ``level``, ``recorded``, ``t``, ``period``, ``shortest``,
        ``longest`` [year], ``why`` (what made it an event).

    References
    ----------
    Coles (2001), sec. 2.6.6 (the curve read the other way, :mod:`predictor.rarity`).
    """
    level = float(peak["level"])
    lowest = np.asarray(curve["level"], dtype=float)
    water = [e for e in episodes if e.get("watch") not in NOT_WATER]
    if water:
        why = "alert open: " + ", ".join(str(e.get("rule")) for e in water)
    elif len(lowest) and np.isfinite(lowest[0]) and level > lowest[0]:
        why = f"above the 1-in-{float(curve['period'][0]):g}-year level ({lowest[0]:.2f} m)"
    else:
        return None
    period, shortest, longest = period_of_level(level, curve)
    words = "Highest water in this event so far, " + rarity_words(level, curve, f"above {datum}")
    recorded = float(peak.get("recorded", level))
    if abs(recorded - level) >= 0.005:
        words += f" (recorded {recorded:.2f} m, on the curve's sea {level:.2f} m)"
    return {"words": words, "level": level, "recorded": recorded, "t": float(peak["t"]), "period": period,
            "shortest": shortest, "longest": longest, "why": why}


# --------------------------------------------------------------------------- the snapshot

def _thin(t: np.ndarray, *cols: np.ndarray, most: int = CHART_POINTS) -> list:
    step = max(1, int(math.ceil(len(t) / most)))
    return [t[::step], *[c[::step] for c in cols]]


def _num(x: Any) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def build_snapshot(*, station: Mapping[str, Any], marks: Sequence[Mark], display_offset: float, now: float,
                   written_at: float, stale_after: float, refresh: float, last_sample_t: float | None,
                   samples: Mapping[str, Any] | None, ahead: Mapping[str, Any] | None = None,
                   forecast: Mapping[str, Any] | None = None, episodes: Sequence[Mapping] = (),
                   health: Mapping[str, Any] | None = None, caution: str = "",
                   rarity: Mapping[str, Any] | None = None) -> Snapshot:
    """Build a station's snapshot from values passed in.

    Parameters
    ----------
    station : mapping
        ``id``, ``name``, ``tz`` (IANA zone), ``datum`` (the display datum in words), ``note``.
    marks : sequence of Mark
        The operator's levels, on the station datum [m].
    display_offset : float
        Height of the display datum's zero above the station datum [m]; subtracted from every level.
    now : float
        The monitor's clock [Unix s] (the replayed clock during a replay).
    written_at : float
        Wall-clock time of writing [Unix s].
    stale_after : float
        Sample age beyond which the station is STALE [s].
    refresh : float
        Reload interval of the page [s].
    last_sample_t : float or None
        Time of the last usable primary sample [Unix s].
    samples : mapping of arrays
        The last hours: ``t`` [Unix s], ``observed``, ``predicted`` (station datum [m]),
        ``residual``, ``smoothed`` [m], usable samples only (others NaN).
    ahead : mapping of arrays, optional
        The predicted tide ahead: ``t`` [Unix s], ``predicted`` (station datum [m]).
    forecast : mapping, optional
        The next high water as the forecast made it: ``hw_t``, ``made_t`` [Unix s],
        ``predicted_high``, ``forecast``, ``lower``, ``upper`` (station datum [m]),
        ``coverage`` (0-1), ``note``.
    episodes : sequence of mapping
        Open alert episodes (``rule``, ``watch``, ``step_now``, ``top_step``, ``opened_at``,
        ``peak``, ``unit``, ``datum``, ``messages``: list of ``recipient``, ``subject``, ``status``,
        ``sent_at``, ``kind``), levels on the display datum as the engine keeps them.
    health : mapping, optional
        ``sensors``: list of ``role``, ``label``, ``kind``, ``last_t``; ``qc``: ``hours``,
        ``fail``, ``suspect``, ``total``; ``faults``: list of words.
    caution : str
        The caution text.
    rarity : mapping, optional
        The cached return-level analysis and the water it is read for: ``peak`` (``level``,
        ``recorded`` on the station datum [m], ``t``; ``level`` already on the sea of the
        curve), ``curve`` (``period``, ``level``, ``lower``, ``upper``, display datum [m]) and
        ``note`` (where the curve is from). The page's rarity line (:func:`rarity_line`) is
        said only during an event; None: no cached analysis, no line.

    Returns
    -------
    Snapshot
    """
    shift = float(display_offset)
    age = None if last_sample_t is None else now - last_sample_t
    stale = age is None or age > stale_after
    s = {k: np.asarray(v, dtype=float) for k, v in (samples or {}).items()}
    t = s.get("t", np.empty(0))
    level = residual = None
    ms_now: list = []
    if len(t):
        obs = s["observed"]
        good = np.flatnonzero(np.isfinite(obs))
        if len(good):
            i = good[-1]
            end = float(t[i])
            value = float(obs[i]) - shift
            pred = s.get("predicted")
            level = {"t": end, "value": value, "rate": rate_per_hour(t, obs, end),
                     "predicted": _num(pred[i] - shift) if pred is not None else None}
            ms_now = [mark_now(value, m.level - shift, m.name, m.side) for m in marks]
            res = s.get("residual")
            if res is not None and np.isfinite(res[i]):
                sm = s.get("smoothed")
                series = sm if sm is not None and np.isfinite(sm[i]) else res
                residual = {"t": end, "value": float(res[i]),
                            "smoothed": _num(sm[i]) if sm is not None else None,
                            "rate": rate_per_hour(t, series, end, window=2 * RATE_WINDOW)}
    fc = None
    ms_hw: list = []
    if forecast is not None and forecast.get("forecast") is not None:
        f = {k: _num(forecast.get(k)) for k in ("hw_t", "made_t", "predicted_high", "forecast", "lower",
                                                "upper", "coverage")}
        for k in ("predicted_high", "forecast", "lower", "upper"):
            if f[k] is not None:
                f[k] -= shift
        f["note"] = str(forecast.get("note") or "")
        fc = f
        if f["lower"] is not None and f["upper"] is not None:
            ms_hw = [mark_at_high_water(f["forecast"], f["lower"], f["upper"], m.level - shift, m.name, m.side)
                     for m in marks]
    chart: dict = {}
    if len(t):
        ref = min(now, last_sample_t) if (stale and last_sample_t is not None) else now
        cut = t >= ref - CHART_HOURS * 3600
        tt, ob, pr = _thin(t[cut], s["observed"][cut] - shift,
                           s.get("predicted", np.full(len(t), np.nan))[cut] - shift)
        chart = {"t": tt.tolist(), "observed": ob.tolist(), "predicted": pr.tolist()}
    if ahead is not None and len(ahead.get("t", ())):
        at = np.asarray(ahead["t"], dtype=float)
        chart["ahead_t"] = at.tolist()
        chart["ahead_predicted"] = (np.asarray(ahead["predicted"], dtype=float) - shift).tolist()
    rare = None
    if rarity is not None:
        pk = rarity["peak"]
        rare = rarity_line({"level": float(pk["level"]) - shift, "recorded": float(pk["recorded"]) - shift,
                            "t": pk["t"]}, rarity["curve"], str(station.get("datum", "")), episodes)
        if rare is not None:
            rare["note"] = str(rarity.get("note") or "")
    return Snapshot(
        station=dict(station), written_at=float(written_at), now=float(now), stale_after=float(stale_after),
        refresh=float(refresh), last_sample_t=None if last_sample_t is None else float(last_sample_t),
        stale=bool(stale), level=level, residual=residual,
        marks=[{"name": m.name, "level": m.level - shift, "side": m.side} for m in marks],
        marks_now=[asdict(m) for m in ms_now], forecast=fc, marks_hw=[asdict(m) for m in ms_hw],
        episodes=[dict(e) for e in episodes], health=dict(health or {}), chart=chart, caution=caution, rarity=rare)
