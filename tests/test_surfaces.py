"""Checks of the synthetic surface shapes in surfrec.synth.surfaces.

References
----------
Lamb, H., *Hydrodynamics* (1932), Art. 267: capillary-gravity dispersion
    omega^2 = (g k + sigma k^3 / rho) tanh(k H) for the plane wave.
MacCamy & Fuchs (1954) series for the scattered wave, evaluated with
    scipy.special (jv, jvp, hankel1, h1vp) as the reference library.
scipy.special.hankel1 as reference for the outgoing cylindrical wave
    Re[H1_0(kr) exp(-i omega t)] of the ripples.
"""

import json
import math

import numpy as np
import pytest
from scipy import special

from surfrec.synth.surfaces import (
    CircularRipples,
    Depression,
    PlaneWave,
    ScatteredWave,
    StillWater,
    Superposition,
    surface_from_dict,
)
from surfrec.waves.water import DENSITY, STANDARD_GRAVITY, SURFACE_TENSION

RNG = np.random.default_rng(20240601)


def _central_difference(surface, x, y, t, h=1e-5):
    """Plain central difference of height (step h mm) as the slope reference."""
    gx = (surface.height(x + h, y, t) - surface.height(x - h, y, t)) / (2 * h)
    gy = (surface.height(x, y + h, t) - surface.height(x, y - h, t)) / (2 * h)
    return gx, gy


# ---------------------------------------------------------------- PlaneWave


def test_plane_wave_matches_closed_form_and_dispersion():
    w = PlaneWave(amplitude_mm=0.8, frequency_hz=12.0, depth_mm=35.0, direction_deg=20.0, phase_deg=30.0)
    # Lamb Art. 267, in SI units: omega^2 = (g k + sigma k^3/rho) tanh(kH)
    k_si = w.wavenumber * 1000.0
    rhs = (STANDARD_GRAVITY * k_si + SURFACE_TENSION / DENSITY * k_si**3) * math.tanh(w.wavenumber * 35.0)
    assert w.omega == pytest.approx(2 * math.pi * 12.0, rel=1e-15)
    assert math.sqrt(rhs) == pytest.approx(w.omega, rel=1e-12)
    x = RNG.uniform(-100, 100, (50, 40))
    y = RNG.uniform(-100, 100, (50, 40))
    for t in (0.0, 0.0371, 1.5):
        phi = math.radians(20.0)
        ref = 0.8 * np.cos(w.wavenumber * (x * math.cos(phi) + y * math.sin(phi)) - w.omega * t + math.radians(30.0))
        np.testing.assert_allclose(w.height(x, y, t), ref, rtol=0, atol=1e-12)


def test_plane_wave_amplitude_step():
    w = PlaneWave(1.0, 5.0, 60.0, direction_deg=20.0, phase_deg=30.0, step_time_s=0.024, step_factor=1.1)
    ref = PlaneWave(1.0, 5.0, 60.0, direction_deg=20.0, phase_deg=30.0)
    x = np.linspace(-50, 50, 101)
    y = 0.3 * x
    for t in (0.0, 0.0239999):
        np.testing.assert_array_equal(w.height(x, y, t), ref.height(x, y, t))
    for t in (0.024, 0.03, 1.0):
        np.testing.assert_allclose(w.height(x, y, t), 1.1 * ref.height(x, y, t), rtol=1e-15, atol=1e-15)
        gx, gy = w.gradient(x, y, t)
        rx, ry = ref.gradient(x, y, t)
        np.testing.assert_allclose(gx, 1.1 * rx, rtol=1e-15, atol=1e-15)
    assert w.amplitude_at(0.0) == 1.0 and w.amplitude_at(0.024) == pytest.approx(1.1)


def test_plane_wave_broadcasting_and_dtype():
    w = PlaneWave(1.0, 5.0, np.inf)
    h = w.height(np.linspace(0, 1, 7)[:, None], np.linspace(0, 1, 5)[None, :], 0.1)
    assert h.shape == (7, 5) and h.dtype == np.float64
    assert np.ndim(w.height(1.0, 2.0, 0.0)) == 0


# ------------------------------------------------------------ CircularRipples


def _ripples():
    return CircularRipples(centre_mm=(-6.0, 4.0), amplitude_mm=0.5, frequency_hz=8.0, depth_mm=60.0,
                           start_time_s=-0.2)


def test_circular_ripples_finite_everywhere():
    s = _ripples()
    cx, cy = s.centre_mm
    x = np.concatenate([[cx, cx + 1e-300, cx + 1e-12, cx + 1e-6], RNG.uniform(-300, 300, 5000)])
    y = np.concatenate([[cy, cy, cy - 1e-12, cy], RNG.uniform(-300, 300, 5000)])
    for t in (-1.0, -0.2, 0.0, 0.3, 5.0):
        h = s.height(x, y, t)
        gx, gy = s.gradient(x, y, t)
        assert np.all(np.isfinite(h)) and np.all(np.isfinite(gx)) and np.all(np.isfinite(gy))
    assert s.height(cx, cy, 1.0) == 0.0


def test_circular_ripples_amplitude_at_reference_radius():
    s = _ripples()
    cx, cy = s.centre_mm
    # front 20 widths past the reference radius
    t0 = s.start_time_s + (s.reference_radius_mm + 20 * s.front_width_mm) / s.group_speed_mm_s
    times = t0 + np.arange(64) / (64 * s.frequency_hz)
    th = np.linspace(0, 2 * np.pi, 9)
    x = cx + s.reference_radius_mm * np.cos(th)
    y = cy + s.reference_radius_mm * np.sin(th)
    peak = np.max(np.abs([s.height(x, y, t) for t in times]), axis=0)
    np.testing.assert_allclose(peak, 0.5, rtol=0.01)


def test_circular_ripples_behind_front_is_outgoing_hankel_wave():
    # Reference: Re[C H1_0(kr) e^{-i omega t}] from scipy.special.hankel1,
    # C = A / (|H1_0(k r_ref)| T_core(r_ref)), times the core taper.
    s = _ripples()
    cx, cy = s.centre_mm
    t = 3.0
    rf = s.front_radius_mm(t)
    assert rf - 25 * s.front_width_mm > 100.0
    r = np.linspace(2 * s.core_radius_mm, rf - 25 * s.front_width_mm, 400)
    th = RNG.uniform(0, 2 * np.pi, r.size)
    k = s.wavenumber
    core = lambda rr: 1 - np.exp(-((rr / s.core_radius_mm) ** 4))  # noqa: E731
    c = 0.5 / (abs(special.hankel1(0, k * s.reference_radius_mm)) * core(s.reference_radius_mm))
    ref = (c * core(r) * special.hankel1(0, k * r) * np.exp(-1j * s.omega * t)).real
    got = s.height(cx + r * np.cos(th), cy + r * np.sin(th), t)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)


def test_circular_ripples_zero_ahead_of_front():
    s = _ripples()
    cx, cy = s.centre_mm
    t = 0.3
    r = s.front_radius_mm(t) + 30 * s.front_width_mm + np.linspace(0, 500, 50)
    assert np.max(np.abs(s.height(cx + r, cy + 0 * r, t))) < 1e-20
    # before the start the whole field is (essentially) flat
    assert np.max(np.abs(s.height(RNG.uniform(-9, 9, 99), RNG.uniform(-9, 9, 99), -5.0))) < 1e-20


# ---------------------------------------------------------------- others


def test_depression_and_still_water_closed_form():
    d = Depression(centre_mm=(40.0, -30.0), depth_mm=3.0, radius_mm=25.0)
    x = RNG.uniform(-100, 100, 300)
    y = RNG.uniform(-100, 100, 300)
    ref = -3.0 * np.exp(-((x - 40) ** 2 + (y + 30) ** 2) / (2 * 25.0**2))
    np.testing.assert_allclose(d.height(x, y, 0.7), ref, rtol=1e-14, atol=0)
    s = StillWater(0.25)
    np.testing.assert_array_equal(s.height(x, y[:, None], 0.0), np.full((300, 300), 0.25))
    gx, gy = s.gradient(x, y, 0.0)
    assert not gx.any() and not gy.any()


@pytest.mark.parametrize(
    "surface",
    [
        PlaneWave(0.6, 7.0, 40.0, direction_deg=-35.0, phase_deg=10.0),
        PlaneWave(0.1, 60.0, np.inf, direction_deg=100.0),
        _ripples(),
        Depression((5.0, -3.0), 2.0, 8.0),
        Superposition(PlaneWave(0.3, 4.0, 80.0), Depression((0.0, 0.0), 1.0, 10.0), _ripples()),
    ],
    ids=["plane", "plane-capillary-deep", "ripples", "depression", "superposition"],
)
def test_gradient_matches_central_difference(surface):
    x = RNG.uniform(-80, 80, 2000)
    y = RNG.uniform(-80, 80, 2000)
    for t in (0.0, 0.41):
        gx, gy = surface.gradient(x, y, t)
        rx, ry = _central_difference(surface, x, y, t)
        scale = max(1e-3, np.max(np.abs(rx)), np.max(np.abs(ry)))
        assert np.max(np.abs(gx - rx)) < 1e-7 * scale
        assert np.max(np.abs(gy - ry)) < 1e-7 * scale


def test_superposition_adds():
    parts = (PlaneWave(0.3, 4.0, 80.0), Depression((0.0, 0.0), 1.0, 10.0), _ripples(), StillWater(0.1))
    s = Superposition(*parts)
    x = RNG.uniform(-50, 50, (20, 30))
    y = RNG.uniform(-50, 50, (20, 30))
    t = 0.37
    np.testing.assert_allclose(s.height(x, y, t), sum(p.height(x, y, t) for p in parts), rtol=0, atol=1e-14)
    gx, gy = s.gradient(x, y, t)
    np.testing.assert_allclose(gx, sum(p.gradient(x, y, t)[0] for p in parts), rtol=0, atol=1e-14)
    np.testing.assert_allclose(gy, sum(p.gradient(x, y, t)[1] for p in parts), rtol=0, atol=1e-14)
    np.testing.assert_array_equal(Superposition().height(x, y, t), np.zeros((20, 30)))


# ---------------------------------------------------------------- round trip


def _all_kinds():
    return [
        StillWater(-0.5),
        PlaneWave(1.0, 5.0, 60.0, direction_deg=20.0, phase_deg=30.0, step_time_s=0.024, step_factor=1.1),
        PlaneWave(0.2, 30.0, np.inf, surface_tension=0.05),
        CircularRipples((-60.0, 40.0), 0.5, 8.0, 60.0, start_time_s=-0.9),
        CircularRipples((1.0, 2.0), 0.1, 20.0, 10.0, reference_radius_mm=15.0, core_radius_mm=3.0),
        Depression((40.0, -30.0), 3.0, 25.0),
        ScatteredWave(1.0, 5.0, 60.0, (10.0, -5.0), 20.0, (-40.0, 50.0, -45.0, 40.0), grid_step_mm=0.5,
                      direction_deg=15.0, phase_deg=-20.0),
        Superposition(PlaneWave(1.0, 5.0, 60.0), Superposition(Depression((0.0, 0.0), 1.0, 9.0), StillWater(0.1))),
    ]


def test_to_dict_round_trip_gives_identical_heights():
    x = RNG.uniform(-60, 60, 3000)
    y = RNG.uniform(-60, 60, 3000)
    for s in _all_kinds():
        d = s.to_dict()
        assert d["kind"] == s.kind
        text = json.dumps(d, allow_nan=False)  # strict JSON
        s2 = surface_from_dict(json.loads(text))
        assert type(s2) is type(s)
        assert s2.to_dict() == d
        for t in (0.0, 0.05):
            np.testing.assert_array_equal(s2.height(x, y, t), s.height(x, y, t))
            np.testing.assert_array_equal(s2.gradient(x, y, t)[0], s.gradient(x, y, t)[0])


def test_surface_from_dict_rejects_unknown():
    with pytest.raises(ValueError):
        surface_from_dict({"kind": "tsunami"})
    with pytest.raises(ValueError):
        surface_from_dict({"kind": "still_water", "level": 1.0})


# ---------------------------------------------------------------- ScatteredWave


def _series_gradient(s, x, y, t):
    """Slopes from the MacCamy-Fuchs series with scipy.special derivatives."""
    k, a = s.wavenumber, s.post_radius_mm
    cx, cy = s.post_centre_mm
    phi = math.radians(s.direction_deg)
    u, v = x - cx, y - cy
    r = np.hypot(u, v)
    th = np.arctan2(v, u) - phi
    z = k * r
    n = int(k * r.max() + 10 * (k * r.max()) ** (1 / 3) + 12)
    m = np.arange(n)[:, None]
    beta = special.jvp(m, k * a) / special.h1vp(m, k * a)
    beta[~np.isfinite(beta)] = 0.0
    use = np.abs(beta[:, 0]) > 1e-18
    eps = np.where(m == 0, 1.0, 2.0) * (1j**m)
    rad = special.jv(m, z).astype(complex)
    drad = k * special.jvp(m, z).astype(complex)
    rad[use] -= beta[use] * special.hankel1(m[use], z)
    drad[use] -= beta[use] * k * special.h1vp(m[use], z)
    d_r = (eps * drad * np.cos(m * th)).sum(axis=0)
    d_th = (eps * rad * (-m) * np.sin(m * th)).sum(axis=0)
    # polar -> Cartesian, theta measured from the incident direction
    ang = th + phi
    dx = np.cos(ang) * d_r - np.sin(ang) / r * d_th
    dy = np.sin(ang) * d_r + np.cos(ang) / r * d_th
    p = s.amplitude_mm * np.exp(1j * (math.radians(s.phase_deg) - s.omega * t))
    return (p * dx).real, (p * dy).real


SCATTER_CASES = [
    # the "scatter" scenario: 5 Hz, 40 mm post, default 0.25 mm grid
    dict(frequency_hz=5.0, post_centre_mm=(10.0, -5.0), post_radius_mm=20.0, extent_mm=(-45.0, 60.0, -55.0, 45.0)),
    # short capillary-gravity waves round a 5 mm post
    dict(frequency_hz=20.0, post_centre_mm=(1.0, 2.0), post_radius_mm=5.0, extent_mm=(-25.0, 25.0, -22.0, 26.0),
         direction_deg=-30.0, phase_deg=45.0),
    # a thin 1 mm post at 50 Hz: near-wall band evaluated from the series
    dict(frequency_hz=50.0, post_centre_mm=(0.0, 0.0), post_radius_mm=1.0, extent_mm=(-15.0, 15.0, -15.0, 15.0)),
]


def _outside_points(s, n_bulk, n_wall):
    xmin, xmax, ymin, ymax = s.extent_mm
    cx, cy = s.post_centre_mm
    a = s.post_radius_mm
    x = RNG.uniform(xmin, xmax, 3 * n_bulk)
    y = RNG.uniform(ymin, ymax, 3 * n_bulk)
    keep = np.hypot(x - cx, y - cy) >= a
    x, y = x[keep][:n_bulk], y[keep][:n_bulk]
    r = a + RNG.uniform(0.0, 0.5, n_wall)
    th = RNG.uniform(0, 2 * np.pi, n_wall)
    return np.concatenate([x, cx + r * np.cos(th)]), np.concatenate([y, cy + r * np.sin(th)])


@pytest.fixture(scope="module", params=range(len(SCATTER_CASES)), ids=["5Hz-a20", "20Hz-a5", "50Hz-a1"])
def scattered(request):
    return ScatteredWave(amplitude_mm=1.0, depth_mm=60.0, **SCATTER_CASES[request.param])


def test_scattered_interpolation_matches_series(scattered):
    s = scattered
    x, y = _outside_points(s, 4000, 1500)
    r = np.hypot(x - s.post_centre_mm[0], y - s.post_centre_mm[1])
    assert np.mean(r >= s.exact_radius_mm) > 0.5  # most points do use the spline
    for t in (0.0, 0.0123, 0.31):
        err = np.abs(s.height(x, y, t) - s.height_exact(x, y, t))
        assert np.max(err) < 1e-6
    assert s.spline_error_mm < 1e-6


def test_scattered_exact_is_the_scipy_series(scattered):
    # "fast" (closed-form incident, recurrence) vs every term from scipy.special
    s = scattered
    x, y = _outside_points(s, 150, 50)
    np.testing.assert_allclose(s.height_exact(x, y, 0.2), s.height_exact(x, y, 0.2, method="series"),
                               rtol=0, atol=1e-12)


def test_scattered_gradient_matches_series_derivative(scattered):
    s = scattered
    x, y = _outside_points(s, 400, 200)
    for t in (0.0, 0.07):
        gx, gy = s.gradient(x, y, t)
        rx, ry = _series_gradient(s, x, y, t)
        # documented error of the 1e-3 mm central difference: spline part
        # ~4e-7, truncation up to ~1.2e-6 next to the 1 mm post at 50 Hz
        assert np.max(np.abs(gx - rx)) < 2e-6
        assert np.max(np.abs(gy - ry)) < 2e-6


def test_scattered_outside_extent_and_inside_post(scattered):
    s = scattered
    xmin, xmax, ymin, ymax = s.extent_mm
    x = np.array([xmin - 5.0, xmax + 0.01, 0.5 * (xmin + xmax), xmax + 30.0])
    y = np.array([0.5 * (ymin + ymax), ymin, ymax + 2.0, ymax + 30.0])
    np.testing.assert_allclose(s.height(x, y, 0.1), s.height_exact(x, y, 0.1), rtol=0, atol=1e-12)
    # inside the post: finite (continuation, for ray intersection), NaN from the series
    cx, cy = s.post_centre_mm
    r = s.post_radius_mm * np.array([0.0, 0.2, 0.5, 0.9, 0.999])
    assert np.all(np.isfinite(s.height(cx + r, cy + 0 * r, 0.1)))
    assert np.all(np.isfinite(s.gradient(cx + r, cy + 0 * r, 0.1)[0]))
    assert np.all(np.isnan(s.height_exact(cx + r, cy + 0 * r, 0.1)))


def test_scattered_exposes_post_and_reflection_coefficients(scattered):
    s = scattered
    rc = s.reflection_coefficients(12)
    assert rc.shape == (13,)
    ka = s.wavenumber * s.post_radius_mm
    m = np.arange(13)
    ref = -special.h2vp(m, ka) / special.h1vp(m, ka)  # scipy reference
    np.testing.assert_allclose(rc, ref, rtol=1e-12)
    assert s.post_radius_mm > 0 and len(s.post_centre_mm) == 2


def test_scalar_inputs_give_scalars():
    # Closed form of a plane wave at one point: A cos(k x - omega t + phase) (linear wave theory).
    from surfrec.synth.surfaces import Depression, PlaneWave, Superposition

    w = PlaneWave(amplitude_mm=1.0, frequency_hz=5.0, depth_mm=60.0, phase_deg=30.0)
    s = Superposition(w, Depression(centre_mm=(0.0, 0.0), depth_mm=2.0, radius_mm=10.0))
    h = s.height(0.0, 0.0, 0.0)
    assert isinstance(h, float)
    assert abs(h - (np.cos(np.radians(30.0)) - 2.0)) < 1e-12
    gx, gy = s.gradient(1.0, 2.0, 0.1)
    assert isinstance(gx, float) and isinstance(gy, float)
