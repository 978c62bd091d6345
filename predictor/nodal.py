"""Nodal factors f and nodal phase corrections u, and full arguments V + u.

The lunar constituents' amplitudes and phases are modulated by the 18.61-year
regression of the Moon's node (and, for L2 and M1, by the 8.85-year perigee cycle).
Each astronomical constituent uses the Schureman (1958) formula for its kind; a
compound uses ``f = prod f_parent^|c|`` and ``u = sum c u_parent``.

The numeric constants below are Schureman's (1958) equations as remembered (not
copied from the book at the time of writing): cos I = 0.91370 - 0.03569 cos N,
nu = asin(0.08968 sin N / sin I), xi = N - 2 atan(0.64412 tan(N/2)) - nu,
nu' and 2nu'' as in ``_node_terms``, and the normalising means 0.9154, 0.3800,
0.7214, 0.01640, 0.1578, 0.5021.  They are verified in ``tests/test_nodal.py``
against the published ranges of f and against Doodson's series in cos N / sin N.

L2 and M1 use Schureman's special formulas written as phasor sums:
``1/Ra e^{-iR} = 1 - 6 tan^2(I/2) e^{2iP}`` and
``1/Qa e^{iQ} = 0.5 e^{-iP} + 1.5 cos I / cos^2(I/2) e^{iP}`` with P = p - xi;
their moduli and arguments reproduce Schureman's 1/Ra, tan R, 1/Qa, tan Q (from
memory). Checked by an independent route in ``tests/test_equilibrium.py``: one-year
harmonic analyses of the equilibrium tide computed from pyerfa's Moon and Sun, in four
years spread over the 8.85-year perigee cycle, give L2 and M1 constants steady to 2 % in
amplitude and 1.5 deg in phase with these f and u (without them the phases move by more
than 10 deg). Limits: M1's f and u describe the group's two main lines only; in this
catalogue's convention M1's equilibrium amplitude comes out near 0.0056 m (the value
depends on how the group is normalised, so compare M1 between analyses made with the
same formulas). OO1's formula leaves +-9 deg and +-8 % between yearly fits of the
equilibrium tide (satellites it does not model; under 0.5 mm at mid-latitudes).

References
----------
Schureman, P. (1958). Manual of Harmonic Analysis and Prediction of Tides. US C&GS
Special Publication 98, eqs. 73-78, 140-149, 191-233 and Table 2.
Pugh, D., Woodworth, P. (2014). Sea-Level Science, Table 4.3.
"""
from __future__ import annotations

import numpy as np

from predictor.astro import astronomical_arguments
from predictor.constituents import doodson_matrix, get

__all__ = ["nodal_factors", "arguments", "node_terms", "equilibrium_arguments"]

_DAY = 86400.0


def node_terms(N_deg, p_deg=None):
    """Schureman's auxiliary angles of the lunar orbit.

    Parameters
    ----------
    N_deg : array_like
        Longitude of the Moon's ascending node N [deg] (note N = -N').
    p_deg : array_like, optional
        Longitude of the lunar perigee p [deg]; needed for P = p - xi.

    Returns
    -------
    dict of numpy.ndarray
        ``I, nu, xi, nup, nupp2`` and (with ``p_deg``) ``P``, all [rad].
        ``nup`` is nu', ``nupp2`` is 2nu''.

    References
    ----------
    Schureman, P. (1958). Special Publication 98, eqs. 191-204 (from memory).
    """
    N = np.radians(np.asarray(N_deg, dtype=float))
    cos_i = 0.91370 - 0.03569 * np.cos(N)
    I = np.arccos(cos_i)
    nu = np.arcsin(0.08968 * np.sin(N) / np.sin(I))
    # N - 2 atan(0.64412 tan(N/2)) written with atan2 so it is continuous in N.
    half = N / 2.0
    xi = N - 2.0 * np.arctan2(0.64412 * np.sin(half), np.cos(half)) - nu
    xi = np.angle(np.exp(1j * xi))
    s2i = np.sin(2.0 * I)
    nup = np.arctan2(s2i * np.sin(nu), s2i * np.cos(nu) + 0.3347)
    si2 = np.sin(I) ** 2
    nupp2 = np.arctan2(si2 * np.sin(2.0 * nu), si2 * np.cos(2.0 * nu) + 0.0727)
    out = {"I": I, "nu": nu, "xi": xi, "nup": nup, "nupp2": nupp2}
    if p_deg is not None:
        out["P"] = np.radians(np.asarray(p_deg, dtype=float)) - xi
    return out


def _kind_fu(kind: str, a: dict):
    """f [1] and u [rad] for one nodal kind from the auxiliary angles ``a``."""
    I, nu, xi = a["I"], a["nu"], a["xi"]
    one = np.ones_like(I)
    if kind == "solar":
        return one, np.zeros_like(I)
    if kind == "M2":
        return np.cos(I / 2) ** 4 / 0.9154, 2 * xi - 2 * nu
    if kind == "M3":
        return (np.cos(I / 2) ** 4 / 0.9154) ** 1.5, 3 * xi - 3 * nu
    if kind == "O1":
        return np.sin(I) * np.cos(I / 2) ** 2 / 0.3800, 2 * xi - nu
    if kind == "K1":
        s2i = np.sin(2 * I)
        f = np.sqrt(0.8965 * s2i**2 + 0.6001 * s2i * np.cos(nu) + 0.1006)
        return f, -a["nup"]
    if kind == "K2":
        si = np.sin(I)
        f = np.sqrt(19.0444 * si**4 + 2.7702 * si**2 * np.cos(2 * nu) + 0.0981)
        return f, -a["nupp2"]
    if kind == "J1":
        return np.sin(2 * I) / 0.7214, -nu
    if kind == "OO1":
        return np.sin(I) * np.sin(I / 2) ** 2 / 0.01640, -2 * xi - nu
    if kind == "Mf":
        return np.sin(I) ** 2 / 0.1578, -2 * xi
    if kind == "Mm":
        return (2.0 / 3.0 - np.sin(I) ** 2) / 0.5021, np.zeros_like(I)
    if kind == "L2":
        P = a["P"]
        z = 1.0 - 6.0 * np.tan(I / 2) ** 2 * np.exp(2j * P)  # = (1/Ra) e^{-iR}
        f_m2, u_m2 = _kind_fu("M2", a)
        return f_m2 * np.abs(z), u_m2 + np.angle(z)
    if kind == "M1":
        # Our V(M1) = tau + p + 90 carries the perigee; Schureman's carries it in Q,
        # so u here is Schureman's xi - nu + Q minus p, i.e. -nu + (Q - P).
        P = a["P"]
        # (1/Qa) e^{iQ} = 0.5 e^{-iP} + b e^{iP}; times e^{-iP} gives (1/Qa) e^{i(Q-P)}.
        z = 0.5 * np.exp(-2j * P) + 1.5 * np.cos(I) / np.cos(I / 2) ** 2
        f_o1, _ = _kind_fu("O1", a)
        return f_o1 * np.abs(z), -nu + np.angle(z)
    raise ValueError(f"no nodal formula for kind {kind!r}")


def _exact_fu(t, names):
    """f [1] and u [deg] evaluated at each time, shape (n, k)."""
    t = np.atleast_1d(np.asarray(t, dtype=float))
    args = astronomical_arguments(t)
    a = node_terms(-args[:, 4], args[:, 3])
    cache: dict[str, tuple] = {}

    def fu(name):
        c = get(name)
        if c.name in cache:
            return cache[c.name]
        if c.parents:
            f = np.ones_like(t)
            u = np.zeros_like(t)
            for parent, coef in c.parents:
                fp, up = fu(parent)
                f = f * fp ** abs(coef)
                u = u + coef * up
            res = (f, u)
        else:
            res = _kind_fu(c.nodal_kind, a)
        cache[c.name] = res
        return res

    f = np.empty((t.size, len(names)))
    u = np.empty((t.size, len(names)))
    for j, name in enumerate(names):
        fj, uj = fu(name)
        f[:, j] = fj
        u[:, j] = np.degrees(uj)
    return f, u


def nodal_factors(t, names, daily: bool | None = None):
    """Nodal factors f and nodal phase corrections u.

    Parameters
    ----------
    t : array_like
        Unix time [s], UTC, shape (n,).
    names : sequence of str
        Constituent names, length k.
    daily : bool, optional
        Evaluate f and u at each midnight and interpolate (as the phasor f e^{iu},
        so angles never wrap).  Over one day f changes by less than 1e-5 and u by
        less than 0.002 deg.  Default: daily when there are more samples than days.

    Returns
    -------
    f : numpy.ndarray
        Nodal factors [1], shape (n, k).
    u : numpy.ndarray
        Nodal phase corrections [deg], shape (n, k), in (-180, 180].

    References
    ----------
    Schureman, P. (1958). Special Publication 98.
    """
    t = np.atleast_1d(np.asarray(t, dtype=float)).ravel()
    names = list(names)
    if t.size == 0:
        return np.empty((0, len(names))), np.empty((0, len(names)))
    d0 = np.floor(np.nanmin(t) / _DAY)
    d1 = np.floor(np.nanmax(t) / _DAY) + 1.0
    ndays = int(d1 - d0) + 1
    if daily is None:
        daily = t.size > 2 * ndays
    if not daily:
        f, u = _exact_fu(t, names)
        return f, np.angle(np.exp(1j * np.radians(u)), deg=True)
    grid = (d0 + np.arange(ndays)) * _DAY
    fg, ug = _exact_fu(grid, names)
    zg = fg * np.exp(1j * np.radians(ug))
    pos = (t - grid[0]) / _DAY
    i = np.clip(np.floor(pos).astype(np.int64), 0, ndays - 2)
    w = (pos - i)[:, None]
    z = zg[i] * (1.0 - w) + zg[i + 1] * w
    return np.abs(z), np.angle(z, deg=True)


def equilibrium_arguments(t, names):
    """Equilibrium arguments V (without nodal correction) [deg], shape (n, k).

    References
    ----------
    Doodson, A. T. (1921); Foreman, M. G. G. (1977): V = sum of Doodson numbers times
    the astronomical arguments, plus the phase offset in quarter cycles.
    """
    t = np.atleast_1d(np.asarray(t, dtype=float)).ravel()
    D = doodson_matrix(names)
    args = astronomical_arguments(t)
    v = args @ D[:, :6].T + 90.0 * D[:, 6]
    return np.mod(v, 360.0)


def arguments(t, names, daily: bool | None = None):
    """Full astronomical arguments V + u and nodal factors f.

    Parameters
    ----------
    t : array_like
        Unix time [s], UTC, shape (n,).
    names : sequence of str
        Constituent names, length k.
    daily : bool, optional
        Passed to :func:`nodal_factors`.

    Returns
    -------
    v_plus_u : numpy.ndarray
        V + u [deg] in [0, 360), shape (n, k).
    f : numpy.ndarray
        Nodal factors [1], shape (n, k).

    Notes
    -----
    A constituent with amplitude H and Greenwich phase lag g contributes
    ``f H cos(V + u - g)`` to the tide.

    References
    ----------
    Schureman, P. (1958); Foreman, M. G. G. (1977).
    """
    names = list(names)
    f, u = nodal_factors(t, names, daily=daily)
    v = equilibrium_arguments(t, names)
    return np.mod(v + u, 360.0), f
