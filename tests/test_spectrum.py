"""Spectra (surfrec.analysis.spectrum) against outside references.

* Welch spectra against scipy.signal.welch on the same series (a
  general-purpose reference library).
* The wavenumber measured on an exact plane wave, and on the exact
  MacCamy-Fuchs field, against the linear capillary-gravity dispersion
  relation omega^2 = (g k + sigma k^3 / rho) tanh(kH) (Lamb, Hydrodynamics,
  Art. 267; Lighthill, Waves in Fluids, ch. 3 -- article numbers from memory),
  as surfrec.waves.dispersion implements it (itself tested in
  tests/test_dispersion.py).
"""

import numpy as np
import pytest
from scipy import signal

from surfrec.analysis.modes import HarmonicFit
from surfrec.analysis.series import longest_finite_run, regular_stretch
from surfrec.analysis.spectrum import (FrequencyWavenumberSpectrum, default_segment, dispersion_check,
                                       dominant_wavenumber, find_spectral_peaks, welch_psd)
from surfrec.errors import InputError
from surfrec.waves import maccamy_fuchs_amplitude, wavenumber


@pytest.mark.parametrize("n, nperseg", [(1000, 256), (777, 100), (64, 64), (301, 51)])
def test_welch_matches_scipy(n, nperseg):
    # Reference: scipy.signal.welch (Hann, half overlap, mean detrend, one-sided density).
    rng = np.random.default_rng(n)
    t = np.arange(n) / 500.0
    x = 0.7 * np.sin(2 * np.pi * 31.0 * t) + 0.1 * rng.standard_normal(n) + 3.0
    f, p, params = welch_psd(x, 500.0, nperseg=nperseg)
    f_ref, p_ref = signal.welch(x, fs=500.0, nperseg=nperseg)
    np.testing.assert_allclose(f, f_ref, rtol=0, atol=1e-12)
    np.testing.assert_allclose(p, p_ref, rtol=1e-10, atol=1e-18)
    assert params["nperseg"] == nperseg


def test_welch_area_average_is_the_mean_of_the_series_spectra():
    # Reference: the mean of scipy.signal.welch over the columns.
    rng = np.random.default_rng(1)
    x = rng.standard_normal((512, 5))
    _, p, _ = welch_psd(x, 100.0, nperseg=128)
    _, p_ref = signal.welch(x, fs=100.0, nperseg=128, axis=0)
    np.testing.assert_allclose(p, p_ref.mean(axis=1), rtol=1e-10)


def test_welch_leaves_out_segments_with_nan():
    # A NaN spoils only its own segments, never zero-filled: the result equals scipy.signal.welch over the
    # complete series' segments.
    rng = np.random.default_rng(2)
    x = rng.standard_normal((400, 2))
    x[10, 1] = np.nan
    _, p, params = welch_psd(x, 10.0, nperseg=100, noverlap=50)
    assert params["series_segments_with_nan_skipped"] == 1
    _, p0 = signal.welch(x[:, 0], fs=10.0, nperseg=100)
    _, p1 = signal.welch(x[50:, 1], fs=10.0, nperseg=100)
    np.testing.assert_allclose(p, (7 * p0 + 6 * p1) / 13, rtol=1e-10)


def test_default_segment_and_peaks():
    assert default_segment(20) == 20
    assert default_segment(20000) == 2048
    f = np.arange(0, 50.5, 0.5)
    psd = 1e-4 + np.exp(-0.5 * ((f - 12.2) / 0.4) ** 2)
    peaks = find_spectral_peaks(f, psd)
    assert len(peaks) == 1
    # A Gaussian is a parabola in log power: the 3-point refinement is exact for it (but for the floor).
    assert abs(peaks[0]["frequency_hz"] - 12.2) < 1e-4


def test_regular_stretch_and_runs():
    t = np.r_[np.arange(10), np.arange(11, 30)] * 0.01      # frame 10 dropped
    start, stop, dt, gaps = regular_stretch(t)
    assert (start, stop, gaps) == (10, 29, 1)
    assert abs(dt - 0.01) < 1e-12
    assert longest_finite_run([np.nan, 1, 2, np.nan, 1, 2, 3]) == (4, 3)
    with pytest.raises(InputError):
        regular_stretch([0.0, 0.1, 0.1])


def _plane_wave_amplitude(k, direction_deg, x, y):
    xx, yy = np.meshgrid(x, y)
    d = np.radians(direction_deg)
    return 0.8 * np.exp(1j * (k * (np.cos(d) * xx + np.sin(d) * yy) + 0.3))


def test_dominant_wavenumber_of_a_plane_wave_follows_dispersion():
    # Reference: the dispersion relation (Lamb; Lighthill) -- the field is made at its wavenumber.
    f = 7.0
    k = float(wavenumber(f, 60.0))
    x = np.arange(-120, 120.1, 2.0)
    y = np.arange(-90, 90.1, 2.0)
    a = _plane_wave_amplitude(k, 25.0, x, y)
    a[40:50, 60:75] = np.nan                                 # a hole: zero weight in the window
    kw = dominant_wavenumber(a, x, y)
    assert abs(kw["k"] / k - 1) < 1e-4
    assert abs(kw["direction_deg"] - 25.0) < 0.05
    chk = dispersion_check(f, kw["k"], depth_mm=60.0)
    assert abs(chk["relative_error"]) < 1e-4


def test_wavenumber_on_the_exact_scattered_field_within_one_percent():
    # The scattered waves share |k| with the incident one: the measured |k| stays within 1% of the dispersion
    # relation (Lamb; Lighthill) on the exact MacCamy-Fuchs field of the quick scatter scenario's geometry.
    f = 5.0
    k = float(wavenumber(f, 60.0))
    x = np.arange(-160, 160.1, 2.5)
    y = np.arange(-120, 120.1, 2.5)
    xx, yy = np.meshgrid(x, y)
    a = maccamy_fuchs_amplitude(xx, yy, k=k, radius=20.0, centre=(8.0, -4.0), method="fast")
    kw = dominant_wavenumber(a, x, y)
    assert abs(kw["k"] / k - 1) < 0.01
    assert abs(kw["direction_deg"]) < 0.5


def test_frequency_wavenumber_spectrum_peak_and_normalisation():
    # A plane wave exp(i(k.x - omega t)) (docs/conventions.md's convention) sits at +f, +k; the total power equals the
    # windowed variance (Parseval), also with missing nodes (normalised by the window actually used).
    k, f, dt = 0.2, 10.0, 0.005
    x = np.arange(64) * 2.0
    y = np.arange(48) * 2.0
    t = np.arange(64) * dt
    kx, ky = k * np.cos(0.4), k * np.sin(0.4)
    h = np.cos(kx * x[None, None, :] + ky * y[None, :, None] - 2 * np.pi * f * t[:, None, None])
    h[:, 10:14, 20:30] = np.nan
    fk = FrequencyWavenumberSpectrum(h.shape, dt, 2.0, 2.0)
    fk.add(h)
    p = fk.power()
    i, j, l = np.unravel_index(np.argmax(p), p.shape)
    assert abs(fk.frequency[i] - f) <= 0.5 / (64 * dt) + 1e-9
    assert abs(fk.kx[l] - kx) <= np.pi / (64 * 2.0) + 1e-9 and abs(fk.ky[j] - ky) <= np.pi / (48 * 2.0) + 1e-9
    assert abs(np.sum(p) - 0.5) < 0.03                        # variance of a unit cosine, windowed
    assert 0 < fk.missing_fraction < 0.02


def test_harmonic_fit_recovers_a_known_amplitude_with_missing_frames():
    # h = c0 + Re[A exp(-i omega t)] (docs/conventions.md's time convention): least squares returns A exactly.
    t = np.arange(40) / 100.0
    a_true = np.array([0.3 - 0.4j, 1.0 + 0.0j])
    h = 0.2 + np.real(a_true[None, :] * np.exp(-1j * 2 * np.pi * 5.0 * t)[:, None])
    h[3, 0] = np.nan
    fit = HarmonicFit(2, 5.0, 40, 10)
    fit.add(t, h)
    np.testing.assert_allclose(fit.amplitude(), a_true, atol=1e-12)
