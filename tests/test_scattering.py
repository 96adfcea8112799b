"""Checks of surfrec.waves.scattering (MacCamy & Fuchs 1954 diffraction).

References
----------
MacCamy, R. C. & Fuchs, R. A. (1954), Wave forces on piles: a diffraction
    theory, Beach Erosion Board Tech. Memo. 69; Dean & Dalrymple (1991),
    Water Wave Mechanics for Engineers and Scientists.
DLMF (NIST Digital Library of Mathematical Functions): 10.4.4
    (J = (H1 + H2)/2), sec. 10.12 (Jacobi-Anger expansion, = Abramowitz &
    Stegun 9.1.41-9.1.45), 10.17.5 (large-argument form of H1_m) -- equation
    numbers from memory.
scipy.special (jv, jvp, hankel1, hankel2, h1vp, h2vp) is the reference
    implementation of the Bessel functions.
"""

import numpy as np
import pytest
from scipy import special

from surfrec.waves.scattering import (
    maccamy_fuchs_amplitude,
    mode_coefficients,
    reflection_coefficients,
)

CASES = [(0.5, 5.0), (1.0, 2.0), (0.3, 0.5), (0.0945, 20.0), (2.0, 10.0)]  # (k rad/mm, a mm)


def _polar_points(a, r, theta, centre=(0.0, 0.0)):
    return centre[0] + r * np.cos(theta), centre[1] + r * np.sin(theta)


@pytest.mark.parametrize("k, a", CASES)
def test_no_flux_at_the_wall_from_series_derivatives(k, a):
    # Wall condition d eta/dr = 0 at r = a (MacCamy & Fuchs 1954): the
    # module's mode coefficients in d/dr[a_in H2_m(kr) + a_out H1_m(kr)],
    # with the derivatives from scipy.special.h1vp/h2vp.
    m_max = 60
    a_in, a_out = mode_coefficients(k, a, m_max)
    m = np.arange(m_max + 1)
    ka = k * a
    h1p = special.h1vp(m, ka)
    h2p = special.h2vp(m, ka)
    d_mode = k * (a_in * h2p + a_out * h1p)
    # Per mode the two waves cancel at the wall to rounding of the larger one.
    ok = np.isfinite(h1p)
    assert ok[:12].all()
    assert np.all(np.abs(d_mode[ok]) <= 1e-14 * k * np.abs(a_in[ok] * h1p[ok]))
    # Summed over the modes whose |H1_m'(ka)| < 1e4 (above that the in/out
    # split itself loses all digits; the J/H1 form does not need it).
    use = ok & (np.abs(h1p) < 1e4)
    theta = np.linspace(0, 2 * np.pi, 13)
    d_total = (d_mode[None, use] * np.cos(np.outer(theta, m[use]))).sum(axis=1)
    # relative to the incident slope k A (A = 1)
    assert np.max(np.abs(d_total)) / k < 1e-10


@pytest.mark.parametrize("k, a", CASES)
def test_no_flux_at_the_wall_from_finite_difference(k, a):
    # Same wall condition, from a central difference (step 1e-4 mm) of
    # maccamy_fuchs_amplitude itself across the wall, using the analytic
    # continuation just inside.
    centre = (3.0, -2.0)
    theta = np.linspace(0.1, 2 * np.pi, 7)
    h = 1e-4
    kw = dict(k=k, radius=a, centre=centre, direction_deg=17.0, inside="continue")
    fp = maccamy_fuchs_amplitude(*_polar_points(a, a + h, theta, centre), **kw)
    fm = maccamy_fuchs_amplitude(*_polar_points(a, a - h, theta, centre), **kw)
    assert np.max(np.abs(fp - fm) / (2 * h)) / k < 1e-6


@pytest.mark.parametrize("k, a", [(0.5, 5.0), (1.0, 2.0), (2.0, 10.0)])
def test_scattered_field_decays_like_inverse_sqrt_r(k, a):
    # Far field of an outgoing wave: H1_m(kr) ~ sqrt(2/(pi k r)) e^{i(kr - m pi/2 - pi/4)}
    # (DLMF 10.17.5), so |eta - eta_inc| ~ r^(-1/2).
    theta = np.array([0.0, 0.7, np.pi / 2, 2.5, np.pi])
    radii = np.array([1e2, 1e3, 1e4, 1e5, 1e6]) / k
    mags = []
    for r in radii:
        x, y = _polar_points(a, r, theta)
        scat = maccamy_fuchs_amplitude(x, y, k=k, radius=a, method="fast") - np.exp(1j * k * x)
        mags.append(np.abs(scat))
    mags = np.array(mags)  # (radius, theta)
    slopes = np.diff(np.log(mags), axis=0) / np.diff(np.log(radii))[:, None]
    dev = np.abs(slopes + 0.5).max(axis=1)
    # the log-log slope tends to -1/2, with corrections falling like 1/(kr)
    assert dev[-1] < 1e-4
    assert dev[0] < 5e-2
    assert np.all(dev[1:] < 0.3 * dev[:-1])
    # and the "series" evaluation (every term from scipy) agrees at kr = 100
    x, y = _polar_points(a, radii[0], theta)
    ser = maccamy_fuchs_amplitude(x, y, k=k, radius=a, method="series") - np.exp(1j * k * x)
    np.testing.assert_allclose(np.abs(ser), mags[0], rtol=1e-9)


@pytest.mark.parametrize("k, a", CASES)
def test_reflection_coefficients_unit_modulus_and_phase(k, a):
    # |R_m| = 1 for a lossless scatterer; R_m = -H2_m'(ka)/H1_m'(ka) from
    # scipy.special.h1vp/h2vp as the reference.
    m = np.arange(0, 41)
    r = reflection_coefficients(k, a, m)
    np.testing.assert_allclose(np.abs(r), 1.0, rtol=0, atol=1e-12)
    ref = -special.h2vp(m, k * a) / special.h1vp(m, k * a)
    ok = np.isfinite(ref)
    assert ok[:10].all()
    np.testing.assert_allclose(np.angle(r[ok] / ref[ok]), 0.0, atol=1e-12)
    # consistent with the mode decomposition a_out = R_m a_in
    a_in, a_out = mode_coefficients(k, a, 40)
    np.testing.assert_allclose(a_out, r * a_in, rtol=0, atol=1e-14)


def test_reflection_coefficient_scalar_and_no_cylinder():
    assert reflection_coefficients(0.5, 0.0, 3) == 1.0
    assert isinstance(reflection_coefficients(0.5, 5.0, 2), complex)


@pytest.mark.parametrize("radius", [0.0, 1e-7])
@pytest.mark.parametrize("direction_deg", [0.0, 30.0])
def test_jacobi_anger_limit(radius, direction_deg):
    # With radius -> 0 the series is the Jacobi-Anger expansion of the incident
    # wave, exp(i k d.x) (DLMF sec. 10.12; A&S 9.1.41-9.1.45).
    k = 0.7
    rng = np.random.default_rng(3)
    r = rng.uniform(1.0, 60.0, 400)
    th = rng.uniform(0, 2 * np.pi, 400)
    x, y = r * np.cos(th), r * np.sin(th)
    d = np.deg2rad(direction_deg)
    ref = np.exp(1j * k * (x * np.cos(d) + y * np.sin(d)))
    got = maccamy_fuchs_amplitude(x, y, k=k, radius=radius, direction_deg=direction_deg, method="series")
    assert np.max(np.abs(got - ref)) < 1e-12


@pytest.mark.parametrize("k, a", CASES)
def test_in_out_decomposition_reproduces_the_field(k, a):
    # eta = sum_m [a_in H2_m(kr) + a_out H1_m(kr)] cos(m theta), with
    # J = (H1 + H2)/2 (DLMF 10.4.4) and scipy.special.hankel1/hankel2.
    rng = np.random.default_rng(5)
    r = a + rng.uniform(0.0, 30.0, 300)
    th = rng.uniform(0, 2 * np.pi, 300)
    x, y = r * np.cos(th), r * np.sin(th)
    # The split into H2 and H1 cancels catastrophically once |H1_m(kr)| is
    # large (orders m > kr), so compare the first M orders, M limited by
    # |H1_m(kr)| <= 100 at every point, against the series truncated alike.
    z = k * r[:, None]
    m_all = np.arange(200)
    big = np.abs(special.hankel1(m_all[None, :], z.min())) > 100.0
    n = int(np.argmax(big)) if big.any() else 200
    assert n >= 3
    field = maccamy_fuchs_amplitude(x, y, k=k, radius=a, method="series", n_terms=n)
    a_in, a_out = mode_coefficients(k, a, n - 1)
    m = np.arange(n)
    h1 = special.hankel1(m[None, :], z)
    h2 = special.hankel2(m[None, :], z)
    terms = (a_in * h2 + a_out * h1) * np.cos(m[None, :] * th[:, None])
    np.testing.assert_allclose(terms.sum(axis=1), field, rtol=0, atol=1e-12)


@pytest.mark.parametrize("k, a", CASES)
def test_fast_method_matches_term_by_term_series(k, a):
    # scipy.special term by term ("series") is the reference for the
    # closed-form-incident + recurrence evaluation ("fast").
    rng = np.random.default_rng(7)
    x = rng.uniform(-80, 80, 500)
    y = rng.uniform(-80, 80, 500)
    kw = dict(k=k, radius=a, centre=(4.0, -1.0), direction_deg=-40.0)
    s = maccamy_fuchs_amplitude(x, y, method="series", **kw)
    f = maccamy_fuchs_amplitude(x, y, method="fast", **kw)
    assert np.array_equal(np.isnan(s), np.isnan(f))
    ok = ~np.isnan(s)
    assert np.max(np.abs(s[ok] - f[ok])) < 1e-12


def test_automatic_truncation_has_converged():
    # More terms than the automatic choice change nothing above 1e-12.
    k, a = 0.8, 4.0
    x = np.linspace(-50, 50, 201)
    y = 0.37 * x + 9.0
    auto = maccamy_fuchs_amplitude(x, y, k=k, radius=a)
    m_auto = int(np.ceil(k * np.hypot(x, y).max() + 10 * (k * np.hypot(x, y).max()) ** (1 / 3) + 12))
    more = maccamy_fuchs_amplitude(x, y, k=k, radius=a, n_terms=m_auto + 40)
    ok = np.isfinite(auto)
    assert np.max(np.abs(auto[ok] - more[ok])) < 1e-12
    fewer = maccamy_fuchs_amplitude(x, y, k=k, radius=a, n_terms=10)
    assert np.max(np.abs(auto[ok] - fewer[ok])) > 1e-3  # truncation matters


def test_inside_handling_and_shapes():
    k, a = 0.5, 5.0
    x = np.array([[0.0, 2.0, 3.0], [4.9, 5.0, 20.0]])
    f = maccamy_fuchs_amplitude(x, 0.0, k=k, radius=a)
    assert f.shape == (2, 3)
    assert np.isnan(f[0]).all() and np.isnan(f[1, 0])
    assert np.isfinite(f[1, 1:]).all()
    c = maccamy_fuchs_amplitude(x, 0.0, k=k, radius=a, inside="continue")
    assert np.isnan(c[0, :2]).all()  # r < a/2
    assert np.isfinite(c[0, 2]) and np.isfinite(c[1]).all()
    assert np.ndim(maccamy_fuchs_amplitude(10.0, 1.0, k=k, radius=a)) == 0
    with pytest.raises(ValueError):
        maccamy_fuchs_amplitude(x, 0.0, k=k, radius=a, inside="zero")
    with pytest.raises(ValueError):
        maccamy_fuchs_amplitude(x, 0.0, k=-1.0, radius=a)


def test_amplitude_and_centre_scale_and_translate():
    # Linearity and translation invariance of the linear problem.
    k, a = 0.6, 3.0
    x = np.linspace(-30, 30, 50)
    y = np.full_like(x, 7.0)
    f1 = maccamy_fuchs_amplitude(x, y, k=k, radius=a, method="fast")
    f2 = maccamy_fuchs_amplitude(x + 11.0, y - 4.0, k=k, radius=a, amplitude=2.5, centre=(11.0, -4.0), method="fast")
    np.testing.assert_allclose(f2, 2.5 * f1, rtol=0, atol=1e-12)
