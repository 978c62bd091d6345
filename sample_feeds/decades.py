"""A multi-decade hourly history for the invented port of Port Dunmerrow (demo and tests).

Everything here is invented: the port, its tide (the constants in ``demo/port.toml``), the rise
of its sea level, its storms and its gauge's history. The history is generated on demand with a
fixed seed and is never written into the repository.

The level on the station datum [m] at hourly time t is::

    tide(t) + rise (t - epoch) + nodal(t) + anomaly(t) + weather(t) + sensor noise
            + max over storms s of X_s g(t - t_s)       [+ datum step, - outages]

- ``tide``: the harmonic formula with the astronomical arguments and nodal factors written out
  in ``sample_feeds/generate.py`` (an independent synthesis: nothing from ``predictor``);
- ``rise``: a linear rise of sea level [m/year] relative to the epoch (the end of the record);
- ``nodal``: an 18.61-year term in mean sea level, ``A cos N`` with N the longitude of the
  Moon's ascending node (invented amplitude);
- ``anomaly``: slow mean-sea-level variability, a stationary Ornstein-Uhlenbeck (AR(1)) process
  with a correlation time of weeks, which makes monthly means serially correlated;
- ``weather``: short-term non-tidal variability, AR(1) with a correlation time of hours;
- storms: a Poisson process in time (uniform over the year) with peak surges
  ``X = floor + GPD(scale, shape)`` and a Gaussian time profile ``g`` of a few hours' width;
  overlapping storms combine by their maximum (so the truth below is exact);
- a datum step: readings before a given time are low by a given offset (a gauge replaced and
  its zero set anew), and outages: spells with no data at all.

Truth. The true trend is ``rise``. The true return levels are those of the annual maximum of
the hourly level with the rise frozen at the epoch (a stationary sea at the epoch's mean sea
level, on the current station datum). They are computed by conditional Monte Carlo: background
years (tide from a pool of 57 consecutive years about the epoch, three nodal cycles, plus fresh
anomaly, weather and sensor noise) are simulated, and for each the probability that no storm lifts the
level over z is integrated over the storm size exactly::

    P(annual max <= z) = E_years[ 1{background max <= z} exp(-rate E_t0[ S_X(x*(z, t0)) ]) ]
    x*(z, t0) = min_k (z - background_k) / g(t_k - t0)

(a Poisson process of storms that combine by maximum; S_X the survival function of the peak
surge), averaged over storm times t0 spread evenly through each year. The Monte Carlo standard
error of each level is reported beside it.

References
----------
Coles, S. (2001). An Introduction to Statistical Modeling of Extreme Values. Springer
(generalised Pareto distribution, sec. 4.2; Poisson process of exceedances, sec. 7).
Pugh, D., Woodworth, P. (2014). Sea-Level Science. Cambridge University Press (the 18.61-year
nodal term in mean sea level, ch. 4 and 10).
Uhlenbeck, G. E., Ornstein, L. S. (1930). On the theory of the Brownian motion. Phys. Rev. 36
(the AR(1) / Ornstein-Uhlenbeck process).
"""
from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import optimize, signal

HERE = Path(__file__).resolve().parent
SEED = 19850101          # the record's seed
TRUTH_SEED = 18610000    # the truth's Monte Carlo seed (independent of the record's)
HOUR = 3600.0
DAY = 86400.0
YEAR = 365.25 * DAY      # Julian year [s]
HOURS_PER_YEAR = 8766    # 365.25 * 24
POOL_YEARS = 57          # years of tide behind the truth (three nodal cycles)


def _load_generate():
    """``sample_feeds/generate.py`` (not a package) loaded by path, once."""
    name = "sample_feeds_generate"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, HERE / "generate.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


_gen = _load_generate()


@dataclass(frozen=True)
class DecadesSpec:
    """What the history is made of (every number invented).

    Parameters
    ----------
    start_year, years : int
        First calendar year and number of years of the record.
    rise_mm_per_year : float
        Linear rise of mean sea level [mm/year].
    nodal_amplitude_m : float
        Amplitude of the 18.61-year term in mean sea level [m].
    anomaly_sd_m, anomaly_tau_days : float
        Standard deviation [m] and correlation time [day] of slow mean-sea-level variability.
    weather_sd_m, weather_tau_hours : float
        Standard deviation [m] and correlation time [h] of short-term non-tidal variability.
    sensor_sd_m : float
        White sensor noise [m].
    storm_rate_per_year : float
        Mean number of storms a year (Poisson).
    storm_floor_m, storm_scale_m, storm_shape : float
        Peak surge X = floor + Y, Y generalised Pareto with scale [m] and shape (Coles' xi).
    storm_width_hours : float
        Standard deviation of the Gaussian time profile of a storm surge [h].
    datum_step : tuple of (str, float) or None
        (ISO time, offset [m]): readings before that time are low by the offset.
    outages : int
        Number of random outages (days to weeks), plus one of four months.
    """

    start_year: int = 1985
    years: int = 40
    rise_mm_per_year: float = 2.8
    nodal_amplitude_m: float = 0.009
    anomaly_sd_m: float = 0.035
    anomaly_tau_days: float = 40.0
    weather_sd_m: float = 0.06
    weather_tau_hours: float = 15.0
    sensor_sd_m: float = 0.005
    storm_rate_per_year: float = 20.0
    storm_floor_m: float = 0.0
    storm_scale_m: float = 0.18
    storm_shape: float = -0.05
    storm_width_hours: float = 8.0
    datum_step: tuple | None = ("2003-06-17T10:00:00", 0.042)
    outages: int = 10

    @property
    def epoch(self) -> pd.Timestamp:
        """End of the record (UTC): the rise is zero here, the truth is for this sea level."""
        return pd.Timestamp(f"{self.start_year + self.years}-01-01", tz="UTC")


@dataclass
class DecadesTruth:
    """What was put into a history.

    Attributes
    ----------
    spec : DecadesSpec
    epoch : pandas.Timestamp
        Reference time of the rise (UTC) [-].
    mean_sea_level_m : float
        Mean sea level at the epoch on the (current) station datum [m].
    rise_mm_per_year : float
        True linear rise [mm/year].
    datum_steps : list of dict
        ``time`` (Timestamp, UTC) and ``offset_m`` [m] (the record jumps up by it there).
    outages : list of tuple
        (start, end) Timestamps of the spells without data.
    return_levels : pandas.DataFrame or None
        ``period`` [year], ``level`` [m, station datum], ``mc_se`` [m] (Monte Carlo error).
    """

    spec: DecadesSpec
    epoch: pd.Timestamp
    mean_sea_level_m: float
    rise_mm_per_year: float
    datum_steps: list = field(default_factory=list)
    outages: list = field(default_factory=list)
    return_levels: pd.DataFrame | None = None


# ----------------------------------------------------------------------------- processes
def _port() -> dict:
    return _gen.load_port()


def _tide(t_s: np.ndarray, port: dict) -> np.ndarray:
    """Astronomical tide [m, station datum] at Unix seconds ``t_s`` (generate.py's synthesis)."""
    mean_sd = port["tide"]["mean"] + port["datums"]["chart_datum"]
    return _gen.tide(t_s.astype("datetime64[s]"), mean_sd, port["tide"]["constituents"])


def _nodal(t_s: np.ndarray, spec: DecadesSpec) -> np.ndarray:
    """Nodal term of mean sea level [m]: A cos N (N the Moon's node longitude)."""
    N = _gen.astro_arguments(t_s.astype("datetime64[s]"))["N"]
    return spec.nodal_amplitude_m * np.cos(np.radians(N))


def _ar1(rng: np.random.Generator, n: int, step_s: float, sd: float, tau_s: float,
         m: int = 1) -> np.ndarray:
    """``m`` stationary AR(1) series of length ``n`` [m], sd ``sd``, correlation time ``tau_s``."""
    phi = np.exp(-step_s / tau_s)
    e = rng.normal(0.0, sd * np.sqrt(1.0 - phi * phi), (m, n))
    e[:, 0] = rng.normal(0.0, sd, m)
    return signal.lfilter([1.0], [1.0, -phi], e, axis=1)


def _storm_sizes(rng: np.random.Generator, n: int, spec: DecadesSpec) -> np.ndarray:
    """Peak surges [m]: floor + generalised Pareto by inversion (Coles 2001, eq. 4.2)."""
    u = rng.random(n)
    xi, s = spec.storm_shape, spec.storm_scale_m
    y = -s * np.log(u) if xi == 0 else s / xi * (u ** (-xi) - 1.0)
    return spec.storm_floor_m + y


def _storm_survival(x: np.ndarray, spec: DecadesSpec) -> np.ndarray:
    """P(X > x) for the peak surge [1]."""
    y = np.maximum(np.asarray(x, dtype=float) - spec.storm_floor_m, 0.0)
    xi, s = spec.storm_shape, spec.storm_scale_m
    if xi == 0:
        return np.exp(-y / s)
    base = np.maximum(1.0 + xi * y / s, 0.0)
    with np.errstate(divide="ignore"):
        return np.where(base > 0, base ** (-1.0 / xi), 0.0)


def _half_window(spec: DecadesSpec) -> int:
    """Half-width [h] of a storm's window: where its profile is above 1e-4."""
    return int(np.ceil(spec.storm_width_hours * np.sqrt(2 * np.log(1e4))))


# ----------------------------------------------------------------------------- the record
def make_history(spec: DecadesSpec | None = None, seed: int = SEED,
                 return_periods=None) -> tuple[pd.Series, DecadesTruth]:
    """The hourly history and what was put into it.

    Parameters
    ----------
    spec : DecadesSpec, optional
        What the history is made of; the defaults by default.
    seed : int
        Seed of the record's random numbers.
    return_periods : sequence of float, optional
        Return periods [year] whose true levels are computed into ``truth.return_levels``
        (a few seconds; see :func:`true_return_levels`).

    Returns
    -------
    levels : pandas.Series
        Hourly levels [m, station datum as read at the time], UTC DatetimeIndex; outages are
        missing rows.
    truth : DecadesTruth
    """
    spec = spec or DecadesSpec()
    port = _port()
    rng = np.random.default_rng(seed)
    t0 = int(pd.Timestamp(f"{spec.start_year}-01-01", tz="UTC").timestamp())
    t1 = int(spec.epoch.timestamp())
    t = np.arange(t0, t1, int(HOUR), dtype=np.int64)
    n = t.size
    level = _tide(t, port) + _nodal(t, spec)
    level += spec.rise_mm_per_year * 1e-3 * (t - t1) / YEAR
    level += _ar1(rng, n, HOUR, spec.anomaly_sd_m, spec.anomaly_tau_days * DAY)[0]
    level += _ar1(rng, n, HOUR, spec.weather_sd_m, spec.weather_tau_hours * HOUR)[0]
    level += rng.normal(0.0, spec.sensor_sd_m, n)
    level += _storms(rng, n, spec)
    steps = []
    if spec.datum_step is not None:
        when = pd.Timestamp(spec.datum_step[0], tz="UTC")
        level[t < when.timestamp()] -= spec.datum_step[1]
        steps.append({"time": when, "offset_m": float(spec.datum_step[1])})
    keep, outages = _outages(rng, t, spec)
    levels = pd.Series(level[keep], index=pd.to_datetime(t[keep], unit="s", utc=True), name="level")
    truth = DecadesTruth(spec=spec, epoch=spec.epoch,
                         mean_sea_level_m=port["tide"]["mean"] + port["datums"]["chart_datum"],
                         rise_mm_per_year=spec.rise_mm_per_year, datum_steps=steps, outages=outages)
    if return_periods is not None:
        truth.return_levels = true_return_levels(return_periods, spec)
    return levels, truth


def _storms(rng: np.random.Generator, n: int, spec: DecadesSpec) -> np.ndarray:
    """Surge of the storms [m] on ``n`` hourly samples: max over storms of X g(t - t_s)."""
    count = rng.poisson(spec.storm_rate_per_year * n / HOURS_PER_YEAR)
    centre = rng.random(count) * n                      # [h], continuous
    size = _storm_sizes(rng, count, spec)
    K = _half_window(spec)
    k = np.floor(centre).astype(np.int64)[:, None] + np.arange(-K, K + 2)[None, :]
    g = np.exp(-0.5 * ((k - centre[:, None]) / spec.storm_width_hours) ** 2)
    inside = (k >= 0) & (k < n)
    surge = np.zeros(n)
    np.maximum.at(surge, k[inside], (size[:, None] * g)[inside])
    return surge


def _outages(rng: np.random.Generator, t: np.ndarray, spec: DecadesSpec):
    """Mask of the samples kept and the list of outages (start, end) as Timestamps."""
    keep = np.ones(t.size, bool)
    spans = []
    if spec.outages:
        lengths = np.concatenate([rng.uniform(1, 30, spec.outages), [122.0]]) * 24  # [h]
        starts = rng.integers(0, t.size - int(lengths.max()) - 1, lengths.size)
        for s, length in zip(starts, lengths.astype(int)):
            keep[s:s + length] = False
            spans.append((pd.Timestamp(int(t[s]), unit="s", tz="UTC"),
                          pd.Timestamp(int(t[s + length - 1]), unit="s", tz="UTC")))
    return keep, sorted(spans)


# ----------------------------------------------------------------------------- the truth
def true_return_levels(periods, spec: DecadesSpec | None = None, years: int = 1140,
                       storms_per_year: int = 40, seed: int = TRUTH_SEED,
                       pool_years: int = POOL_YEARS) -> pd.DataFrame:
    """True return levels of the annual maximum of the hourly level at the epoch.

    Parameters
    ----------
    periods : sequence of float
        Return periods [year] (> 1): the level whose annual exceedance probability is 1/T.
    spec : DecadesSpec, optional
    years : int
        Background years simulated (a multiple of ``pool_years`` uses the pool evenly).
    storms_per_year : int
        Storm times per simulated year over which the storm term is averaged.
    seed : int
    pool_years : int
        Years of tide the background years cycle through, centred on the epoch. Many nodal
        (18.61-year) and perigee (8.85-year) cycles: the annual maximum of the tide alone
        differs by centimetres between one 19-year span and another.

    Returns
    -------
    pandas.DataFrame
        ``period`` [year], ``level`` [m, current station datum], ``mc_se`` [m].

    References
    ----------
    Coles, S. (2001), sec. 7.3 (Poisson process: P(no event) = exp(-rate x probability)).
    """
    spec = spec or DecadesSpec()
    bg_max, xstar_fn = _truth_sampler(spec, years, storms_per_year, seed, pool_years)
    rate = spec.storm_rate_per_year
    batches = np.array_split(np.arange(years), 10)

    def cdf(z, rows=slice(None)):
        xs = xstar_fn(z, rows)
        s = _storm_survival(xs, spec).mean(axis=1)
        return np.where(bg_max[rows] <= z, np.exp(-rate * s), 0.0)

    out = []
    for T in np.atleast_1d(np.asarray(periods, dtype=float)):
        target = 1.0 - 1.0 / T
        lo, hi = float(np.median(bg_max)) - 0.5, float(np.max(bg_max)) + 0.5
        while cdf(hi).mean() < target:
            hi += 0.5
        z = optimize.brentq(lambda v: cdf(v).mean() - target, lo, hi, xtol=1e-4)
        # Monte Carlo error: spread of the batch CDFs at z over the slope of the CDF
        fb = np.array([cdf(z, b).mean() for b in batches])
        slope = (cdf(z + 0.005).mean() - cdf(z - 0.005).mean()) / 0.01
        se = float(np.std(fb, ddof=1) / np.sqrt(len(batches)) / max(slope, 1e-12))
        out.append((float(T), float(z), se))
    return pd.DataFrame(out, columns=["period", "level", "mc_se"])


def _truth_sampler(spec: DecadesSpec, years: int, per_year: int, seed: int, pool_years: int):
    """Background annual maxima [m] and a function z -> x*(z) of shape (years, per_year)."""
    port = _port()
    rng = np.random.default_rng(seed)
    K = _half_window(spec)
    first = spec.start_year + spec.years - pool_years // 2
    pool_start = int(pd.Timestamp(f"{first}-01-01", tz="UTC").timestamp())
    n = HOURS_PER_YEAR + 2 * K
    t_pool = pool_start - K * int(HOUR) + np.arange(pool_years * HOURS_PER_YEAR + 2 * K) * int(HOUR)
    pool = _tide(t_pool, port) + _nodal(t_pool, spec)
    bg_max = np.empty(years)
    offsets = np.arange(-K, K + 2)
    windows = np.empty((years, per_year, offsets.size))
    profiles = np.empty_like(windows)
    for y in range(years):
        i0 = (y % pool_years) * HOURS_PER_YEAR
        bg = pool[i0:i0 + n].copy()
        bg += _ar1(rng, n, HOUR, spec.anomaly_sd_m, spec.anomaly_tau_days * DAY)[0]
        bg += _ar1(rng, n, HOUR, spec.weather_sd_m, spec.weather_tau_hours * HOUR)[0]
        bg += rng.normal(0.0, spec.sensor_sd_m, n)
        bg_max[y] = bg[K:K + HOURS_PER_YEAR].max()
        # storm centres spread evenly over the year (stratified), anywhere within the hour
        centre = K + (np.arange(per_year) + rng.random(per_year)) * (HOURS_PER_YEAR - 1) / per_year
        k = np.floor(centre).astype(np.int64)[:, None] + offsets[None, :]
        windows[y] = bg[k]
        profiles[y] = np.exp(-0.5 * ((k - centre[:, None]) / spec.storm_width_hours) ** 2)

    def xstar(z, rows=slice(None)):
        return np.min((z - windows[rows]) / profiles[rows], axis=2)

    return bg_max, xstar


# ----------------------------------------------------------------------------- command line
def write_csv(path: Path, levels: pd.Series) -> None:
    """``time,level`` CSV (ISO 8601 UTC with ``Z``; metres, millimetre resolution)."""
    times = levels.index.strftime("%Y-%m-%dT%H:%M:%SZ")
    with open(path, "w", newline="\n") as fh:
        fh.write("time,level\n")
        fh.writelines(f"{t},{v:.3f}\n" for t, v in zip(times, levels.to_numpy()))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path, help="CSV file to write (time,level)")
    ap.add_argument("--years", type=int, default=DecadesSpec.years)
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--truth", action="store_true", help="also print the true return levels")
    args = ap.parse_args(argv)
    spec = dataclasses.replace(DecadesSpec(), years=args.years)
    levels, truth = make_history(spec, seed=args.seed,
                                 return_periods=(2, 5, 10, 20, 50, 100) if args.truth else None)
    write_csv(args.out, levels)
    print(f"{len(levels)} hourly levels {levels.index[0]} to {levels.index[-1]} -> {args.out}")
    print(f"true rise {truth.rise_mm_per_year} mm/year; datum steps {truth.datum_steps}")
    if truth.return_levels is not None:
        print(truth.return_levels.to_string(index=False))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
