"""Harmonic analysis: least-squares fit of tidal constants to a record of levels.

The model is ``h(t) = Z0 [+ trend * years] + sum_k f_k(t) H_k cos(V_k(t) + u_k(t) - g_k)``.
Each constituent contributes two columns, ``f cos(V+u)`` and ``f sin(V+u)``, whose
coefficients are ``a = H cos g`` and ``b = H sin g``. The normal equations ``X'WX`` and
``X'Wy`` are accumulated over chunks of rows, so decades of one-minute data fit in bounded
memory, and solved by Cholesky after a conditioning check.

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
from dataclasses import dataclass

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


@dataclass
class _Design:
    """What is needed to build rows of the design matrix for any chunk of times."""

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
                       self.f[:, idx], self.trend, self.trend_epoch, infer)

    def rows(self, t: np.ndarray) -> np.ndarray:
        pos = (t - self.t_ref) / SECONDS_PER_DAY
        i = np.clip(np.floor(pos).astype(np.int64), 0, self.phi.shape[0] - 2)
        w = (pos - i)[:, None]
        phi = self.phi[i] * (1.0 - w) + self.phi[i + 1] * w
        f = self.f[i] * (1.0 - w) + self.f[i + 1] * w
        arg = (t - self.t_ref)[:, None] * self.omega[None, :] + phi
        off = 1 + int(self.trend)
        k = self.n_fit
        X = np.empty((t.size, self.n_params), order="F")  # column-major suits BLAS syrk
        X[:, 0] = 1.0
        if self.trend:
            X[:, 1] = (t - self.trend_epoch) / SECONDS_PER_YEAR
        X[:, off::2] = f[:, :k] * np.cos(arg[:, :k])
        X[:, off + 1::2] = f[:, :k] * np.sin(arg[:, :k])
        for j, col, r, d in self.infer:
            # H_ref [f cos(th - g) + r f' cos(th' - g - d)]: with a = H cos g, b = H sin g
            # the inferred term adds r f' cos(th' - d) to the a column, r f' sin(th' - d) to b.
            fk = r * f[:, col]
            X[:, off + 2 * j] += fk * np.cos(arg[:, col] - d)
            X[:, off + 2 * j + 1] += fk * np.sin(arg[:, col] - d)
        return X


_NODE_BLOCK = 512  # daily nodes evaluated at a time


def _build_design(names, t_min, t_max, nodal, trend, trend_epoch, infer=()) -> _Design:
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
    return _Design(list(names), omega, d0, phi, f, bool(trend), float(trend_epoch), tuple(infer))


def _accumulate(design: _Design, t, y, w, chunk_size):
    p = design.n_params
    A = np.zeros((p, p))
    rhs = np.zeros(p)
    for s in range(0, t.size, chunk_size):
        X = design.rows(t[s:s + chunk_size])
        yc = y[s:s + chunk_size]
        if w is not None:
            sw = np.sqrt(w[s:s + chunk_size])
            X *= sw[:, None]
            yc = yc * sw
        # X'X is symmetric: syrk computes one triangle, half the work of a product.
        A += blas.dsyrk(1.0, X, trans=1, lower=0)
        rhs += X.T @ yc
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
    warnings.warn(f"normal equations ill-conditioned (condition number {cond:.3g}); using a "
                  "minimum-norm solution - gaps may leave some constituents undetermined, "
                  "consider fewer constituents or a larger Rayleigh factor",
                  FitConditioningWarning, stacklevel=3)
    # Directions weaker than 1/max_condition are not determined by the data: drop them.
    x, *_ = np.linalg.lstsq(As, rhs / d, rcond=1.0 / max_condition)
    return x / d, cond


def _residual(design, beta, t, y, chunk_size):
    r = np.empty_like(y)
    for s in range(0, t.size, chunk_size):
        r[s:s + chunk_size] = y[s:s + chunk_size] - design.rows(t[s:s + chunk_size]) @ beta
    return r


def _cauchy_weights(r, tuning):
    mad = float(np.median(np.abs(r - np.median(r))))
    scale = mad / _MAD_TO_SIGMA
    if scale <= 0.0:
        return np.ones_like(r)
    return 1.0 / (1.0 + (r / (tuning * scale)) ** 2)


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
    duration_h = (t[-1] - t[0]) / SECONDS_PER_HOUR
    steps = np.diff(t)
    steps = steps[steps > 0]
    step_h = float(np.median(steps)) / SECONDS_PER_HOUR if steps.size else None
    auto = isinstance(constituents, str)
    names, dropped = _chosen_names(constituents, duration_h, step_h, rayleigh, min_constituents)
    if robust not in (True, False, "auto"):
        raise FitInputError(f"robust must be True, False or 'auto', got {robust!r}")
    epoch = 0.5 * (t[0] + t[-1]) if trend_epoch is None else float(to_unix_seconds([trend_epoch])[0]) \
        if not isinstance(trend_epoch, (int, float)) else float(trend_epoch)
    inferred, dropped = _resolve_inference(infer, auto, names, dropped, duration_h, rayleigh, step_h)
    chunk = int(chunk_size) if chunk_size else t.size
    if chunk < 1:
        raise FitInputError("chunk_size must be a positive number of samples")
    setup = dict(t=t, y=y, w=w, nodal=nodal, trend=trend, epoch=epoch, chunk=chunk,
                 iterations=robust_iterations, tuning=robust_tuning)

    # 1. ordinary least squares, then robust where asked or where the residual is heavy-tailed
    sol = _solve_record(names, inferred, robust=robust is True, **setup)
    use_robust, robust_reason = bool(robust), "asked for" if robust is True else "not asked for"
    if robust == "auto":
        use_robust, robust_reason = _heavy_tailed(sol.r)
        if use_robust:
            sol = _solve_record(names, inferred, robust=True, start=(sol.A, sol.rhs), design=sol.design,
                                **setup)
    # 2. long-period constituents the record cannot tell from its weather are left out
    if long_period_snr is None:
        long_period_snr = LONG_PERIOD_SNR
    if auto and long_period_snr:
        weak = _weak_long_period(sol, names, inferred, step_h, long_period_snr)
        if weak:
            dropped = dropped + [{"name": n, "reason": f"long-period, signal-to-noise ratio {snr:.2g} below "
                                  f"{long_period_snr:g}: at this period the record's weather (surges, gaps) "
                                  "cannot be told from tide; left out of the prediction"}
                                 for n, snr in weak.items()]
            # shrunk to zero: the others keep their joint estimate, the residual takes back what
            # the weak ones had fitted (a pass over their columns only)
            sol, names = _without(sol, names, list(weak), setup), [n for n in names if n not in weak]

    cons = _constituent_table(sol, names, inferred, step_h, confidence)
    r = sol.r
    var_y = float(np.var(y))
    meta = {
        "method": "robust least squares (IRLS, Cauchy weights)" if use_robust else "least squares",
        "robust_reason": robust_reason,
        "record_start": iso_utc(t[0]),
        "record_end": iso_utc(t[-1]),
        "n_samples": int(t.size),
        "duration_days": float(duration_h / 24.0),
        "sample_interval_s": float(step_h * SECONDS_PER_HOUR) if step_h else 0.0,
        "rayleigh": float(rayleigh),
        "constituent_selection": "auto" if auto else "given",
        "nodal": "daily f and u, interpolated" if nodal else "none",
        "rms": float(np.sqrt(np.mean(r**2))),
        "variance_explained": float(1.0 - np.var(r) / var_y) if var_y > 0 else 0.0,
        "condition_number": float(sol.cond),
        "dropped": dropped,
    }
    if inferred:
        meta["inferred"] = [{"name": d["name"], "from": d["from"], "ratio": float(d["ratio"]),
                             "phase_difference": float(d["dphase"]), "source": d["source"]}
                            for d in inferred]
    if use_robust:
        meta["robust_iterations"] = int(sol.iterations)
        meta["robust_tuning"] = float(robust_tuning)
    if confidence is not None:
        meta["confidence"] = float(confidence)
    if trend:
        meta["trend_epoch"] = iso_utc(epoch)
    if metadata:
        meta.update(metadata)
    beta = sol.beta
    kwargs = {"trend": float(beta[1]), "trend_epoch": float(epoch)} if trend else {}
    return TideModel(mean=float(beta[0]), constituents=cons, metadata=meta, **kwargs)


# --------------------------------------------------------------------------- steps of the fit


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
class _Solution:
    design: _Design
    beta: np.ndarray        # mean, [trend], then a, b per fitted constituent
    A: np.ndarray           # the final (weighted) normal matrix
    cond: float
    r: np.ndarray           # residual [m]
    iterations: int
    off: int                # index of the first constituent coefficient
    t: np.ndarray           # sample times [s]
    rhs: np.ndarray         # the final right-hand side X'Wy
    cov: np.ndarray | None = None  # (X'WX)^-1 when it is not the inverse of A (see _without)


def _solve_record(names, inferred, *, t, y, w, nodal, trend, epoch, chunk, robust, iterations,
                  tuning, start=None, design=None) -> _Solution:
    """Least squares (and IRLS when ``robust``) for the given constituents.

    ``start`` is ``(A, rhs)``: normal equations already accumulated for these parameters (a
    previous solve's, or the part of them a smaller model keeps), used instead of a first pass
    over the record; ``design`` the matching design, if already built.
    """
    if design is None:
        infer_cols = tuple((names.index(d["from"]), len(names) + i, d["ratio"], math.radians(d["dphase"]))
                           for i, d in enumerate(inferred))
        design = _build_design(names + [d["name"] for d in inferred], t[0], t[-1], nodal, trend, epoch,
                               infer_cols)
    if t.size < design.n_params + 2:
        raise FitInputError(f"only {t.size} valid samples for {design.n_params} unknowns; "
                            "the record needs more samples")
    A, rhs = start if start is not None else _accumulate(design, t, y, w, chunk)
    beta, cond = _solve(A, rhs)
    done = 0
    if robust:
        for done in range(1, iterations + 1):
            r = _residual(design, beta, t, y, chunk)
            rw = _cauchy_weights(r, tuning)
            A, rhs = _accumulate(design, t, y, rw if w is None else rw * w, chunk)
            new, cond = _solve(A, rhs)
            change = float(np.max(np.abs(new - beta)))
            beta = new
            if change < 1e-6:  # metres: a thousandth of a millimetre
                break
    r = _residual(design, beta, t, y, chunk)
    return _Solution(design, beta, A, cond, r, done, 1 + int(trend), t, rhs)


def _inverse(A: np.ndarray) -> np.ndarray:
    """(X'WX)^-1 from the Jacobi-scaled system, pseudo-inverted so that an undetermined
    direction shows as a wide interval rather than an error."""
    dsc = np.sqrt(np.diag(A))
    dsc[dsc == 0] = 1.0
    return np.linalg.pinv(A / dsc[:, None] / dsc[None, :], rcond=1.0 / MAX_CONDITION) / np.outer(dsc, dsc)


def _without(sol: _Solution, names, gone, setup) -> _Solution:
    """``sol`` with the fitted constituents ``gone`` set to zero: their coefficients and rows of
    the normal equations removed (the others' covariance is the joint one, as estimated), and
    what they fitted put back into the residual."""
    pos = [names.index(n) for n in gone]
    cols = np.array([sol.off + 2 * i + k for i in pos for k in (0, 1)])
    keep = np.setdiff1d(np.arange(sol.beta.size), cols)
    part = _build_design(list(gone), sol.t[0], sol.t[-1], setup["nodal"], False, 0.0)
    ab = sol.beta[cols]
    r = sol.r.copy()
    chunk = setup["chunk"]
    for s0 in range(0, sol.t.size, chunk):
        r[s0:s0 + chunk] += part.rows(sol.t[s0:s0 + chunk])[:, 1:] @ ab
    # the design keeps the others (with any inferred constituent riding on them)
    design = sol.design.keeping([n for n in names if n not in gone])
    cov = _inverse(sol.A)[np.ix_(keep, keep)]
    return _Solution(design, sol.beta[keep], sol.A[np.ix_(keep, keep)], sol.cond, r, sol.iterations,
                     sol.off, sol.t, sol.rhs[keep], cov)


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


def _heavy_tailed(r: np.ndarray) -> tuple[bool, str]:
    """Whether the ordinary residual is heavy-tailed, and the reason in words."""
    med = float(np.median(r))
    sigma = float(np.median(np.abs(r - med))) / _MAD_TO_SIGMA
    if sigma <= 0.0:
        return False, "residual without spread"
    share = float(np.mean(np.abs(r - med) > HEAVY_TAIL_SIGMAS * sigma))
    words = (f"{share:.2%} of the least-squares residual lies beyond {HEAVY_TAIL_SIGMAS:g} robust standard "
             f"deviations ({sigma * 1000:.0f} mm), against 0.006 % for Gaussian noise")
    if share > HEAVY_TAIL_SHARE:
        return True, "heavy-tailed residual (storms or faults in the record): " + words
    return False, "residual close to Gaussian: " + words


def _intervals(sol: _Solution, names, step_h, confidence):
    """Amplitude and phase half-widths and SNR of the fitted constituents (coloured noise)."""
    catalogue = _catalogue()
    off, beta, A = sol.off, sol.beta, sol.A
    a, b = beta[off::2], beta[off + 1::2]
    speeds = np.array([_speed(catalogue[n]) for n in names])
    spec = _ci.residual_band_spectrum(sol.t, sol.r, None if step_h is None else step_h * SECONDS_PER_HOUR,
                                      fitted_speeds=speeds)
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
