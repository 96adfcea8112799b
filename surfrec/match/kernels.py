"""Compiled inner loops of the matcher (numba): integer ZNCC search and IC-GN refinement.

Why by hand: the matcher evaluates a small correlation problem at tens of
thousands of grid points per frame, each with its own search band and warp;
no library offers ZNCC with per-point bands on rectified rows, nor
inverse-compositional Gauss–Newton with a horizontal first-order shape
function and a spatio-temporal term. The loops run in parallel over points
(numba prange), one compiled function per task, cached on disk.

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


@njit(cache=True, inline="always")
def _sample_row(coef, t, row, x, order, w):
    """Value of the row spline at column x (float); NaN outside the image."""
    n = coef.shape[2]
    i = int(np.floor(x))
    f = x - i
    if order == 3:
        if i - 1 < 0 or i + 2 >= n:
            return np.nan
        _bspline3_weights(f, w)
        return (w[0] * coef[t, row, i - 1] + w[1] * coef[t, row, i] + w[2] * coef[t, row, i + 1]
                + w[3] * coef[t, row, i + 2])
    if i - 2 < 0 or i + 3 >= n:
        return np.nan
    _bspline5_weights(f, w)
    return (w[0] * coef[t, row, i - 2] + w[1] * coef[t, row, i - 1] + w[2] * coef[t, row, i]
            + w[3] * coef[t, row, i + 1] + w[4] * coef[t, row, i + 2] + w[5] * coef[t, row, i + 3])


@njit(cache=True, inline="always")
def _centre_window(left, t, u, v, hw, out):
    """Write frame t's window about (u, v) minus its mean into out[t]; return its norm (0 if flat)."""
    side = 2 * hw + 1
    s = 0.0
    for dy in range(side):
        for dx in range(side):
            s += left[t, v - hw + dy, u - hw + dx]
    mean = s / (side * side)
    ss = 0.0
    for dy in range(side):
        for dx in range(side):
            val = left[t, v - hw + dy, u - hw + dx] - mean
            out[t, dy, dx] = val
            ss += val * val
    return np.sqrt(ss) if ss > _EPS else 0.0


@njit(parallel=True, cache=True)
def zncc_search(left, right, us, vs, centre, halfwidth, hw, scores):
    """ZNCC of each point's left window against right windows at integer disparities.

    Parameters
    ----------
    left, right : float32 (T, H, W) rectified stacks (T frames of one time window).
    us, vs : int64 (N,) window centres in the left image, px.
    centre : int64 (N,) centre of each point's disparity band, px.
    halfwidth : int, band half-width, px: disparities centre-halfwidth..centre+halfwidth.
    hw : int, window half-size (window = 2 hw + 1 px square).
    scores : float64 (N, 2 halfwidth + 1) output; the mean over frames of the
        per-frame ZNCC; -2 where the right window leaves the image or a window is flat.
    """
    T, H, W = left.shape
    n = us.shape[0]
    nk = 2 * halfwidth + 1
    m = (2 * hw + 1) * (2 * hw + 1)
    side = 2 * hw + 1
    for p in prange(n):
        u = us[p]
        v = vs[p]
        for k in range(nk):
            scores[p, k] = -2.0
        if v - hw < 0 or v + hw >= H or u - hw < 0 or u + hw >= W:
            continue
        # The template, zero-mean and unit-norm per frame, once per point: then each
        # candidate needs only sum(g), sum(g^2) and sum(f~ g).
        tpl = np.empty((T, side, side))
        flat = False
        for t in range(T):
            norm = _centre_window(left, t, u, v, hw, tpl)
            if norm == 0.0:
                flat = True
                break
            inv = 1.0 / norm
            for dy in range(side):
                for dx in range(side):
                    tpl[t, dy, dx] *= inv
        if flat:
            continue
        for k in range(nk):
            d = centre[p] - halfwidth + k
            ur = u - d
            if ur - hw < 0 or ur + hw >= W:
                continue
            total = 0.0
            ok = True
            for t in range(T):
                sg = 0.0
                sgg = 0.0
                sfg = 0.0
                for dy in range(side):
                    row = v - hw + dy
                    for dx in range(side):
                        g = right[t, row, ur - hw + dx]
                        sg += g
                        sgg += g * g
                        sfg += tpl[t, dy, dx] * g
                vg = sgg - sg * sg / m
                if vg <= _EPS:
                    ok = False
                    break
                total += sfg / np.sqrt(vg)
            if ok:
                scores[p, k] = total / T


@njit(parallel=True, cache=True)
def icgn_refine(left, right_coef, taus, us, vs, d0, hw, order, max_iter, tol, temporal,
                out_d, out_p, out_sigma, out_score, out_iter):
    """Inverse-compositional Gauss–Newton refinement of each point's disparity.

    Shape function (horizontal, first order, plus a linear-in-time term in the
    spatio-temporal mode): a template pixel at offsets (dx, dy) from the point,
    in frame t of the window, is matched at right column
        u + dx + a0 + a1 dx + a2 dy + a3 tau_t,
    so d = -a0 at the window centre and frame tau = 0, d_u = -a1, d_v = -a2,
    d_t = -a3 (px per unit of tau). The criterion is the zero-normalised SSD
    summed over frames (Pan et al. 2013; Baker & Matthews 2004), which is
    insensitive to brightness changes per frame and equals 2 (1 - ZNCC).

    Parameters
    ----------
    left : float32 (T, H, W) rectified left stack.
    right_coef : float64 (T, H, W) row B-spline coefficients of the right stack.
    taus : float64 (T,) time of each frame relative to the window's centre (any unit).
    us, vs : int64 (N,) window centres, px.  d0 : float64 (N,) starting disparity, px.
    hw : window half-size.  order : 3 or 5.  max_iter, tol (px) : stopping rule.
    temporal : bool, estimate a3 (only meaningful for T > 1).

    Outputs (N,): out_d disparity px (NaN when not converged or outside);
    out_p (N, 4) the shape parameters [d, d_u, d_v, d_t]; out_sigma the
    1-sigma of d from the Gauss–Newton normal matrix and the residual, px;
    out_score the ZNCC at the solution; out_iter iterations used (-1 failed).
    """
    T, H, W = left.shape
    n = us.shape[0]
    npar = 4 if temporal else 3
    side = 2 * hw + 1
    m = side * side
    for p in prange(n):
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
        w = np.empty(6)
        # Template: zero-mean, unit-norm per frame, and its steepest-descent images.
        fn = np.empty((T, side, side))
        sd = np.empty((T, side, side, 4))
        hess = np.zeros((npar, npar))
        flat = False
        for t in range(T):
            norm = _centre_window(left, t, u, v, hw, fn)
            if norm == 0.0:
                flat = True
                break
            for dy in range(side):
                row = v - hw + dy
                for dx in range(side):
                    col = u - hw + dx
                    fn[t, dy, dx] /= norm
                    # Fourth-order central difference: accurate gradients speed convergence;
                    # the fixed point does not depend on them to first order.
                    gx = (-left[t, row, col + 2] + 8.0 * left[t, row, col + 1] - 8.0 * left[t, row, col - 1]
                          + left[t, row, col - 2]) / (12.0 * norm)
                    sd[t, dy, dx, 0] = gx
                    sd[t, dy, dx, 1] = gx * (dx - hw)
                    sd[t, dy, dx, 2] = gx * (dy - hw)
                    sd[t, dy, dx, 3] = gx * taus[t]
            for dy in range(side):
                for dx in range(side):
                    for i in range(npar):
                        si = sd[t, dy, dx, i]
                        for j in range(i, npar):
                            hess[i, j] += si * sd[t, dy, dx, j]
        if flat:
            continue
        for i in range(npar):
            for j in range(i):
                hess[i, j] = hess[j, i]
        hinv = np.linalg.inv(hess)
        a0 = -d0[p]
        a1 = 0.0
        a2 = 0.0
        a3 = 0.0
        g = np.empty((side, side))
        converged = False
        bad = False
        it = 0
        ssd = 0.0
        for it in range(1, max_iter + 1):
            grad = np.zeros(npar)
            ssd = 0.0
            for t in range(T):
                s = 0.0
                for dy in range(side):
                    row = v - hw + dy
                    ody = dy - hw
                    for dx in range(side):
                        odx = dx - hw
                        x = u + odx + a0 + a1 * odx + a2 * ody + a3 * taus[t]
                        val = _sample_row(right_coef, t, row, x, order, w)
                        if np.isnan(val):
                            bad = True
                            break
                        g[dy, dx] = val
                        s += val
                    if bad:
                        break
                if bad:
                    break
                mean = s / m
                ss = 0.0
                for dy in range(side):
                    for dx in range(side):
                        g[dy, dx] -= mean
                        ss += g[dy, dx] * g[dy, dx]
                if ss <= _EPS:
                    bad = True
                    break
                norm = np.sqrt(ss)
                for dy in range(side):
                    for dx in range(side):
                        r = fn[t, dy, dx] - g[dy, dx] / norm
                        ssd += r * r
                        for i in range(npar):
                            grad[i] += sd[t, dy, dx, i] * r
            if bad:
                break
            # dp = -H^-1 grad is the template-side update; composing its inverse into
            # the warp gives a_new = a - s dp / (1 + dp1) for the additive terms.
            dp = np.zeros(4)
            for i in range(npar):
                acc = 0.0
                for j in range(npar):
                    acc += hinv[i, j] * grad[j]
                dp[i] = -acc
            s_old = 1.0 + a1
            s_d = 1.0 + dp[1]
            a0 = a0 - s_old * dp[0] / s_d
            a1 = s_old / s_d - 1.0
            a2 = a2 - s_old * dp[2] / s_d
            a3 = a3 - s_old * dp[3] / s_d
            if abs(dp[0]) < tol and abs(dp[1]) * hw < tol and abs(dp[2]) * hw < tol and \
                    abs(dp[3]) < tol:
                converged = True
                break
        if bad or not converged:
            continue
        out_d[p] = -a0
        out_p[p, 0] = -a0
        out_p[p, 1] = -a1
        out_p[p, 2] = -a2
        out_p[p, 3] = -a3 if temporal else 0.0
        out_score[p] = 1.0 - ssd / (2.0 * T)
        # Residual variance per pixel in normalised units (mean and scale per frame, and
        # the shape parameters, are fitted), times the inverse normal matrix.
        dof = T * (m - 2) - npar
        out_sigma[p] = np.sqrt(max(ssd, 0.0) / dof * hinv[0, 0])
        out_iter[p] = it
