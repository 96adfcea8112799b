"""Stereo rectification (OpenCV's cv2.stereoRectify, Bouguet's method) and its maps."""

from __future__ import annotations

import cv2
import numpy as np


def rectify(matrix_left, dist_left, matrix_right, dist_right, image_size, rotation, translation, *,
            alpha: float = 0.0, zero_disparity: bool = False) -> dict:
    """Rectifying rotations and projections of a calibrated stereo pair.

    Parameters
    ----------
    matrix_left, matrix_right : (3, 3) camera matrices, px.
    dist_left, dist_right : (5,) Brown–Conrady [k1, k2, p1, p2, k3].
    image_size : (width, height) px.
    rotation, translation : left camera frame -> right camera frame,
        X_right = R X_left + t (t in mm).
    alpha : free scaling of cv2.stereoRectify: 0 keeps only valid pixels,
        1 keeps every source pixel.
    zero_disparity : make the two rectified principal points equal
        (``CALIB_ZERO_DISPARITY``). For a verged rig this forces both
        rectified images to be framed about one common principal ray, and
        with ``alpha=0`` OpenCV then zooms in until only the narrow field
        both cameras share about that ray is left (about 4.5 times for the
        synthetic rig's 16 degrees of convergence). With False each image
        keeps its own horizontal principal point (P1[0, 2] != P2[0, 2]); Q
        carries the offset, so disparity is still d = u_left - u_right.
        False is the default: both views stay centred on the field and the
        water surface's disparities are a few px.

    Returns
    -------
    dict with R1, R2 (3, 3), P1, P2 (3, 4), Q (4, 4) as numpy arrays, in
    OpenCV's convention (disparity d = u_left - u_right; Q maps
    (u, v, d, 1) to homogeneous left-rectified coordinates in mm).
    """
    r1, r2, p1, p2, q, _, _ = cv2.stereoRectify(
        np.asarray(matrix_left, float), np.asarray(dist_left, float),
        np.asarray(matrix_right, float), np.asarray(dist_right, float),
        (int(image_size[0]), int(image_size[1])), np.asarray(rotation, float),
        np.asarray(translation, float).reshape(3, 1), flags=cv2.CALIB_ZERO_DISPARITY if zero_disparity else 0, alpha=alpha)
    return {"R1": r1, "R2": r2, "P1": p1, "P2": p2, "Q": q}


def rectification_maps(matrix, dist, rect_rotation, rect_projection, image_size):
    """Float pixel maps (map_x, map_y) for cv2.remap into the rectified image.

    float32 maps (not OpenCV's fixed-point ones) keep the full sub-pixel
    position of every sample.
    """
    return cv2.initUndistortRectifyMap(np.asarray(matrix, float), np.asarray(dist, float),
                                       np.asarray(rect_rotation, float), np.asarray(rect_projection, float),
                                       (int(image_size[0]), int(image_size[1])), cv2.CV_32FC1)
