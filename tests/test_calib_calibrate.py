"""Rig calibration (surfrec.calib.calibrate, surfrec.calib.bundle) against known truth and OpenCV.

The views are the quick `moved` session's target groups (512x384 px; target/
before the move, target-moved/ after the right camera turned 0.2 degrees about
its optical axis), rendered in memory once for this module. Truth is the
renderer's cameras (checked against cv2.projectPoints / cv2.undistortPoints
in tests/test_cameras.py).

Accuracy targets are those of issue 3 (focal lengths within 0.1 %, principal
points within 1 px, pixel-to-ray mapping within 0.1 px RMS over the whole
image once the best-fitting rotation is removed, baseline within 0.05 %,
stereo rotation within 0.05 degrees, rectified corner pairs on the same row
within 0.1 px, re-posing within 0.1 degrees and 0.5 mm, reprojection RMS
below 0.2 px). The best-fitting rotation is the orthogonal Procrustes /
Kabsch solution by SVD (Kabsch, Acta Cryst. A32 (1976) 922).

Margins: with 12 views on 512x384 px the view geometry itself limits the
accuracy; a Monte Carlo over this geometry (tests/benchmarks/
bench_calibrate_noise.py, docs/calibration.md) puts the median errors of the
joint estimate at about 0.07 px (rays), 0.05 deg (stereo rotation) and
0.02 % (baseline). The seed-0 images meet the issue's targets, but a change
of the renderer or of the seed can move a figure across one with nothing
wrong; the full-size figures in docs/calibration.md are the reference then.
"""

import dataclasses

import cv2
import numpy as np
import pytest

from surfrec.calib.calibrate import (calibrate_rig, convergence_angle_deg, coverage, outlier_views, repose_rig,
                                     rotation_angle_deg)
from surfrec.calib.rectify import rectification_maps
from surfrec.calib.targets import Board, Detection, find_target
from surfrec.errors import InputError
from surfrec.synth.cameras import stereo_from_cameras
from surfrec.synth.scenarios import build_scenario
from surfrec.synth.session import render_session

BOARD = Board("chessboard", 11, 8, 15.0)


@pytest.fixture(scope="module")
def session():
    sc = build_scenario("moved", quick=True, seed=0)
    boards = dataclasses.replace(sc, groups=[g for g in sc.groups if g.kind == "board"])
    images = {}
    render_session(boards, lambda g, i, left, right: images.setdefault(g, []).append((left, right)), workers=2)
    dets = {}
    for g, pairs in images.items():
        dets[g] = {"left": [find_target(a, BOARD) for a, _ in pairs], "right": [find_target(b, BOARD) for _, b in pairs]}
    return {"scenario": sc, "images": images, "dets": dets}


@pytest.fixture(scope="module")
def calib(session):
    d = session["dets"]["target"]
    return calibrate_rig(d["left"], d["right"], BOARD, (512, 384))


@pytest.fixture(scope="module")
def truth(session):
    return session["scenario"].rigs


def _ray_error_px(matrix, dist, cam, n=(65, 49)):
    """Pixel-to-ray error of an estimated camera against the true one, px, over the whole image.

    Rays of a grid of pixels (edges and corners included) from both models
    (cv2.undistortPoints as the reference for both), the estimated ones turned
    by the best-fitting rotation (Kabsch), projected back through the true
    camera (cv2.projectPoints) and compared with the pixels.
    """
    w, h = cam.image_size
    uu, vv = np.meshgrid(np.linspace(0, w - 1, n[0]), np.linspace(0, h - 1, n[1]))
    px = np.stack([uu.ravel(), vv.ravel()], -1)
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-14)

    def rays(k, d):
        x = cv2.undistortPoints(px.reshape(-1, 1, 2), k, d, criteria=crit).reshape(-1, 2)
        r = np.c_[x, np.ones(len(x))]
        return r / np.linalg.norm(r, axis=1, keepdims=True)

    est, ref = rays(matrix, dist), rays(cam.matrix, cam.distortion)
    u, _, vt = np.linalg.svd(est.T @ ref)
    rot = vt.T @ np.diag([1, 1, np.sign(np.linalg.det(vt.T @ u.T))]) @ u.T
    back, _ = cv2.projectPoints(est @ rot.T, np.zeros(3), np.zeros(3), cam.matrix, cam.distortion)
    err = np.linalg.norm(back.reshape(-1, 2) - px, axis=1)
    return err, rot


def test_every_view_found_and_used(calib):
    assert len(calib.views) == 16
    assert all(v.used and set(v.roles) == {"left", "right", "stereo"} for v in calib.views)
    assert calib.mode == "full" and calib.joint_fit is not None


@pytest.mark.parametrize("side", ["left", "right"])
def test_intrinsics_match_truth(calib, truth, side):
    # Issue 3: focal lengths within 0.1 %, principal points within 1 px (truth: the renderer's camera).
    k = getattr(calib, f"{side}_matrix")
    kt = getattr(truth["rig"], side).matrix
    assert abs(k[0, 0] / kt[0, 0] - 1) < 1e-3
    assert abs(k[1, 1] / kt[1, 1] - 1) < 1e-3
    assert abs(k[0, 2] - kt[0, 2]) < 1.0
    assert abs(k[1, 2] - kt[1, 2]) < 1.0
    # And within 3 sigma of the fit's own uncertainty (least-squares covariance).
    s = calib.joint_fit.std[side]
    for key, (a, b) in {"fx": (0, 0), "fy": (1, 1), "cx": (0, 2), "cy": (1, 2)}.items():
        assert abs(k[a, b] - kt[a, b]) < 3 * s[key], key


@pytest.mark.parametrize("side", ["left", "right"])
def test_pixel_to_ray_mapping_within_01_px_over_the_whole_image(calib, truth, side):
    # Issue 3: within 0.1 px RMS of the true mapping, corners included, once the
    # best-fitting rotation (absorbed by the pose) is removed.
    cam = getattr(truth["rig"], side)
    err, rot = _ray_error_px(getattr(calib, f"{side}_matrix"), getattr(calib, f"{side}_distortion"), cam)
    assert np.sqrt(np.mean(err ** 2)) < 0.1
    # The extreme corners are extrapolated from the nearest target points; on 512x384 px quick
    # images a few tenths of a px there is what 16 views allow (full size: see docs/calibration.md).
    assert err.max() < 0.5
    assert rotation_angle_deg(rot) < 0.1  # only a small frame rotation was absorbed


def test_stereo_pose_matches_truth(calib, truth):
    # Issue 3: baseline within 0.05 %, stereo rotation within 0.05 degrees.
    r_t, t_t = stereo_from_cameras(truth["rig"].left, truth["rig"].right)
    assert abs(calib.baseline_mm / np.linalg.norm(t_t) - 1) < 5e-4
    assert rotation_angle_deg(calib.rotation @ r_t.T) < 0.05
    # The convergence angle is the angle between the true optical axes (rows 3 of the world->camera rotations).
    axes = [truth["rig"].left.rotation[2], truth["rig"].right.rotation[2]]
    assert calib.convergence_deg == pytest.approx(np.degrees(np.arccos(axes[0] @ axes[1])), abs=0.05)
    assert convergence_angle_deg(r_t) == pytest.approx(np.degrees(np.arccos(axes[0] @ axes[1])), abs=1e-9)


def test_stereo_pose_matches_truth_once_the_camera_frame_rotations_are_removed(calib, truth):
    # What is left of the stereo rotation error after each camera's small frame rotation
    # (found by the ray fit above) is taken out: the pose absorbs those, as it should.
    r_t, t_t = stereo_from_cameras(truth["rig"].left, truth["rig"].right)
    _, rot_l = _ray_error_px(calib.left_matrix, calib.left_distortion, truth["rig"].left)
    _, rot_r = _ray_error_px(calib.right_matrix, calib.right_distortion, truth["rig"].right)
    # True rays d = rot @ estimated rays, so the estimated frames map by rot^T.
    r_expected = rot_r.T @ r_t @ rot_l
    assert rotation_angle_deg(calib.rotation @ r_expected.T) < 0.01


def test_residuals_below_02_px(calib):
    # Issue 3 "done when": reprojection RMS below 0.2 px.
    assert calib.rms_px < 0.2
    assert calib.epipolar_rms_px < 0.1
    assert all(v.rms_px < 0.2 for v in calib.views)
    d = calib.residuals_dict()
    assert d["rms_px"] == pytest.approx(calib.rms_px, abs=1e-5)
    assert len(d["views"]) == 16 and d["views"][0]["used"] is True


def test_sequential_stage_is_opencvs_own_calibration(calib, session):
    # Reference: cv2.calibrateCamera and cv2.stereoCalibrate (CALIB_FIX_INTRINSIC) run
    # directly on the same corners give the sequential estimate.
    d = session["dets"]["target"]
    obj = BOARD.object_points().astype(np.float32)
    for side in ("left", "right"):
        fit = getattr(calib, f"{side}_fit")
        pts = [d[side][i].points.astype(np.float32) for i in fit.views]
        rms, k, dist, _, _ = cv2.calibrateCamera([obj] * len(pts), pts, (512, 384), None, None,
                                                 criteria=(cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-12))
        # Not bit-identical: OpenCV's parallel sums differ from run to run in the last digits.
        np.testing.assert_allclose(fit.matrix, k, rtol=1e-7, atol=1e-7)
        np.testing.assert_allclose(fit.distortion, dist.ravel()[:5], rtol=1e-5, atol=1e-7)
        assert fit.rms_px == pytest.approx(rms, rel=1e-7)
    st = calib.stereo_fit
    out = cv2.stereoCalibrate([obj] * len(st.views), [d["left"][i].points.astype(np.float32) for i in st.views],
                              [d["right"][i].points.astype(np.float32) for i in st.views],
                              calib.left_fit.matrix, calib.left_fit.distortion, calib.right_fit.matrix,
                              calib.right_fit.distortion, (512, 384), flags=cv2.CALIB_FIX_INTRINSIC,
                              criteria=(cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-12))
    np.testing.assert_allclose(st.rotation, out[5], atol=1e-8)
    np.testing.assert_allclose(st.translation, out[6].ravel(), atol=1e-6)
    assert st.rms_px == pytest.approx(out[0], rel=1e-7)


def test_joint_refinement_reaches_opencvs_joint_minimum(calib, session):
    # When every view is seen by both cameras, the joint refinement minimises what
    # cv2.stereoCalibrate with CALIB_USE_INTRINSIC_GUESS minimises (reference library):
    # both, started from the sequential estimate, must reach the same parameters.
    d = session["dets"]["target"]
    obj = BOARD.object_points().astype(np.float32)
    v = calib.joint_fit.views
    assert all(set(calib.views[i].roles) == {"left", "right", "stereo"} for i in v)
    out = cv2.stereoCalibrate([obj] * len(v), [d["left"][i].points.astype(np.float32) for i in v],
                              [d["right"][i].points.astype(np.float32) for i in v],
                              calib.left_fit.matrix.copy(), calib.left_fit.distortion.copy(),
                              calib.right_fit.matrix.copy(), calib.right_fit.distortion.copy(), (512, 384),
                              flags=cv2.CALIB_USE_INTRINSIC_GUESS,
                              criteria=(cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 300, 1e-14))
    assert calib.rms_px == pytest.approx(out[0], rel=1e-4)
    for ours, ref in ((calib.left_matrix, out[1]), (calib.right_matrix, out[3])):
        np.testing.assert_allclose(ours, ref, atol=0.02)
    for ours, ref in ((calib.left_distortion, out[2]), (calib.right_distortion, out[4])):
        np.testing.assert_allclose(ours[:3], ref.ravel()[:3], atol=2e-3)
    assert rotation_angle_deg(calib.rotation @ out[5].T) < 1e-4
    np.testing.assert_allclose(calib.translation, out[6].ravel(), atol=2e-3)


def test_rectified_true_corners_share_rows(calib, session):
    # Issue 3: corresponding corners on the same row within 0.1 px. The true corner
    # projections (no detection noise) mapped through cv2.undistortPoints with R1/P1, R2/P2.
    rect = calib.rectification
    sc = session["scenario"]
    from surfrec.synth.scenarios import board_corners_world

    rig = sc.rigs["rig"]
    errs = []
    for view in sc.group("target").views:
        world = board_corners_world(view, sc.board)
        pl = cv2.undistortPoints(rig.left.project(world).reshape(-1, 1, 2), calib.left_matrix, calib.left_distortion,
                                 R=rect["R1"], P=rect["P1"]).reshape(-1, 2)
        pr = cv2.undistortPoints(rig.right.project(world).reshape(-1, 1, 2), calib.right_matrix,
                                 calib.right_distortion, R=rect["R2"], P=rect["P2"]).reshape(-1, 2)
        errs.append(pl[:, 1] - pr[:, 1])
    errs = np.concatenate(errs)
    assert np.abs(errs).max() < 0.1
    # Rectified pixels are about image pixels (no zoom; see surfrec.calib.rectify).
    assert 0.9 < rect["P1"][0, 0] / calib.left_matrix[0, 0] < 1.2


def test_corners_detected_in_remapped_images_share_rows(calib, session):
    # Issue 3: after cv2.remap with the rig's maps, chessboard corners found in the
    # rectified images lie on the same row within 0.1 px (RMS; each corner carries
    # about 0.04 px of detection noise, so single pairs spread a little more).
    rect = calib.rectification
    maps = [rectification_maps(calib.left_matrix, calib.left_distortion, rect["R1"], rect["P1"], (512, 384)),
            rectification_maps(calib.right_matrix, calib.right_distortion, rect["R2"], rect["P2"], (512, 384))]
    diffs = []
    for left, right in session["images"]["target"]:
        found = []
        for img, (mx, my) in zip((left, right), maps):
            r = cv2.remap(img, mx, my, cv2.INTER_CUBIC, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
            found.append(find_target(r, BOARD))
        if found[0].found and found[1].found:
            diffs.append(found[0].points[:, 1] - found[1].points[:, 1])
    assert len(diffs) >= 6
    diffs = np.concatenate(diffs)
    assert np.sqrt(np.mean(diffs ** 2)) < 0.1
    assert np.median(np.abs(diffs)) < 0.1


def test_single_camera_views_serve_only_that_camera(session, truth):
    # A view the right camera does not see whole still serves the left intrinsics (how the
    # image corners get covered), and not the stereo pose; the joint fit takes it too.
    d = session["dets"]["target"]
    right = list(d["right"])
    hidden = range(8, len(right) - 1)  # all but nine views lose the right camera
    for i in hidden:
        right[i] = Detection(False, None, "not in view")
    c = calibrate_rig(d["left"], right, BOARD, (512, 384))
    for i in hidden:
        assert c.views[i].roles == ["left"]
        assert c.views[i].rms_right_px is None and c.views[i].rms_left_px is not None
        assert "right: not in view" in c.views[i].notes
    assert sum("stereo" in v.roles for v in c.views) == 9
    assert len(c.joint_fit.views) == 16
    r_t, t_t = stereo_from_cameras(truth["rig"].left, truth["rig"].right)
    assert abs(c.baseline_mm / np.linalg.norm(t_t) - 1) < 1e-3
    err, _ = _ray_error_px(c.left_matrix, c.left_distortion, truth["rig"].left)
    assert np.sqrt(np.mean(err ** 2)) < 0.15
    # Fewer than 10 good views: warned (common practice).
    assert any("only 9 views serve the stereo pose" in w for w in c.warnings)


def test_an_outlier_view_is_rejected_and_reported(session, truth):
    # Common practice: a view with gross errors (here the left corners of view 5 pushed by
    # 1.5 px in random directions, as a blurred or moving target gives) is dropped and the
    # fit repeated; the rule is RMS > 3 x median and > 0.3 px.
    d = session["dets"]["target"]
    left = list(d["left"])
    rng = np.random.default_rng(0)
    left[5] = Detection(True, left[5].points + 1.5 * rng.standard_normal(left[5].points.shape))
    c = calibrate_rig(left, d["right"], BOARD, (512, 384))
    v = c.views[5]
    assert "left" not in v.roles and "stereo" not in v.roles and v.roles == ["right"]
    assert any(n.startswith("rejected from the left intrinsics") for n in v.notes)
    assert c.rms_px < 0.2
    assert abs(c.left_matrix[0, 0] / truth["rig"].left.matrix[0, 0] - 1) < 1e-3


def test_outlier_rule():
    # RMS > 3 x median and > 0.3 px (both needed).
    np.testing.assert_array_equal(outlier_views([0.05, 0.06, 0.05, 0.2]), [False, False, False, False])
    np.testing.assert_array_equal(outlier_views([0.05, 0.06, 0.05, 0.9]), [False, False, False, True])
    np.testing.assert_array_equal(outlier_views([0.5, 0.6, 0.55, 1.2]), [False, False, False, False])


def test_coverage_counts_cells():
    # An 8x6 grid of 64x64 px cells on a 512x384 image.
    centres = [np.array([[64 * c + 32, 64 * r + 32]]) for r in range(6) for c in range(8)]
    frac, occ = coverage(centres, (512, 384))
    assert frac == 1.0 and occ.shape == (6, 8)
    frac, occ = coverage([np.array([[0.0, 0.0], [511.0, 383.0]])], (512, 384))
    assert frac == pytest.approx(2 / 48) and occ[0, 0] and occ[-1, -1]


def test_reposing_recovers_the_moved_pose(session, calib, truth):
    # Issue 3: re-posing from 3 views (and from all 4) after the right camera turned
    # 0.2 degrees about its optical axis recovers the new pose within 0.1 degrees and 0.5 mm.
    d = session["dets"]["target-moved"]
    r_new, t_new = stereo_from_cameras(truth["moved"].left, truth["moved"].right)
    for n in (3, 4):
        c = repose_rig(d["left"][:n], d["right"][:n], BOARD, (512, 384), left_matrix=calib.left_matrix,
                       left_distortion=calib.left_distortion, right_matrix=calib.right_matrix,
                       right_distortion=calib.right_distortion, old_rotation=calib.rotation,
                       old_translation=calib.translation)
        assert c.mode == "keep-intrinsics"
        assert rotation_angle_deg(c.rotation @ r_new.T) < 0.1
        assert np.linalg.norm(c.translation - t_new) < 0.5
        # The move itself (docs/synthetic-sessions.md: 0.2 degrees about the optical axis, centre fixed).
        assert c.pose_change["rotation_deg"] == pytest.approx(0.2, abs=0.02)
        np.testing.assert_array_equal(c.left_matrix, calib.left_matrix)
        assert c.rms_px < 0.2 and c.epipolar_rms_px < 0.1


def test_too_few_views_are_input_errors(session, calib):
    d = session["dets"]["target-moved"]
    with pytest.raises(InputError, match="needs at least 3"):
        repose_rig(d["left"][:2], d["right"][:2], BOARD, (512, 384), left_matrix=calib.left_matrix,
                   left_distortion=calib.left_distortion, right_matrix=calib.right_matrix,
                   right_distortion=calib.right_distortion)
    d = session["dets"]["target"]
    missing = [Detection(False, None, "no 11x8 chessboard found")] * (len(d["right"]) - 2)
    with pytest.raises(InputError, match=f"the left camera sees the whole 11x8 chessboard in 2 of {len(d['right'])} views"):
        calibrate_rig(d["left"][:2] + missing, d["right"], BOARD, (512, 384))
    with pytest.raises(InputError, match="paired by index"):
        calibrate_rig(d["left"], d["right"][:5], BOARD, (512, 384))
