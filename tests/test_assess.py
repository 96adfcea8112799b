"""surfrec.analysis.assess: geometry, error statistics, plane-wave amplitude and the noise floor.

Each check names its outside reference beside it.
"""

import math

import numpy as np
import pytest

from surfrec.analysis.assess import (ErrorAccumulator, HighPassNoise, TruthComparison, error_statistics,
                                     exact_heights, height_errors, noise_floor_from_data, plane_wave_amplitude,
                                     split_plane_wave, tank_positions, true_datum_frame, visible_in_both)
from surfrec.synth.surfaces import Depression, PlaneWave, Superposition

from synthetic_heights import X, Y, truth_parts


@pytest.fixture(scope="module")
def truth(quick_session):
    return quick_session("waves") / "truth.h5"


# ------------------------------------------------------------------ geometry


def test_true_datum_frame_follows_the_design_convention(truth):
    left, _, _, _ = truth_parts(truth)
    m = true_datum_frame(left.rotation, left.translation)
    r = m[:3, :3]
    # A rotation (orthonormal, det +1): numpy.linalg.
    np.testing.assert_allclose(r.T @ r, np.eye(3), atol=1e-12)
    assert np.linalg.det(r) == pytest.approx(1.0, abs=1e-12)
    # docs/conventions.md: origin on the left optical axis (camera x = y = 0) ...
    np.testing.assert_allclose(m[:2, 3], 0.0, atol=1e-9)
    # ... and on the still water z = 0 of the tank: X_tank = R^T (X_cam - t) (truthfile's world_frame text).
    origin_tank = left.rotation.T @ (m[:3, 3] - left.translation)
    assert origin_tank[2] == pytest.approx(0.0, abs=1e-9)
    # z = the plane normal pointing up (tank +z seen from the camera: R e_z).
    np.testing.assert_allclose(r[:, 2], left.rotation[:, 2], atol=1e-12)
    # x = the camera x axis projected onto the plane, normalised.
    ex = np.array([1.0, 0, 0]) - r[0, 2] * r[:, 2]
    np.testing.assert_allclose(r[:, 0], ex / np.linalg.norm(ex), atol=1e-12)


def test_tank_positions_invert_the_camera_pose(truth):
    left, _, _, _ = truth_parts(truth)
    m = true_datum_frame(left.rotation, left.translation)
    rng = np.random.default_rng(3)
    h = rng.normal(0, 2, (Y.size, X.size))
    p = tank_positions(X, Y, h, m, left.rotation, left.translation)
    # Reference: Camera.to_camera (X_cam = R X_tank + t) applied to the result gives back M [x, y, h, 1].
    xx, yy = np.meshgrid(X, Y)
    nodes = np.stack([xx, yy, h, np.ones_like(h)], -1) @ m.T
    np.testing.assert_allclose(left.to_camera(p), nodes[..., :3], atol=1e-9)
    # In the true datum frame the tank z is the height itself (both z axes are the tank's).
    np.testing.assert_allclose(p[..., 2], h, atol=1e-9)


def test_visible_in_both_matches_the_renderers_footprint(truth):
    from surfrec.io.truthfile import read_truth

    left, right, _, _ = truth_parts(truth)
    g = read_truth(truth)["groups"]["waves"]["surface_grid"]
    xx, yy = np.meshgrid(g["x"], g["y"])
    seen = visible_in_both(np.stack([xx, yy, np.zeros_like(xx)], -1), left, right)
    # Reference: the renderer's own common footprint stored in truth.h5 (surfrec.synth.scenarios.common_footprint).
    assert np.array_equal(seen, g["seen"])


def test_post_hides_what_is_behind_it():
    # Reference: elementary geometry; a camera straight above a post sees its top, not the water inside it,
    # and a camera low on one side cannot see the water right behind the post.
    class Cam:
        image_size = (10_000, 10_000)

        def __init__(self, centre):
            self.centre = np.asarray(centre, float)

        def project(self, pts):
            return np.full(pts.shape[:-1] + (2,), 5000.0)

    post = {"centre_mm": [0.0, 0.0], "radius_mm": 10.0, "top_mm": 50.0}  # as truth.h5 stores it
    pts = np.array([[0.0, 0, 0], [30.0, 0, 0], [-30.0, 0, 0]])
    above = Cam([0.0, 0.0, 900.0])
    low = Cam([-1000.0, 0.0, 100.0])  # 5.7 degrees above the water, to the -x side
    assert visible_in_both(pts, above, above, post=post).tolist() == [False, True, True]
    assert visible_in_both(pts, low, low, post=post).tolist() == [False, False, True]


def test_exact_heights_in_a_lifted_frame(truth):
    left, _, surface, times = truth_parts(truth)
    m = true_datum_frame(left.rotation, left.translation)
    lifted = m.copy()
    lifted[:3, 3] += 0.7 * m[:3, 2]  # the frame's origin 0.7 mm up its own z axis
    h0 = exact_heights(X, Y, times[2], surface, m, left.rotation, left.translation)
    h1 = exact_heights(X, Y, times[2], surface, lifted, left.rotation, left.translation)
    # Reference: the surface's own height(x, y, t) at the nodes (tank = true datum frame axes).
    xx, yy = np.meshgrid(X, Y)
    p = tank_positions(X, Y, np.zeros_like(xx), m, left.rotation, left.translation)
    np.testing.assert_allclose(h0, surface.height(p[..., 0], p[..., 1], times[2]), atol=1e-9)
    np.testing.assert_allclose(h1, h0 - 0.7, atol=1e-9)


# ----------------------------------------------------------------- statistics


def test_error_statistics_and_accumulator_match_numpy():
    rng = np.random.default_rng(5)
    e = rng.normal(0.01, 0.02, (7, 60, 80))
    e[0, :10] = np.nan
    acc = ErrorAccumulator(e.shape[1:])
    for f in e:
        acc.add(f)
    got, ref = acc.result(), error_statistics(e)
    v = e[np.isfinite(e)]
    # Reference: numpy's mean, std and percentile (linear interpolation) on all the values at once.
    assert ref["rms_mm"] == pytest.approx(np.sqrt(np.mean(v ** 2)), rel=1e-12)
    assert ref["p95_abs_mm"] == pytest.approx(np.percentile(np.abs(v), 95), rel=1e-12)
    for k in ("rms_mm", "bias_mm", "std_mm", "max_abs_mm"):
        assert got[k] == pytest.approx(ref[k], rel=1e-9), k
    assert got["p95_abs_mm"] == pytest.approx(ref["p95_abs_mm"], rel=2e-3)  # the log histogram's 0.1% bins
    # Per-node split: numpy over the frame axis.
    mean = np.nanmean(e, axis=0)
    assert got["systematic_rms_mm"] == pytest.approx(np.sqrt(np.mean(mean ** 2)), rel=1e-9)
    assert got["random_rms_mm"] == pytest.approx(np.sqrt(np.mean(np.nanvar(e, axis=0, ddof=1))), rel=1e-9)


# --------------------------------------------------------- plane-wave amplitude


def test_plane_wave_amplitude_closed_form_on_whole_periods():
    # Reference: discrete orthogonality of cos and sin over whole periods sampled uniformly
    # (a = 2/N sum h cos phi, b = 2/N sum h sin phi, exact for any noise-free data).
    k = 2 * math.pi / 40.0
    x = np.arange(0.0, 400.0, 0.5)  # 10 whole wavelengths
    y = np.zeros_like(x)
    rng = np.random.default_rng(2)
    h = 1.1 * np.cos(k * x + math.radians(30.0)) + 0.3 * np.cos(3 * k * x) + rng.normal(0, 0.05, x.size)
    fit = plane_wave_amplitude(x, y, h, wavevector=(k, 0.0), omega=0.0, fit_offset=False)
    a = 2 / x.size * np.sum(h * np.cos(k * x))
    b = 2 / x.size * np.sum(h * np.sin(k * x))
    assert fit["a_mm"] == pytest.approx(a, abs=1e-12) and fit["b_mm"] == pytest.approx(b, abs=1e-12)


def test_plane_wave_amplitude_recovers_a_known_wave_on_scattered_points():
    rng = np.random.default_rng(4)
    x, y = rng.uniform(-150, 150, 5000), rng.uniform(-100, 100, 5000)
    kx, ky, omega, t = 0.08, 0.03, 2 * math.pi * 5, 0.012
    h = 1.1 * np.cos(kx * x + ky * y - omega * t + math.radians(30.0)) + 0.2
    h[::7] = np.nan
    fit = plane_wave_amplitude(x, y, h, wavevector=(kx, ky), omega=omega, time_s=t)
    # Reference: the defining closed form A cos(k.x - omega t + phase) + c.
    assert fit["amplitude_mm"] == pytest.approx(1.1, abs=1e-12)
    assert fit["phase_deg"] == pytest.approx(30.0, abs=1e-9)
    assert fit["offset_mm"] == pytest.approx(0.2, abs=1e-12)
    # Reference: numpy.linalg.lstsq on the same design written out here.
    ok = np.isfinite(h)
    phi = kx * x[ok] + ky * y[ok] - omega * t
    coef = np.linalg.lstsq(np.column_stack([np.cos(phi), np.sin(phi), np.ones(phi.size)]), h[ok], rcond=None)[0]
    assert fit["a_mm"] == pytest.approx(coef[0], abs=1e-12) and fit["b_mm"] == pytest.approx(coef[1], abs=1e-12)


def test_split_plane_wave():
    w = PlaneWave(1.0, 5.0, 60.0)
    d = Depression((0.0, 0.0), 3.0, 25.0)
    wave, rest = split_plane_wave(Superposition(w, d))
    assert wave is w and rest.parts == (d,)
    assert split_plane_wave(d) == (None, d)


# ------------------------------------------------------------------ the noise floor


def _smooth_field(nt=24, fps=500.0):
    # A 5 Hz, 1 mm wave over a 3 mm dip, as in the default synthetic session.
    x = np.arange(-150, 150, 2.0)
    y = np.arange(-100, 100, 2.0)
    xx, yy = np.meshgrid(x, y)
    t = np.arange(nt) / fps
    wave = np.cos(0.0887 * xx[None] + 0.0323 * yy[None] - 2 * np.pi * 5.0 * t[:, None, None])
    dip = -3.0 * np.exp(-((xx - 40) ** 2 + (yy + 30) ** 2) / (2 * 25.0 ** 2))
    return wave + dip[None]


def test_noise_floor_recovers_known_gaussian_noise():
    rng = np.random.default_rng(7)
    field = _smooth_field()
    for sigma in (0.005, 0.02):
        noisy = field + rng.normal(0.0, sigma, field.shape)  # reference: numpy's Gaussian generator
        est = noise_floor_from_data(noisy)
        assert est["sigma_mm"] == pytest.approx(sigma, rel=0.10)
        assert est["consistent"]
    # Some invalid nodes change nothing but the sample count.
    noisy[:, :20, :20] = np.nan
    assert noise_floor_from_data(noisy)["sigma_mm"] == pytest.approx(0.02, rel=0.10)


def test_noise_floor_lag_for_time_correlated_noise():
    # Noise averaged over 3 consecutive frames (as a 3-frame match window would) is correlated
    # in time: lag 1 underestimates it, lag 3 (samples that share no frame) recovers it.
    rng = np.random.default_rng(8)
    white = rng.normal(0.0, 0.03, (62, 60, 60))
    smoothed = (white[:-2] + white[1:-1] + white[2:]) / 3.0
    sigma = smoothed.std()  # reference: numpy's standard deviation of the noise itself
    assert noise_floor_from_data(smoothed, lag=1)["sigma_mm"] < 0.7 * sigma
    assert noise_floor_from_data(smoothed, lag=3)["sigma_mm"] == pytest.approx(sigma, rel=0.10)


def test_noise_floor_flags_a_poorly_sampled_wave():
    # 5 Hz at 20 frames/s: the high-pass passes much of the wave (gain (2 sin(omega dt / 2))^n).
    rng = np.random.default_rng(9)
    field = _smooth_field(nt=40, fps=20.0) + rng.normal(0, 0.01, (40, 100, 150))
    est = noise_floor_from_data(field)
    assert not est["consistent"] and est["sigma_mm"] > 0.05


def test_streamed_noise_equals_in_memory():
    rng = np.random.default_rng(10)
    field = _smooth_field(nt=30) + rng.normal(0, 0.01, (30, 100, 150))
    acc = HighPassNoise(orders=(3, 2, 4))
    for i in range(0, 30, 4):  # blocks shorter than the 4th difference's reach
        acc.add(field[i:i + 4])
    assert acc.result() == noise_floor_from_data(field)


# ------------------------------------------------------------------ against truth


def test_truth_comparison_of_exact_and_perturbed_heights(truth):
    left, right, surface, times = truth_parts(truth)
    m = true_datum_frame(left.rotation, left.translation)
    h = exact_heights(X, Y, times, surface, m, left.rotation, left.translation)
    rng = np.random.default_rng(11)
    cases = {"exact": (0.0, 0.0), "noisy": (0.01, 0.02)}
    for name, (sigma, bias) in cases.items():
        cmp = TruthComparison(X, Y, surface, m, left, right)
        blank = np.zeros(h.shape[1:], bool)
        blank[:8, :12] = True
        for k, t in enumerate(times):
            f = (h[k] + bias + sigma * rng.standard_normal(h[k].shape)).astype(np.float32)
            f[blank] = np.nan
            cmp.add(f, t, k)
        r = cmp.result()
        for g in ("true_geometry", "true_datum_frame"):
            s = r[g]
            if name == "exact":
                # Reference: the surface's own analytic height; only float32 storage remains (~1e-7 mm).
                assert s["rms_mm"] < 1e-6 and abs(s["bias_mm"]) < 1e-7
            else:
                # Reference: the known added error, E[e^2] = sigma^2 + bias^2.
                assert s["bias_mm"] == pytest.approx(bias, abs=5e-4)
                assert s["rms_mm"] == pytest.approx(math.hypot(sigma, bias), rel=0.02)
                assert s["random_rms_mm"] == pytest.approx(sigma, rel=0.05)
        # Every node of this grid is seen by both cameras, so coverage = unblanked share.
        assert r["coverage"] == pytest.approx(1 - blank.mean(), abs=1e-12)
        pw = r["plane_wave"]
        # The waves scenario: 1.0 mm, stepping to 1.1 mm (docs/synthetic-sessions.md; truth notes).
        tol = 1e-6 if name == "exact" else 2e-3
        assert pw["step_ratio"] == pytest.approx(1.1, abs=tol)
        np.testing.assert_allclose(pw["amplitudes_mm"], [surface.parts[0].amplitude_at(t) for t in times],
                                   atol=tol)


def test_true_geometry_sees_through_a_datum_offset(truth):
    # The file's datum 0.5 mm above the true still water, heights exact in it: the
    # rig's points are right (true geometry: no error) but the numbers read at face
    # value are 0.5 mm low (true datum frame: bias -0.5 mm). Reference: the lift itself.
    left, right, surface, times = truth_parts(truth)
    m = true_datum_frame(left.rotation, left.translation)
    lifted = m.copy()
    lifted[:3, 3] += 0.5 * m[:3, 2]
    h = exact_heights(X, Y, times[:2], surface, lifted, left.rotation, left.translation)
    cmp = TruthComparison(X, Y, surface, lifted, left, right)
    for k in range(2):
        cmp.add(h[k], times[k], k)
    r = cmp.result()
    assert r["true_geometry"]["rms_mm"] < 1e-9
    assert r["true_datum_frame"]["bias_mm"] == pytest.approx(-0.5, abs=1e-9)
    err, _ = height_errors(X, Y, h[0], time_s=times[0], surface=surface, world_to_left_camera=m,
                           camera_rotation=left.rotation, camera_translation=left.translation)
    np.testing.assert_allclose(err, -0.5, atol=1e-9)


def test_uncertainty_check_is_one_for_honest_gaussian_sigmas():
    # Errors drawn from N(systematic_node, sigma^2) with a per-node sigma: the pooled random part over
    # sigma is 1 (chi-square: E[sum of squared deviations] = (n - 1) sigma^2), and the median |e|/sigma
    # over 0.6745 (the median of |z| for a standard normal, 0.674490 from scipy.stats.norm.ppf(0.75)) is
    # 1 without a systematic part, above 1 with one.
    from scipy.stats import norm

    from surfrec.analysis.assess import UncertaintyCheck

    rng = np.random.default_rng(4)
    shape = (60, 80)
    sigma = 0.01 + 0.03 * rng.random(shape)
    honest, biased = UncertaintyCheck(shape), UncertaintyCheck(shape)
    offset = 0.02 * rng.standard_normal(shape)
    for _ in range(6):
        e = sigma * rng.standard_normal(shape)
        honest.add(e, sigma)
        biased.add(e + offset, sigma)
    h, b = honest.result(), biased.result()
    assert norm.ppf(0.75) == pytest.approx(0.6745, abs=1e-4)
    assert h["random_to_sigma"] == pytest.approx(1.0, abs=0.02)
    assert h["error_to_sigma_median"] == pytest.approx(1.0, abs=0.03)
    assert b["random_to_sigma"] == pytest.approx(1.0, abs=0.02)  # the systematic part leaves it alone
    assert b["error_to_sigma_median"] > 1.1
    half = UncertaintyCheck(shape)
    for _ in range(6):
        half.add(sigma * rng.standard_normal(shape), 2 * sigma)
    assert half.result()["random_to_sigma"] == pytest.approx(0.5, abs=0.01)
