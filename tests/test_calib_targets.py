"""Target detection (surfrec.calib.targets) and the circle-grid renderer (surfrec.synth.circlegrid).

References named beside each check:
- true corner / centre positions: cv2.projectPoints of the rendered target's
  world points through the renderer's camera (the renderer itself is checked
  against OpenCV in tests/test_render.py and tests/test_cameras.py);
- OpenCV's own detectors (cv2.findChessboardCornersSB, cv2.findCirclesGrid)
  as the baseline our refinement must not fall behind;
- OpenCV's board layouts (its calibration sample, samples/cpp/calibration.cpp,
  calcBoardCornerPositions; from memory), checked by fitting a homography
  (cv2.findHomography) to a view through a distortion-free camera.
"""

import dataclasses

import cv2
import numpy as np
import pytest

from surfrec.calib.targets import DEFECT_THRESHOLD, SUBPIX_WINDOW_FRACTION, Board, find_target, parse_board_size, repair_defects
from surfrec.synth import render as rd
from surfrec.synth.cameras import Camera
from surfrec.synth.circlegrid import CircleGrid, facing_pose, render_circle_grid_view
from surfrec.synth.scenarios import board_corners_world, board_fully_visible, build_scenario
from surfrec.synth.session import render_session

BOARD = Board("chessboard", 11, 8, 15.0)


@pytest.fixture(scope="module")
def quick():
    return build_scenario("waves", quick=True, seed=0)


@pytest.fixture(scope="module")
def chessboard_views(quick):
    """A few rendered target views of each quick camera, with their true corner pixels."""
    rig = quick.rigs["rig"]
    sensor = rd.SensorModel(supersample=4)
    out = []
    views = quick.group("target").views
    for side in ("left", "right"):
        cam = getattr(rig, side)
        bundle = rd.RayBundle(cam, 4)
        for i in (0, 3, 8, 10):
            view = views[i]
            if not board_fully_visible(view, quick.board, cam):
                continue
            rad = rd.render_radiance_board(bundle, view.rotation, view.origin, quick.board, quick.lighting)
            img = rd.expose(rad, sensor, np.random.default_rng([i, 1 if side == "left" else 2]))
            rvec, _ = cv2.Rodrigues(cam.rotation)
            truth, _ = cv2.projectPoints(board_corners_world(view, quick.board), rvec, cam.translation, cam.matrix,
                                         cam.distortion)
            out.append((side, i, img, truth.reshape(-1, 2)))
    return out


def _match(found, truth):
    """Error of each truth point to its nearest found point, px (order-free)."""
    d = np.linalg.norm(found[:, None, :] - truth[None, :, :], axis=2)
    return d.min(axis=0)


def test_chessboard_corners_within_005_px_and_better_than_opencv_alone(chessboard_views):
    # Reference: true projections (cv2.projectPoints); baseline: cv2.findChessboardCornersSB alone.
    ours, sb_only = [], []
    for side, i, img, truth in chessboard_views:
        det = find_target(img, BOARD)
        assert det.found, f"{side} view {i}: {det.reason}"
        ours.append(_match(det.points, truth))
        ok, sb = cv2.findChessboardCornersSB(img, (11, 8), flags=cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE)
        assert ok
        sb_only.append(_match(sb.reshape(-1, 2).astype(float), truth))
    ours, sb_only = np.concatenate(ours), np.concatenate(sb_only)
    assert len(ours) >= 6 * 88
    rms = np.sqrt(np.mean(ours ** 2))
    assert rms < 0.05
    assert rms < 0.8 * np.sqrt(np.mean(sb_only ** 2))
    assert ours.max() < 0.25


def test_corner_order_is_the_same_in_both_cameras(chessboard_views):
    # Stereo needs point k of the left view to be point k of the right view. The
    # detector numbers an 11x8 board (one odd, one even count: not symmetric under a
    # half turn) from the same physical corner in every view, so one fixed
    # permutation maps the truth order (board rows) to the detected order everywhere.
    perms = set()
    for side, i, img, truth in chessboard_views:
        det = find_target(img, BOARD)
        nearest = np.argmin(np.linalg.norm(det.points[:, None] - truth[None], axis=2), axis=1)
        assert len(set(nearest)) == 88
        perms.add(tuple(nearest))
    assert len(perms) == 1
    assert not BOARD.symmetric and Board("chessboard", 9, 7, 10.0).symmetric


def test_integer_depth_and_scale_do_not_change_the_corners(chessboard_views):
    # 12-bit data in 16-bit samples: the same scene scaled by 16 gives the same corners
    # (cornerSubPix's gradient equations are invariant to intensity scale).
    side, i, img, truth = chessboard_views[0]
    a = find_target(img, BOARD)
    b = find_target(img.astype(np.uint16) * 16, BOARD)
    c = find_target(img.astype(np.float32) / 255.0, BOARD)
    assert a.found and b.found and c.found
    np.testing.assert_allclose(b.points, a.points, atol=2e-3)
    np.testing.assert_allclose(c.points, a.points, atol=2e-3)


# ------------------------------------------------------- camera nuisances

def _opencv_alone(img, truth):
    """OpenCV's detector and cornerSubPix with our window, on the image as it is (the baseline)."""
    ok, sb = cv2.findChessboardCornersSB(img, (11, 8), flags=cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE)
    assert ok
    spacing = np.linalg.norm(np.diff(truth.reshape(8, 11, 2), axis=1), axis=2).min()
    half = int(round(SUBPIX_WINDOW_FRACTION * spacing))
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 100, 1e-4)
    return cv2.cornerSubPix(img.astype(np.float32), sb.astype(np.float32), (half, half), (-1, -1), crit).reshape(-1, 2)


class _DetectionLike:
    def __init__(self, points):
        self.found = points is not None
        self.points = points


def _found(det):
    return det if det.found else None


def _opencv_alone_any(img):
    """_opencv_alone for any sample type: the detector on the same 8-bit copy find_target makes."""
    from surfrec.calib.targets import _to_uint8

    img8, _ = _to_uint8(np.asarray(img))
    ok, sb = cv2.findChessboardCornersSB(img8, (11, 8), flags=cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE)
    if not ok:
        return None
    grid = sb.reshape(8, 11, 2)
    spacing = min(np.linalg.norm(np.diff(grid, axis=0), axis=2).min(), np.linalg.norm(np.diff(grid, axis=1), axis=2).min())
    half = int(round(SUBPIX_WINDOW_FRACTION * spacing))
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 100, 1e-4)
    return cv2.cornerSubPix(np.asarray(img, np.float32), sb, (half, half), (-1, -1), crit).reshape(-1, 2).astype(float)


def _stuck_pixels(img, truth, rng, fraction=5e-4):
    """Isolated hot (full scale) and dead (zero) pixels: a random fraction, and one within 2 px of every 4th corner.

    Isolated: a pixel next to one already stuck is left alone (side-by-side
    pairs are repair_defects' stated limit).
    """
    out = img.copy()
    full = np.iinfo(img.dtype).max
    h, w = img.shape
    stuck = np.zeros((h + 2, w + 2), bool)
    near = [np.rint(p).astype(int) + rng.integers(-2, 3, 2) for p in truth[::4]]
    idx = rng.choice(h * w, int(fraction * h * w), replace=False)
    for x, y in near + [(k % w, k // w) for k in idx]:
        if stuck[y:y + 3, x:x + 3].any():
            continue
        stuck[y + 1, x + 1] = True
        out[y, x] = full if rng.random() < 0.6 else 0
    return out


def test_clean_views_have_no_defects(chessboard_views):
    # The repair must leave clean data alone (then the corners are bit for bit those of
    # issue 3's tests): no pixel of the rendered views is flagged, and the image comes back as is.
    for side, i, img, truth in chessboard_views:
        rep, mask = repair_defects(img)
        assert not mask.any() and rep is img


def test_hot_and_dead_pixels_are_repaired(chessboard_views):
    # 5e-4 of the pixels stuck at full scale or zero (typical of machine-vision sensors; from
    # memory), plus one near every 4th corner. Reference: the true corners (cv2.projectPoints);
    # baseline: OpenCV's detector + cornerSubPix on the same images, which the stuck pixels
    # pull by about 0.12 px RMS (0.5 px worst).
    ours, alone, clean = [], [], []
    for side, i, img, truth in chessboard_views:
        bad = _stuck_pixels(img, truth, np.random.default_rng([i, len(side)]))
        rep, mask = repair_defects(bad)
        # Every stuck pixel that departs from the clean image by more than half the span is
        # caught, but for a dead one right at an X-junction (it looks like the black squares'
        # diagonal; see repair_defects)...
        span = np.subtract(*np.percentile(img, [99.9, 0.1]))
        gross = np.abs(bad.astype(float) - img) > 0.5 * span
        assert gross.sum() > 50
        for y, x in zip(*np.nonzero(gross & ~mask)):
            assert np.linalg.norm(truth - (x, y), axis=1).min() < 1.5 and bad[y, x] == 0
        # ...and nothing else is touched.
        assert not mask[bad == img].any()
        det = find_target(bad, BOARD)
        assert det.found
        ours.append(_match(det.points, truth))
        alone.append(_match(_opencv_alone(bad, truth), truth))
        clean.append(_match(find_target(img, BOARD).points, truth))
    rms = [np.sqrt(np.mean(np.concatenate(e) ** 2)) for e in (ours, alone, clean)]
    assert rms[0] < 1.2 * rms[2] and rms[0] < 0.06
    assert rms[0] < 0.6 * rms[1]
    assert np.concatenate(ours).max() < 0.25


@pytest.fixture(scope="module")
def effects_views():
    """The quick session's target views with every camera effect of the renderer on (surfrec.synth.effects).

    Returns (images, records): (left, right) per view; the renderer's truth,
    with the true corner pixels and the fixed effect maps (vignetting, dust,
    hot and dead pixels).
    """
    sc = build_scenario("waves", quick=True, seed=0, effects="all")
    sc = dataclasses.replace(sc, groups=[g for g in sc.groups if g.name == "target"])
    images = []
    records = render_session(sc, lambda g, i, left, right: images.append((left, right)), workers=2)
    return images, records


def _corner_errors(images, records, detect):
    """Per camera and view: (corner errors px, the true corners), against the renderer's true corner pixels."""
    out = []
    for k, side in enumerate(("left", "right")):
        for i, pair in enumerate(images):
            det = detect(pair[k])
            truth = records["target"][f"corners_{side}"][i]
            out.append((side, i, None if det is None else _match(det.points, truth), truth))
    return out


def test_camera_effects_corners(effects_views):
    # Every effect of the renderer at once: lens vignetting (image corners about 40 % darker),
    # the projector's hotspot and a room lamp, thin-lens defocus, dust shadows, hot and dead
    # pixels, high-speed sensor noise, 12-bit data in 16-bit files. Reference: the true corner
    # pixels (the renderer's projection, checked against cv2.projectPoints in
    # tests/test_cameras.py); baseline: OpenCV's detector + cornerSubPix on the images as they
    # are, which finds every view too but whose corners the stuck pixels pull by up to several px.
    images, records = effects_views
    assert images[0][0].dtype == np.uint16 and max(int(a.max()) for p in images for a in p) < 4096
    cams = records["_effects"]["cameras"]
    ours = _corner_errors(images, records, lambda im: _found(find_target(im, BOARD)))
    alone = _corner_errors(images, records, lambda im: _found(_DetectionLike(_opencv_alone_any(im))))
    assert all(e is not None for _, _, e, _ in ours)  # no view lost
    groups = {"all": [], "vignetted": [], "near a defect": []}
    base = {k: [] for k in groups}
    for (side, i, e, truth), (_, _, ea, _) in zip(ours, alone):
        c = cams[side]
        h, w = images[0][0].shape
        ij = np.clip(np.rint(truth).astype(int), 0, [w - 1, h - 1])
        defect = np.zeros((h, w), bool)
        for r, col in np.concatenate([c["hot_pixels"], c["dead_pixels"]]):
            defect[r, col] = True
        near = np.array([defect[max(y - 7, 0):y + 8, max(x - 7, 0):x + 8].any() for x, y in ij])
        for key, m in (("all", np.ones(len(e), bool)), ("vignetted", c["vignetting"][ij[:, 1], ij[:, 0]] < 0.9),
                       ("near a defect", near)):
            groups[key].append(e[m])
            base[key].append(ea[m])
    rms = {k: np.sqrt(np.mean(np.concatenate(v) ** 2)) for k, v in groups.items()}
    rms_alone = {k: np.sqrt(np.mean(np.concatenate(v) ** 2)) for k, v in base.items()}
    n = {k: len(np.concatenate(v)) for k, v in groups.items()}
    assert n["vignetted"] > 100 and n["near a defect"] > 100
    # The clean views' figure is about 0.05 px (test_chessboard_corners_...; issue 3). Where the
    # lens passes less than 90 % of the light the edges have less contrast over the same noise,
    # and the corner noise grows in proportion (common practice): about 0.08 px there.
    assert rms["all"] < 0.07 and rms["vignetted"] < 0.09 and rms["near a defect"] < 0.08
    assert rms["all"] < 0.5 * rms_alone["all"] and rms["near a defect"] < 0.25 * rms_alone["near a defect"]
    assert np.concatenate(groups["all"]).max() < 0.35


def test_strongly_defocused_views_are_found(chessboard_views):
    # Thin-lens defocus on the far side of a verged view can reach sigma 4 px on full-size
    # images (surfrec.synth.effects.Defocus); there the sector-based detector alone misses the
    # board. The views are magnified 2x (cv2.resize, bicubic: squares of about 45 px, as at full
    # size) and blurred by sigma 4 px. Reference: the true corners, magnified likewise
    # (centre-of-pixel origin: x' = 2 (x + 0.5) - 0.5); baseline: cv2.findChessboardCornersSB.
    missed, errs = 0, []
    for side, i, img, truth in chessboard_views:
        big = cv2.GaussianBlur(cv2.resize(img, None, fx=2, fy=2, interpolation=cv2.INTER_CUBIC), (0, 0), 4.0)
        ok, _ = cv2.findChessboardCornersSB(big, (11, 8), flags=cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE)
        det = find_target(big, BOARD)
        assert det.found, f"{side} view {i}"
        if not ok:
            missed += 1
            errs.append(_match(det.points, 2 * (truth + 0.5) - 0.5))
    assert missed >= 1
    # Refined at full size: as accurate as on the sharp magnified views (about 0.04 px).
    assert np.sqrt(np.mean(np.concatenate(errs) ** 2)) < 0.06


def test_not_found_says_why(chessboard_views):
    side, i, img, truth = chessboard_views[0]
    wrong = find_target(img, Board("chessboard", 9, 6, 15.0))
    assert not wrong.found and wrong.points is None
    assert wrong.reason == "no 9x6 chessboard found"
    blank = find_target(np.full((64, 80), 120, np.uint8), BOARD)
    assert not blank.found and "uniform" in blank.reason
    with pytest.raises(ValueError, match="greyscale"):
        find_target(np.zeros((4, 4, 3), np.uint8), BOARD)


def test_parse_board_size():
    assert parse_board_size("11x8") == (11, 8)
    assert parse_board_size(" 9 X 6 ") == (9, 6)
    for bad in ("11", "11x", "x8", "11x8x2", "1x8", "11,8", "-3x4"):
        with pytest.raises(ValueError):
            parse_board_size(bad)


@pytest.mark.parametrize("kind", ["chessboard", "circles", "asymmetric-circles"])
def test_board_layout_is_opencvs(kind):
    # OpenCV's calibration sample (calcBoardCornerPositions, from memory): chessboard and
    # symmetric grid (j*s, i*s); asymmetric grid ((2j + i % 2) * s, i * s), row i, column j.
    b = Board(kind, 4, 3, 10.0)
    pts = b.object_points()
    assert pts.shape == (12, 3) and np.all(pts[:, 2] == 0)
    for i in range(3):
        for j in range(4):
            x = (2 * j + i % 2) * 10.0 if kind == "asymmetric-circles" else j * 10.0
            np.testing.assert_allclose(pts[i * 4 + j], [x, i * 10.0, 0.0])


# ------------------------------------------------------------ circle grids

@pytest.fixture(scope="module")
def camera(quick):
    return quick.rigs["rig"].left


@pytest.fixture(scope="module")
def bundle(camera):
    return rd.RayBundle(camera, 4)


GRIDS = {"circles": CircleGrid(7, 6, 15.0, 4.5), "asymmetric-circles": CircleGrid(4, 11, 10.0, 3.2, asymmetric=True)}
POSES = [((0.0, 0.0), 0.0, (0.0, 0.0)), ((25.0, -15.0), 10.0, (40.0, -30.0)), ((-20.0, 30.0), -20.0, (-60.0, 40.0))]


@pytest.mark.parametrize("kind", list(GRIDS))
def test_circle_grid_centres_within_01_px(kind, camera, bundle):
    # Reference: true centre projections (cv2.projectPoints of the world centres). The
    # centroid of a tilted circle's image is not the image of its centre; for circles of
    # about 8 px at these tilts that bias stays well below 0.1 px (perspective bias of
    # circular targets; from memory, Heikkilä 2000).
    grid = GRIDS[kind]
    board = Board(kind, grid.cols, grid.rows, grid.spacing_mm)
    errs = []
    for k, (tilt, yaw, off) in enumerate(POSES):
        r, o = facing_pose(camera, grid, 700.0, tilt_deg=tilt, yaw_deg=yaw, offset_px=off)
        img, truth = render_circle_grid_view(camera, r, o, grid, np.random.default_rng(k), bundle=bundle)
        rvec, _ = cv2.Rodrigues(camera.rotation)
        world = grid.centres() @ r.T + o
        ref, _ = cv2.projectPoints(world, rvec, camera.translation, camera.matrix, camera.distortion)
        np.testing.assert_allclose(truth, ref.reshape(-1, 2), atol=1e-9)
        det = find_target(img, board)
        assert det.found, f"pose {k}: {det.reason}"
        err = np.linalg.norm(det.points - truth, axis=1)
        # Same order as the board's own numbering for these upright views.
        errs.append(err)
    errs = np.concatenate(errs)
    assert np.sqrt(np.mean(errs ** 2)) < 0.1
    assert errs.max() < 0.25


def test_symmetric_circle_grid_turned_half_a_turn_is_numbered_from_the_other_end(camera, bundle):
    # A symmetric grid looks the same after a half turn (so Board.symmetric is True): the
    # detector then numbers it from the opposite corner; an asymmetric grid keeps its order.
    for kind, expect_reversed in (("circles", True), ("asymmetric-circles", False)):
        grid = GRIDS[kind]
        board = Board(kind, grid.cols, grid.rows, grid.spacing_mm)
        assert board.symmetric == expect_reversed
        r, o = facing_pose(camera, grid, 700.0, yaw_deg=180.0)
        img, truth = render_circle_grid_view(camera, r, o, grid, np.random.default_rng(9), bundle=bundle)
        det = find_target(img, board)
        assert det.found
        pts = det.points[::-1] if expect_reversed else det.points
        assert np.sqrt(np.mean(np.sum((pts - truth) ** 2, axis=1))) < 0.1


@pytest.mark.parametrize("kind", list(GRIDS))
def test_circle_grid_layout_fits_a_homography(kind, quick):
    # Through a distortion-free camera a planar grid maps to the image by a homography
    # (pinhole geometry), so Board.object_points must fit the detected centres exactly
    # up to noise (reference: cv2.findHomography).
    cam0 = quick.rigs["rig"].left
    cam = Camera(cam0.matrix, np.zeros(5), cam0.rotation, cam0.translation, cam0.image_size)
    grid = GRIDS[kind]
    board = Board(kind, grid.cols, grid.rows, grid.spacing_mm)
    r, o = facing_pose(cam, grid, 700.0, tilt_deg=(20.0, 10.0), yaw_deg=8.0)
    img, _ = render_circle_grid_view(cam, r, o, grid, np.random.default_rng(3))
    det = find_target(img, board)
    assert det.found
    obj = board.object_points()[:, :2]
    hom, _ = cv2.findHomography(obj, det.points, 0)
    fit = cv2.perspectiveTransform(obj.reshape(-1, 1, 2), hom).reshape(-1, 2)
    assert np.sqrt(np.mean(np.sum((fit - det.points) ** 2, axis=1))) < 0.1


@pytest.mark.parametrize("grid", list(GRIDS.values()))
def test_circle_grid_dark_area_is_the_circles_area(grid):
    # Geometry: the dark fraction of the board is N pi r^2 / board area.
    x0, x1, y0, y1 = grid.extent()
    step = 0.05
    bx, by = np.meshgrid(np.arange(x0, x1, step) + step / 2, np.arange(y0, y1, step) + step / 2)
    dark = grid.in_circle(bx, by).mean()
    expect = grid.cols * grid.rows * np.pi * grid.radius_mm ** 2 / ((x1 - x0) * (y1 - y0))
    assert dark == pytest.approx(expect, rel=5e-3)
    with pytest.raises(ValueError):
        CircleGrid(4, 4, 10.0, 5.0)


def test_a_rig_calibrates_from_asymmetric_circle_grid_views(quick):
    # The whole path with circle grids: 8 stereo views of a small asymmetric grid (4x11,
    # 8 mm unit) rendered through both quick cameras. Reference: the true cameras, within
    # 4 sigma of the fit's own least-squares uncertainty (a small board constrains less
    # than the sessions' chessboard, so the issue's chessboard targets do not apply).
    from surfrec.calib.calibrate import calibrate_rig, rotation_angle_deg
    from surfrec.synth.cameras import stereo_from_cameras

    rig = quick.rigs["rig"]
    grid = CircleGrid(4, 11, 8.0, 2.6, asymmetric=True)
    board = Board("asymmetric-circles", 4, 11, 8.0)
    bundles = {side: rd.RayBundle(getattr(rig, side), 4) for side in ("left", "right")}
    poses = [((0, 0), 0, (0, 0)), ((25, -10), 10, (60, -40)), ((-20, 25), -15, (-60, 40)), ((15, 20), 30, (40, 50)),
             ((-25, -15), -30, (-50, -50)), ((10, -25), 90, (0, 0)), ((30, 5), -80, (20, -20)),
             ((-10, 30), 45, (-30, 10))]
    dets = {"left": [], "right": []}
    for k, (tilt, yaw, off) in enumerate(poses):
        r, o = facing_pose(rig.left, grid, 820.0, tilt_deg=tilt, yaw_deg=yaw, offset_px=off)
        for side in ("left", "right"):
            img, _ = render_circle_grid_view(getattr(rig, side), r, o, grid, np.random.default_rng([k, len(side)]),
                                             bundle=bundles[side])
            dets[side].append(find_target(img, board))
    assert all(d.found for side in dets for d in dets[side])
    c = calibrate_rig(dets["left"], dets["right"], board, (512, 384))
    assert c.rms_px < 0.1 and all(set(v.roles) == {"left", "right", "stereo"} for v in c.views)
    st = c.joint_fit.std
    for side in ("left", "right"):
        k, kt = getattr(c, f"{side}_matrix"), getattr(rig, side).matrix
        assert abs(k[0, 0] - kt[0, 0]) < 4 * st[side]["fx"]
        assert abs(k[1, 2] - kt[1, 2]) < 4 * st[side]["cy"]
    r_t, t_t = stereo_from_cameras(rig.left, rig.right)
    assert abs(c.baseline_mm - np.linalg.norm(t_t)) < 4 * np.linalg.norm(st["translation_mm"])
    assert rotation_angle_deg(c.rotation @ r_t.T) < 4 * np.linalg.norm(st["rotation_deg"])
