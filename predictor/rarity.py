"""How rare is this level, in words: a return-level curve read the other way.

A return-level curve with its band (``period``, ``level``, ``lower``, ``upper``, as
:meth:`predictor.extremes.GevFit.curve` gives it) answers "what level has a T-year return
period"; the same curve read the other way answers "what is the return period of this level",
and its band read the other way is the period's range (the upper band reaches the level at
the shortest plausible period, the lower band at the longest; Coles 2001, sec. 2.6.6: a
profile-likelihood interval is the set of values the data do not reject, whichever way it is
parameterised). :func:`period_of_level` does the reading by interpolation in the logarithm of
the period, :func:`rarity_words` says it in words for reports and live pages:

    "about a 1-in-20-year level, range 1-in-8 to 1-in-90 years"

Pure functions, no I/O; levels in metres on whatever datum the curve is on.

References
----------
Coles, S. (2001). An Introduction to Statistical Modeling of Extreme Values. Springer
(sec. 3.1.3 and 4.3.3, return levels and periods; sec. 2.6.6, profile likelihood).
"""
from __future__ import annotations

import math
from typing import Mapping

import numpy as np

__all__ = ["period_of_level", "rarity_words", "round_period", "COMMON_PERIOD"]

#: Below this return period [year] a level is one reached in most years: words, no number.
COMMON_PERIOD = 1.5


def _column(curve, name: str) -> np.ndarray:
    if isinstance(curve, Mapping):
        values = curve[name]
    else:  # a DataFrame
        values = curve[name].to_numpy()
    return np.asarray(values, dtype=float)


def period_of_level(level: float, curve) -> tuple[float, float, float]:
    """Return period of ``level`` and its range, read from a return-level curve.

    Parameters
    ----------
    level : float
        Level [m], on the curve's datum.
    curve : pandas.DataFrame or mapping
        Columns (or keys) ``period`` [year], ``level``, ``lower``, ``upper`` [m], periods
        increasing, at least two rows.

    Returns
    -------
    (period, shortest, longest) : tuple of float
        Return period [year] and its range [year]. ``inf`` beyond the curve's last period
        (the curve says only "rarer than that"); 1.0 for a level at or below the curve's first
        row (start the curve at 2 years or less: such a level is then reached in most years).

    References
    ----------
    Coles (2001), sec. 2.6.6 (an interval read under another parameterisation).
    """
    p = _column(curve, "period")
    if p.size < 2 or np.any(np.diff(p) <= 0) or np.any(p <= 1.0):
        raise ValueError("a return-level curve needs two or more increasing periods above 1 year")
    logp = np.log(p)

    def read(col: str) -> float:
        z = _column(curve, col)
        ok = np.isfinite(z)
        zz, lp = z[ok], logp[ok]
        if zz.size == 0:
            return math.inf if col == "lower" else 1.0
        zz = np.maximum.accumulate(zz)              # a curve never falls with the period
        if level > zz[-1]:
            return math.inf
        if level <= zz[0]:
            return 1.0
        return float(np.exp(np.interp(level, zz, lp)))

    return read("level"), read("upper"), read("lower")


def round_period(years: float) -> str:
    """A return period in words' numbers: 1-2 significant figures (``"20"``, ``"150"``)."""
    if not math.isfinite(years):
        return "inf"
    if years < 10:
        return f"{years:.0f}" if years >= 1.95 else f"{years:.1f}".rstrip("0").rstrip(".")
    digits = 10 ** (int(math.log10(years)) - 1)
    return f"{round(years / digits) * digits:.0f}"


def rarity_words(level: float, curve, datum: str = "") -> str:
    """``level`` as "about a 1-in-N-year level, range A to B" (for reports and live pages).

    Parameters
    ----------
    level : float
        The level [m], on the curve's datum.
    curve : pandas.DataFrame or mapping
        Return-level curve with its band (see :func:`period_of_level`).
    datum : str
        The datum's name in words, said after the level when given.

    Returns
    -------
    str
        One phrase; a level reached in most years, or one beyond the curve, said so instead
        of a number the record cannot give.

    Examples
    --------
    >>> curve = {"period": [2, 10, 100], "level": [4.0, 4.3, 4.6],
    ...          "lower": [3.95, 4.2, 4.4], "upper": [4.05, 4.4, 4.9]}
    >>> rarity_words(4.3, curve)
    '4.30 m: about a 1-in-10-year level, range 1-in-6 to 1-in-32 years'
    """
    period, shortest, longest = period_of_level(level, curve)
    top = float(_column(curve, "period")[-1])
    at = f"{level:.2f} m{(' ' + datum) if datum else ''}: "
    if period < COMMON_PERIOD:
        return at + "an ordinary high for this station, reached in most years"
    if not math.isfinite(period):
        return (at + f"beyond the 1-in-{round_period(top)}-year level of this station's record: "
                "rarer than the record can say")
    lo = "1-in-1" if shortest < COMMON_PERIOD else f"1-in-{round_period(shortest)}"
    hi = f"rarer than 1-in-{round_period(top)}" if not math.isfinite(longest) else \
        f"1-in-{round_period(longest)}"
    return at + f"about a 1-in-{round_period(period)}-year level, range {lo} to {hi} years"
