"""Nodal factors f and corrections u.

Sources (all quoted from memory):
* ranges over the 18.61-year cycle: Schureman (1958) Table 14 / Pugh & Woodworth
  (2014) Table 4.3: f(M2) 0.963..1.038, f(K1) 0.88..1.11, f(O1) 0.81..1.18,
  u(M2) about +-2.1 deg;
* series in N (the node's longitude): Doodson (1928) as given in Pugh & Woodworth
  (2014), Table 4.3, typed once in tests/reference_tide.py (NODAL_SERIES) with N from
  pyerfa's IERS 2003 fundamental argument Omega, not from predictor.astro. The series
  are truncated, hence the tolerances.
"""
import numpy as np
import pytest

import reference_tide as ref
from predictor.astro import astronomical_arguments
from predictor.nodal import arguments, equilibrium_arguments, nodal_factors
from units import degree

DAY = 86400.0
# one full nodal cycle, daily, from 2001-01-01
T_CYCLE = 978307200.0 + DAY * np.arange(0, int(18.62 * 365.25))


@pytest.fixture(scope="module")
def cycle():
    names = ["M2", "K1", "O1"]
    f, u = nodal_factors(T_CYCLE, names, daily=False)
    N = ref.arguments(T_CYCLE)["N"]  # [deg], pyerfa
    return dict(zip(names, f.T)), dict(zip(names, u.T)), N


@pytest.mark.parametrize("name,lo,hi,tol", [
    ("M2", 0.963, 1.038, 0.001),
    ("K1", 0.88, 1.11, 0.005),
    ("O1", 0.81, 1.18, 0.006),
])
def test_f_range_over_nodal_cycle(cycle, name, lo, hi, tol):
    f = cycle[0][name]  # Schureman / Pugh & Woodworth ranges, from memory
    assert f.min() == pytest.approx(lo, abs=tol)
    assert f.max() == pytest.approx(hi, abs=tol)


def test_u_m2_range_over_nodal_cycle(cycle):
    u = cycle[1]["M2"]  # about +-2.1 deg (Pugh & Woodworth 2014, from memory)
    assert u.max() == pytest.approx(2.14, abs=0.05 * degree)
    assert u.min() == pytest.approx(-2.14, abs=0.05 * degree)


@pytest.mark.parametrize("name,tol", [("M2", 0.0005), ("K1", 0.0005), ("O1", 0.0008)])
def test_f_matches_doodson_series(cycle, name, tol):
    f, _, N = cycle
    assert np.max(np.abs(f[name] - ref.series(name, N)[0])) < tol


@pytest.mark.parametrize("name,tol", [("M2", 0.02 * degree), ("K1", 0.03 * degree), ("O1", 0.06 * degree)])
def test_u_matches_doodson_series(cycle, name, tol):
    _, u, N = cycle
    assert np.max(np.abs(u[name] - ref.series(name, N)[1])) < tol


def test_compound_f_and_u_follow_parents():
    # Schureman (1958): f(MS4) = f(M2) f(S2) = f(M2); u(2MK3) = 2 u(M2) - u(K1).
    t = np.array([1.2e9, 1.5e9])
    f, u = nodal_factors(t, ["M2", "K1", "MS4", "2MK3", "M4"], daily=False)
    assert np.allclose(f[:, 2], f[:, 0])
    assert np.allclose(f[:, 3], f[:, 0] ** 2 * f[:, 1])
    assert np.allclose(u[:, 3], 2 * u[:, 0] - u[:, 1])
    assert np.allclose(u[:, 4], 2 * u[:, 0])


def test_daily_interpolation_matches_exact():
    # Over a day f and u change by far less than the precision any gauge resolves.
    names = ["M2", "K1", "O1", "K2", "L2", "M1", "Mf", "2MK3"]
    t = 1.4e9 + np.arange(0, 40 * DAY, 600.0)
    f0, u0 = nodal_factors(t, names, daily=False)
    f1, u1 = nodal_factors(t, names, daily=True)
    assert np.max(np.abs(f1 - f0)) < 1e-5
    assert np.max(np.abs((u1 - u0 + 180) % 360 - 180)) < 0.005 * degree


def test_arguments_are_v_plus_u():
    t = np.array([1.3e9])
    vu, f = arguments(t, ["M2", "O1"])
    v = equilibrium_arguments(t, ["M2", "O1"])
    _, u = nodal_factors(t, ["M2", "O1"])
    assert np.allclose((vu - v - u + 180) % 360 - 180, 0.0, atol=1e-9)


def test_m2_argument_is_twice_lunar_time():
    # Foreman (1977) convention: V(M2) = 2 tau.
    t = np.array([1.0e9, 2.0e9])
    tau = astronomical_arguments(t)[:, 0]
    assert np.allclose(equilibrium_arguments(t, ["M2"])[:, 0], (2 * tau) % 360, atol=1e-9)


def test_all_catalogue_factors_finite_and_positive():
    from predictor.constituents import CATALOGUE

    f, u = nodal_factors(T_CYCLE[::30], list(CATALOGUE), daily=False)
    assert np.all(np.isfinite(f)) and np.all(f > 0) and np.all(np.isfinite(u))
