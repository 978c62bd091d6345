"""Harmonic analysis: least-squares fit of tidal constants to a record of levels.

The model is ``h(t) = Z0 [+ trend * years] + sum_k f_k(t) H_k cos(V_k(t) + u_k(t) - g_k)``.
Each constituent contributes two columns, ``f cos(V+u)`` and ``f sin(V+u)``, whose
coefficients are ``a = H cos g`` and ``b = H sin g``. The normal equations ``X'WX`` and
``X'Wy`` are accumulated over chunks of rows and solved by Cholesky after a conditioning
check. The rows are built by phasor steps, as prediction evaluates the tide: within a day
each column's phasor ``f exp(i(V+u))`` is the day's nodal coefficients times a rotation
``exp(i omega s)`` taken from a table of the sampling grid, rather than a cosine and a sine of
every argument. The residual (for the robust weights' scale, the heavy-tail check, the
spectrum of the intervals, the RMS) comes from the fitted model's fast prediction, one pass
over the record each time, summarised in bounded memory: sums, a histogram (median and MAD)
and the spectrum's cells. So a record read in chunks (:func:`harmonic_fit_chunks`) is never
held: decades of one-minute data fit in memory that does not grow with the samples.

References
----------
Foreman, M. G. G. (1977, revised 2004). Manual for Tidal Heights Analysis and Prediction.
Pacific Marine Science Report 77-10 (least squares with gaps; Rayleigh selection).
Godin, G. (1972). The Analysis of Tides. University of Toronto Press (Rayleigh criterion).
Munk, W. H., Cartwright, D. E. (1966). Phil. Trans. R. Soc. A 259 (the residual as coloured
noise in each tidal band; see :mod:`predictor.confidence`).
Leffler, K. E., Jay, D. A. (2009). Enhancing tidal harmonic analysis: robust (hybrid L1/L2)
solutions. Continental Shelf Research 29, 78-88 (IRLS with Cauchy weights).
Cartwright, D. E., Tayler, R. J. (1971); Cartwright, D. E., Edden, A. C. (1973) (equilibrium
amplitudes for inference). Pugh, D., Woodworth, P. (2014). Sea-Level Science, sec. 4.2.4.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import linalg
from scipy.linalg import blas

from predictor import confidence as _ci
from predictor import constituents as cat
from predictor import nodal as nod
from predictor.constituents import equilibrium_amplitude
from predictor.constituents import get
from predictor.errors import FitConditioningWarning, FitInputError
from predictor.model import TideModel
from predictor.timeutil import iso_utc, to_unix_seconds

__all__ = [
    "FitInputError",
    "RecordTooShortError",
    "FitConditioningWarning",
    "PRIORITY",
    "CAUCHY_TUNING",
    "harmonic_fit",
    "harmonic_fit_chunks",
    "select_constituents",
    "required_days",
    "to_unix_seconds",
    "INFERENCE_PAIRS",
    "AUTO_INFERENCE",
    "equilibrium_inference",
    "HEAVY_TAIL_SHARE",
    "HEAVY_TAIL_SIGMAS",
    "LONG_PERIOD_SNR",
]

SECONDS_PER_HOUR = 3600.0
SECONDS_PER_DAY = 86400.0
SECONDS_PER_YEAR = 365.25 * SECONDS_PER_DAY  # Julian year, the unit of the trend

# Cauchy weight tuning constant giving 95 % efficiency for Gaussian errors
# (Holland & Welsch 1977; the value used by Leffler & Jay 2009).
CAUCHY_TUNING = 2.385
# MAD / 0.6745 estimates the standard deviation of Gaussian errors (common practice).
_MAD_TO_SIGMA = 0.6745

# Order in which constituents are considered for inclusion: roughly by their typical
# amplitude at mid-latitude ports, major astronomical ones first, then minor astronomical,
# then long-period and shallow-water ones, after the ordering idea of Foreman (1977). A
# constituent is kept only if it is resolved from every one already kept. Catalogue entries
# not named here follow in catalogue order.
PRIORITY = (
    "M2", "K1", "S2", "O1", "N2", "P1", "K2", "Q1",
    "Sa", "Ssa", "M4", "Mf", "Mm", "MS4", "NU2", "L2", "MU2", "2N2", "J1", "M1", "NO1",
    "OO1", "T2", "S1", "MSf", "MN4", "M3", "S4", "M6", "2MS6", "MK3", "2Q1", "SIG1",
    "RHO1", "LDA2", "R2", "EPS2", "ETA2", "MSN2", "2SM2", "MO3", "2MK3", "SO1", "SK3",
    "M8", "2MN6", "MSK6", "SN4", "SK4", "MK4", "2MK5", "2SK5", "3MK7", "MKS2", "MNS2", "OQ2",
    "ALP1", "TAU1", "BET1", "CHI1", "PI1", "PHI1", "THE1", "PSI1", "UPS1", "SO3", "Msm",
    "Mtm", "MSqm", "S3", "2MK6", "2SM6",
)


class RecordTooShortError(FitInputError):
    """The record is too short to resolve the constituents a useful fit needs."""


# --------------------------------------------------------------------------- selection


def _catalogue():
    return cat.CATALOGUE


def _speed(c) -> float:
    return float(c.speed)


def _priority_order(catalogue) -> list[str]:
    by_upper = {name.upper(): name for name in catalogue}
    order, seen = [], set()
    for name in PRIORITY:
        real = by_upper.get(name.upper())
        if real is not None and real not in seen:
            order.append(real)
            seen.add(real)
    order += [name for name in catalogue if name not in seen]
    return order


def required_days(speed_a: float, speed_b: float, rayleigh: float = 1.0) -> float:
    """Record length needed to resolve two speeds by the Rayleigh criterion.

    Parameters
    ----------
    speed_a, speed_b : float
        Speeds [deg/h].
    rayleigh : float
        Rayleigh factor (1 is the classical criterion).

    Returns
    -------
    float
        ``rayleigh * 360 / |speed_a - speed_b|`` expressed in days [d].

    References
    ----------
    Godin (1972); Foreman (1977), section 2.
    """
    diff = abs(float(speed_a) - float(speed_b))
    if diff == 0.0:
        return math.inf
    return rayleigh * 360.0 / diff / 24.0


def select_constituents(duration_hours: float, step_hours: float | None = None,
                        rayleigh: float = 1.0, candidates=None):
    """Choose constituents resolvable in a record, by priority, Rayleigh and Nyquist.

    A constituent is kept if its speed is below the Nyquist speed of the sampling interval
    and differs from the mean (speed 0) and from every more important candidate by at least
    ``rayleigh * 360 / T`` [deg/h] -- kept or not: a candidate within the resolution of a
    larger one that the record cannot resolve would take that one's energy under its own
    name (MU2 taking N2's in a 15-27 day record). "More important" is the priority order
    (:data:`PRIORITY`, roughly the typical size at ports); the larger unresolved neighbour
    can be inferred instead (``harmonic_fit(infer=...)``).

    Parameters
    ----------
    duration_hours : float
        Record length T, last sample minus first [h].
    step_hours : float, optional
        Typical (median) sampling interval [h]; no Nyquist limit if None.
    rayleigh : float
        Rayleigh factor.
    candidates : sequence of str, optional
        Names to consider, in priority order; default the whole catalogue in
        :data:`PRIORITY` order.

    Returns
    -------
    chosen : list of str
        Names kept, in priority order.
    dropped : list of dict
        ``{"name", "reason"}`` for every candidate left out.

    References
    ----------
    Foreman (1977), section 2.1; Godin (1972).
    """
    catalogue = _catalogue()
    names = list(candidates) if candidates is not None else _priority_order(catalogue)
    nyquist = 180.0 / step_hours if step_hours else math.inf  # deg/h
    min_sep = rayleigh * 360.0 / duration_hours if duration_hours > 0 else math.inf
    chosen: list[str] = []
    # every candidate seen so far (kept or not), with the mean first
    seen_speeds: list[float] = [0.0]
    seen_names: list[str] = ["the mean"]
    dropped: list[dict] = []
    for name in names:
        s = _speed(catalogue[name])
        if s >= nyquist:
            dropped.append({"name": name, "reason": f"above the Nyquist speed {nyquist:.4g} deg/h "
                            f"of the {step_hours:.4g} h sampling"})
            continue
        seps = np.abs(np.asarray(seen_speeds) - s)
        close = np.flatnonzero(seps < min_sep)
        seen_speeds.append(s)
        seen_names.append(name)
        if close.size:
            j = int(close[0])  # the most important one it cannot be told from
            need = required_days(s, seen_speeds[j], rayleigh)
            kept = j == 0 or seen_names[j] in chosen
            dropped.append({"name": name, "reason": f"not resolved from {seen_names[j]} "
                            f"(needs {need:.2f} days)" + ("" if kept else f"; {seen_names[j]} is not "
                                                          "resolved either")})
            continue
        chosen.append(name)
    return chosen, dropped


def _too_short_message(duration_hours: float, chosen, rayleigh: float, min_constituents: int) -> str:
    catalogue = _catalogue()

    def sp(name):
        for real in catalogue:
            if real.upper() == name:
                return _speed(catalogue[real])
        return None

    parts = []
    m2, k1, o1, s2, k2 = (sp(n) for n in ("M2", "K1", "O1", "S2", "K2"))
    if m2 is not None:
        parts.append(f"{required_days(m2, 0.0, rayleigh):.2f} days for M2 alone")
        if k1 is not None:
            parts.append(f"{max(required_days(m2, k1, rayleigh), required_days(k1, 0.0, rayleigh)):.2f}"
                         " days for M2 and K1 together")
    if k1 is not None and o1 is not None:
        parts.append(f"{required_days(k1, o1, rayleigh):.2f} days to separate K1 from O1")
    if s2 is not None and k2 is not None:
        parts.append(f"{required_days(s2, k2, rayleigh):.2f} days to separate S2 from K2")
    got = ", ".join(chosen) if chosen else "nothing but the mean"
    return (f"record too short: {duration_hours / 24.0:.2f} days ({duration_hours:.1f} h) resolves "
            f"{got}, and a fit needs at least the {min_constituents} most important constituent(s); "
            f"with Rayleigh "
            f"factor {rayleigh:g} a fit needs " + ", ".join(parts))


# --------------------------------------------------------------------------- inference

#: Unresolved constituent -> resolved neighbour it is inferred from, by equilibrium ratios
#: (the usual pairs of Foreman 1977, sec. 2.3, and Pugh & Woodworth 2014, sec. 4.2.4: each
#: pair within one species and close in speed, so the ocean's response is nearly the same).
#: T2 is left out: S2 carries a radiational (weather-driven) part that T2 lacks, so their
#: equilibrium ratio is a poor guide (common practice, no source); pass it explicitly if wanted.
INFERENCE_PAIRS = {
    "P1": "K1", "K2": "S2", "NU2": "N2", "2N2": "N2", "Q1": "O1", "J1": "K1", "L2": "M2",
    "N2": "M2",
}
#: The pairs ``infer="auto"`` uses, each only when the record cannot resolve the constituent
#: from its reference: P1 from K1 and K2 from S2 (182.6 days to resolve), NU2 from N2 (205
#: days), and for the shortest useful records, 15 to 27 days, N2 from M2 and Q1 from O1 (27.6
#: days each) -- the pairs Foreman (1977, sec. 2.3) uses for short records (from memory). All
#: are large neighbours (equilibrium ratios 0.33, 0.27, 0.19, 0.19, 0.19) whose omission
#: biases their reference most, or whose place an unrelated constituent would otherwise take
#: (MU2 taking N2's). ``infer="equilibrium"`` adds 2N2, J1 and L2.
AUTO_INFERENCE = ("P1", "K2", "NU2", "N2", "Q1")


def equilibrium_inference(name: str, reference: str) -> tuple[float, float]:
    """Amplitude ratio and phase difference of two constituents in the equilibrium tide.

    Parameters
    ----------
    name, reference : str
        The constituent to infer and the resolved one it is inferred from; same species.

    Returns
    -------
    ratio : float
        ``A_name / A_reference`` [1] of the degree-2 equilibrium amplitudes.
    dphase : float
        ``g_name - g_reference`` [deg]: 0, since the catalogue's phase offsets make every
        equilibrium amplitude positive (checked against pyerfa in tests/test_equilibrium.py).

    References
    ----------
    Cartwright & Tayler (1971); Cartwright & Edden (1973) (amplitudes, from memory);
    Foreman (1977), sec. 2.3 (inference from equilibrium ratios).
    """
    a, b = get(name), get(reference)
    if a.species != b.species:
        raise FitInputError(f"cannot infer {a.name} from {b.name}: different species")
    return equilibrium_amplitude(a.name) / equilibrium_amplitude(b.name), 0.0


def _resolve_inference(infer, auto_selected: bool, names: list, dropped: list,
                       duration_h: float, rayleigh: float, step_h) -> tuple[list, list]:
    """Which constituents to infer: list of dict name/from/ratio/dphase/source."""
    if infer is None or infer is False:
        return [], dropped
    catalogue = _catalogue()
    out: list[dict] = []
    if isinstance(infer, str):
        if infer not in ("auto", "equilibrium"):
            raise FitInputError(f"infer must be 'auto', 'equilibrium', None or a mapping, got {infer!r}")
        if infer == "auto" and not auto_selected:
            return [], dropped  # a list given by name is used exactly as given
        unresolved = {d["name"] for d in dropped if d["reason"].startswith("not resolved")}
        min_sep = rayleigh * 360.0 / duration_h if duration_h > 0 else math.inf
        for name, ref in INFERENCE_PAIRS.items():
            if infer == "auto" and name not in AUTO_INFERENCE:
                continue
            if ref not in names or name in names:
                continue
            s = _speed(catalogue[name])
            if step_h and s >= 180.0 / step_h:
                continue
            if auto_selected and name not in unresolved:
                continue
            if not auto_selected and abs(s - _speed(catalogue[ref])) >= min_sep:
                continue  # resolvable: the caller left it out on purpose
            ratio, dphase = equilibrium_inference(name, ref)
            out.append({"name": name, "from": ref, "ratio": ratio, "dphase": dphase,
                        "source": "equilibrium tide (Cartwright & Tayler 1971)"})
    elif isinstance(infer, dict):
        for key, spec in infer.items():
            try:
                name = get(key).name
                if isinstance(spec, str):
                    spec = (spec, None, None)
                ref_raw, ratio, dphase = (tuple(spec) + (None, None))[:3]
                ref = get(ref_raw).name
            except KeyError as exc:
                raise FitInputError(f"infer[{key!r}]: {exc.args[0]}") from None
            except TypeError:
                raise FitInputError(f"infer[{key!r}] must be (reference, ratio, phase difference "
                                    f"[deg]) or a reference name, got {spec!r}") from None
            if ref not in names:
                raise FitInputError(f"infer[{key!r}]: reference {ref} is not among the fitted "
                                    "constituents")
            if name in names:
                raise FitInputError(f"infer[{key!r}]: {name} is fitted in its own right; leave it "
                                    "out of the constituents to infer it")
            source = "given"
            if ratio is None or dphase is None:
                r_eq, d_eq = equilibrium_inference(name, ref)
                ratio = r_eq if ratio is None else ratio
                dphase = d_eq if dphase is None else dphase
                source = "equilibrium tide (Cartwright & Tayler 1971)" if spec[1] is None \
                    else "given ratio, equilibrium phase"
            try:
                ratio, dphase = float(ratio), float(dphase)
            except (TypeError, ValueError):
                raise FitInputError(f"infer[{key!r}]: ratio and phase difference must be numbers, "
                                    f"got {spec!r}") from None
            if not (math.isfinite(ratio) and ratio >= 0.0 and math.isfinite(dphase)):
                raise FitInputError(f"infer[{key!r}]: ratio must be a non-negative number and the "
                                    f"phase difference finite, got {spec!r}")
            out.append({"name": name, "from": ref, "ratio": ratio, "dphase": dphase, "source": source})
    else:
        raise FitInputError(f"infer must be 'auto', 'equilibrium', None or a mapping, got {infer!r}")
    seen = {d["name"] for d in out}
    if len(seen) != len(out):
        raise FitInputError("a constituent is inferred twice")
    kept = [d for d in dropped if d["name"] not in seen]
    return out, kept


# --------------------------------------------------------------------------- design

#: Longest table of in-day rotations ``exp(i omega (o + j dt))`` kept as one piece [rows];
#: finer sampling (a day of more than this many steps) takes two tables and one product.
_TABLE_ROWS = 4096
#: A sample whose time is within this of its grid point takes the grid point's rotation [s]
#: (at most 1.2e-9 rad for the fastest constituent, M8).
_ON_GRID = 1e-6


@dataclass
class _Design:
    """What is needed to build rows of the design matrix for any chunk of times.

    Within one UTC day the daily nodes' f and ``phi = V + u - omega (t - t_ref)`` are
    interpolated linearly, so a constituent's argument is ``a_d + omega s + delta_d s / day``
    (``s`` seconds into day ``d``) and its factor ``f_d + df_d s / day``. A row is
    ``(C0_d + C1_d w + C2_d w^2) exp(i omega s)`` with ``w = s / day``: the day's
    coefficients take ``exp(i delta w)`` to second order (``delta`` at most a few 1e-4 rad,
    so the third-order term is below 1e-10), and ``exp(i omega s)`` is a phasor step looked up
    in a table of the record's sampling grid (built once), as prediction does; a sample off
    the grid takes its own exponential.
    """

    names: list[str]
    omega: np.ndarray      # [rad/s]
    t_ref: float           # first daily node [s]
    phi: np.ndarray        # (days, k) slowly varying phase V+u - omega (t - t_ref) [rad]
    f: np.ndarray          # (days, k) nodal factor [1]
    trend: bool
    trend_epoch: float     # [s]
    # Inferred constituents ride on a fitted one's columns: (fitted column j, column k of
    # ``names`` beyond the fitted ones, amplitude ratio r [1], phase difference d [rad]).
    infer: tuple = ()
    step: float | None = None   # sampling interval of the rotation table [s]
    offset: float = 0.0         # the grid's first point after midnight [s]
    _table: tuple | None = field(default=None, repr=False)

    @property
    def n_fit(self) -> int:
        return len(self.names) - len(self.infer)

    @property
    def n_params(self) -> int:
        return 1 + int(self.trend) + 2 * self.n_fit

    def keeping(self, kept: list[str]) -> "_Design":
        """The same design with only the fitted constituents ``kept`` (inferred ones stay)."""
        n_fit = self.n_fit
        idx = [i for i in range(n_fit) if self.names[i] in kept]
        idx += list(range(n_fit, len(self.names)))
        new_pos = {old: new for new, old in enumerate(idx)}
        infer = tuple((new_pos[j], new_pos[col], r, d) for j, col, r, d in self.infer)
        return _Design([self.names[i] for i in idx], self.omega[idx], self.t_ref, self.phi[:, idx],
                       self.f[:, idx], self.trend, self.trend_epoch, infer, self.step, self.offset)

    def rows(self, t: np.ndarray) -> np.ndarray:
        """Rows of the design matrix at times ``t`` [s] (column-major, as BLAS syrk wants)."""
        Z = self.phasors(t)
        off = 1 + int(self.trend)
        k = self.n_fit
        for j, col, r, d in self.infer:
            # H_ref [f cos(th - g) + r f' cos(th' - g - d)]: with a = H cos g, b = H sin g
            # the inferred term adds r f' cos(th' - d) to the a column, r f' sin(th' - d) to b.
            Z[:, j] += (r * complex(math.cos(d), -math.sin(d))) * Z[:, col]
        X = np.empty((t.size, self.n_params), order="F")
        X[:, 0] = 1.0
        if self.trend:
            X[:, 1] = (t - self.trend_epoch) / SECONDS_PER_YEAR
        X[:, off::2] = Z.real[:, :k]
        X[:, off + 1::2] = Z.imag[:, :k]
        return X

    def phasors(self, t: np.ndarray) -> np.ndarray:
        """``f exp(i (V + u))`` of every constituent at times ``t`` [s]: (n, k) complex."""
        nd = self.phi.shape[0]
        i = np.clip(np.floor((t - self.t_ref) / SECONDS_PER_DAY).astype(np.int64), 0, nd - 2)
        d0, d1 = int(i.min()), int(i.max())
        days = np.arange(d0, d1 + 1)
        phi0 = self.phi[d0:d1 + 1]
        f0 = self.f[d0:d1 + 1]
        delta = self.phi[d0 + 1:d1 + 2] - phi0
        df = self.f[d0 + 1:d1 + 2] - f0
        e = np.exp(1j * ((days * SECONDS_PER_DAY)[:, None] * self.omega[None, :] + phi0))
        C0 = f0 * e
        C1 = (df + 1j * delta * f0) * e
        C2 = (1j * delta * df - 0.5 * delta**2 * f0) * e
        s = t - (self.t_ref + i * SECONDS_PER_DAY)
        w = (s / SECONDS_PER_DAY)[:, None]
        ii = i - d0
        Z = np.empty((t.size, len(self.names)), dtype=complex)
        if t.size >= 64 * days.size:  # long days: each day's coefficients broadcast
            cut = np.searchsorted(ii, np.arange(days.size + 1))
            for q in range(days.size):
                a, b = cut[q], cut[q + 1]
                if a < b:
                    z, wq = Z[a:b], w[a:b]
                    np.multiply(C2[q], wq, out=z)
                    z += C1[q]
                    z *= wq
                    z += C0[q]
                    z *= self._rotation(s[a:b])
            return Z
        Z = C2[ii]
        Z *= w
        Z += C1[ii]
        Z *= w
        Z += C0[ii]
        Z *= self._rotation(s)
        return Z

    def _rotation(self, s: np.ndarray) -> np.ndarray:
        """``exp(i omega s)`` for ``s`` seconds after midnight: (n, k) complex (a view of the
        table for consecutive grid points)."""
        if self.step is None or not self.names:
            return np.exp(1j * np.outer(s, self.omega))
        table, J, m = self._tables()
        x = (s - self.offset) / self.step
        j = np.rint(x)
        on = (np.abs(x - j) * self.step <= _ON_GRID) & (j >= 0) & (j < J)
        if on.all():
            j = j.astype(np.int64)
            if m == 0 and (np.diff(j) == 1).all():  # consecutive grid points (no repeat, no gap)
                return table[0][j[0]:j[-1] + 1]
            return self._lookup(table, j, m)
        E = np.exp(1j * np.outer(s, self.omega))
        if on.any():
            E[on] = self._lookup(table, j[on].astype(np.int64), m)
        return E

    @staticmethod
    def _lookup(table, j, m):
        if m == 0:
            return table[0][j]
        return table[0][j // m] * table[1][j % m]

    def _tables(self):
        """The rotation table(s) of the sampling grid, built on first use."""
        if self._table is None:
            dt, o = float(self.step), float(self.offset)
            J = int((SECONDS_PER_DAY - o) // dt) + 2
            if J <= _TABLE_ROWS:
                tab = (np.exp(1j * np.outer(o + dt * np.arange(J), self.omega)),)
                m = 0
            else:  # exp(i w (o + j dt)) = hi[j // m] lo[j % m]
                m = int(math.isqrt(J)) + 1
                hi = np.exp(1j * np.outer(o + dt * m * np.arange(-(-J // m)), self.omega))
                lo = np.exp(1j * np.outer(dt * np.arange(m), self.omega))
                tab = (hi, lo)
            self._table = (tab, J, m)
        return self._table


_NODE_BLOCK = 512  # daily nodes evaluated at a time


def _build_design(names, t_min, t_max, nodal, trend, trend_epoch, infer=(), step=None) -> _Design:
    catalogue = _catalogue()
    speeds = np.array([_speed(catalogue[n]) for n in names])
    omega = np.radians(speeds) / SECONDS_PER_HOUR
    # f and u vary over months to years; V is linear in time to far below a millimetre's
    # worth of phase within a day. Evaluate them on a daily grid and interpolate.
    d0 = math.floor(t_min / SECONDS_PER_DAY) * SECONDS_PER_DAY
    d1 = (math.floor(t_max / SECONDS_PER_DAY) + 2) * SECONDS_PER_DAY
    nodes = np.arange(d0, d1 + 1.0, SECONDS_PER_DAY)
    if names:
        vu = np.empty((nodes.size, len(names)))
        f = np.ones((nodes.size, len(names)))
        for s in range(0, nodes.size, _NODE_BLOCK):  # bounded temporaries for long records
            blk = nodes[s:s + _NODE_BLOCK]
            if nodal:
                v, fb = nod.arguments(blk, list(names), daily=False)
                f[s:s + _NODE_BLOCK] = np.asarray(fb, dtype=float).reshape(blk.size, len(names))
            else:
                v = nod.equilibrium_arguments(blk, list(names))
            vu[s:s + _NODE_BLOCK] = np.asarray(v, dtype=float).reshape(blk.size, len(names))
        phi = np.unwrap(np.radians(vu) - (nodes - d0)[:, None] * omega[None, :], axis=0)
    else:
        phi = np.zeros((nodes.size, 0))
        f = np.zeros((nodes.size, 0))
    offset = 0.0
    if step:
        offset = float((t_min - d0) % step)
    return _Design(list(names), omega, d0, phi, f, bool(trend), float(trend_epoch), tuple(infer),
                   float(step) if step else None, offset)


def _accumulate(design: _Design, record: "_Record", chunk_size: int, weighting=None):
    """``X'WX`` and ``X'Wy`` over the record, one chunk of rows at a time. ``weighting`` is
    ``(beta, scale, tuning)``: Cauchy weights of the residual ``y - X beta`` [m] scaled by
    ``tuning * scale`` (IRLS), times the record's own weights."""
    p = design.n_params
    A = np.zeros((p, p))
    rhs = np.zeros(p)
    for t, y, w in record.chunks(chunk_size):
        X = design.rows(t)
        if weighting is not None:
            beta, scale, tuning = weighting
            cw = _cauchy(y - X @ beta, scale, tuning)
            w = cw if w is None else cw * w
        if w is not None:
            sw = np.sqrt(w)
            X *= sw[:, None]
            y = y * sw
        # X'X is symmetric: syrk computes one triangle, half the work of a product.
        A += blas.dsyrk(1.0, X, trans=1, lower=0)
        rhs += X.T @ y
    return np.triu(A) + np.triu(A, 1).T, rhs


# Largest condition number of the scaled normal equations accepted for a Cholesky solve.
# X'X squares the condition of X, so 1e6 means errors amplified up to a thousandfold:
# beyond that the record cannot tell some constituents apart (common practice, no source).
MAX_CONDITION = 1e6


def _solve(A, rhs, max_condition=MAX_CONDITION):
    # Jacobi scaling so that the condition number reflects the geometry, not the units.
    d = np.sqrt(np.diag(A))
    d[d == 0] = 1.0
    As = A / d[:, None] / d[None, :]
    cond = float(np.linalg.cond(As))
    if np.isfinite(cond) and cond < max_condition:
        try:
            x = linalg.cho_solve(linalg.cho_factor(As, lower=True), rhs / d)
            return x / d, cond
        except linalg.LinAlgError:
            pass
    # stacklevel 5: the warning names harmonic_fit's line (via _solve_record,
    # _least_squares_or_robust, _fit)
    warnings.warn(f"normal equations ill-conditioned (condition number {cond:.3g}); using a "
                  "minimum-norm solution - gaps may leave some constituents undetermined, "
                  "consider fewer constituents or a larger Rayleigh factor",
                  FitConditioningWarning, stacklevel=5)
    # Directions weaker than 1/max_condition are not determined by the data: drop them.
    x, *_ = np.linalg.lstsq(As, rhs / d, rcond=1.0 / max_condition)
    return x / d, cond


def _cauchy(r, scale, tuning):
    """Cauchy weights of residuals ``r`` [m] scaled by ``tuning * scale``; ones without spread."""
    if scale <= 0.0:
        return np.ones_like(r)
    return 1.0 / (1.0 + (r / (tuning * scale)) ** 2)


# --------------------------------------------------------------------------- the record

#: Rows read at a time from a record in passes that need no design rows (the residual).
_RESIDUAL_ROWS = 65536
#: Edges of the residual's histogram (medians and MAD in bounded memory): 2**17 bins either
#: side of zero, spaced evenly in log |r| from a nanometre to a kilometre, so each is 2.1e-4
#: of its distance from zero wide whatever the residual's size (a gauge's quantisation or a
#: storm); the median and MAD are interpolated inside a bin. Below a nanometre the residual
#: has no spread.
_HIST_SIDE = 2 ** 17
_NO_SPREAD = 1e-9  # [m]
_HIST_EDGES = np.concatenate([-np.logspace(3.0, -9.0, _HIST_SIDE + 1),
                              np.logspace(-9.0, 3.0, _HIST_SIDE + 1)])


@dataclass
class _Summary:
    """What one reading of a record says about it."""

    n: int                 # finite samples
    t_first: float         # [s]
    t_last: float          # [s]
    step: float | None     # median positive interval [s]; None without two distinct times
    mean_y: float          # [m]
    var_y: float           # population variance of the levels [m^2]


class _Record:
    """A record in time order, read in chunks ``(t [s], y [m], w [1] or None)`` as often as
    the fit needs (one pass per step)."""

    def chunks(self, size: int):
        raise NotImplementedError

    def summary(self) -> _Summary:
        raise NotImplementedError


class _ArrayRecord(_Record):
    """A record held in arrays (the in-memory API)."""

    def __init__(self, t, y, w):
        self.t, self.y, self.w = t, y, w

    def chunks(self, size: int):
        t, y, w = self.t, self.y, self.w
        for s in range(0, t.size, size):
            yield t[s:s + size], y[s:s + size], None if w is None else w[s:s + size]

    def summary(self) -> _Summary:
        t = self.t
        steps = np.diff(t)
        steps = steps[steps > 0]
        # to the microsecond, as _StepCounter counts them: times converted from nanoseconds
        # carry a few 1e-7 s of rounding, which would put a one-minute record off its grid
        step = round(float(np.median(steps)), 6) if steps.size else None
        return _Summary(int(t.size), float(t[0]), float(t[-1]), step, float(np.mean(self.y)),
                        float(np.var(self.y)))


class _StreamRecord(_Record):
    """A record read from a source more than once: ``read()`` returns a fresh iterable of
    chunks ``(t, y)`` or ``(t, y, w)`` in time order (times as :func:`to_unix_seconds` takes)."""

    def __init__(self, read):
        if not callable(read):
            raise FitInputError("the record must be a callable returning an iterable of chunks "
                                "(times, levels[, weights]) in time order")
        self._read = read
        self._n: int | None = None

    def _clean(self):
        last = -math.inf
        n = 0
        for i, chunk in enumerate(self._read()):
            try:
                t, y, *rest = chunk
            except (TypeError, ValueError):
                raise FitInputError(f"chunk {i} of the record must be (times, levels) or "
                                    "(times, levels, weights)") from None
            t = to_unix_seconds(t)
            y = np.asarray(y, dtype=float).ravel()
            w = np.asarray(rest[0], dtype=float).ravel() if rest and rest[0] is not None else None
            if t.shape != y.shape or (w is not None and w.shape != y.shape):
                raise FitInputError(f"chunk {i} of the record: times, levels and weights differ in length")
            if w is not None and np.any(w[np.isfinite(w)] < 0):
                raise FitInputError(f"chunk {i} of the record: weights must be non-negative")
            ok = np.isfinite(t) & np.isfinite(y)
            if w is not None:
                ok &= np.isfinite(w) & (w > 0)
            if not ok.all():
                t, y, w = t[ok], y[ok], None if w is None else w[ok]
            if t.size == 0:
                continue
            if np.any(np.diff(t) < 0):
                order = np.argsort(t, kind="stable")
                t, y, w = t[order], y[order], None if w is None else w[order]
            if t[0] < last:
                raise FitInputError(f"chunk {i} of the record starts at {iso_utc(t[0])}, before the "
                                    f"previous chunk ends ({iso_utc(last)}): chunks must come in time order")
            last = t[-1]
            n += t.size
            yield t, y, w
        if self._n is not None and n != self._n:
            raise FitInputError(f"the record changed while it was being fitted ({self._n} samples "
                                f"first, {n} now)")

    def chunks(self, size: int):
        for t, y, w in self._clean():
            for s in range(0, t.size, size):
                yield t[s:s + size], y[s:s + size], None if w is None else w[s:s + size]

    def summary(self) -> _Summary:
        n, first, last, mean, m2 = 0, math.nan, math.nan, 0.0, 0.0
        steps = _StepCounter()
        prev = None
        for t, y, _ in self._clean():
            if n == 0:
                first = float(t[0])
            steps.add(np.diff(t) if prev is None else np.diff(np.concatenate([[prev], t])))
            prev, last = t[-1], float(t[-1])
            # the chunk's mean and squared deviations merged into the running ones (Chan et al.)
            k = y.size
            cm = float(np.mean(y))
            cm2 = float(np.sum((y - cm) ** 2))
            d = cm - mean
            tot = n + k
            mean += d * k / tot
            m2 += cm2 + d * d * n * k / tot
            n = tot
        self._n = n
        return _Summary(n, first, last, steps.median(), mean, m2 / n if n else math.nan)


class _StepCounter:
    """Counts of the positive intervals between samples (rounded to a microsecond, coarser
    if a record holds more than 65536 distinct ones), for an exact median in bounded memory."""

    _MAX_KEYS = 65536

    def __init__(self):
        self.keys = np.empty(0)
        self.counts = np.empty(0, dtype=np.int64)
        self.decimals = 6

    def add(self, d: np.ndarray) -> None:
        d = d[d > 0]
        if d.size == 0:
            return
        k, c = np.unique(np.round(d, self.decimals), return_counts=True)
        self._merge(np.concatenate([self.keys, k]), np.concatenate([self.counts, c]))
        while self.keys.size > self._MAX_KEYS:
            self.decimals -= 1
            self._merge(np.round(self.keys, self.decimals), self.counts)

    def _merge(self, keys, counts) -> None:
        self.keys, inv = np.unique(keys, return_inverse=True)
        self.counts = np.bincount(inv, weights=counts).astype(np.int64)

    def median(self) -> float | None:
        total = int(self.counts.sum())
        if total == 0:
            return None
        cum = np.cumsum(self.counts)
        lo = self.keys[np.searchsorted(cum, (total - 1) // 2, side="right")]
        hi = self.keys[np.searchsorted(cum, total // 2, side="right")]
        return float(0.5 * (lo + hi))


@dataclass
class _ResidualStats:
    """One pass over the residual: sums, a histogram (median and MAD) and the spectrum's grid."""

    n: int
    total: float           # sum of r [m]
    squares: float         # sum of r^2 [m^2]
    edges: np.ndarray      # histogram bin edges [m]
    cum: np.ndarray        # samples at or below each edge (linear inside a bin)
    grid: _ci.ResidualGrid | None

    def cdf(self, x):
        return np.interp(x, self.edges, self.cum)

    def median(self) -> float:
        return float(np.interp(0.5 * self.n, self.cum, self.edges))

    def mad(self, med: float) -> float:
        """Median absolute deviation from ``med`` [m] (bisection on the interpolated CDF)."""
        lo, hi = 0.0, float(self.edges[-1] - self.edges[0])
        for _ in range(100):
            mid = 0.5 * (lo + hi)
            if self.cdf(med + mid) - self.cdf(med - mid) < 0.5 * self.n:
                lo = mid
            else:
                hi = mid
        return 0.5 * (lo + hi)

    def beyond(self, med: float, d: float) -> float:
        """Share of the residual farther than ``d`` from ``med`` [1]."""
        return float(1.0 - (self.cdf(med + d) - self.cdf(med - d)) / self.n)



def _bin_of(r: np.ndarray) -> np.ndarray:
    """Histogram bin of each residual (as ``searchsorted(_HIST_EDGES, r)``, computed from
    log10 |r| rather than searched)."""
    side = _HIST_SIDE
    a = np.abs(r)
    with np.errstate(divide="ignore"):
        lg = np.log10(a)
    per = side / 12.0  # bins per decade
    idx = np.where(r > 0, side + 1 + np.ceil((lg + 9.0) * per), np.ceil((3.0 - lg) * per))
    idx[a <= _NO_SPREAD] = side + 1
    return np.clip(idx, 0, 2 * side + 2).astype(np.int64)


def _residual_pass(predict, record: _Record, summary: _Summary, spectrum: bool) -> _ResidualStats:
    """Residual ``y - predict(t)`` over the record: sums, histogram and (when ``spectrum``)
    the cells of its spectrum, in memory bounded by the bins and the cells."""
    edges = _HIST_EDGES
    hist = np.zeros(edges.size + 1, dtype=np.int64)  # [under, bins..., over]
    grid = None
    if spectrum and summary.step:
        grid = _ci.ResidualGrid(summary.t_first, summary.t_last, summary.step)
    n, total, squares = 0, 0.0, 0.0
    for t, y, _ in record.chunks(_RESIDUAL_ROWS):
        r = y - predict(t)
        n += r.size
        total += float(r.sum())
        squares += float(np.dot(r, r))
        hist += np.bincount(_bin_of(r), minlength=hist.size)
        if grid is not None:
            grid.add(t, r)
    # samples beyond the range sit at its ends
    cum = np.cumsum(hist[:-1]).astype(float)
    cum[-1] += hist[-1]
    return _ResidualStats(n, total, squares, edges, cum, grid)


def _model_of(beta, names, inferred, trend, epoch) -> TideModel:
    """The tide model of coefficients ``beta`` (inferred constituents riding on theirs)."""
    off = 1 + int(trend)
    a, b = beta[off::2], beta[off + 1::2]
    amp, phase = np.hypot(a, b), np.degrees(np.arctan2(b, a)) % 360.0
    cons = [{"name": n, "amplitude": float(amp[i]), "phase": float(phase[i])} for i, n in enumerate(names)]
    for d in inferred:
        i = names.index(d["from"])
        cons.append({"name": d["name"], "amplitude": d["ratio"] * float(amp[i]),
                     "phase": (float(phase[i]) + d["dphase"]) % 360.0})
    kwargs = {"trend": float(beta[1]), "trend_epoch": float(epoch)} if trend else {}
    return TideModel(mean=float(beta[0]), constituents=cons, **kwargs)


def _predictor(design: _Design, beta, names, inferred, trend, epoch, nodal, step):
    """``t -> predicted level`` [m] for a chunk of times: the model's fast block path over
    the chunk's sampling grid when its samples sit on one (gaps allowed), else the model's
    general path; the design's rows when the fit had no nodal terms (the model always has)."""
    if not nodal:
        return lambda t: design.rows(t) @ beta
    model = _model_of(beta, names, inferred, trend, epoch)

    def predict(t):
        if step and t.size > 1:
            x = (t - t[0]) / step
            j = np.rint(x)
            cells = int(j[-1]) + 1
            if cells <= 2 * t.size + 1440 and np.all(np.abs(x - j) * step <= _ON_GRID):
                return model.predict_grid(float(t[0]), step, cells)[j.astype(np.int64)]
        return model.predict(t)

    return predict


# --------------------------------------------------------------------------- the fit


def harmonic_fit(times, levels, constituents="auto", rayleigh: float = 1.0, trend: bool = False,
                 robust="auto", nodal="auto", chunk_size: int | None = 4096,
                 min_constituents: int = 2, confidence: float | None = 0.95, weights=None,
                 robust_iterations: int = 10, robust_tuning: float = CAUCHY_TUNING,
                 trend_epoch=None, metadata: dict | None = None, infer="auto",
                 long_period_snr: float | None = None):
    """Fit harmonic constants to a record of sea levels by least squares.

    Parameters
    ----------
    times : array_like
        Sample times: ``datetime64`` (UTC), pandas DatetimeIndex (tz-aware converted,
        naive taken as UTC), or Unix seconds. Gaps and irregular sampling are fine.
    levels : array_like
        Observed levels [m]. Samples with NaN level or time are dropped.
    constituents : "auto" or sequence of str
        "auto" chooses by priority, Rayleigh criterion and Nyquist speed
        (:func:`select_constituents`); a list of names is used exactly as given.
    rayleigh : float
        Rayleigh factor for "auto" [1].
    trend : bool
        Also fit a linear trend [m/year] about ``trend_epoch``.
    robust : "auto", True or False
        Iteratively reweighted least squares with Cauchy weights, starting from the
        ordinary solution (Leffler & Jay 2009), so that storms bias the constants less.
        "auto" (default) refits robustly when the ordinary residual is heavy-tailed (more
        than :data:`HEAVY_TAIL_SHARE` of it beyond :data:`HEAVY_TAIL_SIGMAS` robust standard
        deviations): a storm in a short record otherwise turns into decimetres of spurious
        long-period tide. ``metadata["robust_reason"]`` says which way and why.
    nodal : "auto", True or False
        Apply nodal factors f and corrections u, evaluated daily and interpolated
        ("auto" and True). False fits plain V only; for comparisons, not prediction.
    chunk_size : int or None
        Rows of the design matrix built at a time [samples]; None builds them all at once.
    min_constituents : int
        With "auto", the first ``min_constituents`` names of :data:`PRIORITY` below the
        Nyquist speed must all be resolved, else :class:`RecordTooShortError`. The default
        2 asks the record to separate M2 from K1 and both from the mean (about 1.1 days):
        a fit that cannot tell the diurnal from the semidiurnal tide is of no use.
    confidence : float or None
        Level of the confidence intervals; None skips them.
    weights : array_like, optional
        Non-negative weight per sample [1].
    robust_iterations : int
        Most IRLS iterations.
    robust_tuning : float
        Cauchy tuning constant on residuals scaled by MAD/0.6745.
    trend_epoch : time, optional
        Reference time of the trend (the mean is the level there); default the record
        midpoint.
    metadata : dict, optional
        Extra entries for the model's metadata.
    infer : "auto", "equilibrium", None or dict
        Inference of constituents the record cannot resolve from a resolved neighbour
        (Foreman 1977, sec. 2.3; Godin 1972; Pugh & Woodworth 2014, sec. 4.2.4). The
        inferred constituent's amplitude is fixed at ``ratio`` times the reference's and
        its phase lag at the reference's plus ``dphase``; the pair is solved as one combined
        column, so the reference's estimate is corrected for its unresolved neighbour
        instead of absorbing it as a slow beat.

        * "auto": with ``constituents="auto"``, P1 from K1, K2 from S2, NU2 from N2,
          and N2 from M2 and Q1 from O1 (:data:`AUTO_INFERENCE`) when the Rayleigh
          criterion dropped the neighbour and kept its reference, from equilibrium ratios;
          a list of names is used exactly as given. In practice this acts on records
          shorter than about half a year (K1-P1 and S2-K2 need 182.6 days, N2-M2 27.6);
          longer records resolve the pairs and nothing is inferred. Recommended for gauge records
          shorter than about seven months: the neighbours are large (P1 a third of K1,
          K2 over a quarter of S2 in the equilibrium tide), so leaving them out biases
          K1 and S2 by up to that much, while real ports usually keep the ratios within
          some 10-20 % of equilibrium (Pugh & Woodworth 2014, ch. 4; the size of the
          departure is common practice, no source).
        * "equilibrium": every pair of :data:`INFERENCE_PAIRS` (adding 2N2, Q1, J1 and L2),
          also for a list of names: neighbours left out of the list and not resolvable
          from their reference are inferred.
        * dict ``{name: (reference, ratio, dphase)}``: explicit ratio [1] and phase
          difference ``g_name - g_reference`` [deg], e.g. from a nearby station's long
          record; ``ratio`` or ``dphase`` None takes the equilibrium value; a bare
          reference name means both.
        None or False: no inference, only what the record resolves. The default is "auto",
        the same everywhere (library, ``quaywatch fit``, ``refit`` and the daemon): a short
        record predicts far better with its unresolved neighbours inferred than with them
        left to beat against their reference (the invented port of
        tests/test_short_records.py: a 29-day record predicts the next year to 25 mm RMS
        with inference, 103 mm without), and the fit's metadata (``inferred``) and every printout say
        what was inferred from what, so the assumption is never silent.

    long_period_snr : float or None
        With ``constituents="auto"``, long-period constituents (Sa, Ssa, Mm, Mf, ...) whose
        signal-to-noise ratio comes out below this are left out of the prediction (shrunk
        to zero; the others keep their joint estimate and intervals, the residual takes back
        what the weak ones fitted); each is listed in ``metadata["dropped"]`` with its SNR.
        None takes :data:`LONG_PERIOD_SNR`; 0 keeps them all.

    Returns
    -------
    TideModel
        ``mean`` [m]; constituents with ``name``, ``amplitude`` [m], ``phase`` (Greenwich
        phase lag g, UTC) [deg], ``speed`` [deg/h], and when ``confidence`` is set
        ``amplitude_ci`` [m], ``phase_ci`` [deg] (half-widths) and ``snr`` [1]; ``trend``
        [m/year]; ``metadata`` with ``rms`` [m], ``variance_explained`` [1],
        ``record_start``/``record_end`` (ISO 8601 UTC), ``n_samples``, ``rayleigh``,
        ``dropped`` (name and reason: record length, sampling, or a long-period
        constituent below ``long_period_snr``), the method used and ``robust_reason``
        (why the fit was or was not robust, in words). Inferred constituents follow
        the fitted ones with ``inferred_from`` (the reference's name), their intervals
        scaled from the reference's; ``metadata["inferred"]`` lists name, reference,
        ratio, phase difference and source.

    Raises
    ------
    RecordTooShortError
        The record does not resolve the ``min_constituents`` most important constituents; it says
        the lengths needed for M2 alone, M2 with K1, K1/O1 and S2/K2.
    FitInputError
        Too few samples, unknown constituent names, or bad weights.

    References
    ----------
    Foreman (1977); Godin (1972); Munk & Cartwright (1966); Leffler & Jay (2009).
    """
    t, y, w = _clean_record(times, levels, weights)
    return _fit(_ArrayRecord(t, y, w), constituents=constituents, rayleigh=rayleigh, trend=trend,
                robust=robust, nodal=nodal, chunk_size=chunk_size, min_constituents=min_constituents,
                confidence=confidence, robust_iterations=robust_iterations, robust_tuning=robust_tuning,
                trend_epoch=trend_epoch, metadata=metadata, infer=infer, long_period_snr=long_period_snr)


def harmonic_fit_chunks(read, constituents="auto", rayleigh: float = 1.0, trend: bool = False,
                        robust="auto", nodal="auto", chunk_size: int = 4096, min_constituents: int = 2,
                        confidence: float | None = 0.95, robust_iterations: int = 10,
                        robust_tuning: float = CAUCHY_TUNING, trend_epoch=None,
                        metadata: dict | None = None, infer="auto", long_period_snr: float | None = None):
    """:func:`harmonic_fit` of a record read in chunks, in memory that does not grow with it.

    The record is read several times (the fit's passes: a summary, the normal equations, the
    residual after each solve, and two passes per robust iteration), each time through
    ``read()``; memory holds one chunk, the normal equations, the daily nodal terms (days by
    constituents), a histogram of the residual and its spectrum's cells (at most
    :data:`predictor.confidence.MAX_CELLS`).

    Parameters
    ----------
    read : callable
        ``read()`` returns a fresh iterable of chunks ``(times, levels)`` or
        ``(times, levels, weights)``, the chunks in time order (times as
        :func:`harmonic_fit` takes them, usually Unix seconds [s]; levels [m]). Samples with
        NaN level or time are dropped, as are non-positive weights. Every call must give the
        same samples; a pass that counts a different number raises :class:`FitInputError`.
    chunk_size : int
        Rows of the design matrix built at a time [samples].
    constituents, rayleigh, trend, robust, nodal, min_constituents, confidence,
    robust_iterations, robust_tuning, trend_epoch, metadata, infer, long_period_snr
        As for :func:`harmonic_fit`.

    Returns
    -------
    TideModel
        As :func:`harmonic_fit`, equal to it on the same samples (the median sampling
        interval is taken from intervals rounded to a microsecond).

    Raises
    ------
    RecordTooShortError, FitInputError
        As :func:`harmonic_fit`; also chunks out of time order or a record that changed
        between passes.

    References
    ----------
    Foreman (1977); Godin (1972); Munk & Cartwright (1966); Leffler & Jay (2009).
    """
    return _fit(_StreamRecord(read), constituents=constituents, rayleigh=rayleigh, trend=trend,
                robust=robust, nodal=nodal, chunk_size=chunk_size, min_constituents=min_constituents,
                confidence=confidence, robust_iterations=robust_iterations, robust_tuning=robust_tuning,
                trend_epoch=trend_epoch, metadata=metadata, infer=infer, long_period_snr=long_period_snr)


# --------------------------------------------------------------------------- steps of the fit


def _fit(record: _Record, *, constituents, rayleigh, trend, robust, nodal, chunk_size, min_constituents,
         confidence, robust_iterations, robust_tuning, trend_epoch, metadata, infer, long_period_snr):
    """The fit of :func:`harmonic_fit` and :func:`harmonic_fit_chunks` over a record read in
    passes: one to summarise it, one to accumulate the normal equations (two per robust
    iteration), one over the residual after each solve."""
    summary = record.summary()
    if summary.n < 3:
        raise FitInputError(f"only {summary.n} valid sample(s); a fit needs a record of levels")
    plan = _plan_fit(summary, constituents, rayleigh, min_constituents, robust, trend_epoch, infer,
                     chunk_size)
    setup = dict(record=record, summary=summary, nodal=nodal, trend=trend, epoch=plan.epoch,
                 chunk=plan.chunk, iterations=robust_iterations, tuning=robust_tuning)
    # 1. ordinary least squares, then robust where asked or where the residual is heavy-tailed
    sol, use_robust, robust_reason = _least_squares_or_robust(plan, robust, setup)
    # 2. long-period constituents the record cannot tell from its weather are left out
    sol, plan = _leave_out_weak_long_period(sol, plan, long_period_snr, setup)
    # 3. the constants (with their intervals) and what was done
    cons = _constituent_table(sol, plan.names, plan.inferred, plan.step_h, confidence)
    meta = _fit_metadata(sol, plan, setup, rayleigh=rayleigh, use_robust=use_robust,
                         robust_reason=robust_reason, confidence=confidence, extra=metadata)
    return _assemble_model(sol, cons, meta, trend, plan.epoch)


def _clean_record(times, levels, weights):
    """Finite samples in time order: (t [s], y [m], w or None)."""
    t = to_unix_seconds(times)
    y = np.asarray(levels, dtype=float).ravel()
    if t.shape != y.shape:
        raise FitInputError(f"times and levels differ in length ({t.size} and {y.size})")
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=float).ravel()
        if w.shape != y.shape or np.any(w[np.isfinite(w)] < 0):
            raise FitInputError("weights must be non-negative, one per sample")
    ok = np.isfinite(t) & np.isfinite(y)
    if w is not None:
        ok &= np.isfinite(w) & (w > 0)
    order = np.argsort(t[ok], kind="stable")
    t, y = t[ok][order], y[ok][order]
    if w is not None:
        w = w[ok][order]
    if t.size < 3:
        raise FitInputError(f"only {t.size} valid sample(s); a fit needs a record of levels")
    return t, y, w


def _chosen_names(constituents, duration_h, step_h, rayleigh, min_constituents):
    """Names to fit and the dropped list, by Rayleigh selection or as given."""
    catalogue = _catalogue()
    if isinstance(constituents, str):
        if constituents != "auto":
            raise FitInputError(f"constituents must be 'auto' or a list of names, got {constituents!r}")
        names, dropped = select_constituents(duration_h, step_h, rayleigh)
        must = [n for n in _priority_order(catalogue)
                if step_h is None or _speed(catalogue[n]) < 180.0 / step_h][:max(0, int(min_constituents))]
        if any(n not in names for n in must):
            raise RecordTooShortError(_too_short_message(duration_h, names, rayleigh, min_constituents))
        return names, dropped

    names, unknown = [], []
    for n in constituents:
        try:
            names.append(get(n).name)
        except KeyError:
            unknown.append(str(n))
    if unknown:
        raise FitInputError("unknown constituent(s): " + ", ".join(unknown))
    return list(dict.fromkeys(names)), []


@dataclass
class _Plan:
    """What a fit solves for, decided from the record's times and the options."""

    names: list[str]        # fitted constituents
    dropped: list[dict]     # left out, with the reason
    inferred: list[dict]    # inferred: name, from, ratio [1], dphase [deg], source
    auto: bool              # constituents chosen by the Rayleigh criterion
    duration_h: float       # record length [h]
    step_h: float | None    # median sampling interval [h]; None without two distinct times
    epoch: float            # trend epoch [s, Unix UTC]
    chunk: int              # rows of the design built at a time [samples]


def _trend_epoch_seconds(trend_epoch, summary: _Summary) -> float:
    """The trend's reference time [s, Unix UTC]: as given (a time or Unix seconds), else the
    record midpoint."""
    if trend_epoch is None:
        return 0.5 * (summary.t_first + summary.t_last)
    if not isinstance(trend_epoch, (int, float)):
        return float(to_unix_seconds([trend_epoch])[0])
    return float(trend_epoch)


def _plan_fit(summary: _Summary, constituents, rayleigh, min_constituents, robust, trend_epoch, infer,
              chunk_size) -> _Plan:
    """The constituents to fit (Rayleigh and Nyquist selection, or as given), those to infer,
    the trend epoch and the chunk size; options are checked in this order."""
    duration_h = (summary.t_last - summary.t_first) / SECONDS_PER_HOUR
    step_h = summary.step / SECONDS_PER_HOUR if summary.step else None
    auto = isinstance(constituents, str)
    names, dropped = _chosen_names(constituents, duration_h, step_h, rayleigh, min_constituents)
    if robust not in (True, False, "auto"):
        raise FitInputError(f"robust must be True, False or 'auto', got {robust!r}")
    epoch = _trend_epoch_seconds(trend_epoch, summary)
    inferred, dropped = _resolve_inference(infer, auto, names, dropped, duration_h, rayleigh, step_h)
    chunk = int(chunk_size) if chunk_size else summary.n
    if chunk < 1:
        raise FitInputError("chunk_size must be a positive number of samples")
    return _Plan(names, dropped, inferred, auto, duration_h, step_h, epoch, chunk)


@dataclass
class _Solution:
    design: _Design
    beta: np.ndarray        # mean, [trend], then a, b per fitted constituent
    A: np.ndarray           # the final (weighted) normal matrix
    cond: float
    stats: _ResidualStats   # the residual of beta: sums, histogram, spectrum cells
    iterations: int
    off: int                # index of the first constituent coefficient
    rhs: np.ndarray         # the final right-hand side X'Wy
    cov: np.ndarray | None = None  # (X'WX)^-1 when it is not the inverse of A (see _without)


def _residual_of(design: _Design, beta, names, inferred, setup) -> _ResidualStats:
    """One pass over the residual of ``beta`` (from the model's fast prediction)."""
    summary = setup["summary"]
    predict = _predictor(design, beta, names, inferred, setup["trend"], setup["epoch"], setup["nodal"],
                         summary.step)
    return _residual_pass(predict, setup["record"], summary, spectrum=True)


def _scale(stats: _ResidualStats) -> float:
    """Robust standard deviation of the residual, MAD / 0.6745 [m]; 0 without spread (MAD
    below :data:`_NO_SPREAD`)."""
    mad = stats.mad(stats.median())
    return mad / _MAD_TO_SIGMA if mad > _NO_SPREAD else 0.0


def _solve_record(names, inferred, *, record, summary, nodal, trend, epoch, chunk, robust, iterations,
                  tuning, start=None) -> _Solution:
    """Least squares (and IRLS when ``robust``) for the given constituents.

    ``start`` is a solution already found for these parameters (the ordinary one), used
    instead of a first pass over the record.
    """
    setup = dict(record=record, summary=summary, nodal=nodal, trend=trend, epoch=epoch)
    if start is None:
        infer_cols = tuple((names.index(d["from"]), len(names) + i, d["ratio"], math.radians(d["dphase"]))
                           for i, d in enumerate(inferred))
        design = _build_design(names + [d["name"] for d in inferred], summary.t_first, summary.t_last,
                               nodal, trend, epoch, infer_cols, summary.step)
        if summary.n < design.n_params + 2:
            raise FitInputError(f"only {summary.n} valid samples for {design.n_params} unknowns; "
                                "the record needs more samples")
        A, rhs = _accumulate(design, record, chunk)
        beta, cond = _solve(A, rhs)
        stats = _residual_of(design, beta, names, inferred, setup)
    else:
        design, A, rhs, beta, cond, stats = (start.design, start.A, start.rhs, start.beta, start.cond,
                                             start.stats)
    done = 0
    if robust:
        for done in range(1, iterations + 1):
            A, rhs = _accumulate(design, record, chunk, weighting=(beta, _scale(stats), tuning))
            new, cond = _solve(A, rhs)
            change = float(np.max(np.abs(new - beta)))
            beta = new
            stats = _residual_of(design, beta, names, inferred, setup)
            if change < 1e-6:  # metres: a thousandth of a millimetre
                break
    return _Solution(design, beta, A, cond, stats, done, 1 + int(trend), rhs)


def _inverse(A: np.ndarray) -> np.ndarray:
    """(X'WX)^-1 from the Jacobi-scaled system, pseudo-inverted so that an undetermined
    direction shows as a wide interval rather than an error."""
    dsc = np.sqrt(np.diag(A))
    dsc[dsc == 0] = 1.0
    return np.linalg.pinv(A / dsc[:, None] / dsc[None, :], rcond=1.0 / MAX_CONDITION) / np.outer(dsc, dsc)


def _without(sol: _Solution, names, inferred, gone, setup) -> _Solution:
    """``sol`` with the fitted constituents ``gone`` set to zero: their coefficients and rows of
    the normal equations removed (the others' covariance is the joint one, as estimated), and
    the residual that of the others (one pass, from the model's prediction)."""
    pos = [names.index(n) for n in gone]
    cols = np.array([sol.off + 2 * i + k for i in pos for k in (0, 1)])
    keep = np.setdiff1d(np.arange(sol.beta.size), cols)
    kept = [n for n in names if n not in gone]
    # the design keeps the others (with any inferred constituent riding on them)
    design = sol.design.keeping(kept)
    beta = sol.beta[keep]
    cov = _inverse(sol.A)[np.ix_(keep, keep)]
    stats = _residual_of(design, beta, kept, inferred, setup)
    return _Solution(design, beta, sol.A[np.ix_(keep, keep)], sol.cond, stats, sol.iterations,
                     sol.off, sol.rhs[keep], cov)


#: A residual is heavy-tailed when more than this share of it lies beyond
#: :data:`HEAVY_TAIL_SIGMAS` robust standard deviations (1.4826 MAD) of its median: for Gaussian
#: noise the share is 0.006 % (normal tables), a storm surge or a datum fault in the record
#: puts percents there. Then ``robust="auto"`` refits by IRLS (common practice, no source).
HEAVY_TAIL_SHARE = 0.005
HEAVY_TAIL_SIGMAS = 4.0
#: Long-period constituents with a signal-to-noise ratio ``H^2 / var`` below this are left out
#: of an automatic selection: below about 2 a constituent cannot be told from noise (common
#: practice, no source), and at long periods the noise is the weather.
LONG_PERIOD_SNR = 2.0


def _heavy_tailed(stats: _ResidualStats) -> tuple[bool, str]:
    """Whether the ordinary residual is heavy-tailed, and the reason in words."""
    med = stats.median()
    sigma = _scale(stats)
    if sigma <= 0.0:
        return False, "residual without spread"
    share = stats.beyond(med, HEAVY_TAIL_SIGMAS * sigma)
    words = (f"{share:.2%} of the least-squares residual lies beyond {HEAVY_TAIL_SIGMAS:g} robust standard "
             f"deviations ({sigma * 1000:.0f} mm), against 0.006 % for Gaussian noise")
    if share > HEAVY_TAIL_SHARE:
        return True, "heavy-tailed residual (storms or faults in the record): " + words
    return False, "residual close to Gaussian: " + words


def _least_squares_or_robust(plan: _Plan, robust, setup: dict) -> tuple[_Solution, bool, str]:
    """Ordinary least squares, then IRLS with Cauchy weights when ``robust`` is True, or when it
    is "auto" and the ordinary residual is heavy-tailed (the robust pass starts from the ordinary
    solution): (solution, whether robust, why in words)."""
    sol = _solve_record(plan.names, plan.inferred, robust=robust is True, **setup)
    use_robust, reason = bool(robust), "asked for" if robust is True else "not asked for"
    if robust == "auto":
        use_robust, reason = _heavy_tailed(sol.stats)
        if use_robust:
            sol = _solve_record(plan.names, plan.inferred, robust=True, start=sol, **setup)
    return sol, use_robust, reason


def _leave_out_weak_long_period(sol: _Solution, plan: _Plan, threshold,
                                setup: dict) -> tuple[_Solution, _Plan]:
    """With an automatic selection, long-period constituents whose SNR is below ``threshold``
    (None: :data:`LONG_PERIOD_SNR`; 0 keeps them) shrunk to zero and listed as dropped with
    their SNR: the others keep their joint estimate, the residual is that of the others."""
    if threshold is None:
        threshold = LONG_PERIOD_SNR
    if not (plan.auto and threshold):
        return sol, plan
    weak = _weak_long_period(sol, plan.names, plan.inferred, plan.step_h, threshold)
    if not weak:
        return sol, plan
    dropped = plan.dropped + [{"name": n, "reason": f"long-period, signal-to-noise ratio {snr:.2g} below "
                               f"{threshold:g}: at this period the record's weather (surges, gaps) "
                               "cannot be told from tide; left out of the prediction"}
                              for n, snr in weak.items()]
    sol = _without(sol, plan.names, plan.inferred, list(weak), setup)
    return sol, replace(plan, names=[n for n in plan.names if n not in weak], dropped=dropped)


def _intervals(sol: _Solution, names, step_h, confidence):
    """Amplitude and phase half-widths and SNR of the fitted constituents (coloured noise)."""
    catalogue = _catalogue()
    off, beta, A = sol.off, sol.beta, sol.A
    a, b = beta[off::2], beta[off + 1::2]
    speeds = np.array([_speed(catalogue[n]) for n in names])
    if sol.stats.grid is None:
        raise FitInputError("the record has no two distinct sample times: no spectrum for intervals")
    spec = sol.stats.grid.spectrum(fitted_speeds=speeds)
    # (X'WX)^-1 of the final solve (of the whole fit when some were set to zero after it)
    inv = np.diag(sol.cov if sol.cov is not None else _inverse(A))
    inv_ab = np.column_stack([inv[off::2], inv[off + 1::2]])
    var_a, var_b = _ci.coefficient_variance(spec, speeds, inv_ab)
    return _ci.amplitude_phase_intervals(a, b, var_a, var_b, confidence=confidence)


def _weak_long_period(sol: _Solution, names, inferred, step_h, threshold) -> dict:
    """Long-period constituents whose SNR is below ``threshold``: name -> SNR."""
    refs = {d["from"] for d in inferred}
    longp = [i for i, n in enumerate(names) if get(n).species == 0 and n not in refs]
    if not longp:
        return {}
    _, _, snr = _intervals(sol, names, step_h, 0.95)
    return {names[i]: float(snr[i]) for i in longp if snr[i] < threshold}


def _constituent_table(sol: _Solution, names, inferred, step_h, confidence) -> list[dict]:
    """Fitted constituents (with intervals when ``confidence``), then the inferred ones."""
    catalogue = _catalogue()
    off, beta = sol.off, sol.beta
    a, b = beta[off::2], beta[off + 1::2]
    amp = np.hypot(a, b)
    phase = np.degrees(np.arctan2(b, a)) % 360.0
    cons = [{"name": n, "amplitude": float(amp[i]), "phase": float(phase[i]),
             "speed": _speed(catalogue[n])} for i, n in enumerate(names)]
    if confidence is not None and names:
        amp_ci, ph_ci, snr = _intervals(sol, names, step_h, confidence)
        for i, c in enumerate(cons):
            c.update(amplitude_ci=float(amp_ci[i]), phase_ci=float(ph_ci[i]), snr=float(snr[i]))
    by_fitted = {c["name"]: c for c in cons}
    for d in inferred:
        ref = by_fitted[d["from"]]
        c = {"name": d["name"], "amplitude": d["ratio"] * ref["amplitude"],
             "phase": (ref["phase"] + d["dphase"]) % 360.0, "speed": _speed(catalogue[d["name"]]),
             "inferred_from": d["from"]}
        if "amplitude_ci" in ref:
            c.update(amplitude_ci=d["ratio"] * ref["amplitude_ci"], phase_ci=ref["phase_ci"],
                     snr=ref["snr"])
        cons.append(c)
    return cons


def _fit_metadata(sol: _Solution, plan: _Plan, setup: dict, *, rayleigh, use_robust, robust_reason,
                  confidence, extra) -> dict:
    """The model's metadata: the record (span, samples, interval [s]), the method and why,
    ``rms`` [m], ``variance_explained`` [1], dropped and inferred constituents, then ``extra``."""
    summary, stats = setup["summary"], sol.stats
    var_y = summary.var_y
    mean_r = stats.total / stats.n
    var_r = max(stats.squares / stats.n - mean_r * mean_r, 0.0)
    meta = {
        "method": "robust least squares (IRLS, Cauchy weights)" if use_robust else "least squares",
        "robust_reason": robust_reason,
        "record_start": iso_utc(summary.t_first),
        "record_end": iso_utc(summary.t_last),
        "n_samples": int(summary.n),
        "duration_days": float(plan.duration_h / 24.0),
        "sample_interval_s": float(plan.step_h * SECONDS_PER_HOUR) if plan.step_h else 0.0,
        "rayleigh": float(rayleigh),
        "constituent_selection": "auto" if plan.auto else "given",
        "nodal": "daily f and u, interpolated" if setup["nodal"] else "none",
        "rms": float(np.sqrt(stats.squares / stats.n)),
        "variance_explained": float(1.0 - var_r / var_y) if var_y > 0 else 0.0,
        "condition_number": float(sol.cond),
        "dropped": plan.dropped,
    }
    if plan.inferred:
        meta["inferred"] = [{"name": d["name"], "from": d["from"], "ratio": float(d["ratio"]),
                             "phase_difference": float(d["dphase"]), "source": d["source"]}
                            for d in plan.inferred]
    if use_robust:
        meta["robust_iterations"] = int(sol.iterations)
        meta["robust_tuning"] = float(setup["tuning"])
    if confidence is not None:
        meta["confidence"] = float(confidence)
    if setup["trend"]:
        meta["trend_epoch"] = iso_utc(plan.epoch)
    if extra:
        meta.update(extra)
    return meta


def _assemble_model(sol: _Solution, cons: list[dict], meta: dict, trend: bool, epoch: float) -> TideModel:
    """The fitted model: mean [m], constituents, trend [m/year] about ``epoch`` [s] when fitted."""
    beta = sol.beta
    kwargs = {"trend": float(beta[1]), "trend_epoch": float(epoch)} if trend else {}
    return TideModel(mean=float(beta[0]), constituents=cons, metadata=meta, **kwargs)
