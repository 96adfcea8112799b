"""Correlation matching of grid points between rectified views.

The two steps per point: an integer ZNCC search in a narrow disparity band,
then sub-pixel refinement by inverse-compositional Gauss–Newton (IC-GN) with
a first-order horizontal shape function (Baker & Matthews 2004; Pan, Li &
Tong 2013), optionally over a spatio-temporal stack of frames with a
linear-in-time disparity term (Zhang, Curless & Seitz 2003; Davis, Nehab,
Ramamoorthi & Rusinkiewicz 2005).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from surfrec.match import kernels
from surfrec.match.prefilter import spline_coefficients


@dataclass
class PointMatches:
    """Per-point results, all (N,) arrays.

    disparity : px (d = u_left - u_right, rectified), NaN where invalid.
    sigma : estimated 1-sigma of the disparity, px.
    score : ZNCC at the solution (mean over the frames of a time window).
    gradient : (N, 3) d_u, d_v (px/px) and d_t (px per frame) of the shape function.
    iterations : IC-GN iterations used, -1 where refinement failed.
    integer_score : best ZNCC of the integer search (-2 where none).
    """

    disparity: np.ndarray
    sigma: np.ndarray
    score: np.ndarray
    gradient: np.ndarray
    iterations: np.ndarray
    integer_score: np.ndarray


def row_spline_coefficients(stack, order: int = 5) -> np.ndarray:
    """B-spline coefficients along image rows (axis -1), float64.

    Sampling these with the B-spline basis reproduces the image exactly at
    integer columns and interpolates smoothly between them. Order 5 keeps
    the interpolation bias on 3–5 px speckle (pixel locking) far below
    0.01 px; order 3 is faster and slightly worse (see the benchmark).
    """
    return spline_coefficients(stack, order, axes=(-1,))


def integer_search(left, right, us, vs, centre, halfwidth: int, window: int):
    """Best integer disparity per point in the band centre ± halfwidth.

    Parameters
    ----------
    left, right : (T, H, W) or (H, W) rectified images (float).
    us, vs : (N,) int window centres, left image px.
    centre : (N,) int band centres, px.
    halfwidth : band half-width, px.  window : odd window size, px.

    Returns
    -------
    best : (N,) float, integer disparity refined by a parabola through the
        three scores around the peak (a starting value for IC-GN), NaN where
        no valid score; score : (N,) the best ZNCC; scores : (N, 2 hw + 1).
    """
    left, right = _stack(left), _stack(right)
    us, vs, centre = (np.ascontiguousarray(a, dtype=np.int64).ravel() for a in (us, vs, centre))
    # The kernel works a grid row at a time (windows of one row share their column sums), so the
    # points must come grouped by row; a grid flattened row by row already is.
    in_rows = bool(np.all(vs[1:] >= vs[:-1]))
    order = None if in_rows else np.lexsort((us, vs))
    vs_sorted = vs if in_rows else vs[order]
    row_start = np.concatenate([[0], np.nonzero(np.diff(vs_sorted))[0] + 1, [vs.size]]).astype(np.int64)
    sorted_scores = np.empty((us.size, 2 * halfwidth + 1))
    if us.size:
        kernels.zncc_search(left, right, us if in_rows else us[order], vs_sorted,
                            centre if in_rows else centre[order], row_start, int(halfwidth),
                            int(window) // 2, sorted_scores)
    if in_rows:
        scores = sorted_scores
    else:
        scores = np.empty_like(sorted_scores)
        scores[order] = sorted_scores
    k = np.argmax(scores, axis=1)
    best = scores[np.arange(us.size), k]
    d = (centre - halfwidth + k).astype(float)
    # Parabolic peak for a better start; at the band edge keep the integer.
    inner = (k > 0) & (k < 2 * halfwidth)
    idx = np.nonzero(inner)[0]
    sm, s0, sp = scores[idx, k[idx] - 1], scores[idx, k[idx]], scores[idx, k[idx] + 1]
    den = sm - 2 * s0 + sp
    ok = (den < 0) & (sm > -2) & (sp > -2)
    d[idx[ok]] += 0.5 * (sm[ok] - sp[ok]) / den[ok]
    d[best <= -2] = np.nan
    return d, best, scores


def refine(left, right_coef, us, vs, d0, window: int, *, order: int = 5, taus=None, temporal: bool = False,
           shape_order: int = 1, max_iter: int = 40, tol: float = 1e-3, bad_left=None, bad_right=None,
           min_good: float = 0.5, robust=None, robust_passes: int = 3, robust_c: float = 2.5, touched=None):
    """IC-GN refinement from the starting disparities d0 (px).

    Parameters
    ----------
    left : (T, H, W) rectified left stack.  right_coef : its right partner as
        row B-spline coefficients (:func:`row_spline_coefficients`).
    taus : (T,) frame times relative to the window centre, in frames.
    temporal : estimate the linear-in-time term (T >= 2).
    shape_order : 1 (disparity, its two slopes) or 2 (also its three second derivatives,
        for surfaces curved on the scale of the window).
    max_iter : iterations before a point counts as not converged. Clean windows converge in a
        few; noisy, defocused ones can take 20 or more (40 instead of 20: 2.1% instead of 4.0% of
        the points fail on a frame of the full-size session with all camera effects) at no cost
        to the others.
    tol : px; iterations stop once the update is smaller. The step after
        that is far smaller again (Gauss–Newton converges fast near the
        solution): 1e-3 px leaves the result within 4e-4 px (RMS 1.4e-5 px)
        of the fully converged one on the default synthetic session — a
        twentieth of the random error — and saves about one iteration in six.
    bad_left, bad_right : (T, H, W) bool/uint8 or None, rectified pixels that must not enter
        the window sums (saturated, hot, dead, with their halo; surfrec.match.defects). A
        template pixel is left out where the left frame is bad or where its right partner, at
        the starting disparity, is.
    min_good : fraction of a window's pixels that must be good in every frame; points with
        fewer come back with iterations = -2.
    robust : (N,) bool or None, points solved again (up to ``robust_passes`` times) without
        the pixels whose residual at the solution exceeds ``robust_c`` robust spreads: for
        windows near glints, whose unsaturated light no image threshold finds.
    touched : (N,) bool or None, the points whose window holds bad pixels (None: any may);
        the others skip the per-pixel weights.

    Returns
    -------
    d, params (N, 4), sigma, score, iterations
    """
    left = _stack(left)
    right_coef = np.ascontiguousarray(right_coef if right_coef.ndim == 3 else right_coef[None], dtype=np.float64)
    T = left.shape[0]
    taus = np.zeros(T) if taus is None else np.asarray(taus, dtype=np.float64)
    n = np.size(us)
    out_d = np.empty(n)
    out_p = np.empty((n, 4))
    out_sigma = np.empty(n)
    out_score = np.empty(n)
    out_iter = np.empty(n, np.int64)
    d0 = np.asarray(d0, dtype=np.float64)
    start = np.where(np.isfinite(d0), d0, 0.0)
    left_gx = np.empty(left.shape)
    kernels.row_gradient(left, left_gx)
    masked = bad_left is not None or bad_right is not None
    if masked:
        bl = _mask_stack(bad_left, left.shape)
        br = _mask_stack(bad_right, left.shape)
    else:
        bl = br = _NO_MASK
    kernels.icgn_refine(left, left_gx, right_coef, taus, np.ascontiguousarray(us, dtype=np.int64),
                        np.ascontiguousarray(vs, dtype=np.int64), start, int(window) // 2, int(order),
                        int(max_iter), float(tol), bool(temporal and T > 1), shape_order == 2,
                        bl, br, masked, float(min_good),
                        _point_flags(n, touched, robust),
                        int(robust_passes), float(robust_c), out_d, out_p, out_sigma, out_score, out_iter)
    out_d[~np.isfinite(d0)] = np.nan
    return out_d, out_p, out_sigma, out_score, out_iter


def match_points(left, right, us, vs, centre, halfwidth: int, window: int, *, order: int = 5, taus=None,
                 temporal: bool = False, right_coef=None, bad_left=None, bad_right=None) -> PointMatches:
    """Integer search then IC-GN refinement for each grid point (see module docstring).

    bad_left, bad_right : rectified bad-pixel masks or None (see :func:`refine`).
    """
    left, right = _stack(left), _stack(right)
    if right_coef is None:
        right_coef = row_spline_coefficients(right, order)
    d_int, s_int, _ = integer_search(left, right, us, vs, centre, halfwidth, window)
    d, params, sigma, score, iters = refine(left, right_coef, us, vs, d_int, window, order=order, taus=taus,
                                            temporal=temporal, bad_left=bad_left, bad_right=bad_right)
    return PointMatches(d, sigma, score, params[:, 1:], iters, s_int)


_NO_MASK = np.zeros((1, 1, 1), np.uint8)
_NO_POINTS = np.zeros(0, np.uint8)


def _point_flags(n, touched, robust):
    # Bit 1: weights from the masks; bit 2: robust passes (see kernels.icgn_refine).
    if touched is None and robust is None:
        return _NO_POINTS
    flags = np.ones(n, np.uint8) if touched is None else np.asarray(touched, bool).astype(np.uint8)
    if robust is not None:
        flags |= np.asarray(robust, bool).astype(np.uint8) << 1
    return flags


def _mask_stack(mask, shape):
    if mask is None:
        return np.zeros(shape, np.uint8)
    m = np.asarray(mask)
    m = m[None] if m.ndim == 2 else m
    if m.shape != tuple(shape):
        raise ValueError(f"bad-pixel mask of shape {m.shape} does not fit the frames {tuple(shape)}")
    return np.ascontiguousarray(m, dtype=np.uint8)


def _stack(a):
    a = np.asarray(a, dtype=np.float32)
    return np.ascontiguousarray(a[None] if a.ndim == 2 else a)
