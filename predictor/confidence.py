"""Confidence intervals of harmonic constants from the residual's spectrum (coloured noise).

The residual of a tidal fit is not white: surges and seiches put far more power at low
frequencies and near the tidal bands than a white-noise estimate assumes. Following
Pawlowicz, Beardsley & Lentz (2002), the residual is put on a uniform grid, its one-sided
power spectral density is averaged over a band around each tidal species, and the cosine
and sine coefficients of a constituent in band ``b`` are each given a variance of about
``S_b / T`` (``S_b`` the band's mean density, ``T`` the record length). The idea of treating
the non-tidal residual as band-limited noise around each species goes back to Munk &
Cartwright (1966).

References
----------
Pawlowicz, R., Beardsley, B., Lentz, S. (2002). Classical tidal harmonic analysis including
error estimates in MATLAB using T_TIDE. Computers & Geosciences 28, 929-937.
Munk, W. H., Cartwright, D. E. (1966). Tidal spectroscopy and prediction. Phil. Trans. R.
Soc. A 259, 533-581.
"""
from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

__all__ = [
    "BAND_HALF_WIDTH_CPD",
    "BandSpectrum",
    "species_band",
    "residual_band_spectrum",
    "coefficient_variance",
    "amplitude_phase_intervals",
]

# Half-width of each species band around n cycles per day. Diurnal constituents run from
# about 0.86 cpd (2Q1) to 1.08 cpd (OO1) and semidiurnal ones from 1.83 (EPS2) to 2.09
# (ETA2); 0.25 cpd holds every species with room for the noise either side. Our choice.
BAND_HALF_WIDTH_CPD = 0.25
# A band average over fewer spectral lines than this is too noisy to be useful; narrow
# bands of short records are widened to this many lines.
_MIN_LINES = 5


@dataclass(frozen=True)
class BandSpectrum:
    """Band-averaged one-sided PSD of a residual.

    Attributes
    ----------
    freq : ndarray
        Frequencies of the periodogram [cycles/hour].
    psd : ndarray
        One-sided power spectral density, corrected for gaps [m^2 / (cycle/hour)].
    duration_hours : float
        Effective record length: number of valid grid cells times the step [h].
    valid_fraction : float
        Fraction of grid cells holding data [1].
    step_hours : float
        Grid step [h].
    """

    freq: np.ndarray
    psd: np.ndarray
    duration_hours: float
    valid_fraction: float
    step_hours: float

    def band_mean(self, species: int) -> float:
        """Mean one-sided PSD over the band of a species [m^2 / (cycle/hour)]."""
        lo, hi = species_band(species)
        lo, hi = lo / 24.0, hi / 24.0
        f = self.freq
        sel = (f >= lo) & (f <= hi) & (f > 0)
        if sel.sum() < _MIN_LINES:
            # Short record: take the lines nearest the band centre instead.
            centre = species / 24.0
            order = np.argsort(np.abs(f - centre) + np.where(f > 0, 0.0, np.inf))
            sel = np.zeros_like(f, dtype=bool)
            sel[order[:_MIN_LINES]] = True
        return float(np.mean(self.psd[sel]))


def species_band(species: int) -> tuple[float, float]:
    """Frequency band used for the noise of a tidal species.

    Parameters
    ----------
    species : int
        Tidal species: 0 long-period, 1 diurnal, 2 semidiurnal, ...

    Returns
    -------
    (lo, hi) : tuple of float
        Band edges [cycles/day]. The long-period band starts just above zero frequency.

    References
    ----------
    Pawlowicz, Beardsley & Lentz (2002), section 3 (band-averaged residual spectra).
    """
    species = int(species)
    if species <= 0:
        return (0.0, BAND_HALF_WIDTH_CPD)
    return (species - BAND_HALF_WIDTH_CPD, species + BAND_HALF_WIDTH_CPD)


def _grid(t_seconds: np.ndarray, residual: np.ndarray, step_seconds: float | None):
    """Bin an irregular residual onto a uniform grid; empty cells are zero."""
    t = np.asarray(t_seconds, dtype=float)
    r = np.asarray(residual, dtype=float)
    ok = np.isfinite(t) & np.isfinite(r)
    t, r = t[ok], r[ok]
    if t.size < 2:
        raise ValueError("need at least two residual samples for a spectrum")
    if step_seconds is None:
        d = np.diff(np.unique(t))
        step_seconds = float(np.median(d))
    t0 = t.min()
    idx = np.rint((t - t0) / step_seconds).astype(np.int64)
    n = int(idx.max()) + 1
    counts = np.bincount(idx, minlength=n)
    sums = np.bincount(idx, weights=r - r.mean(), minlength=n)
    grid = np.zeros(n)
    filled = counts > 0
    grid[filled] = sums[filled] / counts[filled]
    return grid, filled, step_seconds


def residual_band_spectrum(t_seconds, residual, step_seconds: float | None = None) -> BandSpectrum:
    """One-sided PSD of a (possibly gappy, irregular) residual, ready for band averages.

    The residual is averaged into cells of ``step_seconds`` (default: the median sampling
    interval), empty cells are set to zero after removing the mean, and the Hann-windowed
    periodogram is divided by the fraction of filled cells so that the density describes
    the sea, not the gaps.

    Parameters
    ----------
    t_seconds : array_like
        Sample times, Unix seconds UTC [s].
    residual : array_like
        Observed minus fitted level [m].
    step_seconds : float, optional
        Grid step [s].

    Returns
    -------
    BandSpectrum

    References
    ----------
    Pawlowicz, Beardsley & Lentz (2002); Munk & Cartwright (1966).
    """
    grid, filled, step = _grid(t_seconds, residual, step_seconds)
    step_h = step / 3600.0
    p = float(filled.mean())
    # The Hann window keeps the strong low-frequency surge power from leaking into the
    # tidal bands.
    freq, psd = _hann_periodogram(grid, 1.0 / step_h)
    psd = psd / p
    return BandSpectrum(freq=freq, psd=psd, duration_hours=float(filled.sum()) * step_h,
                        valid_fraction=p, step_hours=step_h)


def _hann_periodogram(x: np.ndarray, fs: float):
    """One-sided PSD of ``x`` with a periodic Hann window, integrating to the variance.

    Same normalisation as ``scipy.signal.periodogram(x, fs, window="hann",
    detrend="constant", scaling="density")``, without importing scipy.signal (slow to load
    for a command-line tool).
    """
    n = x.size
    win = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)
    spec = np.abs(np.fft.rfft((x - x.mean()) * win)) ** 2 / (fs * np.sum(win**2))
    if n % 2 == 0:
        spec[1:-1] *= 2.0
    else:
        spec[1:] *= 2.0
    return np.fft.rfftfreq(n, d=1.0 / fs), spec


def coefficient_variance(spectrum: BandSpectrum, speeds_deg_per_hour) -> np.ndarray:
    """Variance of each constituent's cosine and sine coefficients from the band noise.

    Parameters
    ----------
    spectrum : BandSpectrum
        From :func:`residual_band_spectrum`.
    speeds_deg_per_hour : array_like
        Constituent speeds [deg/h].

    Returns
    -------
    ndarray
        ``var(a) = var(b) = S_b / T`` for each constituent [m^2], with ``S_b`` the mean
        one-sided density in the constituent's species band [m^2 h] and ``T`` the
        effective record length [h].

    References
    ----------
    Pawlowicz, Beardsley & Lentz (2002), eq. for the coloured-noise case.
    """
    speeds = np.atleast_1d(np.asarray(speeds_deg_per_hour, dtype=float))
    species = np.rint(speeds / 15.0).astype(int)  # 15 deg/h = one cycle per day
    cache: dict[int, float] = {}
    out = np.empty(speeds.size)
    for i, s in enumerate(species):
        if s not in cache:
            cache[s] = spectrum.band_mean(s)
        out[i] = cache[s] / spectrum.duration_hours
    return out


def amplitude_phase_intervals(a, b, variance, confidence: float = 0.95):
    """Amplitude and phase confidence half-widths from coefficient noise.

    Linearised propagation of independent, equal-variance errors in ``a = H cos g`` and
    ``b = H sin g``: ``var(H) = var`` and ``var(g) = var / H^2``.

    Parameters
    ----------
    a, b : array_like
        Cosine and sine coefficients [m].
    variance : array_like
        Variance of each of ``a`` and ``b`` [m^2].
    confidence : float
        Two-sided confidence level, e.g. 0.95.

    Returns
    -------
    amplitude_ci : ndarray
        Half-width of the amplitude interval [m].
    phase_ci : ndarray
        Half-width of the phase interval [deg], at most 180 (phase unknown).
    snr : ndarray
        Signal-to-noise ratio ``H^2 / var`` [1]; below about 2 the constituent is noise
        (Pawlowicz, Beardsley & Lentz 2002 use the same cut).

    References
    ----------
    Pawlowicz, Beardsley & Lentz (2002).
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    var = np.asarray(variance, dtype=float)
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    amp = np.hypot(a, b)
    sd = np.sqrt(var)
    amplitude_ci = z * sd
    with np.errstate(divide="ignore", invalid="ignore"):
        phase_ci = np.degrees(z * sd / amp)
        snr = amp**2 / var
    phase_ci = np.where(np.isfinite(phase_ci), np.minimum(phase_ci, 180.0), 180.0)
    snr = np.where(np.isfinite(snr), snr, 0.0)
    return amplitude_ci, phase_ci, snr
