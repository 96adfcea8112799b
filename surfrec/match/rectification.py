"""Rectifying frames with maps computed once per rig.

Two families of resampling:

- OpenCV's ``cv2.remap`` (bilinear, bicubic, Lanczos-4): fast and well kept,
  but it rounds every sample position to 1/32 px (INTER_BITS = 5), and since
  the map's fractional part drifts slowly along a row, the rounding error
  is correlated over many pixels — a systematic shift of up to 1/64 px.
- Exact-position B-splines of order 3 or 5 (the image prefiltered once,
  surfrec.match.prefilter, then sampled in a compiled loop): no
  position rounding, and interpolation error far below the matcher's
  noise. Written by hand because scipy's map_coordinates is single-threaded
  and several times slower on whole frames.

The benchmark (tests/benchmarks/bench_match.py) measures the disparity error
each method adds; the default is the one chosen there.
"""

from __future__ import annotations

import cv2
import numpy as np
from numba import njit, prange

from surfrec.calib.rectify import rectification_maps
from surfrec.match.kernels import _bspline3_weights as _w3
from surfrec.match.kernels import _bspline5_weights as _w5
from surfrec.match.prefilter import spline_coefficients

METHODS = ("linear", "cubic", "lanczos4", "bspline3", "bspline5")
DEFAULT_METHOD = "bspline3"

_CV_FLAGS = {"linear": cv2.INTER_LINEAR, "cubic": cv2.INTER_CUBIC, "lanczos4": cv2.INTER_LANCZOS4}


class FrameRectifier:
    """Rectify left and right frames of one rig with maps computed once.

    Parameters
    ----------
    rig : surfrec.io.rigfile.StereoRig
    method : one of METHODS.

    Attributes
    ----------
    maps : {"left": (map_x, map_y), "right": (...)} float32 (H, W): for each
        rectified pixel, its position in the original image, px.
    """

    def __init__(self, rig, method: str = DEFAULT_METHOD):
        if method not in METHODS:
            raise ValueError(f"unknown rectification method {method!r}; choose one of {', '.join(METHODS)}")
        self.method = method
        rect = rig.rectification
        self.image_size = tuple(rig.image_size)
        self.maps = {
            "left": rectification_maps(rig.left_matrix, rig.left_distortion, rect["R1"], rect["P1"], rig.image_size),
            "right": rectification_maps(rig.right_matrix, rig.right_distortion, rect["R2"], rect["P2"],
                                        rig.image_size),
        }

    def __call__(self, image, side: str) -> np.ndarray:
        """Rectified float32 image (H, W) of ``image`` (original camera image of ``side``)."""
        mx, my = self.maps[side]
        img = np.asarray(image, dtype=np.float32)
        if self.method in _CV_FLAGS:
            return cv2.remap(img, mx, my, _CV_FLAGS[self.method], borderMode=cv2.BORDER_REFLECT)
        order = 3 if self.method == "bspline3" else 5
        coef = _padded_coefficients(img, order)
        out = np.empty(mx.shape, np.float32)
        _remap_bspline(coef, mx, my, order, out)
        return out

    def left(self, image):
        return self(image, "left")

    def right(self, image):
        return self(image, "right")

    def mask(self, mask_original) -> np.ndarray:
        """A left-image mask (non-zero = measure) carried into the rectified left view (nearest)."""
        mx, my = self.maps["left"]
        m = (np.asarray(mask_original) != 0).astype(np.uint8)
        return cv2.remap(m, mx, my, cv2.INTER_NEAREST, borderMode=cv2.BORDER_CONSTANT, borderValue=0) != 0


_PAD = 4  # mirrored border added to the coefficients so that the sampling loop needs no boundary tests


def _padded_coefficients(img, order):
    """B-spline coefficients (mirror boundary, as scipy's prefilter assumes) with a mirrored border."""
    coef = spline_coefficients(img, order)
    # numpy's "reflect" repeats no edge sample: the same symmetry as scipy's "mirror".
    return np.pad(coef, _PAD, mode="reflect")


@njit(parallel=True, cache=True, fastmath={"reassoc", "contract", "arcp", "nsz"})
def _remap_bspline(coef, mx, my, order, out):
    """Sample padded B-spline coefficients (see _padded_coefficients) at float positions."""
    Hp, Wp = coef.shape
    rows, cols = mx.shape
    half = 1 if order == 3 else 2
    taps = order + 1
    # Positions beyond the mirrored border are clamped to it (far outside the image: any value will do,
    # such pixels are never matched).
    lo = half - _PAD
    hi_x = Wp - _PAD - taps + half - 1
    hi_y = Hp - _PAD - taps + half - 1
    for r in prange(rows):
        wx = np.empty(6)
        wy = np.empty(6)
        for c in range(cols):
            x = min(max(mx[r, c], lo), hi_x)
            y = min(max(my[r, c], lo), hi_y)
            if not (x == x and y == y):
                out[r, c] = np.nan
                continue
            ix = int(np.floor(x))
            iy = int(np.floor(y))
            if order == 3:
                _w3(x - ix, wx)
                _w3(y - iy, wy)
            else:
                _w5(x - ix, wx)
                _w5(y - iy, wy)
            x0 = ix - half + _PAD
            y0 = iy - half + _PAD
            acc = 0.0
            for j in range(taps):
                racc = 0.0
                for i in range(taps):
                    racc += wx[i] * coef[y0 + j, x0 + i]
                acc += wy[j] * racc
            out[r, c] = acc
