"""The synthetic renderer against outside references.

- Chessboard corners found by OpenCV's cv2.findChessboardCornersSB in the
  rendered target images agree with the true corners projected by
  cv2.projectPoints through the true camera model (median < 0.1 px).
- Ray-surface intersections lie on the ray and on the surface.
- A pinhole projector lights a parallel plane uniformly (inverse-square law
  with Lambert's cosine law; standard radiometry).
- Sensor noise follows the shot-noise + read-noise model (Poisson statistics
  of photo-electrons: variance = mean; EMVA 1288 camera model).
"""

import cv2
import numpy as np
import pytest

from surfrec.synth import render as rd
from surfrec.synth import surfaces as sf
from surfrec.synth.scenarios import board_corners_world, board_fully_visible, build_scenario


@pytest.fixture(scope="module")
def quick():
    return build_scenario("waves", quick=True, seed=3)


@pytest.fixture(scope="module")
def board_bundles(quick):
    rig = quick.rigs["rig"]
    return {side: rd.RayBundle(getattr(rig, side), 4) for side in ("left", "right")}


def _nearest_errors(found, truth):
    d = np.linalg.norm(found[:, None, :] - truth[None, :, :], axis=2)
    return d.min(axis=0)


def test_chessboard_corners_match_cv2_projectPoints(quick, board_bundles):
    rig = quick.rigs["rig"]
    board = quick.board
    views = quick.group("target").views
    errors = []
    sensor = rd.SensorModel(supersample=4)
    for i, view in enumerate(views[::2]):
        for side in ("left", "right"):
            cam = getattr(rig, side)
            if not board_fully_visible(view, board, cam):
                continue
            rad = rd.render_radiance_board(board_bundles[side], view.rotation, view.origin, board, quick.lighting)
            img = rd.expose(rad, sensor, np.random.default_rng(i))
            ok, corners = cv2.findChessboardCornersSB(img, (board["cols"], board["rows"]),
                                                      flags=cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE)
            assert ok, f"view {i} {side}: OpenCV found no chessboard"
            pts = board_corners_world(view, board)
            rvec, _ = cv2.Rodrigues(cam.rotation)
            ref, _ = cv2.projectPoints(pts, rvec, cam.translation, cam.matrix, cam.distortion)
            errors.append(_nearest_errors(corners.reshape(-1, 2), ref[:, 0]))
    errors = np.concatenate(errors)
    assert len(errors) >= 6 * board["cols"] * board["rows"]
    assert np.median(errors) < 0.1
    assert np.percentile(errors, 95) < 0.3


def test_views_cover_corners_and_include_single_camera_views(quick):
    rig = quick.rigs["rig"]
    views = quick.group("target").views
    vis = np.array([[board_fully_visible(v, quick.board, c) for c in (rig.left, rig.right)] for v in views])
    assert vis.any(axis=1).all()
    assert (vis[:, 0] & ~vis[:, 1]).any() and (vis[:, 1] & ~vis[:, 0]).any()
    assert (vis[:, 0] & vis[:, 1]).sum() >= 8


def test_intersection_lies_on_ray_and_surface(quick):
    rig = quick.rigs["rig"]
    bundle = rd.RayBundle(rig.left, 1)
    surface = quick.group("waves").surface
    x, y, z = rd.intersect_surface(bundle, surface, 0.01)
    np.testing.assert_allclose(z, surface.height(x, y, 0.01), atol=1e-7)
    # On the ray: projecting the surface point gives back the pixel (cv2.projectPoints as reference).
    pts = np.ascontiguousarray(np.stack([x, y, z], -1).reshape(-1, 3)[::97])
    rvec, _ = cv2.Rodrigues(rig.left.rotation)
    uv, _ = cv2.projectPoints(pts, rvec, rig.left.translation, rig.left.matrix, rig.left.distortion)
    h, w = bundle.shape
    uu, vv = np.meshgrid(np.arange(w), np.arange(h))
    np.testing.assert_allclose(uv[:, 0, 0], uu.ravel()[::97], atol=1e-6)
    np.testing.assert_allclose(uv[:, 0, 1], vv.ravel()[::97], atol=1e-6)


def test_uniform_pattern_lights_a_parallel_plane_uniformly(quick):
    # A pinhole projector whose axis is normal to a plane gives uniform irradiance on it:
    # E = I(theta) cos(theta) / r^2 with I ∝ 1/cos^3(theta), r = Z/cos(theta)  =>  E = const.
    rig = quick.rigs["rig"]
    proj = rig.projector
    from surfrec.synth.cameras import Projector, look_at
    c = proj.centre
    wide = proj.matrix.copy()
    wide[0, 0] /= 2  # a wider lens, so the straight-down projector covers the whole camera field
    wide[1, 1] /= 2
    straight = Projector(wide, look_at(c, [c[0], c[1], 0.0]), -look_at(c, [c[0], c[1], 0.0]) @ c,
                         proj.resolution)
    bundle = rd.RayBundle(rig.left, 1)
    bundle.vignette[:] = 1.0
    pattern = np.ones((proj.resolution[1], proj.resolution[0]), np.float32)
    light = rd.Lighting(exposure=0.5, ambient=0.0)
    rad = rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, straight, pattern, light)
    core = rad[10:-10, 10:-10]
    np.testing.assert_allclose(core, 0.5, rtol=2e-4)


def test_post_hides_and_shades_the_water():
    sc = build_scenario("scatter", quick=True, seed=0)
    rig = sc.rigs["rig"]
    bundle = rd.RayBundle(rig.left, 1)
    pattern = np.ones((rig.projector.resolution[1], rig.projector.resolution[0]), np.float32)
    g = sc.group("waves")
    rad = rd.render_radiance_speckle(bundle, g.surface, 0.0, rig.projector, pattern, sc.lighting, sc.post)
    # The pixel that sees the centre of the post's top shows the post (geometry: cv2.projectPoints).
    top = np.array([[sc.post.centre[0], sc.post.centre[1], sc.post.top]])
    rvec, _ = cv2.Rodrigues(rig.left.rotation)
    uv, _ = cv2.projectPoints(top, rvec, rig.left.translation, rig.left.matrix, rig.left.distortion)
    u, v = np.rint(uv[0, 0]).astype(int)
    vig = bundle.vignette[v, u]
    assert rad[v, u] == pytest.approx(sc.lighting.post_radiance * vig, rel=1e-6)
    # A shadow exists: water pixels lit by ambient light only.
    water_dark = np.isclose(rad, sc.lighting.ambient * bundle.vignette, rtol=1e-6)
    assert water_dark.sum() > 20
    # The post's outline in the image is about its projected diameter (pinhole geometry).
    post_px = np.isclose(rad, sc.lighting.post_radiance * bundle.vignette, rtol=1e-6)
    f = rig.left.matrix[0, 0]
    dist = np.linalg.norm(rig.left.centre - top[0])
    width_px = 2 * sc.post.radius * f / dist
    assert post_px.sum() > 0.7 * np.pi / 4 * width_px ** 2


def test_sensor_noise_follows_shot_and_read_noise():
    # Photon transfer: variance in electrons = mean signal + read noise^2 (EMVA 1288).
    sensor = rd.SensorModel(supersample=1, psf_sigma_px=0.0, bits=16, container_bits=16,
                            full_well_e=20000.0, read_noise_e=10.0, black_level=0.0)
    level = 0.4
    rad = np.full((400, 400), level, np.float32)
    img = rd.expose(rad, sensor, np.random.default_rng(0)).astype(float)
    gain = (2 ** 16 - 1) / sensor.full_well_e  # DN per electron
    mean_e = img.mean() / gain
    var_e = img.var() / gain ** 2
    assert mean_e == pytest.approx(level * sensor.full_well_e, rel=1e-3)
    assert var_e == pytest.approx(level * sensor.full_well_e + sensor.read_noise_e ** 2, rel=0.02)


def test_speckle_grain_size_matches_request():
    # The autocorrelation FWHM of Gaussian-filtered white noise is 2.355*sqrt(2)*sigma (standard result);
    # the soft threshold sharpens the grains only slightly.
    rng = np.random.default_rng(0)
    pat = rd.speckle_pattern((512, 512), 6.0, rng).astype(float)
    p = pat - pat.mean()
    spec = np.abs(np.fft.fft2(p)) ** 2
    ac = np.real(np.fft.ifft2(spec))
    ac /= ac[0, 0]
    profile = ac[0, :20]
    fwhm = 2 * np.interp(0.5, profile[::-1], np.arange(20)[::-1])
    assert 4.5 < fwhm < 6.5
    assert pat.min() >= 0.0 and pat.max() <= 1.0


def test_time_harmonic_tables_match_direct_intersection():
    # The along-ray tables of a time-harmonic field must give the heights that direct
    # fixed-point intersection with the MacCamy-Fuchs surface gives (outside the post).
    sc = build_scenario("scatter", quick=True, seed=0)
    rig = sc.rigs["rig"]
    bundle = rd.RayBundle(rig.left, 1)
    surface = sc.group("waves").surface
    table = rd._HarmonicAlongRays(bundle, surface)
    rows = slice(150, 230)
    for t in (0.0, 0.037):
        x, y, z, hx, hy = table.intersect(bundle, t, rows, exempt=sc.post.contains)
        x2, y2, z2 = rd.intersect_surface(bundle, surface, t, rows, exempt=sc.post.contains)
        water = ~sc.post.contains(x2, y2)
        assert np.abs(z - z2)[water].max() < 2e-6
        gx, gy = surface.gradient(x2, y2, t)
        assert np.abs(hx - gx)[water].max() < 2e-3 and np.abs(hy - gy)[water].max() < 2e-3
