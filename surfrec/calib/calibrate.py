"""Stereo rig calibration from target views: intrinsics, stereo pose, rectification, quality.

The steps (OpenCV does the estimation; this module chooses the views, rejects
outliers and measures the result):

1. Each camera's intrinsics and Brown–Conrady distortion [k1, k2, p1, p2, k3]
   from every view in which that camera sees the whole target, single-camera
   views included (they are how the image corners, where distortion is
   largest, get covered): ``cv2.calibrateCamera`` (Zhang's method, Zhang,
   IEEE TPAMI 22 (2000) 1330, from memory; then Levenberg–Marquardt over all views).
2. The stereo rotation and translation with both cameras' intrinsics held,
   from the views both cameras see: ``cv2.stereoCalibrate`` with
   ``CALIB_FIX_INTRINSIC``.
3. The rectification (R1 R2 P1 P2 Q): ``cv2.stereoRectify`` (Bouguet's
   method), in :mod:`surfrec.calib.rectify`, with each image keeping its own
   horizontal principal point (not zero-disparity) so that a verged rig's
   rectified images are not zoomed in.

Between steps 2 and 3 the full calibration refines everything jointly: both
cameras' intrinsics, the stereo pose and every board pose, over every used
view, single-camera views included (:mod:`surfrec.calib.bundle`, which says
why OpenCV cannot do this step). The sequential estimate of steps 1 and 2 is
its starting point and stays in the result (``left_fit``, ``right_fit``,
``stereo_fit``) for comparison; ``refine=False`` stops there.

Outlier views. After each fit, a view is an outlier when its reprojection
RMS exceeds both ``OUTLIER_FACTOR`` (3) times the median RMS of the views in
that fit and ``OUTLIER_FLOOR_PX`` (0.3 px). The floor keeps a set of
uniformly good views (all near 0.05 px, say) from losing members to a tight
median. The worst outlier is dropped and the fit repeated, one view at a
time (a gross outlier inflates the others' residuals, so dropping them all
at once would throw away good views), while enough views remain.

Re-posing (:func:`repose_rig`): after a camera was bumped, both cameras'
intrinsics are kept from the old rig and only the stereo pose and the
rectification are estimated again, from three or more views both cameras see.

Lens model. rig.json holds OpenCV's 5-coefficient Brown–Conrady model, so
the rational (k4–k6) and thin-prism models are not offered: the measuring
lenses of such rigs have moderate fields (the synthetic rig's is about 22
degrees), where k1–k3 and p1, p2 describe the distortion, and the higher
terms would be weakly constrained by target views. Even k3 is poorly
determined at that field (its 1-sigma is reported); what matters, the
pixel-to-ray mapping, is well determined all the same (tests).

Frames and units: pixel coordinates with the origin at the centre of the
top-left pixel; the rig frame is the left camera's; X_right = R X_left + t,
t in mm (the board's unit).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from surfrec.calib.rectify import rectify
from surfrec.calib.targets import Board
from surfrec.errors import InputError

OUTLIER_FACTOR = 3.0
OUTLIER_FLOOR_PX = 0.3
COVERAGE_CELLS = (8, 6)  # (columns, rows) of the coarse grid of image cells

# Rules of thumb of camera calibration practice (common practice, not
# published limits): a good calibration uses 10 or more views, reprojects
# within about half a pixel, and has target points in most of the image,
# its corners included.
MIN_GOOD_VIEWS = 10
MAX_GOOD_RMS_PX = 0.5
MIN_COVERAGE = 0.75
MIN_VIEWS_INTRINSICS = 3
MIN_VIEWS_STEREO = 3

_LM_CRITERIA = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 200, 1e-12)
_UNDISTORT_CRITERIA = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-10)


# --------------------------------------------------------------- results

@dataclass
class CameraFit:
    """One camera's intrinsics fit.

    Attributes
    ----------
    matrix : (3, 3) px; distortion : (5,) [k1, k2, p1, p2, k3].
    rms_px : overall reprojection RMS of the fit, px.
    view_rms_px : (V,) per-view reprojection RMS, px.
    std : 1-sigma of fx, fy, cx, cy (px) and k1, k2, p1, p2, k3, from
        OpenCV's covariance estimate.
    rvecs, tvecs : (V, 3) board -> camera poses (Rodrigues vectors; mm).
    residuals : list of (N, 2) observed minus reprojected, px, per view.
    views : indices of the views used (into the caller's view list).
    """

    matrix: np.ndarray
    distortion: np.ndarray
    rms_px: float
    view_rms_px: np.ndarray
    std: dict
    rvecs: np.ndarray
    tvecs: np.ndarray
    residuals: list
    views: list = field(default_factory=list)


@dataclass
class StereoFit:
    """The stereo pose fit with intrinsics held.

    Attributes
    ----------
    rotation : (3, 3) and translation : (3,) mm, X_right = R X_left + t.
    rms_px : reprojection RMS over both cameras, px.
    view_rms_px : (V, 2) per-view RMS in the left and right images, px.
    rvecs, tvecs : (V, 3) board -> left camera poses.
    residuals_left, residuals_right : lists of (N, 2) px, observed minus reprojected.
    views : indices of the views used.
    """

    rotation: np.ndarray
    translation: np.ndarray
    rms_px: float
    view_rms_px: np.ndarray
    rvecs: np.ndarray
    tvecs: np.ndarray
    residuals_left: list
    residuals_right: list
    views: list = field(default_factory=list)


@dataclass
class ViewReport:
    """What one view pair served, and why it did not serve more.

    ``roles`` holds "left" / "right" (that camera's intrinsics) and
    "stereo"; ``notes`` holds the reasons for everything it did not serve
    (target not found, rejected as an outlier). RMS values are the final
    model's reprojection RMS in px (``rms_px`` over every camera the view
    served), None where the view did not serve that camera.
    """

    index: int
    name: str
    found_left: bool
    found_right: bool
    roles: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    rms_left_px: float | None = None
    rms_right_px: float | None = None
    rms_px: float | None = None
    name_right: str | None = None

    @property
    def used(self) -> bool:
        return bool(self.roles)

    def to_dict(self) -> dict:
        d = {"index": self.index, "name": self.name, "used": self.used, "roles": list(self.roles),
             "rms_px": _r(self.rms_px), "rms_left_px": _r(self.rms_left_px), "rms_right_px": _r(self.rms_right_px),
             "found_left": self.found_left, "found_right": self.found_right, "notes": list(self.notes)}
        if self.name_right is not None:
            d["name_right"] = self.name_right
        return d


@dataclass
class RigCalibration:
    """A calibrated stereo rig and how good it is.

    Attributes
    ----------
    mode : "full" or "keep-intrinsics".
    image_size : (width, height) px.
    left_matrix, right_matrix : (3, 3) px; left_distortion, right_distortion : (5,).
    rotation : (3, 3), translation : (3,) mm (X_right = R X_left + t).
    rectification : dict R1 R2 P1 P2 Q.
    views : list of ViewReport.
    rms_px : reprojection RMS over every point of every used view in the
        final model (stereo views through the stereo fit, single-camera views
        through that camera's fit), px.
    epipolar_rms_px : RMS of the row difference of rectified corner pairs, px.
    baseline_mm, convergence_deg : camera centre distance, mm; angle between
        the optical axes, degrees.
    coverage : {"left": fraction, "right": fraction, "cells": [cols, rows],
        "occupied_left": rows x cols bools, "occupied_right": ...}.
    warnings : list of str.
    left_fit, right_fit : CameraFit or None (None when intrinsics were kept).
    stereo_fit : StereoFit (intrinsics held).
    joint_fit : surfrec.calib.bundle.JointFit or None (the final joint
        refinement of a full calibration).
    points : {"left": {view index: (points, residuals)}, "right": ...},
        (N, 2) px each: the detected points of every used view and their
        residuals (observed minus reprojected) in the final model.
    row_errors_px : (K,) rectified row differences v_left - v_right of the
        stereo views' points, px.
    pose_change : for re-posing: rotation_deg, translation_mm, baseline_change_mm.
    """

    mode: str
    image_size: tuple
    left_matrix: np.ndarray
    left_distortion: np.ndarray
    right_matrix: np.ndarray
    right_distortion: np.ndarray
    rotation: np.ndarray
    translation: np.ndarray
    rectification: dict
    views: list
    rms_px: float
    epipolar_rms_px: float
    baseline_mm: float
    convergence_deg: float
    coverage: dict
    warnings: list
    left_fit: CameraFit | None
    right_fit: CameraFit | None
    stereo_fit: StereoFit
    row_errors_px: np.ndarray
    board: Board
    pose_change: dict | None = None
    points: dict = field(default_factory=dict)
    joint_fit: object = None

    def points_of(self, side: str, index: int):
        """Detected points (N, 2) px of view ``index`` in camera ``side``, if the final model used them."""
        entry = self.points.get(side, {}).get(index)
        return None if entry is None else entry[0]

    def residuals_dict(self) -> dict:
        """The rig.json ``residuals`` entry (px)."""
        d = {"rms_px": _r(self.rms_px), "epipolar_rms_px": _r(self.epipolar_rms_px),
             "views": [v.to_dict() for v in self.views]}
        seq = {"stereo_rms_px": _r(self.stereo_fit.rms_px)}
        if self.left_fit is not None:
            seq["left_rms_px"] = _r(self.left_fit.rms_px)
            seq["right_rms_px"] = _r(self.right_fit.rms_px)
        d["sequential"] = seq
        return d

    def quality_dict(self) -> dict:
        """Everything else a user needs to judge the calibration (rig.json ``calibration``)."""
        d = {"mode": self.mode, "baseline_mm": _r(self.baseline_mm, 4), "convergence_deg": _r(self.convergence_deg, 4),
             "coverage": {"left": _r(self.coverage["left"], 3), "right": _r(self.coverage["right"], 3),
                          "cells": list(self.coverage["cells"])},
             "views": {"pairs": len(self.views),
                       "left_intrinsics": _count(self.views, "left"),
                       "right_intrinsics": _count(self.views, "right"),
                       "stereo": _count(self.views, "stereo")},
             "outlier_rule": (f"a view is dropped when its reprojection RMS exceeds {OUTLIER_FACTOR:g} x the "
                              f"median of its fit and {OUTLIER_FLOOR_PX:g} px (worst first, refit after each)"),
             "warnings": list(self.warnings)}
        d["refinement"] = ("joint (all parameters over all used views)" if self.joint_fit is not None else
                           ("none (intrinsics kept from the old rig)" if self.mode != "full" else
                            "none (sequential estimate)"))
        if self.joint_fit is not None:
            st = self.joint_fit.std
            d["uncertainty"] = {"left": {k: _r(v, 6) for k, v in st["left"].items()},
                                "right": {k: _r(v, 6) for k, v in st["right"].items()},
                                "rotation_deg": [_r(v, 6) for v in st["rotation_deg"]],
                                "translation_mm": [_r(v, 5) for v in st["translation_mm"]],
                                "note": "1-sigma from the joint fit's covariance"}
        elif self.left_fit is not None:
            d["uncertainty"] = {"left": {k: _r(v, 6) for k, v in self.left_fit.std.items()},
                                "right": {k: _r(v, 6) for k, v in self.right_fit.std.items()},
                                "note": "1-sigma from each camera's intrinsics fit"}
        if self.pose_change is not None:
            d["pose_change"] = {k: _r(v, 5) for k, v in self.pose_change.items()}
        return d

    def summary(self) -> dict:
        """A JSON-able summary of the whole result (for ``--json``)."""
        cams = {}
        for side in ("left", "right"):
            k = getattr(self, f"{side}_matrix")
            cams[side] = {"fx_px": _r(k[0, 0], 4), "fy_px": _r(k[1, 1], 4), "cx_px": _r(k[0, 2], 4),
                          "cy_px": _r(k[1, 2], 4),
                          "distortion": [float(x) for x in getattr(self, f"{side}_distortion")]}
        return {"image_size": list(self.image_size), "board": self.board.to_dict(), "cameras": cams,
                "residuals": self.residuals_dict(), **self.quality_dict()}


# ---------------------------------------------------------- single fits

def calibrate_intrinsics(object_points, image_points, image_size, *, flags: int = 0) -> CameraFit:
    """One camera's intrinsics and distortion from planar target views (Zhang's method).

    Parameters
    ----------
    object_points : list of (N, 3) board points, mm (z = 0).
    image_points : list of (N, 2) detected points, px.
    image_size : (width, height) px.
    flags : extra ``cv2.CALIB_*`` flags (default: estimate fx, fy, cx, cy
        and all five distortion coefficients, no skew).

    Returns
    -------
    CameraFit
    """
    if len(image_points) < MIN_VIEWS_INTRINSICS:
        raise InputError(f"the intrinsics need at least {MIN_VIEWS_INTRINSICS} views, got {len(image_points)}")
    obj = [np.asarray(o, np.float32).reshape(-1, 3) for o in object_points]
    img = [np.asarray(p, np.float32).reshape(-1, 2) for p in image_points]
    size = (int(image_size[0]), int(image_size[1]))
    rms, k, d, rvecs, tvecs, std_in, _, per_view = cv2.calibrateCameraExtended(
        obj, img, size, None, None, flags=flags, criteria=_LM_CRITERIA)
    d = np.asarray(d, float).ravel()[:5]
    residuals = [np.asarray(p, float) - _project(o, r, t, k, d) for o, p, r, t in zip(obj, img, rvecs, tvecs)]
    std_in = np.asarray(std_in, float).ravel()
    names = ("fx", "fy", "cx", "cy", "k1", "k2", "p1", "p2", "k3")
    return CameraFit(matrix=np.asarray(k, float), distortion=d, rms_px=float(rms),
                     view_rms_px=np.array([_rms(e) for e in residuals]),
                     std={n: float(std_in[i]) for i, n in enumerate(names)},
                     rvecs=np.asarray(rvecs, float).reshape(-1, 3), tvecs=np.asarray(tvecs, float).reshape(-1, 3),
                     residuals=residuals)


def estimate_stereo_pose(object_points, left_points, right_points, left_matrix, left_distortion, right_matrix,
                         right_distortion, image_size) -> StereoFit:
    """Stereo rotation and translation with both cameras' intrinsics held.

    Parameters
    ----------
    object_points : list of (N, 3) board points, mm.
    left_points, right_points : lists of (N, 2) px, the same views in both cameras.
    left_matrix, right_matrix : (3, 3) px; left_distortion, right_distortion : (5,).
    image_size : (width, height) px.

    Returns
    -------
    StereoFit
        X_right = R X_left + t, t in mm.
    """
    if len(left_points) < MIN_VIEWS_STEREO:
        raise InputError(f"the stereo pose needs at least {MIN_VIEWS_STEREO} views that both cameras see, "
                         f"got {len(left_points)}")
    obj = [np.asarray(o, np.float32).reshape(-1, 3) for o in object_points]
    pl = [np.asarray(p, np.float32).reshape(-1, 2) for p in left_points]
    pr = [np.asarray(p, np.float32).reshape(-1, 2) for p in right_points]
    kl, dl = np.asarray(left_matrix, float), np.asarray(left_distortion, float).ravel()
    kr, dr = np.asarray(right_matrix, float), np.asarray(right_distortion, float).ravel()
    size = (int(image_size[0]), int(image_size[1]))
    out = cv2.stereoCalibrateExtended(obj, pl, pr, kl.copy(), dl.copy(), kr.copy(), dr.copy(), size, None, None,
                                      flags=cv2.CALIB_FIX_INTRINSIC, criteria=_LM_CRITERIA)
    rms, r, t, rvecs, tvecs = out[0], out[5], out[6], out[9], out[10]
    r = np.asarray(r, float)
    t = np.asarray(t, float).ravel()
    res_l, res_r = [], []
    for o, a, b, rv, tv in zip(obj, pl, pr, rvecs, tvecs):
        res_l.append(np.asarray(a, float) - _project(o, rv, tv, kl, dl))
        rb = r @ cv2.Rodrigues(np.asarray(rv, float))[0]
        res_r.append(np.asarray(b, float) - _project(o, cv2.Rodrigues(rb)[0], r @ np.ravel(tv) + t, kr, dr))
    view_rms = np.array([[_rms(a), _rms(b)] for a, b in zip(res_l, res_r)])
    return StereoFit(rotation=r, translation=t, rms_px=float(rms), view_rms_px=view_rms,
                     rvecs=np.asarray(rvecs, float).reshape(-1, 3), tvecs=np.asarray(tvecs, float).reshape(-1, 3),
                     residuals_left=res_l, residuals_right=res_r)


# --------------------------------------------------------------- metrics

def outlier_views(view_rms_px, *, factor: float = OUTLIER_FACTOR, floor_px: float = OUTLIER_FLOOR_PX) -> np.ndarray:
    """Which views are outliers: RMS above ``factor`` x median and above ``floor_px``.

    Parameters
    ----------
    view_rms_px : (V,) per-view reprojection RMS, px.

    Returns
    -------
    (V,) bool
    """
    v = np.asarray(view_rms_px, float)
    if v.size == 0:
        return np.zeros(0, bool)
    return (v > factor * np.median(v)) & (v > floor_px)


def coverage(points, image_size, *, cells=COVERAGE_CELLS):
    """Fraction of a coarse grid of image cells that hold target points.

    Parameters
    ----------
    points : list of (N, 2) px, or one (M, 2) array.
    image_size : (width, height) px.
    cells : (columns, rows) of the grid.

    Returns
    -------
    fraction : float in [0, 1]
    occupied : (rows, columns) bool
    """
    w, h = image_size
    nc, nr = cells
    occupied = np.zeros((nr, nc), bool)
    pts = [np.asarray(p, float).reshape(-1, 2) for p in (points if isinstance(points, (list, tuple)) else [points])]
    if pts:
        p = np.concatenate(pts)
        col = np.clip(((p[:, 0] + 0.5) / w * nc).astype(int), 0, nc - 1)
        row = np.clip(((p[:, 1] + 0.5) / h * nr).astype(int), 0, nr - 1)
        occupied[row, col] = True
    return float(occupied.mean()), occupied


def rectified_row_errors(left_points, right_points, left_matrix, left_distortion, right_matrix, right_distortion,
                         rectification) -> np.ndarray:
    """Row difference of corresponding points after rectification (the epipolar error).

    Parameters
    ----------
    left_points, right_points : (N, 2) px, original (distorted) images, the same target points.
    left_matrix, right_matrix : (3, 3) px; left_distortion, right_distortion : (5,).
    rectification : dict with R1, R2, P1, P2.

    Returns
    -------
    (N,) v_left - v_right in rectified px; zero for a perfect calibration.
    """
    ul = _rectify_points(left_points, left_matrix, left_distortion, rectification["R1"], rectification["P1"])
    ur = _rectify_points(right_points, right_matrix, right_distortion, rectification["R2"], rectification["P2"])
    return ul[:, 1] - ur[:, 1]


def rotation_angle_deg(rotation) -> float:
    """Angle of a rotation matrix, degrees (from its trace; clipped for round-off)."""
    r = np.asarray(rotation, float)
    return float(np.degrees(np.arccos(np.clip((np.trace(r) - 1.0) / 2.0, -1.0, 1.0))))


def convergence_angle_deg(rotation) -> float:
    """Angle between the two optical axes, degrees (R maps left-camera to right-camera frame)."""
    # The right optical axis in the left frame is R^T e_z, whose z component is R[2, 2].
    return float(np.degrees(np.arccos(np.clip(np.asarray(rotation, float)[2, 2], -1.0, 1.0))))


def pose_change(old_rotation, old_translation, new_rotation, new_translation) -> dict:
    """How far a stereo pose moved.

    Returns
    -------
    dict with rotation_deg (angle of R_new R_old^T, degrees), translation_mm
    (|t_new - t_old|, mm) and baseline_change_mm (|t_new| - |t_old|, mm).
    """
    r_old, r_new = np.asarray(old_rotation, float), np.asarray(new_rotation, float)
    t_old, t_new = np.asarray(old_translation, float).ravel(), np.asarray(new_translation, float).ravel()
    return {"rotation_deg": rotation_angle_deg(r_new @ r_old.T),
            "translation_mm": float(np.linalg.norm(t_new - t_old)),
            "baseline_change_mm": float(np.linalg.norm(t_new) - np.linalg.norm(t_old))}


# ------------------------------------------------------------ the drivers

def calibrate_rig(left: list, right: list, board: Board, image_size, *, names=None, right_names=None,
                  refine: bool = True) -> RigCalibration:
    """Full calibration of a stereo rig from target views paired by index.

    Parameters
    ----------
    left, right : lists of :class:`~surfrec.calib.targets.Detection`, one per
        view pair (the same length).
    board : the target (its object points, mm).
    image_size : (width, height) px of both cameras.
    names, right_names : optional view names (left and right files) for the report.
    refine : finish with the joint refinement of every parameter over every
        used view (:func:`surfrec.calib.bundle.adjust_rig`); False keeps the
        sequential estimate (intrinsics per camera, then the stereo pose with
        them held).

    Returns
    -------
    RigCalibration

    Raises
    ------
    InputError
        Fewer than 3 views in which a camera sees the whole target, or fewer
        than 3 that both cameras see.
    """
    reports, obj = _start(left, right, board, names, right_names)
    fits = {}
    for side, dets in (("left", left), ("right", right)):
        idx = [i for i, d in enumerate(dets) if d.found]
        if len(idx) < MIN_VIEWS_INTRINSICS:
            raise InputError(f"the {side} camera sees the whole {board.describe()} in {len(idx)} of {len(dets)} "
                             f"views; its intrinsics need at least {MIN_VIEWS_INTRINSICS}")
        fit = _with_rejection(
            idx, lambda use: calibrate_intrinsics([obj] * len(use), [dets[i].points for i in use], image_size),
            lambda f: f.view_rms_px, reports, f"{side} intrinsics", MIN_VIEWS_INTRINSICS)
        fits[side] = fit
        for i in fit.views:
            reports[i].roles.append(side)
    kl, dl = fits["left"].matrix, fits["left"].distortion
    kr, dr = fits["right"].matrix, fits["right"].distortion
    # Stereo views: both cameras see the whole target and neither camera's
    # fit rejected the view (a rejected view is suspect in both images).
    both = [i for i in range(len(left)) if "left" in reports[i].roles and "right" in reports[i].roles]
    stereo = _stereo(both, left, right, obj, kl, dl, kr, dr, image_size, reports, board)
    model = {"left_matrix": kl, "left_distortion": dl, "right_matrix": kr, "right_distortion": dr,
             "rotation": stereo.rotation, "translation": stereo.translation}
    joint = None
    if refine:
        joint = _joint(reports, left, right, obj, fits, stereo)
        model = {k: getattr(joint, k) for k in model}
        residuals = {i: (joint.residuals_left[i], joint.residuals_right[i]) for i in range(len(reports))
                     if reports[i].roles}
    else:
        residuals = _sequential_residuals(reports, fits, stereo)
    result = _finish("full", image_size, board, reports, model, residuals, stereo, fits["left"], fits["right"],
                     left, right)
    result.joint_fit = joint
    result.warnings = _warnings(result)
    return result


def repose_rig(left: list, right: list, board: Board, image_size, *, left_matrix, left_distortion, right_matrix,
               right_distortion, old_rotation=None, old_translation=None, names=None,
               right_names=None) -> RigCalibration:
    """Re-pose a rig: keep both cameras' intrinsics, estimate the stereo pose and rectification again.

    Parameters
    ----------
    left, right : lists of Detection, one per view pair.
    board : the target.
    image_size : (width, height) px.
    left_matrix, right_matrix : (3, 3) px; left_distortion, right_distortion : (5,) — kept.
    old_rotation, old_translation : the old stereo pose, to report how far it moved.
    names, right_names : optional view names (left and right files).

    Returns
    -------
    RigCalibration with ``mode`` "keep-intrinsics" and ``pose_change``.

    Raises
    ------
    InputError
        Fewer than 3 views that both cameras see whole.
    """
    reports, obj = _start(left, right, board, names, right_names)
    kl, dl = np.asarray(left_matrix, float), np.asarray(left_distortion, float).ravel()
    kr, dr = np.asarray(right_matrix, float), np.asarray(right_distortion, float).ravel()
    both = [i for i in range(len(left)) if left[i].found and right[i].found]
    stereo = _stereo(both, left, right, obj, kl, dl, kr, dr, image_size, reports, board)
    model = {"left_matrix": kl, "left_distortion": dl, "right_matrix": kr, "right_distortion": dr,
             "rotation": stereo.rotation, "translation": stereo.translation}
    residuals = _sequential_residuals(reports, {}, stereo)
    result = _finish("keep-intrinsics", image_size, board, reports, model, residuals, stereo, None, None, left, right)
    if old_rotation is not None and old_translation is not None:
        result.pose_change = pose_change(old_rotation, old_translation, result.rotation, result.translation)
    result.warnings = _warnings(result)
    return result


# --------------------------------------------------------------- helpers

def _start(left, right, board, names, right_names=None):
    if len(left) != len(right):
        raise InputError(f"{len(left)} left views but {len(right)} right views; views are paired by index")
    names = list(names) if names is not None else [f"view {i}" for i in range(len(left))]
    right_names = list(right_names) if right_names is not None else [None] * len(left)
    reports = []
    for i, (a, b) in enumerate(zip(left, right)):
        r = ViewReport(index=i, name=names[i], found_left=a.found, found_right=b.found, name_right=right_names[i])
        for side, d in (("left", a), ("right", b)):
            if not d.found:
                r.notes.append(f"{side}: {d.reason}")
        reports.append(r)
    return reports, board.object_points()


def _with_rejection(indices, fit_fn, rms_of, reports, what, min_views):
    """Fit, drop the worst outlier view, refit, until no outlier is left (see the module doc)."""
    use = list(indices)
    fit = fit_fn(use)
    while True:
        rms = np.asarray(rms_of(fit))
        if rms.ndim == 2:
            rms = np.sqrt((rms ** 2).mean(axis=1))
        bad = outlier_views(rms)
        if not bad.any() or len(use) - 1 < min_views:
            break
        worst = int(np.argmax(np.where(bad, rms, -np.inf)))
        med = float(np.median(rms))
        reports[use[worst]].notes.append(
            f"rejected from the {what}: reprojection RMS {rms[worst]:.3f} px > {OUTLIER_FACTOR:g} x median "
            f"({med:.3f} px) and > {OUTLIER_FLOOR_PX:g} px")
        del use[worst]
        fit = fit_fn(use)
    fit.views = use
    return fit


def _stereo(both, left, right, obj, kl, dl, kr, dr, image_size, reports, board):
    if len(both) < MIN_VIEWS_STEREO:
        raise InputError(f"{len(both)} of {len(left)} view pairs show the whole {board.describe()} to both "
                         f"cameras; the stereo pose needs at least {MIN_VIEWS_STEREO}")
    fit = _with_rejection(
        both, lambda use: estimate_stereo_pose([obj] * len(use), [left[i].points for i in use],
                                               [right[i].points for i in use], kl, dl, kr, dr, image_size),
        lambda f: f.view_rms_px, reports, "stereo pose", MIN_VIEWS_STEREO)
    for i in fit.views:
        reports[i].roles.append("stereo")
    return fit


def _sequential_residuals(reports, fits, stereo):
    """Per used view, (left, right) residuals of the sequential model (None where unused).

    Stereo views through the stereo fit (one board pose shared by both
    cameras), single-camera views through that camera's own fit.
    """
    out = {}
    st = {i: (a, b) for i, a, b in zip(stereo.views, stereo.residuals_left, stereo.residuals_right)}
    single = {side: dict(zip(fit.views, fit.residuals)) for side, fit in fits.items()}
    for rep in reports:
        if rep.index in st:
            out[rep.index] = st[rep.index]
        elif rep.roles:
            out[rep.index] = (single.get("left", {}).get(rep.index), single.get("right", {}).get(rep.index))
    return out


def _joint(reports, left, right, obj, fits, stereo):
    """Joint refinement over every used view, started from the sequential estimate."""
    from surfrec.calib.bundle import adjust_rig

    used = [rep for rep in reports if rep.roles]
    r_s, t_s = stereo.rotation, stereo.translation
    st = {i: (rv, tv) for i, rv, tv in zip(stereo.views, stereo.rvecs, stereo.tvecs)}
    poses_l = {i: (rv, tv) for i, rv, tv in zip(fits["left"].views, fits["left"].rvecs, fits["left"].tvecs)}
    poses_r = {i: (rv, tv) for i, rv, tv in zip(fits["right"].views, fits["right"].rvecs, fits["right"].tvecs)}
    rvecs, tvecs, pl, pr = [], [], [], []
    for rep in used:
        i = rep.index
        if i in st:
            rv, tv = st[i]
        elif i in poses_l:
            rv, tv = poses_l[i]
        else:
            # Board pose seen from the right camera, moved into the left camera's frame.
            rb, tb = cv2.Rodrigues(np.asarray(poses_r[i][0], float))[0], np.asarray(poses_r[i][1], float)
            rv = cv2.Rodrigues(r_s.T @ rb)[0].ravel()
            tv = r_s.T @ (tb - t_s)
        rvecs.append(np.ravel(rv))
        tvecs.append(np.ravel(tv))
        pl.append(left[i].points if "left" in rep.roles else None)
        pr.append(right[i].points if "right" in rep.roles else None)
    fit = adjust_rig(obj, pl, pr, left_matrix=fits["left"].matrix, left_distortion=fits["left"].distortion,
                     right_matrix=fits["right"].matrix, right_distortion=fits["right"].distortion,
                     rotation=r_s, translation=t_s, board_rvecs=np.array(rvecs), board_tvecs=np.array(tvecs))
    # Back to the caller's view numbering.
    n = len(reports)
    res_l, res_r = [None] * n, [None] * n
    for k, rep in enumerate(used):
        res_l[rep.index], res_r[rep.index] = fit.residuals_left[k], fit.residuals_right[k]
    fit.residuals_left, fit.residuals_right = res_l, res_r
    fit.views = [rep.index for rep in used]
    return fit


def _finish(mode, image_size, board, reports, model, residuals, stereo, fit_l, fit_r, left, right):
    kl, dl = model["left_matrix"], model["left_distortion"]
    kr, dr = model["right_matrix"], model["right_distortion"]
    rot, trans = model["rotation"], model["translation"]
    # Not zero-disparity: for a verged rig that framing zooms the rectified
    # images in several times (see surfrec.calib.rectify.rectify); this way
    # rectified px stay about the size of image px and every rectified pixel
    # is valid (alpha 0).
    rect = rectify(kl, dl, kr, dr, image_size, rot, trans, alpha=0.0, zero_disparity=False)
    sq_sum, n = 0.0, 0
    residual_points = {"left": {}, "right": {}}
    for rep in reports:
        if rep.index not in residuals:
            continue
        e_l, e_r = residuals[rep.index]
        parts = [(side, e) for side, e in (("left", e_l), ("right", e_r)) if e is not None]
        e = np.concatenate([p for _, p in parts])
        rep.rms_px = _rms(e)
        rep.rms_left_px = None if e_l is None else _rms(e_l)
        rep.rms_right_px = None if e_r is None else _rms(e_r)
        sq_sum += float((e ** 2).sum())
        n += len(e)
        for side, err in parts:
            pts = (left if side == "left" else right)[rep.index].points
            residual_points[side][rep.index] = (pts, err)
    rms_px = float(np.sqrt(sq_sum / n)) if n else float("nan")
    row_err = np.concatenate([rectified_row_errors(left[i].points, right[i].points, kl, dl, kr, dr, rect)
                              for i in stereo.views])
    cov = {"cells": list(COVERAGE_CELLS)}
    for side, dets in (("left", left), ("right", right)):
        role = side if mode == "full" else "stereo"
        cov[side], cov[f"occupied_{side}"] = coverage([d.points for rep, d in zip(reports, dets) if role in rep.roles],
                                                      image_size)
    return RigCalibration(
        mode=mode, image_size=(int(image_size[0]), int(image_size[1])), left_matrix=np.asarray(kl, float),
        left_distortion=np.asarray(dl, float), right_matrix=np.asarray(kr, float),
        right_distortion=np.asarray(dr, float), rotation=np.asarray(rot, float),
        translation=np.asarray(trans, float), rectification=rect, views=reports, rms_px=rms_px,
        epipolar_rms_px=_rms1(row_err), baseline_mm=float(np.linalg.norm(trans)),
        convergence_deg=convergence_angle_deg(rot), coverage=cov, warnings=[], left_fit=fit_l, right_fit=fit_r,
        stereo_fit=stereo, row_errors_px=row_err, board=board, points=residual_points)


def _warnings(c: RigCalibration) -> list:
    w = []
    if c.board.symmetric:
        w.append(f"the {c.board.describe()} looks the same turned half a turn, so the cameras may number its "
                 "points from opposite ends; prefer a board that is not symmetric (for a chessboard, one odd "
                 "and one even count of inner corners)")
    if c.mode == "full":
        for side in ("left", "right"):
            n = _count(c.views, side)
            if n < MIN_GOOD_VIEWS:
                w.append(f"only {n} views serve the {side} camera's intrinsics; {MIN_GOOD_VIEWS} or more are "
                         "advised (common practice)")
        n = _count(c.views, "stereo")
        if n < MIN_GOOD_VIEWS:
            w.append(f"only {n} views serve the stereo pose; {MIN_GOOD_VIEWS} or more are advised (common practice)")
        for side in ("left", "right"):
            frac = c.coverage[side]
            occ = c.coverage[f"occupied_{side}"]
            empty_corners = [name for name, cell in (("top-left", occ[0, 0]), ("top-right", occ[0, -1]),
                                                     ("bottom-left", occ[-1, 0]), ("bottom-right", occ[-1, -1]))
                             if not cell]
            if frac < MIN_COVERAGE or empty_corners:
                msg = (f"the {side} camera's views cover {100 * frac:.0f}% of the image "
                       f"({COVERAGE_CELLS[0]}x{COVERAGE_CELLS[1]} cells)")
                if empty_corners:
                    msg += f", with no target points in its {', '.join(empty_corners)} corner cell"
                    msg += "s" if len(empty_corners) > 1 else ""
                msg += ("; add views that reach the image corners, where distortion is largest "
                        f"(common practice: {100 * MIN_COVERAGE:.0f}% or more, corners included)")
                w.append(msg)
    if c.rms_px > MAX_GOOD_RMS_PX:
        w.append(f"reprojection RMS {c.rms_px:.2f} px exceeds {MAX_GOOD_RMS_PX:g} px (common practice): check "
                 "focus, motion blur, a flat and rigid target, and --square")
    return w


def _project(obj, rvec, tvec, k, d):
    uv, _ = cv2.projectPoints(np.asarray(obj, np.float64).reshape(-1, 3), np.asarray(rvec, float).reshape(3, 1),
                              np.asarray(tvec, float).reshape(3, 1), np.asarray(k, float), np.asarray(d, float))
    return uv.reshape(-1, 2)


def _rectify_points(points, k, d, r, p):
    pts = np.asarray(points, np.float64).reshape(-1, 1, 2)
    out = cv2.undistortPoints(pts, np.asarray(k, float), np.asarray(d, float), R=np.asarray(r, float),
                              P=np.asarray(p, float), criteria=_UNDISTORT_CRITERIA)
    return out.reshape(-1, 2)


def _rms(e) -> float:
    e = np.asarray(e, float).reshape(-1, 2)
    return float(np.sqrt((e ** 2).sum(axis=1).mean())) if len(e) else float("nan")


def _rms1(x) -> float:
    x = np.asarray(x, float).ravel()
    return float(np.sqrt((x ** 2).mean())) if x.size else float("nan")


def _count(views, role) -> int:
    return sum(1 for v in views if role in v.roles)


def _r(x, nd: int = 5):
    return None if x is None else round(float(x), nd)
