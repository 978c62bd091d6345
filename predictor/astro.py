"""Astronomical arguments of the tide: tau, s, h, p, N' and p1.

The six arguments are the mean longitudes (and the lunar time) from which every
constituent's equilibrium argument V is built by integer (Doodson) coefficients.

Conventions
-----------
* Time is Unix seconds, UTC.  The polynomials are in Terrestrial Time; we feed them
  UTC directly and ignore delta-T (about 69 s today).  That shifts the Moon's mean
  longitude by about 0.01 deg, i.e. 0.02 deg of M2 phase, which is far below what
  any gauge resolves, and prediction and analysis use the same convention so it
  cancels.  This is the usual practice of tidal analysis packages, which work in UT.
* tau is the mean lunar time counted from lower transit:
  ``tau = 15 deg * (UT hours since midnight) + h - s``, so that V(M2) = 2 tau,
  V(K1) = tau + s + 90 deg and V(O1) = tau - s - 90 deg (Foreman 1977).
* N' = -N, the negative of the longitude of the Moon's ascending node, so every
  argument increases with time.

References
----------
Meeus, J. (1998). Astronomical Algorithms, 2nd ed., ch. 47 (mean elements of the Moon)
and ch. 25 (Sun).  Simon, J. L., et al. (1994). Numerical expressions for precession
formulae and mean elements for the Moon and the planets. A&A 282, 663-683.
Foreman, M. G. G. (1977, rev. 2004). Manual for Tidal Heights Analysis and Prediction.
Pacific Marine Science Report 77-10.
"""
from __future__ import annotations

import numpy as np

__all__ = [
    "ARGUMENT_NAMES",
    "ARGUMENT_RATES",
    "astronomical_arguments",
    "julian_centuries",
    "UNIX_J2000",
]

ARGUMENT_NAMES = ("tau", "s", "h", "p", "Np", "p1")

# Unix time of J2000.0 (2000-01-01 12:00 TT), taken here as UTC (delta-T ignored).
UNIX_J2000 = 946728000.0
_SECONDS_PER_CENTURY = 36525.0 * 86400.0
_HOURS_PER_CENTURY = 36525.0 * 24.0

# Mean elements in degrees, polynomials in T (Julian centuries from J2000), Meeus (1998)
# eqs. 47.1-47.7 (after Chapront-Touze & Chapront / Simon et al. 1994).  Coefficients of
# T^0, T^1, T^2, T^3, T^4.
_L_MOON = (218.3164477, 481267.88123421, -0.0015786, 1.0 / 538841.0, -1.0 / 65194000.0)
_D_ELONG = (297.8501921, 445267.1114034, -0.0018819, 1.0 / 545868.0, -1.0 / 113065000.0)
_M_SUN = (357.5291092, 35999.0502909, -0.0001536, 1.0 / 24490000.0, 0.0)
_M_MOON = (134.9633964, 477198.8675055, 0.0087414, 1.0 / 69699.0, -1.0 / 14712000.0)
_OMEGA = (125.0445479, -1934.1362891, 0.0020754, 1.0 / 467441.0, -1.0 / 60616000.0)


def _poly(c, T):
    return c[0] + T * (c[1] + T * (c[2] + T * (c[3] + T * c[4])))


def _diff(a, b):
    return tuple(x - y for x, y in zip(a, b))


# s  = mean longitude of the Moon
# h  = mean longitude of the Sun = s - D
# p  = longitude of the lunar perigee = s - M(moon)
# N  = longitude of the Moon's ascending node = Omega;  N' = -N
# p1 = longitude of the solar perigee = h - M(sun)
_S = _L_MOON
_H = _diff(_L_MOON, _D_ELONG)
_P = _diff(_L_MOON, _M_MOON)
_NP = tuple(-c for c in _OMEGA)
_P1 = _diff(_H, _M_SUN)

#: Rates of the arguments at J2000 in degrees per (mean solar) hour, in the order
#: tau, s, h, p, N', p1.  Derived from the linear terms above, never typed in.
ARGUMENT_RATES = np.array(
    [
        15.0 + (_H[1] - _S[1]) / _HOURS_PER_CENTURY,
        _S[1] / _HOURS_PER_CENTURY,
        _H[1] / _HOURS_PER_CENTURY,
        _P[1] / _HOURS_PER_CENTURY,
        _NP[1] / _HOURS_PER_CENTURY,
        _P1[1] / _HOURS_PER_CENTURY,
    ]
)


def julian_centuries(t):
    """Julian centuries from J2000.0.

    Parameters
    ----------
    t : array_like
        Unix time [s], UTC (delta-T ignored).

    Returns
    -------
    numpy.ndarray
        T [Julian centuries of 36525 days].
    """
    return (np.asarray(t, dtype=float) - UNIX_J2000) / _SECONDS_PER_CENTURY


def astronomical_arguments(t):
    """Astronomical arguments tau, s, h, p, N', p1 at the given times.

    Parameters
    ----------
    t : array_like
        Unix time [s], UTC, any shape.

    Returns
    -------
    numpy.ndarray
        Shape ``t.shape + (6,)``: tau, s, h, p, N', p1 [deg], each reduced to [0, 360).

    Notes
    -----
    tau is computed from UT hours since midnight (``15 deg/h``) plus h - s, so that
    the Doodson argument of M2 is 2 tau (Foreman 1977 convention).

    References
    ----------
    Meeus, J. (1998). Astronomical Algorithms, 2nd ed., eqs. 47.1-47.7.
    Simon, J. L., et al. (1994). A&A 282, 663-683.
    Foreman, M. G. G. (1977). Pacific Marine Science Report 77-10.
    """
    t = np.asarray(t, dtype=float)
    T = julian_centuries(t)
    s = _poly(_S, T)
    h = _poly(_H, T)
    p = _poly(_P, T)
    np_ = _poly(_NP, T)
    p1 = _poly(_P1, T)
    # UT angle of the mean sun from midnight; the modulo keeps full float precision.
    ut_angle = np.mod(t, 86400.0) * (360.0 / 86400.0)
    tau = ut_angle + h - s
    out = np.stack([tau, s, h, p, np_, p1], axis=-1)
    return np.mod(out, 360.0)
