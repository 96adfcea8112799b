"""Compiled inner loops of the matcher (numba): integer ZNCC search and IC-GN refinement.

Why by hand: the matcher evaluates a small correlation problem at tens of
thousands of grid points per frame, each with its own search band and warp;
no library offers ZNCC with per-point bands on rectified rows, nor
inverse-compositional Gauss–Newton with a horizontal first-order shape
function and a spatio-temporal term. The loops run in parallel (numba
prange: grid rows for the search, points for the refinement), one compiled
function per task, cached on disk.

Conventions: images are stacks (T, H, W) of rectified frames in one time
window; a point's window is rows v-hw..v+hw and columns u-hw..u+hw of the
left image. Disparity d = u_left - u_right, so the right window sits at
u - d. The right images are given as B-spline coefficients along rows
(order 3 or 5), so sampling at any sub-pixel column of an integer row is
exact for the spline: the warp is horizontal only, because rectified views
agree in v.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

_EPS = 1e-12  # guards divisions by a window's intensity spread; flat windows are rejected earlier


@njit(cache=True, inline="always")
def _bspline3_weights(f, w):
    # Cubic B-spline weights for taps at i-1, i, i+1, i+2 of a fraction f in [0, 1).
    g = 1.0 - f
    w[0] = g * g * g / 6.0
    w[1] = (3.0 * f * f * f - 6.0 * f * f + 4.0) / 6.0
    w[2] = (-3.0 * f * f * f + 3.0 * f * f + 3.0 * f + 1.0) / 6.0
    w[3] = f * f * f / 6.0


@njit(cache=True, inline="always")
def _bspline5_weights(f, w):
    # Quintic B-spline weights for taps at i-2 .. i+3 of a fraction f in [0, 1), written out
    # per piece of beta5 (no branches): beta5(x) = (3-x)^5/120 on [2, 3),
    # (51 + 75x - 210x^2 + 150x^3 - 45x^4 + 5x^5)/120 on [1, 2), (66 - 60x^2 + 30x^4 - 10x^5)/120 on [0, 1).
    g = 1.0 - f
    w[0] = g * g * g * g * g / 120.0
    w[5] = f * f * f * f * f / 120.0
    x = f + 1.0
    x2 = x * x
    w[1] = (51.0 + 75.0 * x - 210.0 * x2 + 150.0 * x2 * x - 45.0 * x2 * x2 + 5.0 * x2 * x2 * x) / 120.0
    x = 2.0 - f
    x2 = x * x
    w[4] = (51.0 + 75.0 * x - 210.0 * x2 + 150.0 * x2 * x - 45.0 * x2 * x2 + 5.0 * x2 * x2 * x) / 120.0
    x2 = f * f
    w[2] = (66.0 - 60.0 * x2 + 30.0 * x2 * x2 - 10.0 * x2 * x2 * f) / 120.0
    x2 = g * g
    w[3] = (66.0 - 60.0 * x2 + 30.0 * x2 * x2 - 10.0 * x2 * x2 * g) / 120.0


# Fast-math flags without "nnan"/"ninf": NaN tests must keep working; reassociation lets the
# compiler vectorise the window sums (results change only in the last bits).
_FAST = {"reassoc", "contract", "arcp", "nsz"}


_ONE = np.uint64(1)
_TWO = np.uint64(2)
_THREE = np.uint64(3)


@njit(cache=True, inline="always")
def _spline3_at(crow, x):
    # Cubic B-spline value at column x of one row of coefficients (caller checks 1 <= x < n - 2).
    # Unsigned indices: numba then skips its negative-index wraparound, which blocks vectorising.
    i = np.uint64(x)
    f = x - np.float64(i)
    g = 1.0 - f
    f2 = f * f
    f3 = f2 * f
    return (g * g * g * crow[i - _ONE] + (3.0 * f3 - 6.0 * f2 + 4.0) * crow[i]
            + (-3.0 * f3 + 3.0 * f2 + 3.0 * f + 1.0) * crow[i + _ONE] + f3 * crow[i + _TWO]) / 6.0


@njit(cache=True, inline="always")
def _spline5_at(crow, x):
    # Quintic B-spline value at column x (caller checks 2 <= x < n - 3); pieces of beta5 as in
    # _bspline5_weights.
    i = np.uint64(x)
    f = x - np.float64(i)
    g = 1.0 - f
    y = f + 1.0
    y2 = y * y
    w1 = 51.0 + 75.0 * y - 210.0 * y2 + 150.0 * y2 * y - 45.0 * y2 * y2 + 5.0 * y2 * y2 * y
    y = 2.0 - f
    y2 = y * y
    w4 = 51.0 + 75.0 * y - 210.0 * y2 + 150.0 * y2 * y - 45.0 * y2 * y2 + 5.0 * y2 * y2 * y
    f2 = f * f
    g2 = g * g
    w2 = 66.0 - 60.0 * f2 + 30.0 * f2 * f2 - 10.0 * f2 * f2 * f
    w3 = 66.0 - 60.0 * g2 + 30.0 * g2 * g2 - 10.0 * g2 * g2 * g
    return (g2 * g2 * g * crow[i - _TWO] + w1 * crow[i - _ONE] + w2 * crow[i] + w3 * crow[i + _ONE]
            + w4 * crow[i + _TWO] + f2 * f2 * f * crow[i + _THREE]) / 120.0


@njit(parallel=True, cache=True, fastmath=_FAST)
def zncc_search(left, right, us, vs, centre, row_start, halfwidth, hw, scores):
    """ZNCC of each point's left window against right windows at integer disparities.

    Points are taken a grid row at a time: for every disparity D a row needs,
    the products left(x) right(x - D) summed down the window's rows are kept
    per column and summed along the row by prefix sums, so each point's
    cross-correlation costs O(1) instead of a window's worth of products
    (neighbouring points' windows overlap by most of their area). Rows are
    processed in blocks, and within a block the column sums slide down from
    one grid row to the next (rows entering added, rows leaving subtracted).

    Parameters
    ----------
    left, right : float32 (T, H, W) rectified stacks (T frames of one time window).
    us, vs : int64 (N,) window centres in the left image, px, sorted by vs.
    centre : int64 (N,) centre of each point's disparity band, px.
    row_start : int64 (R + 1,) offsets of the runs of equal vs in the point arrays.
    halfwidth : int, band half-width, px: disparities centre-halfwidth..centre+halfwidth.
    hw : int, window half-size (window = 2 hw + 1 px square).
    scores : float64 (N, 2 halfwidth + 1) output; the mean over frames of the
        per-frame ZNCC; -2 where the right window leaves the image or a window is flat.
    """
    T, H, W = left.shape
    nk = 2 * halfwidth + 1
    side = 2 * hw + 1
    m = side * side
    nrows = row_start.shape[0] - 1
    block = 8
    for bk in prange((nrows + block - 1) // block):
        r0 = bk * block
        r1 = min(nrows, r0 + block)
        # The block's disparity range (points inside the image only).
        dlo = 1 << 40
        dhi = -(1 << 40)
        for p in range(row_start[r0], row_start[r1]):
            dlo = min(dlo, centre[p] - halfwidth)
            dhi = max(dhi, centre[p] + halfwidth)
        nd = dhi - dlo + 1
        if nd <= 0:
            continue
        cols = np.zeros((T, 4, W))  # column sums of f, f^2, g, g^2 over the window's rows
        cp = np.zeros((T, nd, W))  # column sums of f(x) g(x - D)
        pre = np.empty((4, W + 1))
        pp = np.empty(W + 1)
        top = -1  # first image row of the current column sums; -1: none yet
        for r in range(r0, r1):
            a = row_start[r]
            b = row_start[r + 1]
            npt = b - a
            v = vs[a]
            for p in range(a, b):
                for k in range(nk):
                    scores[p, k] = 0.0
            if v - hw < 0 or v + hw >= H:
                for p in range(a, b):
                    for k in range(nk):
                        scores[p, k] = -2.0
                continue
            new_top = v - hw
            if top < 0 or new_top - top >= side or new_top < top:
                cols[:, :, :] = 0.0
                cp[:, :, :] = 0.0
                lo_add = new_top
                lo_sub = 0
                hi_sub = 0
            else:
                lo_add = top + side
                lo_sub = top
                hi_sub = new_top
            for t in range(T):
                for y in range(lo_add, new_top + side):
                    _add_row(left, right, t, y, 1.0, dlo, nd, W, cols, cp)
                for y in range(lo_sub, hi_sub):
                    _add_row(left, right, t, y, -1.0, dlo, nd, W, cols, cp)
            top = new_top
            bad = np.zeros((npt, nk), np.bool_)
            sf = np.empty(npt)
            vf = np.empty(npt)
            for t in range(T):
                for j in range(4):
                    pre[j, 0] = 0.0
                    for x in range(W):
                        pre[j, x + 1] = pre[j, x] + cols[t, j, x]
                for q in range(npt):
                    u = us[a + q]
                    if u - hw < 0 or u + hw >= W:
                        for k in range(nk):
                            bad[q, k] = True
                        continue
                    s1 = pre[0, u + hw + 1] - pre[0, u - hw]
                    s2 = pre[1, u + hw + 1] - pre[1, u - hw]
                    var = s2 - s1 * s1 / m
                    if var <= _EPS:
                        for k in range(nk):
                            bad[q, k] = True
                        continue
                    sf[q] = s1
                    vf[q] = var
                for j in range(nd):
                    d = dlo + j
                    pp[0] = 0.0
                    for x in range(W):
                        pp[x + 1] = pp[x] + cp[t, j, x]
                    for q in range(npt):
                        k = d - (centre[a + q] - halfwidth)
                        if k < 0 or k >= nk or bad[q, k]:
                            continue
                        u = us[a + q]
                        ur = u - d
                        if ur - hw < 0 or ur + hw >= W:
                            bad[q, k] = True
                            continue
                        s1 = pre[2, ur + hw + 1] - pre[2, ur - hw]
                        s2 = pre[3, ur + hw + 1] - pre[3, ur - hw]
                        vg = s2 - s1 * s1 / m
                        if vg <= _EPS:
                            bad[q, k] = True
                            continue
                        sfg = pp[u + hw + 1] - pp[u - hw]
                        scores[a + q, k] += (sfg - sf[q] * s1 / m) / np.sqrt(vf[q] * vg)
            for q in range(npt):
                for k in range(nk):
                    if bad[q, k]:
                        scores[a + q, k] = -2.0
                    else:
                        scores[a + q, k] /= T


@njit(cache=True, inline="always")
def _add_row(left, right, t, y, sign, dlo, nd, W, cols, cp):
    # Add (sign 1) or remove (sign -1) image row y of frame t to the column sums.
    lrow = left[t, y]
    rrow = right[t, y]
    c0 = cols[t, 0]
    c1 = cols[t, 1]
    c2 = cols[t, 2]
    c3 = cols[t, 3]
    for x in range(W):
        f = np.float64(lrow[x])
        g = np.float64(rrow[x])
        c0[x] += sign * f
        c1[x] += sign * f * f
        c2[x] += sign * g
        c3[x] += sign * g * g
    for j in range(nd):
        d = dlo + j
        x0 = max(0, d)
        x1 = min(W, W + d)
        # 0-based views so that the loop index is provably non-negative (no wraparound tests,
        # which keep the compiler from vectorising).
        a = lrow[x0:x1]
        b = rrow[x0 - d:x1 - d]
        out = cp[t, j, x0:x1]
        for i in range(x1 - x0):
            out[i] += sign * (np.float64(a[i]) * np.float64(b[i]))


@njit(parallel=True, cache=True)
def row_gradient(left, out):
    """Row derivative of each image of a stack by the fourth-order central difference, into out.

    Accurate gradients speed the Gauss–Newton convergence; the fixed point does not depend on
    them to first order. The two columns at each edge (no full stencil) are set to zero.

    Parameters
    ----------
    left : (T, H, W) images.  out : float64 (T, H, W), intensity per px.
    """
    T, H, W = left.shape
    for k in prange(T * H):
        t = k // H
        r = k % H
        src = left[t, r]
        dst = out[t, r]
        if W >= 5:
            # Shifted views: non-negative loop indices let the loop vectorise (see _spline3_at).
            a = src[0:W - 4]
            b = src[1:W - 3]
            d = src[3:W - 1]
            e = src[4:W]
            o = dst[2:W - 2]
            for c in range(W - 4):
                o[c] = (np.float64(a[c]) - 8.0 * b[c] + 8.0 * d[c] - e[c]) * (1.0 / 12.0)
        for c in range(min(2, W)):
            dst[c] = 0.0
            dst[W - 1 - c] = 0.0


@njit(cache=True)
def _invert_spd(a, n, out, work):
    """Inverse of the symmetric positive definite n x n matrix a into out (Gauss–Jordan without
    pivoting, which is stable for such matrices); False if a is not positive definite.

    Written out because numpy.linalg.inv allocates and calls LAPACK, which costs more than the
    whole inversion of a 3x3 or 4x4 matrix, once per grid point."""
    for i in range(n):
        for j in range(n):
            work[i, j] = a[i, j]
            out[i, j] = 1.0 if i == j else 0.0
    for k in range(n):
        piv = work[k, k]
        if not piv > 0.0:
            return False
        inv = 1.0 / piv
        for j in range(n):
            work[k, j] *= inv
            out[k, j] *= inv
        for i in range(n):
            if i != k:
                f = work[i, k]
                if f != 0.0:
                    for j in range(n):
                        work[i, j] -= f * work[k, j]
                        out[i, j] -= f * out[k, j]
    return True


# Shape-function terms, in this order: 0 const, 1 dx, 2 dy, 3 tau, 4 dx^2/2, 5 dx dy, 6 dy^2/2.
# Each term is coefficient * dx^a dy^b tau^c; the tables give (a, b, c, coefficient).
_TERM_A = np.array([0, 1, 0, 0, 2, 1, 0])
_TERM_B = np.array([0, 0, 1, 0, 0, 1, 2])
_TERM_C = np.array([0, 0, 0, 1, 0, 0, 0])
_TERM_K = np.array([1.0, 1.0, 1.0, 1.0, 0.5, 1.0, 0.5])


@njit(cache=True)
def _reject_outliers(right_coef, u, v, hw, side, order, taus, T, a0, a1, a2, a3, a4, a5, a6, fn, scale, wt, meff,
                     resid, c, min_count, buf, cuts):
    """Leave out the window pixels whose normalised residual exceeds c robust spreads (per frame).

    Residual r = f / |f| - (g - mean g) / |g - mean g| over the good pixels at the current warp
    (the zero-normalised SSD's own terms); the spread is 1.4826 times the median |r| (common
    practice). Returns True when weights changed; when a frame would keep fewer than
    min_count good pixels nothing is changed and False is returned. buf (side^2,) and cuts (T,)
    are scratch arrays (allocated once per chunk of points).
    """
    for t in range(T):
        sg = 0.0
        sgg = 0.0
        for dy in range(side):
            ody = dy - hw
            b1 = a1 + a5 * ody - a4 * hw
            b2 = 0.5 * a4
            xa = (u - hw + a0 - a1 * hw + a2 * ody + a3 * taus[t] + 0.5 * a4 * hw * hw
                  - a5 * hw * ody + 0.5 * a6 * ody * ody)
            crow = right_coef[t, v - hw + dy]
            for dx in range(side):
                if wt[t, dy, dx] == 0.0:
                    continue
                x = xa + dx * (1.0 + b1 + b2 * dx)
                val = _spline3_at(crow, x) if order == 3 else _spline5_at(crow, x)
                resid[t, dy, dx] = val
                sg += val
                sgg += val * val
        mean = sg / meff[t]
        norm = np.sqrt(max(sgg - sg * sg / meff[t], 1e-300))
        k = 0
        for dy in range(side):
            for dx in range(side):
                if wt[t, dy, dx] != 0.0:
                    r = fn[t, dy, dx] * scale[t] - (resid[t, dy, dx] - mean) / norm
                    resid[t, dy, dx] = r
                    buf[k] = abs(r)
                    k += 1
        cuts[t] = c * max(1.4826 * np.median(buf[:k]), 1e-12)
        kept = 0.0
        for dy in range(side):
            for dx in range(side):
                if wt[t, dy, dx] != 0.0 and abs(resid[t, dy, dx]) <= cuts[t]:
                    kept += 1.0
        if kept < min_count:
            return False
    changed = False
    for t in range(T):
        cnt = 0.0
        for dy in range(side):
            for dx in range(side):
                if wt[t, dy, dx] != 0.0:
                    if abs(resid[t, dy, dx]) > cuts[t]:
                        wt[t, dy, dx] = 0.0
                        changed = True
                    else:
                        cnt += 1.0
        meff[t] = cnt
    return changed


@njit(parallel=True, cache=True, fastmath=_FAST)
def icgn_refine(left, left_gx, right_coef, taus, us, vs, d0, hw, order, max_iter, tol, temporal, second,
                bad_left, bad_right, masked, min_good, robust_pt, robust_passes, robust_c,
                out_d, out_p, out_sigma, out_score, out_iter):
    """Inverse-compositional Gauss–Newton refinement of each point's disparity.

    Shape function (horizontal; first order, or second order with
    ``second``; plus a linear-in-time term in the spatio-temporal mode): a
    template pixel at offsets (dx, dy) from the point, in frame t of the
    window, is matched at right column
        u + dx + a0 + a1 dx + a2 dy + a3 tau_t [+ a4 dx^2/2 + a5 dx dy + a6 dy^2/2],
    so d = -a0 at the window centre and frame tau = 0, d_u = -a1, d_v = -a2,
    d_t = -a3 (px per unit of tau). The criterion is the zero-normalised SSD
    summed over frames (Pan et al. 2013; Baker & Matthews 2004), which is
    insensitive to brightness changes per frame and equals 2 (1 - ZNCC). The
    second-order terms follow the surface's curvature (Lu & Cary, Exp. Mech.
    40 (2000) 393; in inverse-compositional form Gao et al., Opt. Lasers Eng.
    65 (2015) 73): without them a curved surface biases d toward the window
    mean and leaves a misfit that the 1-sigma does not account for.

    The steepest-descent images are the template's row gradient times the
    shape terms, so each iteration needs only a few sums over the warped
    window (g, g^2, f g, and gx g times 1, dx, dx^2 per row, combined with
    the row's dy); the terms that involve the template alone are computed
    once per point.

    Parameters
    ----------
    left : float32 (T, H, W) rectified left stack.
    left_gx : float64 (T, H, W) its row gradient (:func:`row_gradient`), intensity per px.
    right_coef : float64 (T, H, W) row B-spline coefficients of the right stack.
    taus : float64 (T,) time of each frame relative to the window's centre (any unit).
    us, vs : int64 (N,) window centres, px.  d0 : float64 (N,) starting disparity, px.
    hw : window half-size.  order : 3 or 5.  max_iter, tol (px) : stopping rule.
    temporal : bool, estimate a3 (only meaningful for T > 1).
    second : bool, include the second-order terms a4..a6.
    bad_left, bad_right : uint8 (T, H, W), non-zero at pixels that must not enter the sums
        (saturated, hot, dead and their halo), rectified; read only when ``masked``.
    masked : bool, use the masks. A template pixel is left out when it is bad in the left
        frame or when its partner in the right frame, at the starting disparity, is; every
        window sum then runs over the good pixels only (binary weights, so the sums keep
        their form with the window's pixel count replaced by the good count).
    min_good : fraction of a window's pixels that must be good in every frame, else the
        point is rejected with out_iter = -2.
    robust_pt : uint8 (N,) point flags (or any other length: every point's weights come from
        the masks, no robust pass): bit 1, the window holds bad pixels (its weights come from
        the masks; without it the weights are all one); bit 2, the point gets up to
        ``robust_passes`` more passes in which pixels whose residual at the solution exceeds
        ``robust_c`` robust spreads (1.4826 MAD of the window's residuals, per frame) are
        left out and the point solved again from where it stood (a skipped, or hard-redescending,
        M-estimator iterated to its fixed point; Hampel et al., Robust Statistics, 1986): the
        unsaturated light of a glint, that no threshold on the image finds, is such an outlier.

    Outputs (N,): out_d disparity px (NaN when not converged or outside);
    out_p (N, 4) the shape parameters [d, d_u, d_v, d_t]; out_sigma the
    1-sigma of d from the Gauss–Newton normal matrix and the residual, px;
    out_score the ZNCC at the solution; out_iter iterations used (-1 failed, -2 too few
    good pixels in the window).
    """
    T, H, W = left.shape
    n = us.shape[0]
    # The active terms.
    act = np.empty(7, np.int64)
    npar = 0
    for j in range(7):
        if j == 3 and not temporal:
            continue
        if j >= 4 and not second:
            continue
        act[npar] = j
        npar += 1
    side = 2 * hw + 1
    m = side * side
    lo = 1 if order == 3 else 2  # spline taps left of floor(x) ...
    hi = 2 if order == 3 else 3  # ... and right of it
    sidep = (side + 7) // 8 * 8
    # Points in chunks, with scratch arrays allocated once per chunk rather than per point.
    chunk = 64
    for c in prange((n + chunk - 1) // chunk):
        # Rows padded with zeros to a multiple of 8 so that the sampling loop runs in whole
        # SIMD vectors (the pad's template and gradient are zero, its samples masked out).
        fn = np.zeros((T, side, sidep))
        gx = np.zeros((T, side, sidep))
        A = np.empty((T, 7))  # sums of the steepest-descent images (over the window, per frame) ...
        B = np.empty((T, 7))  # ... and of their products with the template
        mom = np.empty((5, 5))  # sums of gx^2 dx^a dy^b, a + b <= 4
        hess = np.empty((npar, npar))
        hinv = np.empty((npar, npar))
        work = np.empty((npar, npar))
        grad = np.zeros(7)
        dp = np.zeros(7)
        sums = np.zeros(7)
        scale = np.empty(T)  # 1 / norm of each frame's zero-mean template
        offs = np.zeros(sidep)
        for dx in range(side):
            offs[dx] = dx - hw
        # Per-pixel weights of the window (1 good, 0 bad or the row's padding) and the good count.
        wt = np.zeros((T, side, sidep))
        meff = np.empty(T)
        resid = np.zeros((T, side, sidep))
        rbuf = np.empty(side * side)
        rcuts = np.empty(T)
        dirty = True
        for p in range(c * chunk, min(n, (c + 1) * chunk)):
            u = us[p]
            v = vs[p]
            out_d[p] = np.nan
            out_sigma[p] = np.nan
            out_score[p] = np.nan
            out_iter[p] = -1
            for j in range(4):
                out_p[p, j] = np.nan
            if v - hw < 0 or v + hw >= H or u - hw - 2 < 0 or u + hw + 2 >= W:
                continue
            flagged = robust_pt.shape[0] == n
            weigh = masked and (not flagged or (robust_pt[p] & 1) != 0)
            if not weigh and dirty:
                # All-good weights, reset only after they were changed (masks, a robust pass).
                wt[:, :, :] = 0.0
                wt[:, :, :side] = 1.0
                meff[:] = m
                dirty = False
            flat = False
            shift = np.int64(np.floor(d0[p] + 0.5)) if d0[p] == d0[p] else np.int64(0)
            few = False
            if weigh:
                dirty = True
                for t in range(T):
                    cnt = 0.0
                    for dy in range(side):
                        wrow = wt[t, dy]
                        row = v - hw + dy
                        for dx in range(side):
                            cl = u - hw + dx
                            cr = cl - shift
                            good = bad_left[t, row, cl] == 0 and 0 <= cr < W and bad_right[t, row, cr] == 0
                            wrow[dx] = 1.0 if good else 0.0
                            cnt += wrow[dx]
                    meff[t] = cnt
                    if cnt < min_good * m or cnt < npar + 3:
                        few = True
            if few:
                out_iter[p] = -2
                continue
            a0 = -d0[p]
            a1 = 0.0
            a2 = 0.0
            a3 = 0.0
            a4 = 0.0
            a5 = 0.0
            a6 = 0.0
            converged = False
            bad = False
            failed = False
            it = 0
            ssd = 0.0
            passes = 1 + (robust_passes if flagged and (robust_pt[p] & 2) != 0 else 0)
            for rpass in range(passes):
                hess[:, :] = 0.0
                for t in range(T):
                    s = 0.0
                    for dy in range(side):
                        lrow = left[t, v - hw + dy, u - hw:u + hw + 1]
                        wrow = wt[t, dy]
                        for dx in range(side):
                            s += lrow[dx] * wrow[dx]
                    mean = s / meff[t]
                    ss = 0.0
                    for j in range(7):
                        A[t, j] = 0.0
                        B[t, j] = 0.0
                    mom[:, :] = 0.0
                    # Sums over the window: the dx powers per row, the dy powers from the row totals;
                    # f and g are kept unscaled and their norm applied at the end.
                    for dy in range(side):
                        row = v - hw + dy
                        ody = dy - hw
                        ra0 = 0.0
                        ra1 = 0.0
                        ra2 = 0.0
                        rb0 = 0.0
                        rb1 = 0.0
                        rb2 = 0.0
                        rm0 = 0.0
                        rm1 = 0.0
                        rm2 = 0.0
                        rm3 = 0.0
                        rm4 = 0.0
                        # Views starting at the window's first column keep the indices provably
                        # non-negative (see _spline3_at).
                        lrow = left[t, row, u - hw:u + hw + 1]
                        grow = left_gx[t, row, u - hw:u + hw + 1]
                        frow = fn[t, dy]
                        gxrow = gx[t, dy]
                        wrow = wt[t, dy]
                        for dx in range(side):
                            f = (lrow[dx] - mean) * wrow[dx]
                            g = grow[dx] * wrow[dx]
                            frow[dx] = f
                            gxrow[dx] = g
                            ss += f * f
                            o = offs[dx]
                            o2 = o * o
                            gf = g * f
                            g2 = g * g
                            ra0 += g
                            ra1 += g * o
                            ra2 += g * o2
                            rb0 += gf
                            rb1 += gf * o
                            rb2 += gf * o2
                            rm0 += g2
                            rm1 += g2 * o
                            rm2 += g2 * o2
                            rm3 += g2 * o2 * o
                            rm4 += g2 * o2 * o2
                        A[t, 0] += ra0
                        A[t, 1] += ra1
                        A[t, 2] += ody * ra0
                        A[t, 4] += 0.5 * ra2
                        A[t, 5] += ody * ra1
                        A[t, 6] += 0.5 * ody * ody * ra0
                        B[t, 0] += rb0
                        B[t, 1] += rb1
                        B[t, 2] += ody * rb0
                        B[t, 4] += 0.5 * rb2
                        B[t, 5] += ody * rb1
                        B[t, 6] += 0.5 * ody * ody * rb0
                        yb = 1.0
                        for b in range(5):
                            mom[0, b] += yb * rm0
                            if b <= 3:
                                mom[1, b] += yb * rm1
                            if b <= 2:
                                mom[2, b] += yb * rm2
                            if b <= 1:
                                mom[3, b] += yb * rm3
                            if b == 0:
                                mom[4, b] += rm4
                            yb *= ody
                    if ss <= _EPS:
                        flat = True
                        break
                    inv = 1.0 / np.sqrt(ss)
                    scale[t] = inv
                    inv2 = inv * inv
                    tau = taus[t]
                    A[t, 3] = tau * A[t, 0]
                    B[t, 3] = tau * B[t, 0]
                    for j in range(7):
                        A[t, j] *= inv
                        B[t, j] *= inv2
                    for i in range(npar):
                        ti = act[i]
                        for j in range(i, npar):
                            tj = act[j]
                            w = _TERM_K[ti] * _TERM_K[tj] * mom[_TERM_A[ti] + _TERM_A[tj], _TERM_B[ti] + _TERM_B[tj]]
                            cpow = _TERM_C[ti] + _TERM_C[tj]
                            if cpow == 1:
                                w *= tau
                            elif cpow == 2:
                                w *= tau * tau
                            hess[i, j] += w * inv2
                if flat:
                    failed = True
                    break
                for i in range(npar):
                    for j in range(i):
                        hess[i, j] = hess[j, i]
                if not _invert_spd(hess, npar, hinv, work):
                    failed = True
                    break
                converged = False
                bad = False
                for it in range(1, max_iter + 1):
                    for i in range(7):
                        grad[i] = 0.0
                    ssd = 0.0
                    for t in range(T):
                        sg = 0.0
                        sgg = 0.0
                        s0 = 0.0
                        s1 = 0.0
                        s2 = 0.0
                        s4 = 0.0
                        s5 = 0.0
                        s6 = 0.0
                        sfg = 0.0
                        for dy in range(side):
                            row = v - hw + dy
                            ody = dy - hw
                            # Along the row the column is x(dx) = i-th sample at
                            #   xa + dx (1 + b1) + b2 dx^2,  dx = 0 .. 2 hw,
                            # and x(dx) - dx is a parabola in dx: its extremes lie at the ends or the vertex.
                            b1 = a1 + a5 * ody - a4 * hw
                            b2 = 0.5 * a4
                            xa = (u - hw + a0 - a1 * hw + a2 * ody + a3 * taus[t] + 0.5 * a4 * hw * hw
                                  - a5 * hw * ody + 0.5 * a6 * ody * ody)
                            e_end = b1 * (2 * hw) + b2 * (2 * hw) * (2 * hw)
                            e_min = min(0.0, e_end)
                            e_max = max(0.0, e_end)
                            if b2 != 0.0:
                                dv = -b1 / (2.0 * b2)
                                if 0.0 < dv < 2 * hw:
                                    e_v = b1 * dv + b2 * dv * dv
                                    e_min = min(e_min, e_v)
                                    e_max = max(e_max, e_v)
                            # The extremes of x(dx) itself, for the bounds.
                            x_end = xa + (1.0 + b1) * (2 * hw) + b2 * (2 * hw) * (2 * hw)
                            x_min = min(xa, x_end)
                            x_max = max(xa, x_end)
                            if b2 != 0.0:
                                dv = -(1.0 + b1) / (2.0 * b2)
                                if 0.0 < dv < 2 * hw:
                                    x_v = xa + (1.0 + b1) * dv + b2 * dv * dv
                                    x_min = min(x_min, x_v)
                                    x_max = max(x_max, x_v)
                            if x_min < lo or np.floor(x_max) + hi > W - 1 or not (x_min == x_min and x_max == x_max):
                                bad = True
                                break
                            r0 = 0.0
                            r1 = 0.0
                            r2 = 0.0
                            crow = right_coef[t, row]
                            grow = gx[t, dy]
                            frow = fn[t, dy]
                            wrow = wt[t, dy]
                            i0 = np.uint64(max(xa + e_min, 0.0))
                            if order == 3 and xa + e_min >= 1.0 and np.uint64(xa + e_max) == i0 and \
                                    i0 + np.uint64(sidep + 2) <= np.uint64(W):
                                # The usual case: floor(x(dx)) - dx is the same for every dx, so
                                # the samples fall in consecutive intervals, the taps are
                                # contiguous loads and the loop vectorises.
                                seg = crow[i0 - _ONE:i0 + np.uint64(sidep + 2)]
                                f0 = xa - np.float64(i0)
                                for dx in range(sidep):
                                    f = f0 + dx * (b1 + b2 * dx)
                                    g = 1.0 - f
                                    f2 = f * f
                                    f3 = f2 * f
                                    val = (g * g * g * seg[dx] + (3.0 * f3 - 6.0 * f2 + 4.0) * seg[dx + 1]
                                           + (-3.0 * f3 + 3.0 * f2 + 3.0 * f + 1.0) * seg[dx + 2]
                                           + f3 * seg[dx + 3]) * (wrow[dx] / 6.0)
                                    sg += val
                                    sgg += val * val
                                    q = grow[dx] * val
                                    o = offs[dx]
                                    r0 += q
                                    r1 += q * o
                                    r2 += q * o * o
                                    sfg += frow[dx] * val
                            else:
                                # The same sums as above, written out again: sharing them through a
                                # buffer of sample values costs the fast path its vectorisation.
                                for dx in range(side):
                                    x = xa + dx * (1.0 + b1 + b2 * dx)
                                    if order == 3:
                                        val = _spline3_at(crow, x)
                                    else:
                                        val = _spline5_at(crow, x)
                                    val *= wrow[dx]
                                    sg += val
                                    sgg += val * val
                                    q = grow[dx] * val
                                    o = offs[dx]
                                    r0 += q
                                    r1 += q * o
                                    r2 += q * o * o
                                    sfg += frow[dx] * val
                            s0 += r0
                            s1 += r1
                            s2 += ody * r0
                            s4 += 0.5 * r2
                            s5 += ody * r1
                            s6 += 0.5 * ody * ody * r0
                        if bad:
                            break
                        ss = sgg - sg * sg / meff[t]
                        if ss <= _EPS:
                            bad = True
                            break
                        inv = scale[t]
                        norm = np.sqrt(ss)
                        mean = sg / meff[t]
                        sums[0] = s0
                        sums[1] = s1
                        sums[2] = s2
                        sums[3] = taus[t] * s0
                        sums[4] = s4
                        sums[5] = s5
                        sums[6] = s6
                        for j in range(7):
                            grad[j] += B[t, j] - (sums[j] * inv - mean * A[t, j]) / norm
                        # sum of r^2 with r = f - (g - mean) / norm, since sum f = 0 and sum f^2 = 1
                        ssd += 2.0 - 2.0 * sfg * inv / norm
                    if bad:
                        break
                    # dp = -H^-1 grad is the template-side update, in the active terms.
                    for i in range(7):
                        dp[i] = 0.0
                    for i in range(npar):
                        acc = 0.0
                        for j in range(npar):
                            acc += hinv[i, j] * grad[act[j]]
                        dp[act[i]] = -acc
                    s_old = 1.0 + a1
                    if not second:
                        # Composing the inverse of the update into the warp, exactly for the
                        # first-order warp: a_new = a - s dp / (1 + dp1) for the additive terms.
                        s_d = 1.0 + dp[1]
                        a0 = a0 - s_old * dp[0] / s_d
                        a1 = s_old / s_d - 1.0
                        a2 = a2 - s_old * dp[2] / s_d
                        a3 = a3 - s_old * dp[3] / s_d
                    else:
                        # The same composition to first order in dp for the second-order warp:
                        # u_new(x) = u(x) - (1 + du/dx) du_p(x), truncated to second order (the
                        # fixed point, dp = 0, is the same; only the path to it is approximate).
                        n0 = a0 - s_old * dp[0]
                        n1 = a1 - (s_old * dp[1] + a4 * dp[0])
                        n2 = a2 - (s_old * dp[2] + a5 * dp[0])
                        n3 = a3 - s_old * dp[3]
                        n4 = a4 - (s_old * dp[4] + 2.0 * a4 * dp[1])
                        n5 = a5 - (s_old * dp[5] + a4 * dp[2] + a5 * dp[1])
                        n6 = a6 - (s_old * dp[6] + 2.0 * a5 * dp[2])
                        a0, a1, a2, a3, a4, a5, a6 = n0, n1, n2, n3, n4, n5, n6
                    if abs(dp[0]) < tol and abs(dp[1]) * hw < tol and abs(dp[2]) * hw < tol and \
                            abs(dp[3]) < tol and abs(dp[4]) * hw * hw < 2.0 * tol and \
                            abs(dp[5]) * hw * hw < tol and abs(dp[6]) * hw * hw < 2.0 * tol:
                        converged = True
                        break
                if bad or not converged or rpass == passes - 1:
                    break
                dirty = True
                if not _reject_outliers(right_coef, u, v, hw, side, order, taus, T, a0, a1, a2, a3, a4, a5, a6,
                                        fn, scale, wt, meff, resid, robust_c, max(min_good * m, npar + 3.0),
                                        rbuf, rcuts):
                    break
            if failed or bad or not converged:
                continue
            out_d[p] = -a0
            out_p[p, 0] = -a0
            out_p[p, 1] = -a1
            out_p[p, 2] = -a2
            out_p[p, 3] = -a3 if temporal else 0.0
            out_score[p] = 1.0 - ssd / (2.0 * T)
            # Residual variance per pixel in normalised units (mean and scale per frame, and
            # the shape parameters, are fitted), times the inverse normal matrix.
            dof = -npar
            for t in range(T):
                dof += meff[t] - 2.0
            out_sigma[p] = np.sqrt(max(ssd, 0.0) / dof * hinv[0, 0])
            out_iter[p] = it
