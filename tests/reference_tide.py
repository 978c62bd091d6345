"""An independent direct evaluation of the harmonic tide, for tests only.

It shares no code with ``predictor/``: the astronomical arguments come from a general-purpose
astronomy library (pyerfa: the IERS 2003 fundamental arguments), each equilibrium argument V is
written in Schureman's form with the hour angle of the mean sun T (not in the Doodson/Foreman
tau form the product uses), and the nodal factors f and corrections u come from the published
series in the longitude of the Moon's node N, typed once here. Every sample is evaluated on its
own: h = Z0 + sum f H cos(V + u - g) (Schureman 1958, sec. 32-35; Foreman 1977, eq. 1).

Sources
-------
* Fundamental arguments: IERS Conventions (2003) as implemented by pyerfa (erfa.fal03,
  falp03, faf03, fad03, faom03); s = F + Omega, h = s - D, p = s - l, N = Omega, p1 = h - l'
  (identities of the Delaunay arguments).
* V in terms of T = 180 deg + 15 deg/h x UT, s, h, p, p1: Schureman (1958), Table 2 (from
  memory).
* f and u: Doodson's series in N as given by Pugh & Woodworth (2014), Table 4.3, and Pugh
  (1987), Table 4.3, four-decimal values (from memory). The lunar semidiurnal constituents
  N2, 2N2, NU2, MU2 share M2's terms and Q1, 2Q1 share O1's (Schureman 1958, formulas 75
  and 78); compounds multiply their parents' f and add their u (Schureman 1958, sec. 95).
* Time convention: the mean-element polynomials are evaluated at UTC, Delta-T ignored, as the
  design notes fix for the product (predictor/astro.py says why); taking TT instead would move
  M2's phase by 0.02 deg, a fraction of a millimetre.
"""
from __future__ import annotations

import numpy as np

import erfa

DAY = 86400.0
HOUR = 3600.0

#: Doodson's series (Pugh & Woodworth 2014, Table 4.3, from memory): f = sum_k a_k cos(kN),
#: u = sum_k b_k sin(kN) [deg], k from 0 for f and from 1 for u.
NODAL_SERIES = {
    "M2": ([1.0004, -0.0373, 0.0002], [-2.14]),
    "K1": ([1.0060, 0.1150, -0.0088, 0.0006], [-8.86, 0.68, -0.07]),
    "O1": ([1.0089, 0.1871, -0.0147, 0.0014], [10.80, -1.34, 0.19]),
    "K2": ([1.0241, 0.2863, 0.0083, -0.0015], [-17.74, 0.68, -0.04]),
    "Mf": ([1.0429, 0.4135, -0.0040], [-23.74, 2.68, -0.38]),
    "Mm": ([1.0000, -0.1300, 0.0013], []),
    "solar": ([1.0], []),
}

#: V [deg] as a function of the argument dict (Schureman 1958, Table 2, from memory), and the
#: series its f and u follow (a name of NODAL_SERIES, or a compound as ((name, power), ...)).
SCHUREMAN_V = {
    "Sa": (lambda a: a["h"], "solar"),
    "Ssa": (lambda a: 2 * a["h"], "solar"),
    "Mm": (lambda a: a["s"] - a["p"], "Mm"),
    "Mf": (lambda a: 2 * a["s"], "Mf"),
    "Q1": (lambda a: a["T"] - 3 * a["s"] + a["h"] + a["p"] + 90.0, "O1"),
    "2Q1": (lambda a: a["T"] - 4 * a["s"] + a["h"] + 2 * a["p"] + 90.0, "O1"),
    "O1": (lambda a: a["T"] - 2 * a["s"] + a["h"] + 90.0, "O1"),
    "P1": (lambda a: a["T"] - a["h"] + 90.0, "solar"),
    "K1": (lambda a: a["T"] + a["h"] - 90.0, "K1"),
    "2N2": (lambda a: 2 * a["T"] - 4 * a["s"] + 2 * a["h"] + 2 * a["p"], "M2"),
    "MU2": (lambda a: 2 * a["T"] - 4 * a["s"] + 4 * a["h"], "M2"),
    "N2": (lambda a: 2 * a["T"] - 3 * a["s"] + 2 * a["h"] + a["p"], "M2"),
    "NU2": (lambda a: 2 * a["T"] - 3 * a["s"] + 4 * a["h"] - a["p"], "M2"),
    "M2": (lambda a: 2 * a["T"] - 2 * a["s"] + 2 * a["h"], "M2"),
    "T2": (lambda a: 2 * a["T"] - a["h"] + a["p1"], "solar"),
    "S2": (lambda a: 2 * a["T"], "solar"),
    "K2": (lambda a: 2 * a["T"] + 2 * a["h"], "K2"),
    "M4": (lambda a: 4 * a["T"] - 4 * a["s"] + 4 * a["h"], (("M2", 2),)),
    "MN4": (lambda a: 4 * a["T"] - 5 * a["s"] + 4 * a["h"] + a["p"], (("M2", 2),)),
    "MS4": (lambda a: 4 * a["T"] - 2 * a["s"] + 2 * a["h"], (("M2", 1),)),
    "M6": (lambda a: 6 * a["T"] - 6 * a["s"] + 6 * a["h"], (("M2", 3),)),
    "2MS6": (lambda a: 6 * a["T"] - 4 * a["s"] + 4 * a["h"], (("M2", 2),)),
}


def arguments(t) -> dict:
    """Schureman's T and the mean longitudes s, h, p, p1 and the node N [deg] at Unix times t."""
    t = np.atleast_1d(np.asarray(t, dtype=float))
    T_cent = (2440587.5 + t / DAY - 2451545.0) / 36525.0  # Julian centuries (UTC taken as TT)
    l, lp, F, D, Om = (np.degrees(fn(T_cent))
                       for fn in (erfa.fal03, erfa.falp03, erfa.faf03, erfa.fad03, erfa.faom03))
    s = F + Om
    h = s - D
    ut_hours = np.mod(t, DAY) / HOUR
    return {"T": 180.0 + 15.0 * ut_hours, "s": s, "h": h, "p": s - l, "p1": h - lp, "N": Om}


def series(name: str, N_deg) -> tuple[np.ndarray, np.ndarray]:
    """f [1] and u [deg] of one NODAL_SERIES entry at node longitudes N [deg]."""
    fa, ub = NODAL_SERIES[name]
    N = np.radians(np.asarray(N_deg, dtype=float))
    f = sum(a * np.cos(k * N) for k, a in enumerate(fa))
    u = sum(b * np.sin((k + 1) * N) for k, b in enumerate(ub)) + 0.0 * N
    return f, u


def nodal(name: str, N_deg) -> tuple[np.ndarray, np.ndarray]:
    """f [1] and u [deg] of a constituent of SCHUREMAN_V."""
    rule = SCHUREMAN_V[name][1]
    if isinstance(rule, str):
        return series(rule, N_deg)
    f, u = 1.0, 0.0
    for parent, power in rule:
        fp, up = series(parent, N_deg)
        f, u = f * fp**power, u + power * up
    return f, u


def tide(t, mean: float, constants: dict) -> np.ndarray:
    """Level [m] at Unix times t [s] from ``{name: (amplitude [m], phase lag g [deg])}``."""
    a = arguments(t)
    level = np.full(a["T"].shape, float(mean))
    for name, (H, g) in constants.items():
        V = SCHUREMAN_V[name][0](a)
        f, u = nodal(name, a["N"])
        level = level + f * H * np.cos(np.radians(V + u - g))
    return level



#: How far this evaluation may stand from Schureman's closed forms (which the product uses), per
#: metre of amplitude [m/m]: the published series carry 4 decimals in f and 0.01 deg in u and
#: stop at 3N, which leaves them 0.0002-0.0006 in f and 0.01-0.05 deg in u from the closed
#: forms for the M2, K1 and O1 families (measured in tests/test_nodal.py), so 1 mm per metre;
#: Mf's and K2's series stand further off (0.0006 and 0.0017 in f, 0.09 and 0.11 deg in u),
#: so 3 mm per metre. Compounds add their parents'. Solar constituents have no nodal terms.
SERIES_TOL = {"solar": 0.05e-3, "M2": 1e-3, "K1": 1e-3, "O1": 1e-3, "Mm": 1e-3, "Mf": 3e-3, "K2": 3e-3}


def tolerance(name: str) -> float:
    """Largest difference from the closed forms per metre of amplitude [m/m] (SERIES_TOL)."""
    rule = SCHUREMAN_V[name][1]
    if isinstance(rule, str):
        return SERIES_TOL[rule]
    return sum(power * SERIES_TOL[parent] for parent, power in rule)
