"""Matching without a prior: a wide coarse search that seeds the narrow-band matcher.

The datum stage has nothing to centre the matcher's narrow band on, so it
finds the disparity field first, in three steps:

1. a coarse ZNCC search on images reduced 2**level times (Gaussian pyramid,
   ``cv2.pyrDown``) at a sparse set of points, over the widest range the
   images allow: every disparity that keeps the right window inside the
   right image. Reducing by about the speckle size keeps the pattern's
   contrast (the downsampled speckle is still a random texture that both
   views share) and makes the wide search cheap. The ZNCC is averaged
   over the still frames, each a fresh pattern, which makes the peak
   unambiguous even with small windows.
2. a robust smooth fit of the coarse disparities: an affine model from
   random triplets scored by their inlier count (RANSAC; Fischler & Bolles,
   Commun. ACM 24 (1981) 381), then a quadratic polynomial in (u, v) fitted
   with iterated outlier rejection. A flat water surface has a disparity
   exactly affine in rectified (u, v) (its inverse depth is affine in the
   image and d is affine in the inverse depth), so the quadratic has room
   to spare; points on an occluder (a post above the water) or in its
   shadow do not follow the model and drop out.
3. the full-resolution matcher (:func:`surfrec.match.correlate.match_points`:
   integer ZNCC in a band of a few px about the fit, then IC-GN) on the
   matching grid, one frame at a time, with validity tests: the window in
   the valid part of both rectified views, a ZNCC score threshold, the
   refined disparity inside the band, a bounded estimated sigma.

Everything here is a pure function of rectified image arrays.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

from surfrec.geometry.plane import PolynomialSurface, robust_polynomial_surface
from surfrec.match.correlate import PointMatches, integer_search, match_points, row_spline_coefficients
from surfrec.match.pipeline import matching_grid  # noqa: F401  (re-exported: datum and match share one grid rule)

# Coarse points whose mean ZNCC falls below this are not used in the fit: a
# random texture of ~50 independent samples gives |ZNCC| < 0.3 for unrelated
# windows almost always (1/sqrt(samples) spread, from memory); true matches
# of the reduced speckle score above 0.8 on the synthetic sessions.
COARSE_MIN_SCORE = 0.5


@dataclass
class DisparityPrior:
    """A smooth disparity field found without a prior.

    Attributes
    ----------
    surface : PolynomialSurface d(u, v), px, of rectified left px (u, v).
    level : pyramid level of the coarse search (images reduced 2**level times).
    n_coarse : coarse points searched;  n_used : points that agree with the fit.
    spread_px : robust spread of the coarse disparities about the fit, full-resolution px.
    band_px : half-width of the full-resolution integer search about the fit, px.
    """

    surface: PolynomialSurface
    level: int
    n_coarse: int
    n_used: int
    spread_px: float
    band_px: int

    def __call__(self, u, v) -> np.ndarray:
        """The prior disparity at rectified left px (u, v), px."""
        return self.surface(u, v)


@dataclass
class FrameMatches:
    """Per-frame matches on a grid, (Nv, Nu) arrays.

    disparity : px, NaN where invalid.  sigma : estimated 1-sigma, px.
    score : ZNCC at the solution (NaN where not refined).
    attempted : bool, points inside both views that were matched (a point
        attempted but invalid failed a test: an occluder, a shadow, glare).
    reasons : counts of points rejected by each test.
    bad_pixels : bool, points whose window holds bad pixels (saturated, hot,
        dead; rejected or not): near a glint, not an occluder.
    """

    disparity: np.ndarray
    sigma: np.ndarray
    score: np.ndarray
    attempted: np.ndarray
    reasons: dict
    bad_pixels: np.ndarray | None = None


def valid_region(map_x, map_y, source_size) -> np.ndarray:
    """Rectified pixels whose source position lies inside the original image.

    Parameters
    ----------
    map_x, map_y : (H, W) float32, the rectification map (original px of each rectified px).
    source_size : (width, height) of the original image, px.

    Returns
    -------
    (H, W) bool. Outside it the rectifier samples mirrored or clamped image
    content, which matches but means nothing.
    """
    w, h = source_size
    return (map_x >= 0) & (map_x <= w - 1) & (map_y >= 0) & (map_y <= h - 1)


def pyramid_level(speckle_px: float, *, max_level: int = 3) -> int:
    """Coarse-search level: reduce by about the speckle size (so speckles stay >= ~1 px), at most 2**max_level."""
    if not np.isfinite(speckle_px):
        return min(2, max_level)  # no estimate: assume the usual 4-5 px speckle
    if speckle_px < 2:
        return 0
    return int(min(max_level, math.floor(math.log2(speckle_px))))


def wide_search(lefts, rights, *, level: int = 2, window: int = 9, step: int = 4, valid_left=None,
                valid_right=None, degree: int = 2, min_band_px: int = 3, seed: int = 0) -> DisparityPrior:
    """Find the disparity field of a smooth scene without any prior.

    Parameters
    ----------
    lefts, rights : (T, H, W) or (H, W) rectified frames (float), all of one
        still scene; the coarse ZNCC is the mean over the T frames.
    level : pyramid level of the coarse search (see :func:`pyramid_level`).
    window : odd coarse window side, px of the reduced images.
    step : coarse point spacing, px of the reduced images.
    valid_left, valid_right : (H, W) bool or None, the meaningful part of
        each rectified view (:func:`valid_region`).
    degree : total degree of the smooth fit in (u, v).
    min_band_px : the smallest half-width of the full-resolution band, px.
    seed : seed of the random triplets (the result is deterministic).

    Returns
    -------
    DisparityPrior

    Raises
    ------
    ValueError
        Too few coarse points agree on a smooth disparity field (no texture,
        the two views do not overlap, frames of different scenes).
    """
    lefts = _stack(lefts)
    rights = _stack(rights)
    f = 2 ** level
    lc = np.stack([_reduce(a, level) for a in lefts])
    rc = np.stack([_reduce(a, level) for a in rights])
    h, w = lc.shape[1:]
    hw = window // 2
    gu, gv = np.meshgrid(np.arange(hw, w - hw, step), np.arange(hw, h - hw, step))
    gu, gv = gu.ravel(), gv.ravel()
    if valid_left is not None:
        keep = _window_inside(_reduce_mask(valid_left, level), gu, gv, window)
        gu, gv = gu[keep], gv[keep]
    if gu.size < 10:
        raise ValueError("the rectified left view is too small for a disparity search")
    # The widest band the image allows: right windows anywhere on the same row.
    half = w // 2
    d, score, _ = integer_search(lc, rc, gu, gv, gu - half, half, window)
    ok = np.isfinite(d) & (score >= COARSE_MIN_SCORE)
    if valid_right is not None:
        vr = _reduce_mask(valid_right, level)
        ur = np.rint(gu - np.nan_to_num(d)).astype(np.int64)
        inside = (ur - hw >= 0) & (ur + hw < w)
        ok &= inside
        ok[inside] &= _window_inside(vr, ur[inside], gv[inside], window)
    # Back to full-resolution px: a pyrDown sample i is centred on pixel 2 i of the level below.
    u_full, v_full, d_full = gu[ok] * f, gv[ok] * f, d[ok] * f
    n_terms = (degree + 1) * (degree + 2) // 2
    if u_full.size < max(3 * n_terms, 20):
        raise ValueError(f"only {u_full.size} of {gu.size} coarse points found a clear match: "
                         "the views show no common texture")
    start = _ransac_affine(u_full, v_full, d_full, tol=max(1.0, 0.75 * f), seed=seed)
    if start.sum() < max(3 * n_terms, 0.2 * u_full.size):
        raise ValueError(f"only {int(start.sum())} of {u_full.size} coarse matches agree on a smooth "
                         "disparity field")
    surf, inliers, spread = robust_polynomial_surface(u_full, v_full, d_full, degree, threshold=4.0,
                                                      min_tolerance=0.5 * f, start=start)
    # The band covers the coarse scatter about the fit with room (4 sigma) and never less than min_band_px.
    band = int(max(min_band_px, math.ceil(4.0 * spread)))
    return DisparityPrior(surface=surf, level=level, n_coarse=int(gu.size), n_used=int(inliers.sum()),
                          spread_px=float(spread), band_px=band)


def match_frame_on_grid(left, right, grid_u, grid_v, prior: DisparityPrior, window: int, *, valid_left=None,
                        valid_right=None, min_score: float = 0.6, max_sigma_px: float = 0.2,
                        order: int = 5, bad_left=None, bad_right=None) -> FrameMatches:
    """Match one rectified frame pair on the grid in a band about the prior.

    Parameters
    ----------
    left, right : (H, W) rectified frames.
    grid_u, grid_v : (Nu,), (Nv,) int px (:func:`matching_grid`).
    prior : the disparity field from :func:`wide_search`.
    window : odd window side, px.
    valid_left, valid_right : (H, W) bool or None (:func:`valid_region`).
    bad_left, bad_right : (H, W) uint8 rectified bad-pixel masks or None
        (surfrec.match.defects): left out of every window's sums.
    min_score : ZNCC below which a point is invalid.
    max_sigma_px : points with a larger estimated 1-sigma are invalid, px.
    order : B-spline order of the sub-pixel interpolation (3 or 5).

    Returns
    -------
    FrameMatches on the (Nv, Nu) grid.
    """
    vv, uu = np.meshgrid(grid_v, grid_u, indexing="ij")
    centre = prior(uu, vv)
    band = prior.band_px
    hw = window // 2
    ok = np.isfinite(centre)
    # The whole band's right windows (and the interpolation taps) must lie in the right image:
    # points near its edge are outside the common view, not failed matches.
    c_all = np.rint(np.nan_to_num(centre)).astype(np.int64)
    ok &= (uu - c_all - band - hw - 3 >= 0) & (uu - c_all + band + hw + 3 < right.shape[-1])
    if valid_left is not None:
        ok &= _window_inside(valid_left, uu, vv, window)
    reasons = {"outside_view": int((~ok).sum())}
    us, vs = uu[ok], vv[ok]
    c = c_all[ok]
    right_coef = row_spline_coefficients(right, order)
    m: PointMatches = match_points(left, right, us, vs, c, band, window, order=order, right_coef=right_coef,
                                   bad_left=bad_left, bad_right=bad_right)
    d = m.disparity.copy()
    bad_fit = ~np.isfinite(d) | (m.iterations < 0)
    reasons["bad_pixels"] = int(np.sum(m.iterations == -2))
    reasons["no_match"] = int(bad_fit.sum()) - reasons["bad_pixels"]
    low = ~bad_fit & ~(m.score >= min_score)
    reasons["low_score"] = int(low.sum())
    # A refinement that left the band was pulled off by something the prior does not describe.
    off_band = ~bad_fit & ~low & ~(np.abs(d - centre[ok]) <= band)
    reasons["off_band"] = int(off_band.sum())
    noisy = ~bad_fit & ~low & ~off_band & ~(m.sigma <= max_sigma_px)
    reasons["large_sigma"] = int(noisy.sum())
    bad = bad_fit | low | off_band | noisy
    if valid_right is not None:
        ur = np.rint(us - np.nan_to_num(d)).astype(np.int64)
        inside = (ur - hw >= 0) & (ur + hw < right.shape[-1])
        good_right = inside.copy()
        good_right[inside] = _window_inside(valid_right, ur[inside], vs[inside], window)
        outside_right = ~bad & ~good_right
        reasons["outside_view"] += int(outside_right.sum())
        bad |= outside_right
    d[bad] = np.nan
    shape = uu.shape
    out_d = np.full(shape, np.nan)
    out_s = np.full(shape, np.nan)
    out_c = np.full(shape, np.nan)
    out_d[ok] = d
    out_s[ok] = np.where(bad, np.nan, m.sigma)
    out_c[ok] = m.score
    out_b = np.zeros(shape, bool)
    out_b[ok] = m.iterations == -2
    if bad_left is not None or bad_right is not None:
        # Points whose window holds bad pixels: where they fail, or fit the still water badly,
        # the glint is to blame, not an occluder.
        from surfrec.match.defects import near_bad_pixels

        near = np.zeros(shape, bool)
        near[ok] = near_bad_pixels(bad_left, bad_right, us, vs, c, window)
        out_b |= near
    return FrameMatches(out_d, out_s, out_c, ok, reasons, out_b)


@dataclass
class StillMatches:
    """Matches of several frames on one grid.

    disparity, sigma : (F, Nv, Nu) px, NaN where invalid.
    attempted : (F, Nv, Nu) bool (see :class:`FrameMatches`).
    reasons : counts of rejected points by test, summed over the frames.
    bad_pixels : (F, Nv, Nu) bool (see :class:`FrameMatches`).
    """

    disparity: np.ndarray
    sigma: np.ndarray
    attempted: np.ndarray
    reasons: dict
    bad_pixels: np.ndarray | None = None


def match_frames_on_grid(pairs, grid_u, grid_v, prior: DisparityPrior, window: int, *, progress=None,
                         **options) -> StillMatches:
    """:func:`match_frame_on_grid` over frame pairs, one at a time.

    Parameters
    ----------
    pairs : iterable of (left, right) rectified (H, W) frames, or of (left,
        right, bad_left, bad_right) with rectified bad-pixel masks (or None);
        it may rectify lazily, so only one pair need be in memory.
    grid_u, grid_v, prior, window : as for :func:`match_frame_on_grid`.
    progress : callable(n_done) or None, called after each pair.
    **options : valid_left, valid_right, min_score, max_sigma_px, order.

    Returns
    -------
    StillMatches
    """
    d, s, a, b, reasons = [], [], [], [], {}
    for i, pair in enumerate(pairs):
        left, right = pair[0], pair[1]
        bad = {"bad_left": pair[2], "bad_right": pair[3]} if len(pair) > 2 else {}
        m = match_frame_on_grid(left, right, grid_u, grid_v, prior, window, **options, **bad)
        d.append(m.disparity)
        s.append(m.sigma)
        a.append(m.attempted)
        b.append(m.bad_pixels if m.bad_pixels is not None else np.zeros(m.attempted.shape, bool))
        for k, c in m.reasons.items():
            reasons[k] = reasons.get(k, 0) + c
        if progress is not None:
            progress(i + 1)
    if not d:
        raise ValueError("no frame pairs to match")
    return StillMatches(np.stack(d), np.stack(s), np.stack(a), reasons, np.stack(b))


def _ransac_affine(u, v, d, *, tol: float, trials: int = 300, seed: int = 0) -> np.ndarray:
    # Affine models d = a + b u + c v through random triplets; the one most points agree with wins.
    rng = np.random.default_rng(seed)
    n = u.size
    a = np.stack([np.ones(n), u, v], axis=1)
    best = np.zeros(n, bool)
    for _ in range(trials):
        idx = rng.choice(n, size=3, replace=False)
        try:
            coef = np.linalg.solve(a[idx], d[idx])
        except np.linalg.LinAlgError:
            continue
        inl = np.abs(a @ coef - d) <= tol
        if inl.sum() > best.sum():
            best = inl
    if best.sum() >= 3:
        # One least-squares refit on the consensus set, then its own inliers.
        coef = np.linalg.lstsq(a[best], d[best], rcond=None)[0]
        best = np.abs(a @ coef - d) <= tol
    return best


def _reduce(image, level: int) -> np.ndarray:
    a = np.asarray(image, np.float32)
    for _ in range(level):
        a = cv2.pyrDown(a)
    return a


def _reduce_mask(mask, level: int) -> np.ndarray:
    # A reduced pixel is valid only when the full-resolution pixels its pyramid
    # kernel reaches are (about 2**level px about full-resolution pixel 2**level i).
    m = np.asarray(mask, bool)
    if level == 0:
        return m
    f = 2 ** level
    eroded = _erode(m, 2 * f + 1)
    h, w = m.shape
    for _ in range(level):
        h, w = (h + 1) // 2, (w + 1) // 2
    rows = np.minimum(np.arange(h) * f, m.shape[0] - 1)
    cols = np.minimum(np.arange(w) * f, m.shape[1] - 1)
    return eroded[np.ix_(rows, cols)]


def _erode(mask, size: int) -> np.ndarray:
    # Binary erosion by a size x size square, outside the image counting as False. OpenCV's
    # separable erosion is about a hundred times faster than scipy.ndimage's on whole frames.
    m = np.ascontiguousarray(mask, dtype=np.uint8)
    return cv2.erode(m, np.ones((size, size), np.uint8), borderType=cv2.BORDER_CONSTANT, borderValue=0) != 0


def _window_inside(mask, us, vs, window: int) -> np.ndarray:
    # True where the whole window about (u, v) lies on True pixels of the mask.
    return _erode(mask, window)[np.asarray(vs), np.asarray(us)]


def _stack(a):
    a = np.asarray(a, dtype=np.float32)
    return np.ascontiguousarray(a[None] if a.ndim == 2 else a)
