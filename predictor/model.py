"""TideModel: harmonic constants, the TOML constants file, and fast prediction.

The model is ``h(t) = Z0 + trend * (t - epoch) + sum_k f_k(t) H_k cos(V_k(t) + u_k(t) - g_k)``
with H in metres, g the Greenwich phase lag in degrees (times UTC), f and u the nodal
factor and correction (:mod:`predictor.nodal`) and V the equilibrium argument.

Fast prediction (the daemon's and the datum computation's hot path): for uniformly
spaced times the span is cut into one-day blocks.  Within a block f e^{iu} is
interpolated linearly between the block's ends (it drifts by at most 0.03 deg a day)
and every argument advances linearly at its speed, so the block values are the real
part of ``A @ E + dA @ (E j/B)`` with ``A[b, k] = f H exp(i (V + u - g))`` at each block
start, ``dA`` the change of ``f exp(iu)`` over the block, and ``E[k, j] =
exp(i omega_k j dt)`` shared by all blocks (and cached per step).  Both products are
real: ``Re(A E) = Re A Re E - Im A Im E``.  The ramp product is tiny (below 1e-4 m), so
it runs in single precision, and constituents whose ramps sum to under 1e-8 m (all
the solar ones, whose f and u never change) take f e^{iu} at mid-block instead.  For a
year at one-minute steps with 64 constituents this costs about one ``numpy.cos`` of the
samples, and stays within 0.001 mm of the direct evaluation.

The output of this package is an automated, unofficial aid: official predictions and
warnings, and the local authorities, come first.

References
----------
Foreman, M. G. G. (1977, rev. 2004). Manual for Tidal Heights Analysis and Prediction,
Pacific Marine Science Report 77-10 (prediction formula).
Schureman, P. (1958). Special Publication 98 (f and u).
"""
from __future__ import annotations

import copy
import datetime as dt
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import tomli_w

from predictor.astro import astronomical_arguments
from predictor.caution import PREDICTION, comment_lines
from predictor.constituents import doodson_matrix, get
from predictor.errors import ConstantsFileError
from predictor.extrema import high_low
from predictor.nodal import equilibrium_arguments, nodal_factors
from predictor.timeutil import iso_utc, to_unix_seconds
from predictor.tomlfile import read_toml

__all__ = ["TideModel", "ConstantsFileError", "to_unix_seconds", "SECONDS_PER_YEAR"]

SECONDS_PER_YEAR = 365.25 * 86400.0  # Julian year, the unit of the trend
_BLOCK_SECONDS = 86400.0  # block length of the fast path
_ROWS_PER_CHUNK = 65536  # rows per chunk on the general path (bounds memory)
_HALF_DAY = 43200.0
_BLOCKS_PER_CHUNK = 512
_RAMP_BUDGET = 1e-8  # [m] summed error allowed from dropped in-block nodal ramps
# Block phasor factors, shared by every model with the same constituent speeds, step and
# block length: a daemon following many stations whose constants have the same
# constituents keeps one copy (about 1.3 MiB for 37 constituents at one-minute steps)
# rather than one per station. Most recently used last; at most _PHASOR_CACHE_SIZE kept.
_PHASOR_CACHE: dict = {}
_PHASOR_CACHE_SIZE = 16

def _uniform(times):
    """(t0 [s], dt [s], n) when ``times`` are strictly uniform, else None."""
    if isinstance(times, pd.Series):
        times = pd.DatetimeIndex(times)
    if isinstance(times, pd.DatetimeIndex):
        if times.hasnans:
            return None
        if times.tz is not None:
            times = times.tz_convert("UTC").tz_localize(None)
        step = times.freq.nanos if isinstance(times.freq, pd.tseries.offsets.Tick) else 0
        if step > 0 and times.size >= 64:
            # a fixed (Tick) frequency guarantees uniform spacing: no need to scan
            ns = times.as_unit("ns").asi8
            return ns[0] / 1e9, step / 1e9, ns.size
        ns = times.as_unit("ns").asi8
    else:
        arr = np.asarray(times)
        if arr.ndim != 1 or not np.issubdtype(arr.dtype, np.datetime64) or np.isnat(arr).any():
            return None
        ns = arr.astype("datetime64[ns]", copy=False).view(np.int64)
    if ns.size < 64:
        return None
    d = np.diff(ns)
    if d[0] <= 0 or np.any(d != d[0]):
        return None
    return ns[0] / 1e9, d[0] / 1e9, ns.size


def _canonical_constituents(items, where: str) -> list[dict]:
    out, seen = [], {}
    for i, c in enumerate(items):
        c = dict(c) if isinstance(c, dict) else dict(vars(c))
        place = f"{where}constituents[{i}]"
        name = c.get("name")
        if not isinstance(name, str) or not name.strip():
            raise ConstantsFileError(f"{place}: missing 'name' (a constituent name such as \"M2\")")
        try:
            canon = get(name).name
        except KeyError as exc:
            raise ConstantsFileError(f"{place}: {exc.args[0]}") from None
        if canon in seen:
            raise ConstantsFileError(f"{place}: {canon} is listed twice (also constituents[{seen[canon]}])")
        seen[canon] = i
        for key in ("amplitude", "phase"):
            v = c.get(key)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) \
                    or not math.isfinite(float(v)):
                raise ConstantsFileError(f"{place} ({canon}): '{key}' must be a number "
                                         f"({'metres' if key == 'amplitude' else 'degrees'}), got {v!r}")
        if float(c["amplitude"]) < 0:
            raise ConstantsFileError(f"{place} ({canon}): 'amplitude' must not be negative")
        c["name"] = canon
        c["amplitude"] = float(c["amplitude"])
        c["phase"] = float(c["phase"]) % 360.0
        out.append(c)
    return out


@dataclass
class TideModel:
    """Harmonic tidal constants and their prediction.

    Parameters
    ----------
    mean : float
        Mean level Z0 [m] (at ``trend_epoch`` when there is a trend).
    constituents : list of dict
        Each with ``name``, ``amplitude`` H [m] and ``phase`` g [deg, Greenwich lag,
        UTC]; further keys (``amplitude_ci``, ``phase_ci``, ``snr``, ``speed``, ...) are
        kept as given.
    trend : float
        Linear trend [m/year] (Julian year).
    trend_epoch : float or str, optional
        Reference time of the trend: Unix seconds or ISO 8601; default
        ``metadata["trend_epoch"]`` or 2000-01-01T00:00Z.
    metadata : dict
        Free-form information (record span, fit statistics, station, ...).
    datum : str, optional
        Name of the datum the levels (``mean``) are measured from, as the constants file
        records it (e.g. ``"station"``, ``"chart"``); ``None`` when not recorded. The
        model never converts between datums: whoever knows the offsets does that
        (:meth:`referred_to`).
    """

    mean: float
    constituents: list = field(default_factory=list)
    trend: float = 0.0
    trend_epoch: float | None = None
    metadata: dict = field(default_factory=dict)
    datum: str | None = None

    def __post_init__(self):
        self.mean = float(self.mean)
        self.trend = float(self.trend or 0.0)
        self.metadata = dict(self.metadata or {})
        self.constituents = _canonical_constituents(self.constituents, "")
        epoch = self.trend_epoch if self.trend_epoch is not None else self.metadata.get("trend_epoch")
        if epoch is None:
            self.trend_epoch = 946684800.0  # 2000-01-01T00:00Z
        elif isinstance(epoch, (int, float)):
            self.trend_epoch = float(epoch)
        else:
            self.trend_epoch = float(to_unix_seconds([epoch])[0])

    # ------------------------------------------------------------------ accessors
    @property
    def names(self) -> list[str]:
        """Constituent names in model order."""
        return [c["name"] for c in self.constituents]

    def _arrays(self):
        H = np.array([c["amplitude"] for c in self.constituents], dtype=float)
        g = np.array([c["phase"] for c in self.constituents], dtype=float)
        speed = np.array([get(n).speed for n in self.names], dtype=float)
        omega = np.radians(speed) / 3600.0  # rad/s
        return H, g, omega

    def referred_to(self, datum: str, shift: float) -> "TideModel":
        """A copy whose levels are ``shift`` metres higher, recorded as on ``datum``.

        Parameters
        ----------
        datum : str
            Name of the datum the copy's levels are measured from.
        shift : float
            Height of the old datum's zero above the new one's [m] (added to ``mean``).
        """
        m = copy.deepcopy(self)
        m.mean = self.mean + float(shift)
        m.datum = datum
        return m

    def without_trend(self) -> "TideModel":
        """A copy with the trend removed (the astronomical tide about ``mean``)."""
        m = copy.deepcopy(self)
        m.trend = 0.0
        return m

    # ------------------------------------------------------------------ prediction
    def predict(self, times) -> np.ndarray:
        """Predicted level.

        Parameters
        ----------
        times : numpy.ndarray of datetime64 or pandas.DatetimeIndex
            Times (UTC; tz-aware converted, naive taken as UTC).  Numbers are taken as
            Unix seconds.

        Returns
        -------
        numpy.ndarray
            Level [m] on the model's datum, one per time (NaN for NaT).

        References
        ----------
        Foreman, M. G. G. (1977). Pacific Marine Science Report 77-10, prediction formula.
        """
        return self._evaluate(times, order=0)

    def predict_grid(self, t0: float, step: float, n: int) -> np.ndarray:
        """Predicted level at ``t0 + step * j``, ``j < n``, by the fast block path.

        Parameters
        ----------
        t0 : float
            First time [s, Unix UTC].
        step : float
            Interval [s], positive.
        n : int
            Number of times.

        Returns
        -------
        numpy.ndarray
            Level [m], shape (n,).
        """
        if not step > 0.0:
            raise ValueError(f"step must be a positive number of seconds, got {step!r}")
        return self._uniform_path(float(t0), float(step), int(n), 0)

    def predict_derivative(self, times) -> np.ndarray:
        """Analytic rate of change of the predicted level [m/s].

        Includes the slow drift of f and u (from their values 12 h either side), which
        matters at the 1e-3 level for the long-period constituents.
        """
        return self._evaluate(times, order=1)

    def high_low(self, start, end, step="10min"):
        """High and low waters between ``start`` and ``end``.

        Returns
        -------
        pandas.DataFrame
            Columns ``time`` (UTC, tz-aware), ``level`` [m], ``kind`` (high/low).

        See Also
        --------
        predictor.extrema.high_low
        """
        return high_low(self, start, end, step=step)

    def _evaluate(self, times, order: int) -> np.ndarray:
        uni = _uniform(times)
        if uni is not None:
            t0, dt, n = uni
            out = self._uniform_path(t0, dt, n, order)
        else:
            t = to_unix_seconds(times)
            out = np.full(t.shape, np.nan)
            ok = np.isfinite(t)
            out[ok] = self._general_path(t[ok], order)
            return out
        return out

    def _background(self, t, order):
        if order == 0:
            return self.mean + self.trend * (t - self.trend_epoch) / SECONDS_PER_YEAR
        if order == 1:
            return np.full(np.shape(t), self.trend / SECONDS_PER_YEAR)
        return np.zeros(np.shape(t))

    def _general_path(self, t: np.ndarray, order: int) -> np.ndarray:
        return self.evaluate_orders(t, (order,))[0]

    def evaluate_orders(self, t, orders=(0, 1, 2)) -> list:
        """Level and derivatives at arbitrary times, sharing one argument computation.

        Parameters
        ----------
        t : numpy.ndarray
            Unix seconds [s], UTC, finite.
        orders : sequence of int
            0 level [m], 1 rate [m/s], 2 second derivative [m/s^2].

        Returns
        -------
        list of numpy.ndarray
            One array per order, shaped like ``t``.
        """
        t = np.asarray(t, dtype=float).ravel()
        outs = [self._background(t, k).astype(float) for k in orders]
        if not self.constituents or t.size == 0:
            return outs
        H, g, omega = self._arrays()
        names = self.names
        need_rate = max(orders) >= 1
        for i in range(0, t.size, _ROWS_PER_CHUNK):
            tc = t[i:i + _ROWS_PER_CHUNK]
            base = H * np.exp(1j * np.radians(equilibrium_arguments(tc, names) - g))
            f, u = nodal_factors(tc, names)
            z = f * np.exp(1j * np.radians(u))
            if need_rate:
                # rate of f e^{iu} from +-12 h: the nodal drift, kept so derivatives are exact
                fp, up = nodal_factors(tc + _HALF_DAY, names)
                fm, um = nodal_factors(tc - _HALF_DAY, names)
                zr = (fp * np.exp(1j * np.radians(up)) - fm * np.exp(1j * np.radians(um))) / (2 * _HALF_DAY)
            for j, k in enumerate(orders):
                io = 1j * omega
                if k == 0:
                    c = z
                elif k == 1:
                    c = io * z + zr
                else:  # d2/dt2, neglecting the nodal curvature
                    c = io**2 * z + 2 * io * zr
                outs[j][i:i + _ROWS_PER_CHUNK] += np.real(base * c).sum(axis=1)
        return outs

    def _phasors(self, omega: np.ndarray, dt: float, B: int) -> tuple[np.ndarray, np.ndarray]:
        """Real block factors for ``E[k, j] = exp(i omega_k j dt)``, j < B, cached per
        (speeds, step, block length).

        Returns ``[Re E; Im E]`` (2k, B) in double precision and the in-block ramp
        ``[Re E; Im E] * j / B`` in single precision.  E is built as
        ``exp(i omega j_lo dt) * exp(i omega j_hi s dt)`` with ``j = j_hi s + j_lo``: two
        small exponentials and one product (relative error ~1e-16) instead of k*B
        exponentials.  The daemon predicts the same step over and over, so the factors
        are kept, shared by every model with the same speeds (``_PHASOR_CACHE``, the
        least recently used dropped first).
        """
        key = (omega.tobytes(), float(dt), int(B))
        cache = _PHASOR_CACHE
        hit = cache.pop(key, None)
        if hit is None:
            s = max(1, int(math.isqrt(B)))
            lo = np.exp(1j * np.outer(omega, dt * np.arange(s)))          # (k, s)
            hi = np.exp(1j * np.outer(omega, dt * s * np.arange(-(-B // s))))  # (k, B/s)
            E = (hi[:, :, None] * lo[:, None, :]).reshape(omega.size, -1)[:, :B]
            R0 = np.concatenate([E.real, E.imag])  # Re(A E) = Re(A) Re(E) - Im(A) Im(E)
            hit = (R0, (R0 * (np.arange(B) / B)).astype(np.float32))
            R0.setflags(write=False)
            hit[1].setflags(write=False)
            while len(cache) >= _PHASOR_CACHE_SIZE:
                cache.pop(next(iter(cache)), None)
        cache[key] = hit  # most recently used last
        return hit

    def _uniform_path(self, t0: float, dt: float, n: int, order: int) -> np.ndarray:
        if not self.constituents:
            return self._background(t0 + dt * np.arange(n), order)
        H, g, omega = self._arrays()
        io = 1j * omega
        names = self.names
        B = int(min(n, max(1, round(_BLOCK_SECONDS / dt))))
        nblocks = -(-n // B)
        R0, R_ramp = self._phasors(omega, dt, B)  # shared by every block
        D = doodson_matrix(names)
        # A constituent's ramp (the drift of f e^{iu} inside a block) is dropped when it
        # is below this, its block then taking f e^{iu} at the block's middle; solar
        # constituents (f = 1, u = 0) have none at all.  Their summed error stays below
        # _RAMP_BUDGET m (scaled by a typical semidiurnal speed per derivative order).
        budget = _RAMP_BUDGET * (1.4e-4 ** order)
        out = np.empty(nblocks * B)
        for b0 in range(0, nblocks, _BLOCKS_PER_CHUNK):
            b1 = min(nblocks, b0 + _BLOCKS_PER_CHUNK)
            edges = t0 + dt * B * np.arange(b0, b1 + 1, dtype=float)
            v = astronomical_arguments(edges[:-1]) @ D[:, :6].T + 90.0 * D[:, 6]
            # f e^{iu} at both ends of each block, interpolated linearly inside it, so
            # the slow drift of u (up to 0.03 deg/day for OO1) leaves no steps.
            f, u = nodal_factors(edges, names)
            z = f * np.exp(1j * np.radians(u))
            rot = H * np.exp(1j * np.radians(np.mod(v - g, 360.0)))
            dz = z[1:] - z[:-1]
            # d^n/dt^n of (z0 + dz s) e^{i omega t}, s = (t - tb) / (B dt), exactly:
            A0 = rot * (io**order * z[:-1] + order * io ** max(order - 1, 0) * dz / (B * dt))
            dA = rot * io**order * dz
            size = np.abs(dA).max(axis=0)  # worst ramp per constituent [m or m/s^n]
            order_k = np.argsort(size)
            drop = np.zeros(size.size, bool)
            drop[order_k[np.cumsum(size[order_k]) / 2 <= budget]] = True
            A0[:, drop] += dA[:, drop] / 2
            block = out[b0 * B:b1 * B].reshape(b1 - b0, B)
            np.matmul(np.concatenate([A0.real, -A0.imag], axis=1), R0, out=block)
            keep = np.concatenate([~drop, ~drop])
            if keep.any():
                # The ramps are below a few 1e-4 m, so single precision leaves ~1e-11 m
                # and halves the cost of this product.
                Lr = np.concatenate([dA.real, -dA.imag], axis=1)[:, keep].astype(np.float32)
                block += Lr @ R_ramp[keep]
        out = out[:n]
        if order == 0 and self.trend == 0.0:
            out += self.mean
        else:
            out += self._background(t0 + dt * np.arange(n), order)
        return out

    # ------------------------------------------------------------------ file I/O
    def to_dict(self) -> dict:
        """Plain data for TOML or JSON: mean, trend, constituents, metadata."""
        d = {"mean": self.mean}
        if self.datum:
            d["datum"] = self.datum
        if self.trend:
            d["trend"] = self.trend
            d["trend_epoch"] = iso_utc(self.trend_epoch)
        d["constituents"] = [dict(c) for c in self.constituents]
        if self.metadata:
            d["metadata"] = dict(self.metadata)
        return d

    @classmethod
    def from_dict(cls, data: dict, where: str = "") -> "TideModel":
        """Build from plain data (as read from TOML or JSON); ``where`` prefixes errors."""
        if not isinstance(data, dict):
            raise ConstantsFileError(f"{where}expected a table with 'mean' and 'constituents'")
        if "mean" not in data:
            raise ConstantsFileError(f"{where}missing top-level key 'mean' (mean level, metres)")
        mean = data["mean"]
        if isinstance(mean, bool) or not isinstance(mean, (int, float)):
            raise ConstantsFileError(f"{where}'mean' must be a number of metres, got {mean!r}")
        cons = data.get("constituents", [])
        if not isinstance(cons, list):
            raise ConstantsFileError(f"{where}'constituents' must be an array of tables ([[constituents]])")
        trend = data.get("trend", 0.0)
        if isinstance(trend, bool) or not isinstance(trend, (int, float)):
            raise ConstantsFileError(f"{where}'trend' must be a number of metres per year, got {trend!r}")
        epoch = data.get("trend_epoch")
        if epoch is not None and not isinstance(epoch, (int, float)):
            try:
                epoch = float(to_unix_seconds([_aware(epoch)])[0])
            except (ValueError, TypeError):
                raise ConstantsFileError(f"{where}'trend_epoch' must be an ISO 8601 time, got {epoch!r}") from None
        meta = data.get("metadata", {})
        if not isinstance(meta, dict):
            raise ConstantsFileError(f"{where}'metadata' must be a table")
        datum = data.get("datum")
        if datum is not None and (not isinstance(datum, str) or not datum.strip() or len(datum) > 60):
            raise ConstantsFileError(f"{where}'datum' must name the datum the mean is measured from "
                                     f"(e.g. \"station\" or \"chart\"), got {datum!r}")
        cons = _canonical_constituents(cons, where)
        return cls(mean=float(mean), constituents=cons, trend=float(trend), trend_epoch=epoch, metadata=meta,
                   datum=datum.strip() if datum else None)

    @classmethod
    def load(cls, path) -> "TideModel":
        """Read a constants file (TOML).

        Raises
        ------
        ConstantsFileError
            Unreadable file, bad TOML, missing keys or an unknown constituent; the
            message names the file and the entry.
        """
        path = Path(path)
        data = read_toml(path, "constants file", ConstantsFileError)
        return cls.from_dict(data, where=f"{path}: ")

    def save(self, path) -> None:
        """Write the constants file (TOML), with a header saying what it is."""

        data = _plain(self.to_dict())
        meta = data.pop("metadata", None)
        cons = data.pop("constituents")
        body = tomli_w.dumps(data)
        for c in cons:
            body += "\n[[constituents]]\n" + tomli_w.dumps(c)
        if meta:
            body += "\n" + tomli_w.dumps({"metadata": meta})
        header = (
            "# quaywatch harmonic constants: mean [m] above the datum named by 'datum' (when\n"
            "# recorded), amplitude [m], phase = Greenwich phase lag g [deg], times UTC.\n"
        ) + comment_lines(PREDICTION) + "\n"
        Path(path).write_text(header + body, encoding="utf-8")


def _aware(value):
    if isinstance(value, dt.datetime) and value.tzinfo is None:
        return value.replace(tzinfo=dt.timezone.utc)
    return value


def _plain(x):
    """Numpy scalars to Python, None dropped, so tomli_w can write it."""
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items() if v is not None}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x if v is not None]
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, float) and not math.isfinite(x):
        return str(x)
    return x
