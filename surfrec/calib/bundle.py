"""Joint refinement of a stereo rig over every target view (a small bundle adjustment).

Why this is written here: OpenCV refines both cameras' intrinsics together
with the stereo pose only over views that BOTH cameras see
(``cv2.stereoCalibrate`` without ``CALIB_FIX_INTRINSIC``), and its
multi-camera calibration (``cv2.calibrateMultiview``, OpenCV 5) holds the
intrinsics. The views that only one camera sees are the ones that reach
that camera's image corners, so dropping them from the final fit would give
up the corner coverage they exist for. This module minimises the
reprojection error of all views at once:

- parameters: each camera's fx, fy, cx, cy, k1, k2, p1, p2, k3 (zero skew,
  OpenCV's default); the stereo pose (R, t) with X_right = R X_left + t;
  one board pose per view, in the left camera's frame, also for views that
  only the right camera sees (its pose there is the board pose composed
  with the stereo pose);
- residuals: projected minus detected point, px, for every point of every
  camera's used view (``cv2.projectPoints``, whose analytic Jacobian is
  chained through ``cv2.composeRT`` for the right camera);
- solver: Levenberg–Marquardt (``scipy.optimize.least_squares``, MINPACK),
  started from the sequential estimates (Zhang's method per camera, then the
  stereo pose with intrinsics held), so it converges in a few iterations.

When every view is seen by both cameras this is the cost that
``cv2.stereoCalibrate`` with ``CALIB_USE_INTRINSIC_GUESS`` minimises, and the
tests check that both reach the same parameters. On the synthetic sessions
(known truth, corner noise 0.035 px) it halves the pixel-to-ray error and the
stereo rotation error of the sequential estimate (measured by Monte Carlo
over the session's view geometry; see docs/calibration.md).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from scipy.optimize import least_squares

N_INTRINSIC = 9  # fx, fy, cx, cy, k1, k2, p1, p2, k3
INTRINSIC_NAMES = ("fx", "fy", "cx", "cy", "k1", "k2", "p1", "p2", "k3")


@dataclass
class JointFit:
    """The jointly refined rig.

    Attributes
    ----------
    left_matrix, right_matrix : (3, 3) px; left_distortion, right_distortion : (5,).
    rotation : (3, 3), translation : (3,) mm, X_right = R X_left + t.
    rvecs, tvecs : (V, 3) board -> left camera poses (Rodrigues; mm).
    residuals_left, residuals_right : per view, (N, 2) observed minus
        reprojected px, or None where that camera did not serve the view.
    rms_px : reprojection RMS over all observations, px.
    std : {"left": {fx...k3}, "right": {...}, "rotation_deg": (3,), "translation_mm": (3,)}
        1-sigma estimates from the Jacobian at the solution, scaled by the
        residual variance (the usual least-squares covariance).
    iterations : number of residual evaluations.
    """

    left_matrix: np.ndarray
    left_distortion: np.ndarray
    right_matrix: np.ndarray
    right_distortion: np.ndarray
    rotation: np.ndarray
    translation: np.ndarray
    rvecs: np.ndarray
    tvecs: np.ndarray
    residuals_left: list
    residuals_right: list
    rms_px: float
    std: dict
    iterations: int


def adjust_rig(object_points, left_points, right_points, *, left_matrix, left_distortion, right_matrix,
               right_distortion, rotation, translation, board_rvecs, board_tvecs) -> JointFit:
    """Refine both cameras' intrinsics, the stereo pose and every board pose together.

    Parameters
    ----------
    object_points : (N, 3) board points, mm (the same for every view).
    left_points, right_points : lists (one entry per view) of (N, 2) px, or
        None where that camera does not serve the view. Every view needs at
        least one camera.
    left_matrix, left_distortion, right_matrix, right_distortion : starting
        intrinsics (px) and distortion [k1, k2, p1, p2, k3].
    rotation, translation : starting stereo pose (X_right = R X_left + t, mm).
    board_rvecs, board_tvecs : (V, 3) starting board -> left camera poses.

    Returns
    -------
    JointFit
    """
    obj = np.asarray(object_points, np.float64).reshape(-1, 3)
    n_views = len(left_points)
    if len(right_points) != n_views or len(board_rvecs) != n_views:
        raise ValueError("one entry per view is needed in left_points, right_points and the board poses")
    obs = []  # (view, camera 0/1, points)
    for v in range(n_views):
        for cam, pts in ((0, left_points[v]), (1, right_points[v])):
            if pts is not None:
                obs.append((v, cam, np.asarray(pts, np.float64).reshape(-1, 2)))
    if not obs:
        raise ValueError("no observations to adjust")
    x0 = np.concatenate([_pack_intrinsics(left_matrix, left_distortion), _pack_intrinsics(right_matrix, right_distortion),
                         cv2.Rodrigues(np.asarray(rotation, float))[0].ravel(), np.asarray(translation, float).ravel(),
                         np.column_stack([np.asarray(board_rvecs, float).reshape(-1, 3),
                                          np.asarray(board_tvecs, float).reshape(-1, 3)]).ravel()])
    n_pts = len(obj)
    n_params = x0.size
    stereo0 = 2 * N_INTRINSIC

    def evaluate(x, want_jac):
        res = np.empty(2 * n_pts * len(obs))
        jac = np.zeros((res.size, n_params)) if want_jac else None
        ks = [_unpack_intrinsics(x[:N_INTRINSIC]), _unpack_intrinsics(x[N_INTRINSIC:stereo0])]
        rs, ts = x[stereo0:stereo0 + 3], x[stereo0 + 3:stereo0 + 6]
        for row, (v, cam, pts) in enumerate(obs):
            b0 = stereo0 + 6 + 6 * v
            rb, tb = x[b0:b0 + 3], x[b0 + 3:b0 + 6]
            k, d = ks[cam]
            if cam == 0:
                r, t = rb, tb
            else:
                r, t, dr3dr1, dr3dt1, dr3dr2, dr3dt2, dt3dr1, dt3dt1, dt3dr2, dt3dt2 = cv2.composeRT(rb, tb, rs, ts)
            uv, jp = cv2.projectPoints(obj, r, t, k, d)
            sl = slice(2 * n_pts * row, 2 * n_pts * (row + 1))
            res[sl] = uv.reshape(-1) - pts.reshape(-1)
            if want_jac:
                # Columns of projectPoints' Jacobian: rvec (3), tvec (3), fx fy, cx cy, then the 5 coefficients.
                j_r, j_t, j_in = jp[:, 0:3], jp[:, 3:6], jp[:, 6:15]
                i0 = cam * N_INTRINSIC
                jac[sl, i0:i0 + N_INTRINSIC] = j_in
                if cam == 0:
                    jac[sl, b0:b0 + 3] = j_r
                    jac[sl, b0 + 3:b0 + 6] = j_t
                else:
                    jac[sl, b0:b0 + 3] = j_r @ dr3dr1 + j_t @ dt3dr1
                    jac[sl, b0 + 3:b0 + 6] = j_r @ dr3dt1 + j_t @ dt3dt1
                    jac[sl, stereo0:stereo0 + 3] = j_r @ dr3dr2 + j_t @ dt3dr2
                    jac[sl, stereo0 + 3:stereo0 + 6] = j_r @ dr3dt2 + j_t @ dt3dt2
        return res, jac

    cache = {}

    def fun(x):
        r, j = evaluate(x, True)
        cache["x"], cache["jac"] = x.copy(), j
        return r

    def jac(x):
        if "x" in cache and np.array_equal(cache["x"], x):
            return cache["jac"]
        return evaluate(x, True)[1]

    sol = least_squares(fun, x0, jac=jac, method="lm", x_scale="jac", xtol=1e-12, ftol=1e-12, gtol=1e-12,
                        max_nfev=200)
    x = sol.x
    res, j = evaluate(x, True)
    rms = float(np.sqrt((res ** 2).sum() / (res.size / 2)))
    std = _std(j, res)
    kl, dl = _unpack_intrinsics(x[:N_INTRINSIC])
    kr, dr = _unpack_intrinsics(x[N_INTRINSIC:stereo0])
    poses = x[stereo0 + 6:].reshape(-1, 6)
    res_l, res_r = [None] * n_views, [None] * n_views
    for row, (v, cam, pts) in enumerate(obs):
        e = -res[2 * n_pts * row:2 * n_pts * (row + 1)].reshape(-1, 2)  # observed minus reprojected
        (res_l if cam == 0 else res_r)[v] = e
    return JointFit(
        left_matrix=kl, left_distortion=dl, right_matrix=kr, right_distortion=dr,
        rotation=cv2.Rodrigues(x[stereo0:stereo0 + 3])[0], translation=x[stereo0 + 3:stereo0 + 6].copy(),
        rvecs=poses[:, :3].copy(), tvecs=poses[:, 3:].copy(), residuals_left=res_l, residuals_right=res_r,
        rms_px=rms,
        std={"left": dict(zip(INTRINSIC_NAMES, std[:N_INTRINSIC])),
             "right": dict(zip(INTRINSIC_NAMES, std[N_INTRINSIC:stereo0])),
             "rotation_deg": np.degrees(std[stereo0:stereo0 + 3]), "translation_mm": std[stereo0 + 3:stereo0 + 6]},
        iterations=int(sol.nfev))


def _pack_intrinsics(k, d):
    k = np.asarray(k, float)
    return np.concatenate([[k[0, 0], k[1, 1], k[0, 2], k[1, 2]], np.asarray(d, float).ravel()[:5]])


def _unpack_intrinsics(p):
    k = np.array([[p[0], 0.0, p[2]], [0.0, p[1], p[3]], [0.0, 0.0, 1.0]])
    return k, np.array(p[4:9], float)


def _std(jac, res):
    """1-sigma of every parameter: sqrt(diag((J^T J)^-1) * SSR / (m - n))."""
    m, n = jac.shape
    dof = max(m - n, 1)
    sigma2 = float((res ** 2).sum()) / dof
    # Columns scaled to unit norm first (fx is ~1e3 px, p1 ~1e-4), so the
    # normal matrix is well conditioned; then a pseudo-inverse, because with
    # few or poorly spread views k3 and the board distances can be nearly
    # degenerate and the covariance must still come out (large).
    scale = np.linalg.norm(jac, axis=0)
    scale[scale == 0] = 1.0
    js = jac / scale
    evals, evecs = np.linalg.eigh(js.T @ js)
    keep = evals > evals.max() * 1e-14
    var = (evecs[:, keep] ** 2) @ (1.0 / evals[keep])
    return np.sqrt(var * sigma2) / scale
