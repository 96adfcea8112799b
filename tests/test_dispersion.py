"""Checks of surfrec.waves.dispersion against published formulas and limits.

References
----------
Lamb, H., *Hydrodynamics*, 6th ed. (1932), Art. 267-268 (capillary-gravity
    waves, minimum wave speed).
Lighthill, J., *Waves in Fluids* (1978), ch. 3 (dispersion relation,
    group velocity, c_min about 0.23 m/s at a wavelength of about 17 mm).
Article and chapter numbers are cited from memory.
"""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from surfrec.waves import dispersion as dp
from surfrec.waves.water import DENSITY, STANDARD_GRAVITY, SURFACE_TENSION

G = STANDARD_GRAVITY
SIGMA = SURFACE_TENSION
RHO = DENSITY


def test_minimum_phase_speed_of_clean_water_is_about_023_m_s_at_17_mm():
    # Lighthill, Waves in Fluids, ch. 3; Lamb, Hydrodynamics, Art. 268:
    # c_min ~ 0.23 m/s at lambda ~ 17 mm for clean water (from memory).
    c_mm_s, lam_mm = dp.minimum_phase_speed()
    assert c_mm_s / 1000.0 == pytest.approx(0.23, abs=0.005)
    assert lam_mm == pytest.approx(17.0, abs=0.5)


@pytest.mark.parametrize("sigma, rho, g", [(SIGMA, RHO, G), (0.050, 1000.0, 9.81), (0.0728, 1260.0, 3.7)])
def test_minimum_phase_speed_matches_deep_water_closed_form(sigma, rho, g):
    # Lamb, Hydrodynamics, Art. 268: in deep water c_min = (4 g sigma/rho)^(1/4)
    # at lambda = 2 pi sqrt(sigma/(rho g)).
    c_mm_s, lam_mm = dp.minimum_phase_speed(np.inf, gravity=g, surface_tension=sigma, density=rho)
    c_ref = (4.0 * g * sigma / rho) ** 0.25 * 1000.0
    lam_ref = 2.0 * math.pi * math.sqrt(sigma / (rho * g)) * 1000.0
    assert c_mm_s == pytest.approx(c_ref, rel=1e-6)
    assert lam_mm == pytest.approx(lam_ref, rel=1e-6)


def test_minimum_phase_speed_is_a_minimum_in_finite_depth():
    # The minimum of c(k) (Lamb Art. 268) checked by brute force on the
    # module's own phase_speed: no sampled wavenumber beats it.
    for depth in (6.0, 10.0, 50.0):
        c_min, lam = dp.minimum_phase_speed(depth)
        k = np.linspace(0.2, 2.0, 20001) * (2 * math.pi / lam)
        assert np.min(dp.phase_speed(k, depth)) >= c_min * (1 - 1e-12)
    # very shallow layer (H^2 < 3 sigma/(rho g)): minimum is sqrt(gH) at k = 0
    c_min, lam = dp.minimum_phase_speed(3.0)
    assert math.isinf(lam)
    assert c_min == pytest.approx(math.sqrt(G * 3e-3) * 1000.0, rel=1e-14)


def test_deep_water_gravity_limit():
    # Lamb, Hydrodynamics, Art. 229: deep-water gravity waves omega^2 = g k.
    k = np.geomspace(1e-5, 1e2, 200)  # rad/mm
    w = dp.angular_frequency(k, np.inf, surface_tension=0.0)
    np.testing.assert_allclose(w, np.sqrt(G * k * 1000.0), rtol=1e-12, atol=0)


def test_pure_capillary_deep_limit():
    # Lamb, Hydrodynamics, Art. 267 with g = 0: omega^2 = (sigma/rho) k^3.
    k = np.geomspace(1e-3, 1e2, 50)
    w = dp.angular_frequency(k, np.inf, gravity=0.0)
    np.testing.assert_allclose(w, np.sqrt(SIGMA / RHO * (k * 1000.0) ** 3), rtol=1e-12, atol=0)


def test_shallow_water_limit():
    # Lamb, Hydrodynamics, Art. 169-170: long waves travel at c = sqrt(g H).
    for depth in (2.0, 30.0, 500.0):
        c0 = math.sqrt(G * depth / 1000.0) * 1000.0
        errs = [abs(dp.phase_speed(kh / depth, depth) / c0 - 1) for kh in (1e-1, 1e-2, 1e-3, 1e-4)]
        assert all(e2 < e1 for e1, e2 in zip(errs, errs[1:]))  # converges as kH -> 0
        assert errs[-1] < 1e-8
        assert dp.phase_speed(0.0, depth) == pytest.approx(c0, rel=1e-15)
        assert dp.group_speed(0.0, depth) == pytest.approx(c0, rel=1e-15)


def test_phase_speed_is_omega_over_k():
    # definition c = omega / k (Lighthill ch. 3)
    k = np.geomspace(1e-3, 50, 41)
    for depth in (1.0, 40.0, np.inf):
        np.testing.assert_allclose(dp.phase_speed(k, depth), dp.angular_frequency(k, depth) / k, rtol=1e-14)


@settings(max_examples=300, deadline=None)
@given(
    k=st.floats(1e-4, 1e2),
    depth=st.one_of(st.floats(0.05, 1e5), st.just(math.inf)),
    sigma=st.sampled_from([0.0, SIGMA, 0.03]),
)
def test_wavenumber_inverts_angular_frequency(k, depth, sigma):
    # The dispersion relation itself (Lamb Art. 267) is the reference:
    # wavenumber(omega(k)/2pi) must return k.
    w = dp.angular_frequency(k, depth, surface_tension=sigma)
    k2 = dp.wavenumber(w / (2 * math.pi), depth, surface_tension=sigma)
    assert abs(k2 / k - 1.0) < 1e-12


def test_wavenumber_vectorised_sweep():
    # Same reference as above over a broadcast (frequency x depth) sweep.
    f = np.geomspace(0.01, 2000.0, 300)[:, None]
    depth = np.array([0.2, 3.0, 60.0, 1e4, np.inf])[None, :]
    k = dp.wavenumber(f, depth)
    assert k.shape == (300, 5)
    ref = np.broadcast_to(2 * math.pi * f, k.shape)
    np.testing.assert_allclose(dp.angular_frequency(k, depth), ref, rtol=1e-13, atol=0)
    # scalar in, scalar out
    assert np.ndim(dp.wavenumber(5.0, 60.0)) == 0


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), float("inf")])
def test_wavenumber_rejects_non_positive_frequency(bad):
    with pytest.raises(ValueError):
        dp.wavenumber(bad, 10.0)
    with pytest.raises(ValueError):
        dp.wavenumber(np.array([1.0, bad]), 10.0)


def test_group_speed_equals_numerical_derivative():
    # c_g = d omega / dk (Lighthill ch. 3), against a plain central
    # difference with step 1e-5 k (truncation ~1e-11, rounding ~1e-11).
    k = np.geomspace(1e-3, 30.0, 60)
    for depth in (0.5, 5.0, 80.0, np.inf):
        hk = 1e-5 * k
        num = (dp.angular_frequency(k + hk, depth) - dp.angular_frequency(k - hk, depth)) / (2 * hk)
        np.testing.assert_allclose(dp.group_speed(k, depth), num, rtol=1e-7, atol=0)


def test_group_speed_deep_water_limits():
    # Lighthill ch. 3: deep-water gravity waves c_g = c/2, pure capillary c_g = 3c/2.
    k = np.geomspace(1e-3, 30.0, 30)
    c = dp.phase_speed(k, np.inf, surface_tension=0.0)
    np.testing.assert_allclose(dp.group_speed(k, np.inf, surface_tension=0.0), c / 2, rtol=1e-12)
    c = dp.phase_speed(k, np.inf, gravity=0.0)
    np.testing.assert_allclose(dp.group_speed(k, np.inf, gravity=0.0), 1.5 * c, rtol=1e-12)


def test_group_speed_equals_phase_speed_at_the_minimum():
    # At the phase-speed minimum c_g = c (Lamb Art. 268).
    c_min, lam = dp.minimum_phase_speed(np.inf)
    k = 2 * math.pi / lam
    assert dp.group_speed(k, np.inf) == pytest.approx(c_min, rel=1e-12)
