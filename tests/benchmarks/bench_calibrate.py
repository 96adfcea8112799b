"""Calibration time and accuracy on a synthetic session, side by side with plain OpenCV.

Usage::

    surfrec synth /tmp/fullcal                      # once (about 4 minutes)
    python tests/benchmarks/bench_calibrate.py /tmp/fullcal [--repeats 3]

    surfrec synth /tmp/fx --camera-effects all      # the same session (same seed) with camera effects
    python tests/benchmarks/bench_calibrate.py /tmp/fullcal --effects /tmp/fx [--no-timing]

Times (medians of the repeats, one process, one core for OpenCV):

- target detection per image: ours (cv2.findChessboardCornersSB with
  CALIB_CB_ACCURACY | CALIB_CB_NORMALIZE_IMAGE, then cv2.cornerSubPix) against
  the sector-based detector alone, with and without CALIB_CB_ACCURACY;
- the fit: our sequential estimate, the joint refinement, and the reference
  cv2.calibrateCamera (both cameras) + cv2.stereoCalibrate(CALIB_FIX_INTRINSIC).

Accuracy against the session's truth: focal lengths, principal points,
pixel-to-ray mapping over the whole image (after the best-fitting rotation),
baseline, stereo rotation, reprojection and epipolar RMS; with the moved
scenario's target-moved/ folder present, also the re-posing error.

With ``--effects FX_SESSION`` (the same scenario and seed rendered with
camera effects): the calibration from the clean views and from the views
with effects side by side in one run, ours and, as the reference, OpenCV's
detector + cv2.cornerSubPix on the images as they are (no defect repair):
views found and used, corner error against the true corner pixels,
reprojection and epipolar RMS, pixel-to-ray RMS per camera.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import cv2
import numpy as np

from surfrec.calib.calibrate import calibrate_rig, repose_rig, rotation_angle_deg
from surfrec.calib.targets import CHESSBOARD_FLAGS, Board, find_target
from surfrec.io.images import open_frames
from surfrec.io.truthfile import read_truth
from surfrec.synth.cameras import Camera, stereo_from_cameras

BOARD = Board("chessboard", 11, 8, 15.0)


def median_time(fn, repeats):
    times = []
    out = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def ray_error_px(matrix, dist, cam, n=(129, 103)):
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
    corner = ((px[:, 0] < 0.15 * w) | (px[:, 0] > 0.85 * w)) & ((px[:, 1] < 0.15 * h) | (px[:, 1] > 0.85 * h))
    return err, corner


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("session", type=Path)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--effects", type=Path, metavar="FX_SESSION",
                    help="the same session rendered with camera effects: compare the calibrations side by side")
    ap.add_argument("--no-timing", action="store_true", help="accuracy only (skip the timed runs)")
    ap.add_argument("--render-effects", metavar="SETS", default=None,
                    help="also render the session's target views (full size, seed 0) with each ';'-separated set "
                         "of camera effects, e.g. 'defocus;dust,defects', and calibrate from them")
    args = ap.parse_args(argv)
    if args.render_effects:
        for fx in args.render_effects.split(";"):
            rendered_effects(fx.strip())
    if args.effects is not None:
        cv2.setNumThreads(1)
        compare_effects(args.session, args.effects)
    if args.no_timing:
        return 0
    cv2.setNumThreads(1)
    s = args.session
    truth = read_truth(s / "truth.h5")
    frames = {side: open_frames(str(s / "target" / side)) for side in ("left", "right")}
    size = frames["left"].size
    n = len(frames["left"])
    print(f"session {s}: {n} view pairs, {size[0]}x{size[1]} px; OpenCV {cv2.__version__}, 1 thread")

    # --- detection, per image (a sample of 6 images, each timed `repeats` times)
    sample = [(side, i) for i in range(0, n, max(1, n // 3)) for side in ("left", "right")][:6]
    imgs = [frames[side].read_raw(i) for side, i in sample]
    t_ours = statistics.median(median_time(lambda im=im: find_target(im, BOARD), args.repeats)[0] for im in imgs)
    t_sb = statistics.median(median_time(lambda im=im: cv2.findChessboardCornersSB(im, (11, 8), flags=CHESSBOARD_FLAGS),
                                         args.repeats)[0] for im in imgs)
    t_sb_plain = statistics.median(median_time(
        lambda im=im: cv2.findChessboardCornersSB(im, (11, 8), flags=cv2.CALIB_CB_NORMALIZE_IMAGE), args.repeats)[0]
        for im in imgs)
    print("\ndetection, per image (median over 6 images):")
    print(f"  ours (SB + ACCURACY + cornerSubPix)      {t_ours:.3f} s  ratio {t_ours / t_sb:.2f}")
    print(f"  cv2.findChessboardCornersSB ACCURACY     {t_sb:.3f} s  ratio 1.00 (reference)")
    print(f"  cv2.findChessboardCornersSB, no ACCURACY {t_sb_plain:.3f} s  ratio {t_sb_plain / t_sb:.2f}")

    dets = {side: [find_target(frames[side].read_raw(i), BOARD) for i in range(n)] for side in frames}
    t_seq, _ = median_time(lambda: calibrate_rig(dets["left"], dets["right"], BOARD, size, refine=False), args.repeats)
    t_full, calib = median_time(lambda: calibrate_rig(dets["left"], dets["right"], BOARD, size), args.repeats)

    def reference():
        obj = BOARD.object_points().astype(np.float32)
        out = []
        for side in ("left", "right"):
            pts = [d.points.astype(np.float32) for d in dets[side] if d.found]
            out.append(cv2.calibrateCamera([obj] * len(pts), pts, size, None, None)[1:3])
        both = [i for i in range(n) if dets["left"][i].found and dets["right"][i].found]
        cv2.stereoCalibrate([obj] * len(both), [dets["left"][i].points.astype(np.float32) for i in both],
                            [dets["right"][i].points.astype(np.float32) for i in both], out[0][0], out[0][1],
                            out[1][0], out[1][1], size, flags=cv2.CALIB_FIX_INTRINSIC)

    t_ref, _ = median_time(reference, args.repeats)
    print(f"\nfit of {n} view pairs (median of {args.repeats}):")
    print(f"  cv2.calibrateCamera x2 + cv2.stereoCalibrate  {t_ref:.3f} s  ratio 1.00 (reference)")
    print(f"  ours, sequential (with outlier checks)        {t_seq:.3f} s  ratio {t_seq / t_ref:.2f}")
    print(f"  ours, with the joint refinement (default)     {t_full:.3f} s  ratio {t_full / t_ref:.2f}")

    rig = truth["rigs"]["rig"]
    cams = {side: Camera.from_dict(rig[side]) for side in ("left", "right")}
    print("\naccuracy against truth (default calibration):")
    for side in ("left", "right"):
        k, kt = getattr(calib, f"{side}_matrix"), cams[side].matrix
        err, corner = ray_error_px(k, getattr(calib, f"{side}_distortion"), cams[side])
        print(f"  {side:5s} fx {100 * (k[0, 0] / kt[0, 0] - 1):+.4f} %  fy {100 * (k[1, 1] / kt[1, 1] - 1):+.4f} %  "
              f"cx {k[0, 2] - kt[0, 2]:+.3f} px  cy {k[1, 2] - kt[1, 2]:+.3f} px  ray RMS {np.sqrt(np.mean(err ** 2)):.4f} px "
              f"(corner regions {np.sqrt(np.mean(err[corner] ** 2)):.4f}, max {err.max():.4f})")
    r_t, t_t = stereo_from_cameras(cams["left"], cams["right"])
    print(f"  baseline {100 * (calib.baseline_mm / np.linalg.norm(t_t) - 1):+.4f} %  "
          f"stereo rotation {rotation_angle_deg(calib.rotation @ r_t.T):.4f} deg  "
          f"reprojection RMS {calib.rms_px:.4f} px  epipolar RMS {calib.epipolar_rms_px:.4f} px")
    if (s / "target-moved").is_dir() and "moved" in truth["rigs"]:
        moved = {side: open_frames(str(s / "target-moved" / side)) for side in ("left", "right")}
        dm = {side: [find_target(moved[side].read_raw(i), BOARD) for i in range(len(moved[side]))] for side in moved}
        new = repose_rig(dm["left"], dm["right"], BOARD, size, left_matrix=calib.left_matrix,
                         left_distortion=calib.left_distortion, right_matrix=calib.right_matrix,
                         right_distortion=calib.right_distortion, old_rotation=calib.rotation,
                         old_translation=calib.translation)
        r_m, t_m = stereo_from_cameras(*(Camera.from_dict(truth["rigs"]["moved"][x]) for x in ("left", "right")))
        print(f"  re-posing from {len(dm['left'])} views: rotation {rotation_angle_deg(new.rotation @ r_m.T):.4f} deg, "
              f"translation {np.linalg.norm(new.translation - t_m):.3f} mm from the moved truth; "
              f"reported move {new.pose_change['rotation_deg']:.4f} deg")
    return 0


def opencv_alone(image, board=BOARD):
    """The reference detection: OpenCV's detector and cv2.cornerSubPix (our window) on the image as it is."""
    from surfrec.calib.targets import SUBPIX_WINDOW_FRACTION, Detection, _to_uint8

    img8, _ = _to_uint8(np.asarray(image))
    ok, pts = cv2.findChessboardCornersSB(img8, board.pattern_size, flags=CHESSBOARD_FLAGS)
    if not ok:
        return Detection(False, None, "not found")
    grid = pts.reshape(board.rows, board.cols, 2)
    spacing = min(np.linalg.norm(np.diff(grid, axis=0), axis=2).min(), np.linalg.norm(np.diff(grid, axis=1), axis=2).min())
    half = int(np.clip(round(SUBPIX_WINDOW_FRACTION * spacing), 2, 30))
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 100, 1e-4)
    ref = cv2.cornerSubPix(np.asarray(image, np.float32), pts, (half, half), (-1, -1), crit)
    return Detection(True, ref.reshape(-1, 2).astype(np.float64), "")


def calibration_figures(session: Path, detect):
    """Detect in every target view of ``session`` with ``detect``, calibrate, and measure against its truth."""
    truth = read_truth(session / "truth.h5")
    frames = {side: open_frames(str(session / "target" / side)) for side in ("left", "right")}
    size, n = frames["left"].size, len(frames["left"])
    dets = {side: [detect(frames[side].read_raw(i)) for i in range(n)] for side in frames}
    corners = truth["groups"]["target"]
    err = []
    for side in frames:
        for i, d in enumerate(dets[side]):
            if d.found:
                t = np.asarray(corners[f"corners_{side}"][i])
                err.append(np.linalg.norm(d.points[:, None] - t[None], axis=2).min(axis=0))
    err = np.concatenate(err)
    calib = calibrate_rig(dets["left"], dets["right"], BOARD, size)
    cams = {side: Camera.from_dict(truth["rigs"]["rig"][side]) for side in frames}
    ray = {side: float(np.sqrt(np.mean(ray_error_px(getattr(calib, f"{side}_matrix"),
                                                    getattr(calib, f"{side}_distortion"), cams[side])[0] ** 2)))
           for side in frames}
    return {"n": n, "found": {side: sum(d.found for d in dets[side]) for side in frames},
            "used": {side: sum(side in v.roles for v in calib.views) for side in frames},
            "stereo": sum("stereo" in v.roles for v in calib.views),
            "corner_rms": float(np.sqrt(np.mean(err ** 2))), "corner_p99": float(np.percentile(err, 99)),
            "corner_max": float(err.max()), "rms": calib.rms_px, "epi": calib.epipolar_rms_px, "ray": ray}


def rendered_effects(fx: str):
    """Render the full-size waves session's target views (seed 0) with effects ``fx`` in memory, calibrate, measure."""
    import dataclasses

    from surfrec.synth.scenarios import build_scenario
    from surfrec.synth.session import render_session

    sc = build_scenario("waves", seed=0, effects=fx)
    sc = dataclasses.replace(sc, groups=[g for g in sc.groups if g.name == "target"])
    imgs = []
    render_session(sc, lambda g, i, left, right: imgs.append((left, right)), workers=2)
    dets = {side: [find_target(p[k], BOARD) for p in imgs] for k, side in enumerate(("left", "right"))}
    calib = calibrate_rig(dets["left"], dets["right"], BOARD, imgs[0][0].shape[::-1])
    parts = []
    for side in ("left", "right"):
        cam = getattr(sc.rigs["rig"], side)
        k = getattr(calib, f"{side}_matrix")
        err, _ = ray_error_px(k, getattr(calib, f"{side}_distortion"), cam)
        parts.append(f"{side} found {sum(d.found for d in dets[side])} fx {k[0, 0] - cam.matrix[0, 0]:+.2f} px "
                     f"ray RMS {np.sqrt(np.mean(err ** 2)):.3f} px")
    print(f"effects {fx}: " + "; ".join(parts) + f"; reprojection RMS {calib.rms_px:.4f} px")


def compare_effects(clean: Path, fx: Path):
    runs = [("clean views, ours", calibration_figures(clean, lambda im: find_target(im, BOARD))),
            ("effects, ours", calibration_figures(fx, lambda im: find_target(im, BOARD))),
            ("effects, OpenCV alone (reference)", calibration_figures(fx, opencv_alone))]
    base = runs[0][1]
    print(f"\ncamera effects: {fx} against {clean} ({base['n']} view pairs each)")
    print(f"  {'':36s} {'found L/R':>9s} {'used L/R/st':>11s} {'corner RMS/p99/max px':>22s} "
          f"{'reproj px':>9s} {'epi px':>7s} {'ray L px':>9s} {'ray R px':>9s}  ray ratio L/R")
    for name, f in runs:
        print(f"  {name:36s} {f['found']['left']:>4d}/{f['found']['right']:<4d} "
              f"{f['used']['left']:>4d}/{f['used']['right']}/{f['stereo']:<3d} "
              f"{f['corner_rms']:8.4f}/{f['corner_p99']:.3f}/{f['corner_max']:.3f} {f['rms']:9.4f} {f['epi']:7.4f} "
              f"{f['ray']['left']:9.4f} {f['ray']['right']:9.4f}  "
              f"{f['ray']['left'] / base['ray']['left']:.2f}/{f['ray']['right'] / base['ray']['right']:.2f}")


if __name__ == "__main__":
    sys.exit(main())
