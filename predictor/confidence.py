"""Confidence intervals of harmonic constants from the residual's spectrum (coloured noise).

The residual of a tidal fit is not white: surges and seiches put far more power at low
frequencies and near the tidal bands than a white-noise estimate assumes. So the residual
is put on a uniform grid, its one-sided
power spectral density is averaged over a band around each tidal species, and the cosine
and sine coefficients of a constituent in band ``b`` are each given a variance of about
``S_b / T`` (``S_b`` the band's mean density, ``T`` the record length). The idea of treating
the non-tidal residual as band-limited noise around each species goes back to Munk &
Cartwright (1966).

References
----------
Munk, W. H., Cartwright, D. E. (1966). Tidal spectroscopy and prediction. Phil. Trans. R.
Soc. A 259, 533-581.
Pugh, D., Woodworth, P. (2014). Sea-Level Science. Cambridge University Press, ch. 4
(harmonic analysis and the non-tidal residual as noise in each tidal band).
"""
from __future__ import annotations

from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

__all__ = [
    "BAND_HALF_WIDTH_CPD",
    "BandSpectrum",
    "MAX_CELLS",
    "ResidualGrid",
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
#: Most cells of the residual's grid (2**20, about 8 MiB a float array): a longer record is
#: averaged into cells of a whole number of sampling intervals, so the spectrum's memory does
#: not grow with the record (19 years of one-minute data go into 10-minute cells). The bands
#: reach 8.25 cycles/day at most, far below the Nyquist frequency of such cells (72 cpd);
#: averaging over a cell lowers the density of a red residual by ``1 - sinc^2(f cell)``, at
#: most 1 % at 8 cpd and 0.06 % at 2 cpd for 10-minute cells (a white residual's aliases make
#: it up exactly). Our choice.
MAX_CELLS = 2 ** 20


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
    usable : ndarray of bool, optional
        Lines to average; False next to fitted constituents, where the fit itself has
        removed the noise (the residual is orthogonal to the fitted sinusoids).
    sample_hours : float, optional
        Sampling interval of the record [h] when the grid's cells are longer (a long record
        averaged into cells of several samples); the white-noise equivalent of the density
        is per sample. None: the grid step.
    """

    freq: np.ndarray
    psd: np.ndarray
    duration_hours: float
    valid_fraction: float
    step_hours: float
    usable: np.ndarray | None = None
    sample_hours: float | None = None

    def band_mean(self, species: int) -> float:
        """Mean one-sided PSD over the band of a species [m^2 / (cycle/hour)]."""
        lo, hi = species_band(species)
        lo, hi = lo / 24.0, hi / 24.0
        f = self.freq
        sel = (f >= lo) & (f <= hi) & (f > 0)
        if self.usable is not None and (sel & self.usable).sum() >= _MIN_LINES:
            sel &= self.usable
        if sel.sum() < _MIN_LINES:
            # Short record: take the lines nearest the band centre instead.
            centre = species / 24.0
            order = np.argsort(np.abs(f - centre) + np.where(f > 0, 0.0, np.inf))
            sel = np.zeros_like(f, dtype=bool)
            sel[order[:_MIN_LINES]] = True
        return float(np.mean(self.psd[sel]))


    def mean_around(self, freq_cph: float, half_width_cpd: float = BAND_HALF_WIDTH_CPD) -> float:
        """Mean one-sided PSD over a window centred on one frequency [m^2 / (cycle/hour)].

        The residual's spectrum is red: across a species band it can fall by a factor of
        two. The band mean describes the band centre, so a constituent on the band's
        low-frequency side (Q1, O1, N2, M4) would get too little noise and too narrow an
        interval; a window of the same width centred on the constituent follows the slope.
        """
        lo, hi = freq_cph - half_width_cpd / 24.0, freq_cph + half_width_cpd / 24.0
        f = self.freq
        sel = (f >= lo) & (f <= hi) & (f > 0)
        if self.usable is not None and (sel & self.usable).sum() >= _MIN_LINES:
            sel &= self.usable
        if sel.sum() < _MIN_LINES:
            order = np.argsort(np.abs(f - freq_cph) + np.where(f > 0, 0.0, np.inf))
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
    Munk & Cartwright (1966) (the residual as band-limited noise around each species).
    """
    species = int(species)
    if species <= 0:
        return (0.0, BAND_HALF_WIDTH_CPD)
    return (species - BAND_HALF_WIDTH_CPD, species + BAND_HALF_WIDTH_CPD)


class ResidualGrid:
    """A residual averaged into uniform cells, filled chunk by chunk.

    The cells are ``step_seconds`` long (the record's sampling interval), or a whole number
    of them when the record would need more than ``max_cells``: memory is bounded by
    ``max_cells`` whatever the record's length. Empty cells are zero once the mean is
    removed (:meth:`spectrum`).

    Parameters
    ----------
    t_first, t_last : float
        First and last sample time of the record [s, Unix UTC].
    step_seconds : float
        Sampling interval [s].
    max_cells : int
        Most cells (:data:`MAX_CELLS`).
    """

    def __init__(self, t_first: float, t_last: float, step_seconds: float, max_cells: int = MAX_CELLS):
        step = float(step_seconds)
        if not (step > 0.0 and np.isfinite(step)):
            raise ValueError(f"the grid step must be a positive number of seconds, got {step_seconds!r}")
        cells = int(np.rint((float(t_last) - float(t_first)) / step)) + 1
        self.sample_seconds = step
        self.cell_seconds = step * max(1, -(-cells // int(max_cells)))
        self.t0 = float(t_first)
        self.n = int(np.rint((float(t_last) - self.t0) / self.cell_seconds)) + 1
        self.sums = np.zeros(self.n)
        self.counts = np.zeros(self.n, dtype=np.int64)
        self.total = 0.0
        self.count = 0

    def add(self, t_seconds, residual) -> None:
        """Add samples: times [s, Unix UTC] within the record's span and residuals [m]."""
        t = np.asarray(t_seconds, dtype=float).ravel()
        r = np.asarray(residual, dtype=float).ravel()
        ok = np.isfinite(t) & np.isfinite(r)
        if not ok.all():
            t, r = t[ok], r[ok]
        if t.size == 0:
            return
        idx = np.clip(np.rint((t - self.t0) / self.cell_seconds).astype(np.int64), 0, self.n - 1)
        lo, hi = int(idx.min()), int(idx.max()) + 1
        self.sums[lo:hi] += np.bincount(idx - lo, weights=r, minlength=hi - lo)
        self.counts[lo:hi] += np.bincount(idx - lo, minlength=hi - lo)
        self.total += float(r.sum())
        self.count += int(r.size)

    def spectrum(self, fitted_speeds=None) -> "BandSpectrum":
        """The one-sided PSD of the cells (see :func:`residual_band_spectrum`)."""
        if self.count < 2:
            raise ValueError("need at least two residual samples for a spectrum")
        filled = self.counts > 0
        grid = np.zeros(self.n)
        grid[filled] = self.sums[filled] / self.counts[filled] - self.total / self.count
        return _band_spectrum(grid, filled, self.cell_seconds, self.sample_seconds, fitted_speeds)


def residual_band_spectrum(t_seconds, residual, step_seconds: float | None = None,
                           fitted_speeds=None, max_cells: int = MAX_CELLS) -> BandSpectrum:
    """One-sided PSD of a (possibly gappy, irregular) residual, ready for band averages.

    The residual is averaged into cells of ``step_seconds`` (default: the median sampling
    interval; a whole number of them for records longer than ``max_cells`` steps, see
    :data:`MAX_CELLS`), empty cells are set to zero after removing the mean, and the
    Hann-windowed periodogram is divided by the fraction of filled cells so that the density
    describes the sea, not the gaps. :class:`ResidualGrid` does the same chunk by chunk.

    Parameters
    ----------
    t_seconds : array_like
        Sample times, Unix seconds UTC [s].
    residual : array_like
        Observed minus fitted level [m].
    step_seconds : float, optional
        Grid step [s].
    fitted_speeds : array_like, optional
        Speeds of the fitted constituents [deg/h]. The fit leaves almost no power at
        these frequencies, so the lines within the Hann main lobe (two lines either side)
        are left out of the band averages; otherwise the noise would be underestimated
        by the share of the band they cover.
    max_cells : int
        Most cells of the grid.

    Returns
    -------
    BandSpectrum

    References
    ----------
    Munk & Cartwright (1966); Pugh & Woodworth (2014), ch. 4.
    """
    t = np.asarray(t_seconds, dtype=float).ravel()
    r = np.asarray(residual, dtype=float).ravel()
    ok = np.isfinite(t) & np.isfinite(r)
    t, r = t[ok], r[ok]
    if t.size < 2:
        raise ValueError("need at least two residual samples for a spectrum")
    if step_seconds is None:
        d = np.diff(np.unique(t))
        step_seconds = float(np.median(d))
    grid = ResidualGrid(t.min(), t.max(), step_seconds, max_cells)
    grid.add(t, r)
    return grid.spectrum(fitted_speeds)


def _band_spectrum(grid: np.ndarray, filled: np.ndarray, step: float, sample: float,
                   fitted_speeds) -> BandSpectrum:
    """Hann periodogram of mean-removed cells, corrected for the empty ones."""
    step_h = step / 3600.0
    p = float(filled.mean())
    # The Hann window keeps the strong low-frequency surge power from leaking into the
    # tidal bands.
    freq, psd = _hann_periodogram(grid, 1.0 / step_h)
    # Zero-filled gaps remove power in proportion to the window's weight where they fall:
    # a long outage mid-record (where the Hann window is largest) removes more than its
    # share of the samples, so divide by the window-weighted fill fraction.
    n = grid.size
    win2 = (0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)) ** 2
    p_window = float(np.sum(win2 * filled) / np.sum(win2))
    psd = psd / p_window
    usable = None
    if fitted_speeds is not None:
        df = freq[1] - freq[0] if freq.size > 1 else np.inf
        usable = np.ones(freq.size, dtype=bool)
        for fc in np.asarray(fitted_speeds, dtype=float).ravel() / 360.0:  # cycles/hour
            usable &= np.abs(freq - fc) > 2.0 * df
    return BandSpectrum(freq=freq, psd=psd, duration_hours=float(filled.sum()) * step_h,
                        valid_fraction=p, step_hours=step_h, usable=usable,
                        sample_hours=sample / 3600.0)


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


def coefficient_variance(spectrum: BandSpectrum, speeds_deg_per_hour, inverse_diagonal=None):
    """Variance of each constituent's cosine and sine coefficients from the band noise.

    Parameters
    ----------
    spectrum : BandSpectrum
        From :func:`residual_band_spectrum`.
    speeds_deg_per_hour : array_like
        Constituent speeds [deg/h], shape (k,).
    inverse_diagonal : array_like, optional
        Diagonal elements of ``(X'X)^-1`` for the cosine and sine columns, shape (k, 2)
        [1]. With them the band noise is treated as white noise of the same density,
        ``sigma_b^2 = S_b / (2 dt)`` (dt the record's sampling interval, not the grid's
        cell), so that gaps and nearly-aliased neighbours widen the intervals as they
        should; without them the orthogonal approximation is used.

    Returns
    -------
    var_a, var_b : ndarray
        Variances of the cosine and sine coefficients [m^2], shape (k,). Orthogonal
        approximation: ``S_b / T`` with ``S_b`` the mean one-sided density in the
        constituent's species band [m^2 h] and ``T`` the effective record length [h].

    References
    ----------
    Munk & Cartwright (1966), coloured-noise case; for N evenly spaced samples
    ``(X'X)^-1`` has diagonal 2/N and both forms agree.
    """
    speeds = np.atleast_1d(np.asarray(speeds_deg_per_hour, dtype=float))
    species = np.rint(speeds / 15.0).astype(int)  # 15 deg/h = one cycle per day
    cache: dict[int, float] = {}
    density = np.empty(speeds.size)
    for i, s in enumerate(species):
        if s <= 0:
            # long period: the fixed band above zero frequency (a centred window would
            # reach into the zero-frequency surge power for Sa and Ssa)
            if s not in cache:
                cache[s] = spectrum.band_mean(s)
            density[i] = cache[s]
        else:
            density[i] = spectrum.mean_around(speeds[i] / 360.0)
    if inverse_diagonal is None:
        var = density / spectrum.duration_hours
        return var, var.copy()
    inv = np.asarray(inverse_diagonal, dtype=float).reshape(speeds.size, 2)
    # per sample of the record (the grid's cells may hold several)
    white = density / (2.0 * (spectrum.sample_hours or spectrum.step_hours))
    return white * inv[:, 0], white * inv[:, 1]


def amplitude_phase_intervals(a, b, var_a, var_b=None, *, confidence: float = 0.95):
    """Amplitude and phase confidence half-widths from coefficient noise.

    Linearised propagation of independent errors in ``a = H cos g`` and ``b = H sin g``:
    ``var(H) = (a^2 var_a + b^2 var_b) / H^2`` and ``var(g) = (b^2 var_a + a^2 var_b) / H^4``.

    Parameters
    ----------
    a, b : array_like
        Cosine and sine coefficients [m].
    var_a, var_b : array_like
        Variances of ``a`` and ``b`` [m^2]; ``var_b`` defaults to ``var_a``.
    confidence : float
        Two-sided confidence level, e.g. 0.95.

    Returns
    -------
    amplitude_ci : ndarray
        Half-width of the amplitude interval [m].
    phase_ci : ndarray
        Half-width of the phase interval [deg], at most 180 (phase unknown).
    snr : ndarray
        Signal-to-noise ratio ``H^2 / var`` with ``var`` the mean of ``var_a`` and
        ``var_b`` [1]; below about 2 the constituent is indistinguishable from noise
        (common practice, no source).

    References
    ----------
    Linearised propagation of the coefficient variances to amplitude and phase (first-order
    error propagation; Pugh & Woodworth 2014, ch. 4).
    """
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    va = np.asarray(var_a, dtype=float)
    vb = va if var_b is None else np.asarray(var_b, dtype=float)
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)
    amp = np.hypot(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        var_h = np.where(amp > 0, (a**2 * va + b**2 * vb) / amp**2, 0.5 * (va + vb))
        var_g = (b**2 * va + a**2 * vb) / amp**4
        amplitude_ci = z * np.sqrt(var_h)
        phase_ci = np.degrees(z * np.sqrt(var_g))
        snr = amp**2 / (0.5 * (va + vb))
    phase_ci = np.where(np.isfinite(phase_ci), np.minimum(phase_ci, 180.0), 180.0)
    snr = np.where(np.isfinite(snr), snr, 0.0)
    return amplitude_ci, phase_ci, snr
