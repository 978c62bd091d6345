"""Synthetic gauge records for the quality-control tests (an invented port, invented numbers).

The tide is a sum of four constituents at their standard speeds (degrees per hour,
Schureman 1958, Table 2: M2 28.9841042, S2 30.0, K1 15.0410686, O1 13.9430356);
the noise is coloured (first-order autoregressive, hours of memory) plus white
sensor noise, rounded to the 1 mm resolution of a typical gauge logger.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from units import mm, hour, day


SPEEDS = {"M2": 28.9841042, "S2": 30.0, "K1": 15.0410686, "O1": 13.9430356}  # deg/h, Schureman (1958)
AMPS = {"M2": 1.20, "S2": 0.40, "K1": 0.12, "O1": 0.09}                     # invented port, m
PHASES = {"M2": 95.0, "S2": 130.0, "K1": 210.0, "O1": 190.0}                 # invented, deg
MEAN = 2.50                                                                   # m above station datum
START = pd.Timestamp("2024-03-01T00:00:00Z")


class SynthModel:
    """A stand-in for predictor.TideModel: ``predict(times) -> m``, clock shift optional."""

    def __init__(self, shift_s: float = 0.0, scale: float = 1.0, amps=None):
        self.shift_s = shift_s
        self.scale = scale
        self.amps = dict(AMPS if amps is None else amps)

    def predict(self, times) -> np.ndarray:
        idx = pd.DatetimeIndex(times)
        idx = idx.tz_localize("UTC") if idx.tz is None else idx.tz_convert("UTC")
        t_h = (idx.as_unit("ns").asi8 / 1e9 - START.value / 1e9 - self.shift_s) / hour
        out = np.full(len(idx), MEAN)
        for k, w in SPEEDS.items():
            out = out + self.scale * self.amps[k] * np.cos(np.radians(w * t_h - PHASES[k]))
        return out


def times(days: float, step_s: float = 60, start=START) -> pd.DatetimeIndex:
    n = int(round(days * day / step_s))
    return pd.date_range(start, periods=n, freq=pd.Timedelta(seconds=step_s))


def red_noise(n: int, step_s: float, sigma: float, memory_s: float, rng) -> np.ndarray:
    """First-order autoregressive noise with standard deviation ``sigma`` [m]."""
    phi = np.exp(-step_s / memory_s)
    e = rng.normal(0.0, sigma * np.sqrt(1 - phi**2), n)
    out = np.empty(n)
    acc = rng.normal(0.0, sigma)
    # Recursive filter; scipy's lfilter is the vectorised form.
    from scipy.signal import lfilter
    out, _ = lfilter([1.0], [1.0, -phi], e, zi=[acc * phi])
    return out


def surge(idx: pd.DatetimeIndex, peak_time, height: float, width_h: float) -> np.ndarray:
    """A smooth storm surge: Gaussian in time, ``height`` [m], e-folding ``width_h`` [h]."""
    dt_h = (idx - pd.Timestamp(peak_time)).total_seconds().to_numpy() / hour
    return height * np.exp(-0.5 * (dt_h / width_h) ** 2)


def record(days: float = 10, step_s: float = 60, seed: int = 7, red_sigma: float = 0.03,
           white_sigma: float = 0.004, surge_height: float = 0.0, surge_peak=None,
           surge_width_h: float = 5.0, model: SynthModel | None = None, start=START):
    """A clean gauge record: (level Series [m], predicted ndarray [m])."""
    rng = np.random.default_rng(seed)
    idx = times(days, step_s, start)
    model = model or SynthModel()
    tide = model.predict(idx)
    level = tide + red_noise(len(idx), step_s, red_sigma, 6 * hour, rng) + rng.normal(0, white_sigma, len(idx))
    if surge_height:
        level = level + surge(idx, surge_peak or idx[len(idx) // 2], surge_height, surge_width_h)
    level = np.round(level / mm) * mm
    return pd.Series(level, index=idx, name="level"), SynthModel().predict(idx)


def test_red_noise_has_the_requested_spread():
    # Check of the generator itself: sample standard deviation of a long AR(1) series.
    rng = np.random.default_rng(1)
    x = red_noise(200_000, 60, 0.03, 6 * hour, rng)
    assert abs(x.std() - 0.03) < 3 * mm
