"""Frame rectification: exact-position B-spline resampling against scipy.ndimage.map_coordinates,
and the rectified views of a true rig putting corresponding points on the same row
(epipolar geometry of cv2.stereoRectify)."""

import cv2
import numpy as np
import pytest
from scipy import ndimage

from surfrec.calib.rectify import rectify
from surfrec.io.rigfile import StereoRig
from surfrec.match.rectification import FrameRectifier
from surfrec.synth.cameras import stereo_from_cameras
from surfrec.synth.scenarios import build_scenario


@pytest.fixture(scope="module")
def true_rig():
    sc = build_scenario("waves", quick=True)
    left, right = sc.rigs["rig"].left, sc.rigs["rig"].right
    r, t = stereo_from_cameras(left, right)
    rect = rectify(left.matrix, left.distortion, right.matrix, right.distortion, left.image_size, r, t)
    rig = StereoRig(left.image_size, left.matrix, left.distortion, right.matrix, right.distortion, r, t, rect)
    return rig, left, right


@pytest.mark.parametrize("method, order", [("bspline3", 3), ("bspline5", 5)])
def test_bspline_rectification_equals_map_coordinates(true_rig, method, order):
    rig = true_rig[0]
    img = ndimage.gaussian_filter(np.random.default_rng(0).random((384, 512)), 1.2)
    fr = FrameRectifier(rig, method)
    out = fr.left(img)
    mx, my = fr.maps["left"]
    ref = ndimage.map_coordinates(img, [my.astype(float), mx.astype(float)], order=order, mode="mirror")
    assert np.abs(out - ref)[8:-8, 8:-8].max() < 1e-6


def test_rectified_points_share_rows(true_rig):
    # Still-water points projected by the true cameras land on one rectified row in both views.
    rig, left, right = true_rig
    xs, ys = np.meshgrid(np.linspace(-120, 120, 9), np.linspace(-90, 90, 7))
    pts = np.stack([xs.ravel(), ys.ravel(), np.zeros(xs.size)], -1)
    rect = rig.rectification
    ul = cv2.undistortPoints(left.project(pts).reshape(-1, 1, 2), left.matrix, left.distortion, R=rect["R1"],
                             P=rect["P1"])[:, 0]
    ur = cv2.undistortPoints(right.project(pts).reshape(-1, 1, 2), right.matrix, right.distortion, R=rect["R2"],
                             P=rect["P2"])[:, 0]
    assert np.abs(ul[:, 1] - ur[:, 1]).max() < 1e-6
    # The maps invert that mapping: sampling the map at the rectified position gives the original pixel.
    fr = FrameRectifier(rig)
    mx, my = fr.maps["left"]
    orig = left.project(pts)
    inside = (ul[:, 0] > 2) & (ul[:, 0] < 509) & (ul[:, 1] > 2) & (ul[:, 1] < 381)
    back_x = ndimage.map_coordinates(mx, [ul[inside, 1], ul[inside, 0]], order=1)
    back_y = ndimage.map_coordinates(my, [ul[inside, 1], ul[inside, 0]], order=1)
    assert np.abs(back_x - orig[inside, 0]).max() < 0.05
    assert np.abs(back_y - orig[inside, 1]).max() < 0.05
