"""Astronomical arguments against pyerfa's IERS 2003 fundamental arguments.

Source: IERS Conventions (2003), fundamental arguments as implemented by pyerfa
(erfa.fal03, falp03, faf03, fad03, faom03) and the IAU 2006 mean sidereal time
(erfa.gmst06).  Relations used: s = F + Omega, h = s - D, p = s - l, N = Omega,
p1 = h - l' (standard identities of the Delaunay arguments).
"""
import numpy as np
import pytest
from units import degree

erfa = pytest.importorskip("erfa")

from predictor.astro import ARGUMENT_RATES, astronomical_arguments, julian_centuries

# 1900-01-01, 1970-01-01, 2014-03-17, 2050-01-01, 2099-12-31 17:00 UTC
DATES = np.array([-2208988800.0, 0.0, 1395014567.0, 2524608000.0, 4102419600.0])


def _wrap(d):
    return (np.asarray(d) + 180.0) % 360.0 - 180.0


def _erfa_arguments(t_unix):
    T = julian_centuries(t_unix)
    out = []
    for tc in np.atleast_1d(T):
        l, lp = np.degrees(erfa.fal03(tc)), np.degrees(erfa.falp03(tc))
        F, D, Om = np.degrees(erfa.faf03(tc)), np.degrees(erfa.fad03(tc)), np.degrees(erfa.faom03(tc))
        s = F + Om
        h = s - D
        out.append([s, h, s - l, -Om, h - lp])
    return np.array(out)


@pytest.mark.parametrize("column,label", [(1, "s"), (2, "h"), (3, "p"), (4, "N'"), (5, "p1")])
def test_mean_elements_match_iers_fundamental_arguments(column, label):
    # pyerfa (IERS 2003): agreement to 1e-3 deg over 1900..2100.
    ours = astronomical_arguments(DATES)[:, column]
    ref = _erfa_arguments(DATES)[:, column - 1]
    assert np.max(np.abs(_wrap(ours - ref))) < 1e-3 * degree, label


def test_tau_is_lunar_time_from_greenwich_sidereal_time():
    # pyerfa gmst06: tau = 15 UT + h - s = GMST + 180 deg - s, since the mean sun's
    # hour angle is 15 UT - 180 deg.  The mean sun's right ascension differs from h by
    # the aberration constant (20.5" = 0.0057 deg), hence 0.01 deg.
    args = astronomical_arguments(DATES)
    jd = 2440587.5 + DATES / 86400.0
    gmst = np.degrees([erfa.gmst06(j, 0.0, j, 0.0) for j in jd])
    assert np.max(np.abs(_wrap(args[:, 0] - (gmst + 180.0 - args[:, 1])))) < 0.01 * degree


def test_rates_are_time_derivatives_of_arguments():
    # Finite difference over one day of the polynomials themselves.
    t0 = np.array([1.0e9])
    a0 = astronomical_arguments(t0)[0]
    a1 = astronomical_arguments(t0 + 86400.0)[0]
    rate = _wrap(a1 - a0) / 24.0
    rate[0] = _wrap(a1[0] - a0[0] + 0.0) / 24.0 + 15.0  # tau turns ~347 deg a day
    assert np.allclose(rate, ARGUMENT_RATES, atol=1e-8)


def test_rates_match_schureman_table_1():
    # Schureman (1958) Table 1 (from memory): s 0.5490165, h 0.0410686, p 0.0046418,
    # N' 0.0022064 deg/h; tau 14.4920521 deg/h.
    ref = [14.4920521, 0.5490165, 0.0410686, 0.0046418, 0.0022064]
    assert np.allclose(ARGUMENT_RATES[:5], ref, atol=1e-7)


def test_tau_is_180_deg_at_the_moons_upper_transit():
    # pyerfa moon98 (Meeus-based lunar ephemeris) and gmst06: the true Moon's Greenwich
    # hour angle is tau - 180 deg (tau counts from lower transit) to within the Moon's
    # inequalities and the reduction to the equator (up to about 11 deg); the mean over
    # two months is within 2 deg.  A convention error would show as 90 or 180 deg.
    t = 1.6e9 + 3600.0 * 7 * np.arange(200)
    jd = 2440587.5 + t / 86400.0
    p = erfa.moon98(jd, 0.0)["p"]
    ra = np.degrees(np.arctan2(p[:, 1], p[:, 0]))
    gmst = np.degrees(erfa.gmst06(jd, 0.0, jd, 0.0))
    diff = _wrap(astronomical_arguments(t)[:, 0] - (gmst - ra + 180.0))
    assert np.max(np.abs(diff)) < 12 * degree
    assert abs(np.mean(diff)) < 2 * degree


def test_k1_argument_is_sidereal_angle_minus_90():
    # pyerfa gmst06 (IAU 2006): V(K1) = tau + s + 90 = 15 UT + h + 90 = GMST - 90 deg,
    # up to the aberration constant (0.0057 deg) in the mean sun's position.
    from predictor.nodal import equilibrium_arguments

    jd = 2440587.5 + DATES / 86400.0
    gmst = np.degrees([erfa.gmst06(j, 0.0, j, 0.0) for j in jd])
    assert np.max(np.abs(_wrap(equilibrium_arguments(DATES, ["K1"])[:, 0] - (gmst - 90.0)))) < 0.01 * degree
