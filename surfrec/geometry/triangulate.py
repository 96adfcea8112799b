"""Triangulation of rectified matches, and its inverse.

Frames and conventions (docs/conventions.md): a match is given in the rectified LEFT
image as (u, v) px with disparity d = u_left - u_right px. OpenCV's
reprojection matrix Q (``cv2.stereoRectify``, ``cv2.reprojectImageTo3D``)
maps it to homogeneous coordinates in the left RECTIFIED frame,
[X Y Z W]^T = Q [u v d 1]^T; the rectifying rotation R1 maps the left
camera frame to that frame (X_rect = R1 X_cam), so points come back to the
left camera frame (x right, y down, z along the optical axis, mm) through
R1 transposed.

The inverse goes through the rectified projections P1 and P2, which OpenCV
defines on the left rectified frame: u_left from P1, u_right from P2, and
d = u_left - u_right. Q, P1 and P2 are the rectification of one rig, so the
two directions agree to rounding error.
"""

from __future__ import annotations

import numpy as np


def triangulate(u, v, d, q, r1) -> np.ndarray:
    """Left-camera-frame points of rectified matches.

    Parameters
    ----------
    u, v : array_like
        Positions in the rectified left image, px (any matching shapes,
        broadcast together with ``d``).
    d : array_like
        Disparity d = u_left - u_right, rectified px; NaN gives NaN.
    q : (4, 4) array_like
        OpenCV reprojection matrix of the rectification.
    r1 : (3, 3) array_like
        Rectifying rotation of the left camera (left camera frame ->
        left rectified frame).

    Returns
    -------
    points : ndarray, shape broadcast(u, v, d).shape + (3,)
        X, Y, Z in the left camera frame (unrectified), mm, float64. Points
        at infinity (W = 0) are NaN.
    """
    u, v, d = np.broadcast_arrays(np.asarray(u, np.float64), np.asarray(v, np.float64),
                                  np.asarray(d, np.float64))
    q = np.asarray(q, np.float64)
    # Q applied by components (not a (..., 4) stack) keeps temporaries small on large grids.
    h = [q[i, 0] * u + q[i, 1] * v + q[i, 2] * d + q[i, 3] for i in range(4)]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(h[3] == 0, np.nan, h[3])
        rect = np.stack([h[0] / w, h[1] / w, h[2] / w], axis=-1)
    # X_cam = R1^T X_rect, written for row vectors.
    return rect @ np.asarray(r1, np.float64)


def project_rectified(points, r1, p1, p2):
    """Rectified left pixel and disparity of left-camera-frame points (the inverse of :func:`triangulate`).

    Parameters
    ----------
    points : array_like, shape (..., 3)
        Points in the left camera frame (unrectified), mm.
    r1 : (3, 3) rectifying rotation of the left camera.
    p1, p2 : (3, 4) rectified projections of the left and right cameras
        (both act on the left rectified frame, as OpenCV defines them).

    Returns
    -------
    u, v, d : ndarrays of shape points.shape[:-1]
        Rectified left-image position, px, and disparity d = u_left - u_right,
        px. Points on or behind the cameras' common focal plane (Z <= 0 in
        the rectified frame) are NaN.
    """
    x = np.asarray(points, np.float64) @ np.asarray(r1, np.float64).T
    p1 = np.asarray(p1, np.float64)
    p2 = np.asarray(p2, np.float64)
    xh = np.concatenate([x, np.ones(x.shape[:-1] + (1,))], axis=-1)
    a = xh @ p1.T
    b = xh @ p2.T
    with np.errstate(divide="ignore", invalid="ignore"):
        za = np.where(a[..., 2] > 0, a[..., 2], np.nan)
        zb = np.where(b[..., 2] > 0, b[..., 2], np.nan)
        u = a[..., 0] / za
        v = a[..., 1] / za
        d = u - b[..., 0] / zb
    return u, v, d


def height_sensitivity(u, v, d, q, r1, normal, *, step_px: float = 1e-3) -> np.ndarray:
    """Change of a triangulated point's distance along ``normal`` per px of disparity, mm/px.

    At a fixed rectified left pixel (u, v) a disparity change moves the point
    along the left camera's ray; this is how far it moves along the plane
    normal (the height direction), per px. It turns disparity noise (px)
    into height noise (mm).

    Parameters
    ----------
    u, v, d : array_like
        Rectified left px and disparity px (broadcast together).
    q, r1 : see :func:`triangulate`.
    normal : (3,) unit vector, left camera frame.
    step_px : central-difference step, px (the dependence is smooth and
        nearly linear over a few px, so the step is not critical).

    Returns
    -------
    ndarray, mm/px, of the broadcast shape; NaN where d is NaN.
    """
    n = np.asarray(normal, np.float64)
    hi = triangulate(u, v, np.asarray(d, np.float64) + step_px / 2, q, r1) @ n
    lo = triangulate(u, v, np.asarray(d, np.float64) - step_px / 2, q, r1) @ n
    return (hi - lo) / step_px
