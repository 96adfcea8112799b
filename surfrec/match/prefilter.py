"""Cubic B-spline prefilter (the coefficients whose B-spline interpolates an image), in parallel.

The same filter as ``scipy.ndimage.spline_filter1d(..., order=3, mode="mirror")``
(Unser, Aldroubi & Eden, IEEE Trans. Signal Process. 41 (1993) 821: a causal
and an anticausal first-order recursion with the pole z = sqrt(3) - 2, mirror
boundary), written out because scipy's runs on one core and the matcher runs
it on five whole images per frame pair. Other orders use scipy.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange
from scipy import ndimage

_Z = math.sqrt(3.0) - 2.0
_GAIN = (1.0 - _Z) * (1.0 - 1.0 / _Z)  # = 6: makes the filter reproduce constants
_TINY = 1e-18  # powers of the pole below this add nothing in double precision


@njit(cache=True, inline="always")
def _filter_line(c, n):
    # In place on the 1-D view c of length n (n >= 2).
    z = _Z
    for i in range(n):
        c[i] *= _GAIN
    # Causal initial value for a mirror-symmetric signal.
    zn1 = z ** (n - 1)
    acc = c[0] + zn1 * c[n - 1]
    zi = z
    for i in range(1, n - 1):
        acc += zi * (c[i] + zn1 * c[n - 1 - i])
        zi *= z
        if abs(zi) < _TINY:
            break
    c[0] = acc / (1.0 - zn1 * zn1)
    for i in range(1, n):
        c[i] += z * c[i - 1]
    c[n - 1] = (z * c[n - 2] + c[n - 1]) * z / (z * z - 1.0)
    for i in range(n - 2, -1, -1):
        c[i] = z * (c[i + 1] - c[i])


@njit(parallel=True, cache=True)
def _filter_rows(a):
    # a: (R, n) float64, each row filtered in place.
    R, n = a.shape
    for r in prange(R):
        _filter_line(a[r], n)


@njit(parallel=True, cache=True)
def _filter_columns(a):
    # a: (n, W) float64, each column filtered in place; columns in blocks so that the
    # recursion runs along rows of contiguous memory.
    n, W = a.shape
    block = 32
    z = _Z
    zn1 = z ** (n - 1)
    for b in prange((W + block - 1) // block):
        c0 = b * block
        c1 = min(W, c0 + block)
        for i in range(n):
            for j in range(c0, c1):
                a[i, j] *= _GAIN
        for j in range(c0, c1):
            acc = a[0, j] + zn1 * a[n - 1, j]
            zi = z
            for i in range(1, n - 1):
                acc += zi * (a[i, j] + zn1 * a[n - 1 - i, j])
                zi *= z
                if abs(zi) < _TINY:
                    break
            a[0, j] = acc / (1.0 - zn1 * zn1)
        for i in range(1, n):
            for j in range(c0, c1):
                a[i, j] += z * a[i - 1, j]
        for j in range(c0, c1):
            a[n - 1, j] = (z * a[n - 2, j] + a[n - 1, j]) * z / (z * z - 1.0)
        for i in range(n - 2, -1, -1):
            for j in range(c0, c1):
                a[i, j] = z * (a[i + 1, j] - a[i, j])


def spline_coefficients(image, order: int = 3, axes=(-2, -1)) -> np.ndarray:
    """B-spline interpolation coefficients of an image or stack along the given axes (mirror boundary).

    Parameters
    ----------
    image : array (..., H, W), any real dtype (intensities, any unit).
    order : B-spline order; 3 runs here in parallel, others in scipy.ndimage.
    axes : the axes to filter, among the last two (-1: along rows; -2: along columns).

    Returns
    -------
    float64 array of the image's shape, same unit as the image.
    """
    a = np.array(image, dtype=np.float64, order="C", copy=True)
    if order != 3 or min(a.shape[-2:]) < 2:
        for ax in axes:
            a = ndimage.spline_filter1d(a, order=order, axis=ax, mode="mirror")
        return a
    flat = a.reshape(-1, *a.shape[-2:])
    for ax in axes:
        for img in flat:
            if ax in (-1, a.ndim - 1):
                _filter_rows(img)
            else:
                _filter_columns(img)
    return a
