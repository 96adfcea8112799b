"""Spectra of height fields: Welch frequency spectra, the frequency-wavenumber spectrum and a dispersion check.

Pure functions and accumulators on numpy arrays (no file I/O): the CLI
(``surfrec spectrum``) reads heights.h5 a segment of frames at a time and
feeds them in, so a whole night's run never sits in memory.

* :class:`WelchAccumulator` / :func:`welch_psd` -- Welch's method (Welch 1967,
  IEEE Trans. Audio Electroacoust. 15, 70): overlapping segments, each
  detrended by its mean, windowed, periodogram averaged; one-sided power
  spectral density in mm^2/Hz, scaled as scipy.signal.welch scales it
  (``scaling="density"``), so that integrating it over frequency gives the
  variance.
* :class:`FrequencyWavenumberSpectrum` -- the windowed space-time FFT of the
  whole field, averaged over time segments. Missing nodes (NaN) are not
  silently zero-filled: they enter with zero weight *in the window*, the
  power is normalised by the energy of the window actually used, and the
  fraction of missing samples is reported. Holes still widen the spectral
  window (its transform is that of the masked window), which is stated with
  the result.
* :func:`find_spectral_peaks`, :func:`dominant_wavenumber`,
  :func:`dispersion_check` -- peaks of a frequency spectrum, the wavenumber
  of the wave field at a frequency (from its complex amplitude, see
  :mod:`surfrec.analysis.modes`) and its comparison with the linear
  capillary-gravity relation omega^2 = (g k + sigma k^3 / rho) tanh(k H)
  (Lamb, *Hydrodynamics*; Lighthill, *Waves in Fluids*).

Units: mm, s, Hz, rad/mm; power spectral density mm^2/Hz.
"""

from __future__ import annotations

import math

import numpy as np

from surfrec.errors import InputError

__all__ = ["FrequencyWavenumberSpectrum", "WelchAccumulator", "default_segment", "dispersion_check",
           "dominant_wavenumber", "find_spectral_peaks", "segment_starts", "welch_psd"]

#: Fewest evenly sampled frames a spectrum is computed from.
MIN_FRAMES = 8
#: Largest Welch segment chosen by default, frames.
MAX_DEFAULT_SEGMENT = 4096


def default_segment(n_frames: int) -> int:
    """Default Welch segment length, frames.

    Short records (< 512 frames) are one segment (the best frequency
    resolution they allow); longer ones get segments of a power of two near
    an eighth of the record, so that about 15 half-overlapping segments are
    averaged (a common-practice compromise between resolution and the
    variance of the estimate), between 256 and :data:`MAX_DEFAULT_SEGMENT`.

    Parameters
    ----------
    n_frames : int
        Frames in the evenly sampled record.

    Returns
    -------
    int
        Segment length, frames.
    """
    n = int(n_frames)
    if n < 512:
        return n
    return int(min(MAX_DEFAULT_SEGMENT, max(256, 2 ** int(math.floor(math.log2(n / 8))))))


def segment_starts(n_frames: int, nperseg: int, noverlap: int) -> np.ndarray:
    """First frame of each Welch segment (as scipy.signal.welch places them: from frame 0, the tail dropped).

    Parameters
    ----------
    n_frames, nperseg, noverlap : int
        Record length, segment length and overlap, frames.

    Returns
    -------
    (S,) int array.
    """
    step = nperseg - noverlap
    if nperseg > n_frames or step < 1:
        raise InputError(f"a Welch segment of {nperseg} frames with {noverlap} overlapping does not fit a record "
                         f"of {n_frames} frames")
    return np.arange(0, n_frames - nperseg + 1, step)


def _window(name: str, n: int) -> np.ndarray:
    from scipy.signal import get_window

    # Periodic ("DFT-even") windows, as scipy.signal.welch uses them.
    return np.asarray(get_window(name, n, fftbins=True), np.float64)


class WelchAccumulator:
    """Welch power spectral density averaged over segments and over many series.

    Feed it segments of ``nperseg`` frames of one or more series (columns);
    a column with any NaN in a segment is left out of that segment (and
    counted), never zero-filled.

    Parameters
    ----------
    fs : float
        Sampling frequency, Hz.
    nperseg : int
        Segment length, frames (>= 2).
    window : str, optional
        scipy window name (default "hann").

    Attributes
    ----------
    frequency : (nperseg // 2 + 1,) Hz.
    """

    def __init__(self, fs: float, nperseg: int, *, window: str = "hann"):
        if not (math.isfinite(fs) and fs > 0):
            raise InputError(f"sampling frequency must be > 0 Hz, got {fs!r}")
        if int(nperseg) < 2:
            raise InputError(f"a Welch segment needs at least 2 frames, got {nperseg}")
        self.fs = float(fs)
        self.nperseg = int(nperseg)
        self.window_name = window
        self.w = _window(window, self.nperseg)
        self.frequency = np.fft.rfftfreq(self.nperseg, 1.0 / self.fs)
        # Density scaling of scipy.signal.welch: 1 / (fs * sum w^2), doubled for the one-sided spectrum.
        self._scale = 1.0 / (self.fs * float(np.sum(self.w ** 2)))
        self._sum = np.zeros(self.frequency.size)
        self.used = 0       # (segment, series) pairs averaged
        self.skipped = 0    # pairs left out because of NaN
        self.segments = 0

    def add(self, segment) -> None:
        """Add one segment.

        Parameters
        ----------
        segment : (nperseg,) or (nperseg, N) array_like
            Heights, mm; columns are series (nodes).
        """
        a = np.asarray(segment, np.float64)
        if a.ndim == 1:
            a = a[:, None]
        if a.shape[0] != self.nperseg:
            raise ValueError(f"segment has {a.shape[0]} frames, expected {self.nperseg}")
        self.segments += 1
        ok = np.all(np.isfinite(a), axis=0)
        self.skipped += int(np.count_nonzero(~ok))
        a = a[:, ok]
        if a.shape[1] == 0:
            return
        a = a - a.mean(axis=0)
        p = np.abs(np.fft.rfft(a * self.w[:, None], axis=0)) ** 2
        self._sum += p.sum(axis=1)
        self.used += a.shape[1]

    def result(self) -> np.ndarray:
        """One-sided PSD, mm^2/Hz, shape of :attr:`frequency` (NaN if nothing was averaged)."""
        if self.used == 0:
            return np.full(self.frequency.size, np.nan)
        psd = self._sum / self.used * self._scale
        # One-sided: every bin but DC (and Nyquist for an even segment) holds both signs of frequency.
        if self.nperseg % 2 == 0:
            psd[1:-1] *= 2.0
        else:
            psd[1:] *= 2.0
        return psd

    def params(self) -> dict:
        """Welch parameters as reported (segment, overlap, window, resolution, counts)."""
        return {"method": "Welch (mean-detrended segments, averaged periodograms, one-sided density)",
                "nperseg": self.nperseg, "window": self.window_name, "fs_hz": self.fs,
                "resolution_hz": self.fs / self.nperseg, "segments": self.segments,
                "series_segments_used": self.used, "series_segments_with_nan_skipped": self.skipped}


def welch_psd(series, fs: float, *, nperseg: int | None = None, noverlap: int | None = None,
              window: str = "hann"):
    """Welch power spectral density of one series or the mean over several.

    Parameters
    ----------
    series : (T,) or (T, N) array_like
        Heights, mm, evenly sampled at ``fs``; columns are averaged.
    fs : float
        Sampling frequency, Hz.
    nperseg : int, optional
        Segment length, frames (default :func:`default_segment`).
    noverlap : int, optional
        Overlap, frames (default half a segment, as scipy.signal.welch).
    window : str, optional
        scipy window name.

    Returns
    -------
    frequency : (F,) Hz
    psd : (F,) mm^2/Hz, one-sided
    params : dict (see :meth:`WelchAccumulator.params`)
    """
    a = np.asarray(series, np.float64)
    n = a.shape[0]
    if n < 2:
        raise InputError(f"a spectrum needs at least 2 frames, got {n}")
    nperseg = default_segment(n) if nperseg is None else int(nperseg)
    noverlap = nperseg // 2 if noverlap is None else int(noverlap)
    acc = WelchAccumulator(fs, nperseg, window=window)
    for s in segment_starts(n, nperseg, noverlap):
        acc.add(a[s:s + nperseg])
    return acc.frequency, acc.result(), acc.params() | {"noverlap": noverlap}


class FrequencyWavenumberSpectrum:
    """Frequency-wavenumber power of a height field, averaged over time segments.

    Each segment (T, Ny, Nx) is windowed by a separable Hann window in t, y
    and x times the validity mask, each node's weighted mean over the
    segment is removed (stationary features such as a dip in the still
    water carry no frequency), and the 3-D FFT taken. The power is
    normalised by the sum of the squared window actually used, so missing
    nodes lower neither the level nor the total; :attr:`missing_fraction`
    says how much was missing.

    Parameters
    ----------
    shape : (T, Ny, Nx)
        Segment shape (frames, rows, columns).
    dt, dy, dx : float
        Frame step, s, and grid steps, mm.

    Notes
    -----
    With exp(-i omega t) time dependence a wave exp(i(k.x - omega t)) sits at
    positive frequency and wavevector +k here (the transform is taken with
    exp(+i omega t - i k.x)).
    """

    def __init__(self, shape, dt: float, dy: float, dx: float):
        nt, ny, nx = (int(v) for v in shape)
        self.shape = (nt, ny, nx)
        self.wt = _window("hann", nt)
        self.wy = _window("hann", ny) if ny > 2 else np.ones(ny)
        self.wx = _window("hann", nx) if nx > 2 else np.ones(nx)
        self.frequency = np.fft.rfftfreq(nt, dt)
        self.ky = 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(ny, dy))
        self.kx = 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(nx, dx))
        self._sum = np.zeros((self.frequency.size, ny, nx))
        self._w2 = 0.0
        self._missing = 0
        self._total = 0
        self.segments = 0

    def add(self, segment) -> None:
        """Add one segment (T, Ny, Nx) of heights, mm (NaN where missing)."""
        h = np.asarray(segment, np.float64)
        if h.shape != self.shape:
            raise ValueError(f"segment has shape {h.shape}, expected {self.shape}")
        ok = np.isfinite(h)
        w = self.wt[:, None, None] * self.wy[None, :, None] * self.wx[None, None, :] * ok
        hv = np.where(ok, h, 0.0)
        wsum = w.sum(axis=0)
        mean = np.divide((w * hv).sum(axis=0), wsum, out=np.zeros_like(wsum), where=wsum > 0)
        z = w * (hv - mean)
        # Time with exp(+i omega t): the conjugate of numpy's forward transform along t.
        spec = np.fft.fft(np.fft.fft(np.conj(np.fft.rfft(z, axis=0)), axis=1), axis=2)
        self._sum += np.abs(np.fft.fftshift(spec, axes=(1, 2))) ** 2
        self._w2 += float(np.sum(w ** 2))
        self._missing += int(np.count_nonzero(~ok))
        self._total += ok.size
        self.segments += 1

    @property
    def missing_fraction(self) -> float:
        """Share of samples (frames x nodes) that were NaN."""
        return self._missing / self._total if self._total else float("nan")

    def power(self) -> np.ndarray:
        """Power per (f, ky, kx) bin, mm^2, one-sided in f (sums to the windowed variance).

        Returns
        -------
        (F, Ny, Nx) array; axes :attr:`frequency` (Hz), :attr:`ky`, :attr:`kx` (rad/mm).
        """
        if self._w2 == 0:
            return np.full(self._sum.shape, np.nan)
        n = self.shape[0]
        p = self._sum / (self._w2 * n * self.shape[1] * self.shape[2])
        # Fold negative frequencies (the conjugate half) into the positive ones.
        if n % 2 == 0:
            p[1:-1] *= 2.0
        else:
            p[1:] *= 2.0
        return p

    def ring_power(self, n_bins: int | None = None):
        """Power against frequency and wavenumber magnitude (summed over direction).

        Parameters
        ----------
        n_bins : int, optional
            Number of |k| bins from 0 to the smaller Nyquist wavenumber
            (default: half the smaller grid dimension).

        Returns
        -------
        frequency (F,) Hz, k_centres (K,) rad/mm, power (F, K) mm^2 per bin.
        """
        p = self.power()
        kk = np.hypot(*np.meshgrid(self.kx, self.ky))
        kmax = min(float(np.max(np.abs(self.kx))), float(np.max(np.abs(self.ky))))
        n_bins = n_bins or max(2, min(self.shape[1], self.shape[2]) // 2)
        edges = np.linspace(0.0, kmax, n_bins + 1)
        idx = np.digitize(kk.ravel(), edges) - 1
        keep = (idx >= 0) & (idx < n_bins)
        out = np.zeros((p.shape[0], n_bins))
        flat = p.reshape(p.shape[0], -1)
        for b in range(n_bins):
            sel = keep & (idx == b)
            if sel.any():
                out[:, b] = flat[:, sel].sum(axis=1)
        return self.frequency, 0.5 * (edges[1:] + edges[:-1]), out


def find_spectral_peaks(frequency, psd, *, max_peaks: int = 5, prominence_db: float = 10.0,
                        min_frequency: float = 0.0):
    """Peaks of a power spectrum, strongest first, with sub-bin frequencies.

    A peak is a local maximum of 10 log10(psd) that stands at least
    ``prominence_db`` above its surroundings (scipy.signal.find_peaks
    prominence). Its frequency is refined by a parabola through the log
    power of the three bins around it (for a Hann window the main lobe is
    close to a Gaussian, whose logarithm is a parabola).

    Parameters
    ----------
    frequency : (F,) Hz, evenly spaced.
    psd : (F,) mm^2/Hz.
    max_peaks : int
        At most this many peaks.
    prominence_db : float
        Minimum prominence, dB.
    min_frequency : float
        Ignore peaks below this frequency, Hz (the DC bin is always ignored).

    Returns
    -------
    list of dict: ``frequency_hz``, ``psd_mm2_per_hz`` (at the bin),
    ``prominence_db``, ``bin``.
    """
    from scipy.signal import find_peaks

    f = np.asarray(frequency, np.float64)
    p = np.asarray(psd, np.float64)
    ok = np.isfinite(p) & (p > 0)
    if ok.sum() < 3:
        return []
    floor = np.min(p[ok])
    db = 10.0 * np.log10(np.where(ok, p, floor))
    idx, props = find_peaks(db, prominence=prominence_db)
    peaks = []
    for i, prom in zip(idx, props["prominences"]):
        if i == 0 or i == f.size - 1 or f[i] <= min_frequency:
            continue
        y0, y1, y2 = db[i - 1], db[i], db[i + 1]
        den = y0 - 2 * y1 + y2
        shift = 0.5 * (y0 - y2) / den if den < 0 else 0.0
        step = f[1] - f[0]
        peaks.append({"frequency_hz": float(f[i] + float(np.clip(shift, -0.5, 0.5)) * step),
                      "psd_mm2_per_hz": float(p[i]), "prominence_db": float(prom), "bin": int(i)})
    peaks.sort(key=lambda d: -d["psd_mm2_per_hz"])
    return peaks[:max_peaks]


def dominant_wavenumber(amplitude, x, y, *, pad: int = 8):
    """Wavevector of the strongest plane-wave component of a complex amplitude field.

    The field (complex amplitude at one frequency, exp(-i omega t)
    convention, so a wave A exp(i k.x) travels along +k) is weighted by a
    2-D Hann window times its validity mask (NaN nodes get weight 0), its
    zero-padded FFT gives the strongest wavevector to a fraction of a bin,
    and a Nelder-Mead search on the exact (unpadded) Fourier sum refines it.
    For one plane wave the windowed peak is unbiased; other waves at the
    same |k| (scattered waves) bias it only through the window's side lobes.

    Parameters
    ----------
    amplitude : (Ny, Nx) complex
        Complex amplitude, mm, NaN where missing.
    x (Nx,), y (Ny,) : mm, evenly spaced.
    pad : int
        Zero-padding factor of the coarse search.

    Returns
    -------
    dict: ``kx``, ``ky``, ``k`` (rad/mm), ``direction_deg`` (of propagation,
    counter-clockwise from +x), ``wavelength_mm``, ``amplitude_mm`` (the
    plane-wave amplitude that component carries).
    """
    from scipy.optimize import minimize

    a = np.asarray(amplitude, np.complex128)
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    ok = np.isfinite(a)
    if ok.sum() < 16:
        raise InputError("too few valid nodes to measure a wavenumber")
    rows = np.nonzero(ok.any(axis=1))[0]
    cols = np.nonzero(ok.any(axis=0))[0]
    a = a[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    ok = ok[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    xs, ys = x[cols[0]:cols[-1] + 1], y[rows[0]:rows[-1] + 1]
    ny, nx = a.shape
    w = np.outer(np.hanning(ny + 2)[1:-1], np.hanning(nx + 2)[1:-1]) * ok
    z = np.where(ok, a, 0.0) * w
    dx = xs[1] - xs[0] if nx > 1 else 1.0
    dy = ys[1] - ys[0] if ny > 1 else 1.0
    # numpy's forward FFT has exp(-i k.x): a field exp(i k0.x) peaks at +k0.
    big = np.fft.fft2(z, s=(pad * ny, pad * nx))
    j, i = np.unravel_index(int(np.argmax(np.abs(big))), big.shape)
    kx0 = 2 * np.pi * np.fft.fftfreq(pad * nx, dx)[i]
    ky0 = 2 * np.pi * np.fft.fftfreq(pad * ny, dy)[j]
    xx, yy = np.meshgrid(xs - xs[0], ys - ys[0])
    zf, xf, yf = z[ok], xx[ok], yy[ok]

    def neg_power(kv):
        return -abs(np.sum(zf * np.exp(-1j * (kv[0] * xf + kv[1] * yf)))) ** 2

    scale = 2 * np.pi / (pad * max(nx * dx, ny * dy))
    res = minimize(neg_power, [kx0, ky0], method="Nelder-Mead",
                   options={"xatol": 1e-7, "fatol": 1e-12 * -neg_power([kx0, ky0]), "maxiter": 400,
                            "initial_simplex": [[kx0, ky0], [kx0 + scale, ky0], [kx0, ky0 + scale]]})
    kx, ky = (float(v) for v in res.x)
    k = math.hypot(kx, ky)
    amp = math.sqrt(-res.fun) / float(np.sum(w))
    return {"kx": kx, "ky": ky, "k": k, "direction_deg": math.degrees(math.atan2(ky, kx)),
            "wavelength_mm": 2 * np.pi / k if k > 0 else float("inf"), "amplitude_mm": amp}


def dispersion_check(frequency_hz: float, k_measured: float, *, depth_mm: float = np.inf,
                     gravity: float | None = None, surface_tension: float | None = None,
                     density: float | None = None) -> dict:
    """Measured wavenumber against the linear capillary-gravity dispersion relation.

    Parameters
    ----------
    frequency_hz : float
        Wave frequency, Hz.
    k_measured : float
        Measured wavenumber, rad/mm.
    depth_mm : float
        Still-water depth, mm (inf: deep water).
    gravity, surface_tension, density : float, optional
        m/s^2, N/m, kg/m^3 (default: the handbook values of
        :mod:`surfrec.waves.water`).

    Returns
    -------
    dict: ``wavenumber_theory_rad_per_mm``, ``relative_error`` ((measured -
    theory) / theory), ``phase_speed_measured_mm_s``,
    ``phase_speed_theory_mm_s``.
    """
    from surfrec.waves import water
    from surfrec.waves.dispersion import wavenumber

    kw = {"gravity": water.STANDARD_GRAVITY if gravity is None else gravity,
          "surface_tension": water.SURFACE_TENSION if surface_tension is None else surface_tension,
          "density": water.DENSITY if density is None else density}
    k_th = float(wavenumber(frequency_hz, depth_mm, **kw))
    omega = 2 * np.pi * frequency_hz
    return {"wavenumber_theory_rad_per_mm": k_th, "relative_error": (k_measured - k_th) / k_th,
            "phase_speed_measured_mm_s": omega / k_measured if k_measured > 0 else float("nan"),
            "phase_speed_theory_mm_s": omega / k_th}
