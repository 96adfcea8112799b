"""Camera model of the synthetic renderer against OpenCV (a general-purpose reference library)."""

import cv2
import numpy as np
import pytest

from surfrec.synth.cameras import Camera, Projector, distort_normalised, look_at, rotation_about_axis
from surfrec.synth.scenarios import _cameras


@pytest.fixture(scope="module")
def rig():
    return _cameras(1.0)


def test_project_matches_cv2_projectPoints(rig):
    # Reference: cv2.projectPoints with the same K, distortion and pose.
    rng = np.random.default_rng(1)
    pts = rng.uniform([-200, -160, -20], [200, 160, 150], (2000, 3))
    for cam in rig:
        rvec, _ = cv2.Rodrigues(cam.rotation)
        ref, _ = cv2.projectPoints(pts, rvec, cam.translation, cam.matrix, cam.distortion)
        np.testing.assert_allclose(cam.project(pts), ref[:, 0], atol=1e-9)


def test_pixel_rays_match_cv2_undistortPoints(rig):
    # Reference: cv2.undistortPoints run to convergence; corners included, where distortion is largest.
    for cam in rig:
        w, h = cam.image_size
        u, v = np.meshgrid(np.linspace(-0.5, w - 0.5, 41), np.linspace(-0.5, h - 0.5, 33))
        xn, yn = cam.undistort_normalised(u, v)
        crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 1000, 1e-15)
        ref = cv2.undistortPoints(np.stack([u.ravel(), v.ravel()], -1).reshape(-1, 1, 2), cam.matrix,
                                  cam.distortion, criteria=crit)[:, 0]
        # In pixels: normalised error times the focal length.
        err_px = np.hypot(xn.ravel() - ref[:, 0], yn.ravel() - ref[:, 1]) * cam.matrix[0, 0]
        assert err_px.max() < 1e-6


def test_rays_reproject_to_their_pixels(rig):
    # Round trip through cv2.projectPoints: a point on each ray projects back to the pixel.
    for cam in rig:
        w, h = cam.image_size
        u, v = np.meshgrid(np.linspace(0, w - 1, 25), np.linspace(0, h - 1, 20))
        d = cam.pixel_rays(u, v)
        pts = cam.centre + d.reshape(-1, 3) * 850.0
        rvec, _ = cv2.Rodrigues(cam.rotation)
        ref, _ = cv2.projectPoints(pts, rvec, cam.translation, cam.matrix, cam.distortion)
        assert np.abs(ref[:, 0, 0] - u.ravel()).max() < 1e-8
        assert np.abs(ref[:, 0, 1] - v.ravel()).max() < 1e-8


def test_look_at_is_a_rotation_pointing_at_the_target():
    # Definition of a rotation matrix: orthonormal, determinant +1.
    c = np.array([-125.0, 0.0, 900.0])
    r = look_at(c, [0, 0, 0])
    np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-12)
    assert np.linalg.det(r) == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(r[2], -c / np.linalg.norm(c), atol=1e-12)
    # Image up is world +y: the camera's y axis (image down) points to world -y.
    assert r[1, 1] < -0.9


def test_rotation_about_axis_matches_rodrigues_formula():
    # Rodrigues' rotation formula, R = I + sin(a) K + (1 - cos(a)) K^2 (standard result).
    axis = np.array([0.3, -0.5, 0.81])
    axis /= np.linalg.norm(axis)
    a = np.deg2rad(17.0)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    ref = np.eye(3) + np.sin(a) * k + (1 - np.cos(a)) * k @ k
    np.testing.assert_allclose(rotation_about_axis(axis, 17.0), ref, atol=1e-12)


def test_distortion_model_matches_opencv_documentation():
    # OpenCV's documented Brown-Conrady model, evaluated by cv2.projectPoints on a camera at the origin.
    dist = np.array([-0.2, 0.1, 1e-3, -2e-3, 0.05])
    xn = np.array([0.1, -0.2, 0.25])
    yn = np.array([0.05, 0.2, -0.15])
    xd, yd = distort_normalised(xn, yn, dist)
    pts = np.stack([xn, yn, np.ones(3)], -1)
    ref, _ = cv2.projectPoints(pts, np.zeros(3), np.zeros(3), np.eye(3), dist)
    np.testing.assert_allclose(np.stack([xd, yd], -1), ref[:, 0], atol=1e-14)


def test_projector_projection_is_pinhole():
    # Pinhole model x = K [R | t] X (Hartley & Zisserman, Multiple View Geometry, eq. 6.8).
    centre = np.array([0.0, -35.0, 940.0])
    rot = look_at(centre, [0, 0, 0])
    k = np.array([[3000.0, 0, 959.5], [0, 3000.0, 599.5], [0, 0, 1]])
    p = Projector(k, rot, -rot @ centre, (1920, 1200))
    pts = np.array([[10.0, 20.0, 0.0], [-100.0, 50.0, 3.0]])
    u, v = p.project_xyz(pts[:, 0], pts[:, 1], pts[:, 2])
    ref, _ = cv2.projectPoints(pts, cv2.Rodrigues(rot)[0], -rot @ centre, k, None)
    np.testing.assert_allclose(np.stack([u, v], -1), ref[:, 0], atol=1e-9)
    np.testing.assert_allclose(p.centre, centre, atol=1e-12)


def test_camera_dict_round_trip(rig):
    cam = rig[0]
    back = Camera.from_dict(cam.to_dict())
    np.testing.assert_array_equal(back.matrix, cam.matrix)
    np.testing.assert_array_equal(back.rotation, cam.rotation)
    assert back.image_size == cam.image_size
