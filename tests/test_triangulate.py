"""Triangulation of rectified matches against OpenCV.

References:
- cv2.triangulatePoints (linear triangulation, Hartley & Zisserman, Multiple
  View Geometry, 2nd ed., section 12.2) on the same correspondences, with the
  rectified projections P1, P2 of cv2.stereoRectify;
- cv2.reprojectImageTo3D, which applies Q to a disparity image;
- the textbook depth of a rectified pair, Z = f B / (d - (cx1 - cx2))
  (Hartley & Zisserman, section 9.2), whose derivative gives the height
  sensitivity.
"""

import cv2
import numpy as np
import pytest

from surfrec.calib.rectify import rectify
from surfrec.geometry.triangulate import height_sensitivity, project_rectified, triangulate
from surfrec.synth.cameras import Camera, look_at, stereo_from_cameras


@pytest.fixture(scope="module")
def verged_rig():
    # Two cameras 250 mm apart, 900 mm above a target point, verged on it (like the synthetic rig).
    k = np.array([[1300.0, 0, 640.3], [0, 1301.0, 511.7], [0, 0, 1]])
    dist = np.array([-0.11, 0.2, 3e-4, -2e-4, -0.25])
    cams = []
    for x in (-125.0, 125.0):
        centre = np.array([x, 3.0, 900.0])
        cams.append(Camera.from_pose(k, dist, centre, look_at(centre, [0.0, 0.0, 0.0]), (1280, 1024)))
    r, t = stereo_from_cameras(*cams)
    rect = rectify(k, dist, k, dist, (1280, 1024), r, t)
    return cams, rect


def _random_matches(n, seed=0):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 1279, n), rng.uniform(0, 1023, n), rng.uniform(-20, 20, n)


def test_agrees_with_cv2_triangulate_points(verged_rig):
    _, rect = verged_rig
    u, v, d = _random_matches(500)
    ours = triangulate(u, v, d, rect["Q"], rect["R1"])
    hom = cv2.triangulatePoints(rect["P1"], rect["P2"], np.vstack([u, v]), np.vstack([u - d, v]))
    ref_rect = (hom[:3] / hom[3]).T
    ref = ref_rect @ rect["R1"]  # back to the left camera frame through R1 transposed (docs/conventions.md)
    rel = np.linalg.norm(ours - ref, axis=1) / np.linalg.norm(ref, axis=1)
    assert rel.max() < 1e-9


def test_agrees_with_cv2_reproject_image_to_3d(verged_rig):
    _, rect = verged_rig
    rng = np.random.default_rng(1)
    disp = rng.uniform(-5, 5, (24, 32)).astype(np.float32)
    ref_rect = cv2.reprojectImageTo3D(disp, rect["Q"].astype(np.float64))
    vv, uu = np.mgrid[0:24, 0:32]
    ours_rect = triangulate(uu, vv, disp.astype(np.float64), rect["Q"], rect["R1"]) @ rect["R1"].T
    # reprojectImageTo3D computes in float32: compare at its precision.
    np.testing.assert_allclose(ours_rect, ref_rect, rtol=2e-6)


def test_round_trip_through_the_projections(verged_rig):
    _, rect = verged_rig
    u, v, d = _random_matches(1000, seed=2)
    pts = triangulate(u, v, d, rect["Q"], rect["R1"])
    u2, v2, d2 = project_rectified(pts, rect["R1"], rect["P1"], rect["P2"])
    np.testing.assert_allclose(u2, u, atol=1e-9)
    np.testing.assert_allclose(v2, v, atol=1e-9)
    np.testing.assert_allclose(d2, d, atol=1e-9)


def test_points_of_the_scene_come_back(verged_rig):
    # World points seen by both cameras -> distorted pixels (our camera model, checked against
    # cv2.projectPoints in test_cameras.py) -> rectified pixels by cv2.undistortPoints -> triangulated.
    (left, right), rect = verged_rig
    rng = np.random.default_rng(3)
    world = np.column_stack([rng.uniform(-100, 100, 200), rng.uniform(-80, 80, 200), rng.uniform(-5, 5, 200)])
    pl = left.project(world)
    pr = right.project(world)
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
    rl = cv2.undistortPoints(pl.reshape(-1, 1, 2), left.matrix, left.distortion, R=rect["R1"], P=rect["P1"],
                             criteria=crit).reshape(-1, 2)
    rr = cv2.undistortPoints(pr.reshape(-1, 1, 2), right.matrix, right.distortion, R=rect["R2"], P=rect["P2"],
                             criteria=crit).reshape(-1, 2)
    assert np.abs(rl[:, 1] - rr[:, 1]).max() < 1e-6  # rectified rows agree
    pts = triangulate(rl[:, 0], rl[:, 1], rl[:, 0] - rr[:, 0], rect["Q"], rect["R1"])
    np.testing.assert_allclose(pts, left.to_camera(world), atol=1e-5)


def test_height_sensitivity_is_the_derivative_of_depth(verged_rig):
    # Along the rectified optical axis: Z = f B / (d - c), so dZ/dd = -Z^2 / (f B) = -Z^2 Q[3,2] / Q[2,3].
    _, rect = verged_rig
    q = rect["Q"]
    u, v, d = _random_matches(50, seed=4)
    pts_rect = triangulate(u, v, d, q, rect["R1"]) @ rect["R1"].T
    z = pts_rect[:, 2]
    normal = rect["R1"].T @ np.array([0.0, 0.0, 1.0])
    gain = height_sensitivity(u, v, d, q, rect["R1"], normal)
    np.testing.assert_allclose(gain, -z ** 2 * q[3, 2] / q[2, 3], rtol=1e-6)


def test_nan_disparity_and_points_behind_give_nan(verged_rig):
    _, rect = verged_rig
    assert np.all(np.isnan(triangulate(10.0, 20.0, np.nan, rect["Q"], rect["R1"])))
    u, v, d = project_rectified(np.array([[0.0, 0.0, -100.0]]) @ rect["R1"], rect["R1"], rect["P1"], rect["P2"])
    assert np.isnan(u[0]) and np.isnan(d[0])
