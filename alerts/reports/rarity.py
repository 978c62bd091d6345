"""The daily report's "how rare was today's water" part: its data and its two charts.

:class:`RaritySection` is what :mod:`monitor.service.extremes` hands the report (levels on
the report's datum); :func:`return_level_chart` draws both routes' return-level curves with
their 95 % bands and the day's highest water; :func:`sea_level_chart` draws the monthly means
(seasonal cycle removed, datum steps corrected) with the fitted trend. PNG bytes through
matplotlib's Agg backend, like :mod:`alerts.reports.charts`; colours paired with line styles.

References
----------
Coles, S. (2001). An Introduction to Statistical Modeling of Extreme Values. Springer
(return-level plots on a logarithmic period axis, sec. 3.3.3).
"""
from __future__ import annotations

import io
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from alerts.reports.charts import LEVEL_ABOVE, OBSERVED, PREDICTED, RESIDUAL, _naive_utc

__all__ = ["RaritySection", "return_level_chart", "sea_level_chart"]


@dataclass(frozen=True)
class RaritySection:
    """How rare the day's highest water was, and the sea-level trend, for the report.

    Attributes
    ----------
    words : str or None
        "today's highest water ...: about a 1-in-N-year level, range A to B" (None without
        a usable curve; then ``note`` says why).
    note : str
        The record behind it, the route the words read, when it was computed, warnings.
    trend_words : str or None
        The sea-level trend in one sentence, with its error and method.
    highest : float or None
        The day's highest QC-passed water [m, report datum].
    curves : mapping
        Route name -> ``{"period": [...], "level": [...], "lower": [...], "upper": [...]}``
        [year, m]; ``upper`` None where the band has no upper end.
    monthly : mapping or None
        ``{"month": [ISO...], "adjusted_m": [...], "trend_m": [...]}`` for the trend chart.
    """

    words: str | None
    note: str
    trend_words: str | None = None
    highest: float | None = None
    curves: Mapping[str, Mapping[str, Sequence]] = field(default_factory=dict)
    monthly: Mapping[str, Sequence] | None = None


def _png(fig) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", metadata={"Software": None})
    return buffer.getvalue()


_STYLES = {"joint probability": (OBSERVED, "-"), "annual maxima": (RESIDUAL, "--")}


def return_level_chart(section: RaritySection, datum: str, dpi: int = 110) -> bytes | None:
    """Return level against return period (log axis) for each route, 95 % bands shaded."""
    if not section.curves:
        return None
    fig = Figure(figsize=(6.4, 3.8), dpi=dpi, layout="tight")
    ax = fig.subplots()
    for name, c in section.curves.items():
        colour, style = _STYLES.get(name, (PREDICTED, ":"))
        p = np.asarray(c["period"], dtype=float)
        z = np.asarray(c["level"], dtype=float)
        lo = np.asarray(c["lower"], dtype=float)
        hi = np.array([np.nan if v is None else v for v in c["upper"]], dtype=float)
        ax.plot(p, z, color=colour, linestyle=style, linewidth=1.6, label=f"{name} (95 % band shaded)")
        ax.fill_between(p, lo, np.where(np.isfinite(hi), hi, np.nanmax(np.r_[hi, z]) + 0.5),
                        color=colour, alpha=0.15, linewidth=0)
    if section.highest is not None:
        ax.axhline(section.highest, color=LEVEL_ABOVE, linestyle="-.", linewidth=1.2,
                   label=f"the day's highest water, {section.highest:.2f} m")
    ax.set_xscale("log")
    ax.set_xlabel("return period [years]", fontsize=8)
    ax.set_ylabel(f"level [m above {datum}]", fontsize=8)
    ax.tick_params(labelsize=7)
    top = max(float(np.nanmax(np.asarray(c["level"], dtype=float))) for c in section.curves.values())
    bottom = min(float(np.nanmin(np.asarray(c["lower"], dtype=float))) for c in section.curves.values())
    if section.highest is not None:
        top, bottom = max(top, section.highest), min(bottom, section.highest)
    span = max(top - bottom, 0.1)
    ax.set_ylim(bottom - 0.1 * span, top + 0.35 * span)
    ax.grid(True, color="#eeeeee", which="both")
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=7, loc="upper left", frameon=False)
    return _png(fig)


def sea_level_chart(section: RaritySection, datum: str, dpi: int = 110) -> bytes | None:
    """Monthly mean sea level (seasonal cycle removed, steps corrected) and the trend line."""
    m = section.monthly
    if not m or len(m.get("month", ())) < 2:
        return None
    t = _naive_utc(pd.DatetimeIndex(pd.to_datetime(list(m["month"]), utc=True)))
    fig = Figure(figsize=(6.4, 3.0), dpi=dpi, layout="tight")
    ax = fig.subplots()
    ax.plot(t, np.asarray(m["adjusted_m"], dtype=float), color=PREDICTED, linewidth=0.8, marker=".",
            markersize=2.5, label="monthly mean (seasonal cycle removed, datum steps corrected)")
    ax.plot(t, np.asarray(m["trend_m"], dtype=float), color=OBSERVED, linewidth=1.8,
            label="fitted trend (with the nodal term when fitted)")
    ax.set_ylabel(f"m above {datum}", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.grid(True, color="#eeeeee")
    ax.spines[["top", "right"]].set_visible(False)
    ax.legend(fontsize=7, loc="upper left", frameon=False)
    return _png(fig)
