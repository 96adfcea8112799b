"""Cylindrical modes (surfrec.analysis.modes) on the exact MacCamy-Fuchs field.

Reference: scattering of a plane wave by a rigid vertical cylinder (MacCamy &
Fuchs 1954; Dean & Dalrymple, Water Wave Mechanics for Engineers and
Scientists, 1991): every order is reflected fully, |R_m| = 1, with
R_m = -H2_m'(ka) / H1_m'(ka) (the ratio of the derivatives of the two Hankel
functions at ka). The expected values come from scipy.special through
surfrec.waves.scattering.reflection_coefficients (tested in
tests/test_scattering.py). Checks: |R_m| = 1 within 0.1% and the phase within
0.5 degree for |m| <= 4.
"""

import numpy as np
import pytest

from surfrec.analysis.modes import (HarmonicFit, analyse_modes, estimate_centre, polar_grid, resample_polar,
                                    symmetry_misfit, whole_periods)
from surfrec.errors import InputError
from surfrec.waves import maccamy_fuchs_amplitude, reflection_coefficients, wavenumber

F = 5.0
K = float(wavenumber(F, 60.0))
A = 20.0
CENTRE = (3.0, -2.0)
X = np.arange(-150, 150.01, 2.5)
Y = np.arange(-120, 120.01, 2.5)


@pytest.fixture(scope="module")
def fit():
    xx, yy = np.meshgrid(X, Y)
    amp = maccamy_fuchs_amplitude(xx, yy, k=K, radius=A, centre=CENTRE, direction_deg=20.0, method="fast")
    t = np.arange(24) / 60.0                                 # two whole periods
    h = np.real(amp[None] * np.exp(-1j * 2 * np.pi * F * t)[:, None, None])   # NaN inside the post
    hf = HarmonicFit(X.size * Y.size, F, t.size, 2)
    hf.add(t, h)
    return hf, amp


def test_reflection_coefficients_of_a_rigid_cylinder(fit):
    hf, _ = fit
    r = analyse_modes(hf, X, Y, centre=CENTRE, radii=(25.0, 100.0), k=K, orders=4, n_boot=20)
    expected = reflection_coefficients(K, A, np.abs(r["m"]))
    assert np.all(np.abs(np.abs(r["R"]) - 1) < 1e-3), np.abs(r["R"])
    dphi = np.degrees(np.angle(r["R"] / expected))
    assert np.all(np.abs(dphi) < 0.5), dphi
    # A plane wave of amplitude A0 = 1 mm has |a_m| = A0/2 (Jacobi-Anger expansion, DLMF 10.12).
    np.testing.assert_allclose(np.abs(r["a_in"]), 0.5, atol=1e-3)
    # Exact data: the time bootstrap sees nothing to vary.
    assert np.all(r["sigma"]["R_abs_time"] < 1e-9)


def test_fitted_wavenumber_and_estimated_centre(fit):
    hf, amp = fit
    r = analyse_modes(hf, X, Y, centre=CENTRE, radii=(25.0, 100.0), k=1.05 * K, orders=3, fit_k=True, n_boot=0)
    assert abs(r["k"] / K - 1) < 1e-5
    radii, _ = polar_grid(25.0, 100.0, 2.5, K * 100)
    c, info = estimate_centre(amp, X, Y, K, radii)
    assert info["start"] == "hole" and info["mode"] == "line"
    d = np.array(c) - CENTRE
    u = np.array([np.cos(np.radians(20.0)), np.sin(np.radians(20.0))])      # the incident direction
    # Across the incident wave the symmetric-scatterer fit pins the centre (exact field: to 1e-3 mm);
    # along it the centre is the hole's centroid, here the post's disc sampled on the 2.5 mm grid.
    assert abs(d @ [-u[1], u[0]]) < 1e-3, d
    assert abs(d @ u) < 0.25, d
    assert abs(abs(info["direction_deg"] % 180 - (20.0 + 90.0) % 180)) < 1.0, info


def test_symmetry_misfit_is_blind_along_the_incident_wave(fit):
    # MacCamy & Fuchs 1954: about the post's axis b_m / a_m = R_|m| (a body of revolution scatters m and -m
    # alike). A shift across the incident wave breaks that symmetry at first order; a shift along it keeps the
    # whole set-up mirror-symmetric about the incidence line, so the misfit stays at rounding level.
    _, amp = fit
    radii, theta = polar_grid(25.0, 100.0, 2.5, K * 100)
    m_max = int(np.ceil(K * 100))
    u = np.array([np.cos(np.radians(20.0)), np.sin(np.radians(20.0))])
    at = [symmetry_misfit(amp, X, Y, np.array(CENTRE) + s, radii, theta, K, m_max)
          for s in ((0, 0), 2 * u, 0.5 * np.array([-u[1], u[0]]))]
    assert at[0] < 1e-10 and at[1] < 1e-10, at
    assert at[2] > 1e-4, at


def test_polar_resampling_is_accurate_and_honest_about_holes():
    # Lagrange interpolation of exp(i k x): error ~ (k h)^6 / 720 (Lagrange remainder) is below 1e-6 here.
    xx, yy = np.meshgrid(X, Y)
    field = np.exp(1j * K * xx)
    radii = np.array([30.0, 60.0])
    theta = np.linspace(0, 2 * np.pi, 64, endpoint=False)
    p = resample_polar(field, X, Y, (0.0, 0.0), radii, theta)
    exact = np.exp(1j * K * radii[:, None] * np.cos(theta)[None, :])
    assert np.max(np.abs(p - exact)) < 1e-5
    field[48, 72] = np.nan                                   # one missing node near (30, 0) mm
    p = resample_polar(field, X, Y, (0.0, 0.0), radii, theta)
    assert 0 < np.isnan(p).sum() <= 6                          # only points whose 6 x 6 stencil holds it


def test_whole_periods_and_bad_records():
    assert whole_periods(20, 0.02, 5.0) == (20, pytest.approx(2.0))
    n, p = whole_periods(1000, 0.002, 5.3)
    assert p == pytest.approx(round(p), abs=0.01) and n <= 1000
    with pytest.raises(InputError, match="Nyquist"):
        whole_periods(100, 0.01, 60.0)
    with pytest.raises(InputError, match="periods"):
        whole_periods(6, 0.002, 5.0)
