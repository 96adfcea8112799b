"""Matching a run: grid, band, time windows, validity — one frame at a time.

A frame's result depends only on the frames inside its own time window, the
rig and the datum (docs/conventions.md), so any chunking of a run reproduces the
sequential result exactly.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage

from surfrec.match.correlate import integer_search, refine, row_spline_coefficients
from surfrec.match.validity import normalised_median_test

# frame_flags bits (disparity.h5, heights.h5)
FLAG_DROPPED = 1
FLAG_UNREADABLE = 2
FLAG_BLANK = 4
FLAG_FEW_VALID = 8
FLAG_MEANINGS = "dropped unreadable blank few_valid_points"
FLAG_VALUES = (FLAG_DROPPED, FLAG_UNREADABLE, FLAG_BLANK, FLAG_FEW_VALID)


@dataclass
class MatchParams:
    """Matcher settings (all recorded in disparity.h5).

    window : odd square window side, px.  spacing : grid step, px.
    time_window : odd number of frames correlated together (1 = per frame).
    max_excursion_mm : largest expected surface excursion from the datum, mm.
    band_px : half-width of the integer search band, px (derived from
        max_excursion_mm and the rig geometry when None).
    spline_order : B-spline order of the sub-pixel interpolation (3 or 5).
    shape_order : order of the IC-GN shape function: 1 (disparity and its two
        slopes) or 2 (also its curvature: less bias on surfaces curved on the
        scale of the window, about twice the random error; docs/performance.md).
    rectify_method : see surfrec.match.rectification.METHODS.
    min_score : ZNCC below which a point is invalid.
    median_threshold, median_eps : normalised median test (px for eps).
    max_sigma_px : points with a larger estimated 1-sigma are invalid.
    """

    window: int = 15
    spacing: int = 4
    time_window: int = 1
    max_excursion_mm: float = 5.0
    band_px: int | None = None
    spline_order: int = 3
    shape_order: int = 1
    rectify_method: str = "bspline3"
    min_score: float = 0.6
    median_threshold: float = 2.0
    median_eps: float = 0.1
    max_sigma_px: float = 0.2

    def to_dict(self):
        return asdict(self)


def matching_grid(image_size, spacing: int, window: int):
    """Regular grid of window centres inside the rectified left image.

    Returns
    -------
    u (Nu,), v (Nv,) int px; the margin leaves room for the window and the
    interpolation taps.
    """
    w, h = image_size
    margin = window // 2 + 4
    u = np.arange(margin, w - margin, spacing, dtype=np.int64)
    v = np.arange(margin, h - margin, spacing, dtype=np.int64)
    return u, v


def reference_on_grid(ref_u, ref_v, ref_disparity, u, v):
    """The datum's reference disparity interpolated onto another grid (bilinear; NaN outside)."""
    ref = np.asarray(ref_disparity, dtype=np.float64)
    valid = np.isfinite(ref)
    filled = ref.copy()
    if not valid.all():
        # Fill holes (the post, masked areas) by the nearest valid value so that the
        # bilinear interpolation near a hole does not spread NaN over good points.
        idx = ndimage.distance_transform_edt(~valid, return_distances=False, return_indices=True)
        filled = ref[tuple(idx)]
    fu = np.interp(u, ref_u, np.arange(len(ref_u)), left=np.nan, right=np.nan)
    fv = np.interp(v, ref_v, np.arange(len(ref_v)), left=np.nan, right=np.nan)
    vv, uu = np.meshgrid(fv, fu, indexing="ij")
    out = ndimage.map_coordinates(filled, [np.nan_to_num(vv, nan=-1), np.nan_to_num(uu, nan=-1)], order=1,
                                  mode="constant", cval=np.nan)
    out[~np.isfinite(vv) | ~np.isfinite(uu)] = np.nan
    return out


def band_halfwidth_px(reference, plane_offset_mm: float, disparity_offset_px: float, max_excursion_mm: float):
    """Integer search half-width covering +-max_excursion_mm about the datum, px.

    Along a left-camera ray the disparity minus the principal-point offset
    (cx1 - cx2) is inversely proportional to the depth, and the depth to a
    plane moved by Delta along its normal scales by (D + Delta) / D, D being
    the camera's distance to the plane. So |delta d| <= (d - c) Delta / (D - Delta).

    Parameters
    ----------
    reference : datum disparity on the grid, px.  plane_offset_mm : D, mm.
    disparity_offset_px : c = cx1 - cx2 of the rectified views, px.
    """
    core = np.abs(np.asarray(reference) - disparity_offset_px)
    core = core[np.isfinite(core)]
    if core.size == 0:
        raise ValueError("the datum holds no valid reference disparity")
    worst = float(core.max()) * max_excursion_mm / max(plane_offset_mm - max_excursion_mm, 1e-6)
    return int(math.ceil(worst)) + 2  # two px of margin for the parabolic start and the window's slope


def time_window_indices(i: int, n: int, time_window: int):
    """Frames of frame i's time window (consecutive frames, clipped to the run)."""
    half = time_window // 2
    return list(range(max(0, i - half), min(n, i + half + 1)))


class RectifiedCache:
    """Keeps the rectified frames of the current time windows (bounded memory)."""

    def __init__(self, rectifier, left_frames, right_frames, keep: int, defects=None):
        self.rectifier = rectifier
        self.defects = defects
        self.left_frames = left_frames
        self.right_frames = right_frames
        self.keep = max(1, keep)
        self.store = OrderedDict()

    def get(self, i):
        """(left, right) rectified float32 frames of frame i (bad pixels filled)."""
        return self._entry(i)[:2]

    def bad(self, i):
        """(left, right) rectified uint8 bad-pixel masks of frame i (None where a frame has none)."""
        e = self._entry(i)
        return e[3], e[4]

    def right_coefficients(self, i, order: int):
        """Row B-spline coefficients of frame i's rectified right image, computed once per frame
        (a spatio-temporal window uses each frame in several windows)."""
        entry = self._entry(i)
        if entry[2] is None or entry[2][0] != order:
            entry[2] = (order, row_spline_coefficients(entry[1], order))
        return entry[2][1]

    def _entry(self, i):
        if i not in self.store:
            from surfrec.match.defects import prepare_frame

            left, bad_left = prepare_frame(self.left_frames[i], "left", self.rectifier, self.defects)
            right, bad_right = prepare_frame(self.right_frames[i], "right", self.rectifier, self.defects)
            self.store[i] = [left, right, None, bad_left, bad_right]
            while len(self.store) > self.keep:
                self.store.popitem(last=False)
        return self.store[i]


def match_frame(lefts, rights, taus, grid_u, grid_v, centre, band, params: MatchParams, *, measure=None,
                right_coef=None, bad_left=None, bad_right=None):
    """Match one frame (or one spatio-temporal stack) on the grid.

    Parameters
    ----------
    lefts, rights : (T, H, W) float32 rectified frames of the time window.
    taus : (T,) frame times relative to the frame matched, in frames.
    grid_u, grid_v : (Nu,), (Nv,) int px.  centre : (Nv, Nu) band centres, px
        (the datum's reference disparity), NaN where not measured.
    band : half-width of the integer search, px.
    measure : (Nv, Nu) bool or None, points allowed by the mask.
    right_coef : (T, H, W) row B-spline coefficients of ``rights`` when already at hand.
    bad_left, bad_right : (T, H, W) uint8 rectified bad-pixel masks, or None
        (surfrec.match.defects): those pixels never enter a window's sums.

    Returns
    -------
    dict of (Nv, Nu) float32 arrays: disparity (NaN invalid), disparity_sigma,
    score; and counts of why points were rejected.
    """
    vv, uu = np.meshgrid(grid_v, grid_u, indexing="ij")
    ok = np.isfinite(centre)
    if measure is not None:
        ok &= measure
    us, vs = uu[ok], vv[ok]
    c = np.rint(centre[ok]).astype(np.int64)
    lefts = np.ascontiguousarray(lefts, dtype=np.float32)
    rights = np.ascontiguousarray(rights, dtype=np.float32)
    d_int, s_int, _ = integer_search(lefts, rights, us, vs, c, band, params.window)
    coef = right_coef if right_coef is not None else row_spline_coefficients(rights, params.spline_order)
    temporal = lefts.shape[0] > 1
    robust = touched = None
    if bad_left is not None or bad_right is not None:
        from surfrec.match.defects import GLINT, near_bad_pixels

        # Only windows that hold bad pixels need per-pixel weights (the right window at the
        # integer disparity, with 2 px to spare for the warp); windows that hold a glint may
        # hold its unsaturated light too: they are solved again without outliers.
        shift = np.rint(np.nan_to_num(d_int, nan=0.0)).astype(np.int64)
        touched = near_bad_pixels(bad_left, bad_right, us, vs, shift, params.window + 4)
        robust = touched & near_bad_pixels(bad_left, bad_right, us, vs, shift, params.window + 4, bits=GLINT)
    d, p, sigma, score, iters = refine(lefts, coef, us, vs, d_int, params.window, order=params.spline_order,
                                       taus=taus, temporal=temporal, shape_order=params.shape_order,
                                       bad_left=bad_left, bad_right=bad_right, robust=robust, touched=touched)
    shape = uu.shape
    out_d = np.full(shape, np.nan)
    out_s = np.full(shape, np.nan)
    out_c = np.full(shape, np.nan)
    out_d[ok], out_s[ok], out_c[ok] = d, sigma, score
    reasons = {"masked_or_outside": int((~ok).sum()), "no_integer_peak": int(np.sum(~np.isfinite(d_int))),
               "bad_pixels": int(np.sum(np.isfinite(d_int) & (iters == -2))),
               "not_converged": int(np.sum(np.isfinite(d_int) & (iters == -1)))}
    low = np.isfinite(out_d) & (out_c < params.min_score)
    big = np.isfinite(out_d) & ~(out_s <= params.max_sigma_px)
    out_d[low | big] = np.nan
    reasons["low_score"] = int(low.sum())
    reasons["large_sigma"] = int((big & ~low).sum())
    outl = normalised_median_test(out_d, threshold=params.median_threshold, eps=params.median_eps)
    out_d[outl] = np.nan
    reasons["median_test"] = int(outl.sum())
    # Of the points rejected for their score, sigma or convergence, those whose window has too little texture
    # to reach max_sigma_px even when matched right are told apart from mismatches.
    rejected = np.zeros(shape, bool)
    rejected[ok] = np.isfinite(d_int) & (iters == -1)  # not converged
    rejected |= low | big
    reasons["low_texture"] = int(np.sum(rejected & low_texture(lefts, uu, vv, out_s, ok & ~rejected & np.isfinite(out_d),
                                                                rejected, params)))
    out_s[~np.isfinite(out_d)] = np.nan
    return {"disparity": out_d.astype(np.float32), "disparity_sigma": out_s.astype(np.float32),
            "score": out_c.astype(np.float32), "reasons": reasons}


def low_texture(lefts, uu, vv, sigma, good, candidates, params: MatchParams) -> np.ndarray:
    """Points whose window has too little texture to be measured, matched right or not.

    The displacement noise floor of correlation matching is
    sigma_d = sqrt(2) sigma_n / sqrt(sum of squared row gradients over the window)
    (Pan et al., Opt. Express 16 (2008) 7037). The frame's noise sigma_n is
    read off its good points (their estimated sigma times their gradient
    energy, median), so no sensor model is needed; a candidate point whose
    predicted floor exceeds ``max_sigma_px`` lacks texture (a dark, flat or
    defocused patch); the others that failed were mismatches.

    Parameters
    ----------
    lefts : (T, H, W) rectified left frames.  uu, vv : (Nv, Nu) int grid px.
    sigma : (Nv, Nu) estimated 1-sigma, px.  good : (Nv, Nu) bool, accepted points.
    candidates : (Nv, Nu) bool, the points to classify.

    Returns
    -------
    (Nv, Nu) bool, True at candidates that lack texture.
    """
    out = np.zeros(uu.shape, bool)
    if not candidates.any() or good.sum() < 10:
        return out
    import cv2

    energy = np.zeros(uu.shape)
    for frame in lefts:
        g = np.zeros(frame.shape, np.float32)
        g[:, 1:-1] = 0.5 * (frame[:, 2:] - frame[:, :-2])
        # Box sum over the window (not normalised): sum of g^2 at every window centre.
        e = cv2.boxFilter(g * g, -1, (params.window, params.window), normalize=False,
                          borderType=cv2.BORDER_CONSTANT)
        energy += e[vv, uu]
    sigma_n = np.median(sigma[good] * np.sqrt(energy[good] / 2.0))
    # The measured gradient energy holds the noise's own: a central difference of white noise has
    # variance sigma_n^2 / 2 per pixel. What is left is the texture's.
    texture = energy - lefts.shape[0] * params.window ** 2 * sigma_n ** 2 / 2.0
    with np.errstate(divide="ignore", invalid="ignore"):
        predicted = np.where(texture > 0, np.sqrt(2.0) * sigma_n / np.sqrt(np.maximum(texture, 1e-300)), np.inf)
    return candidates & ~(predicted <= params.max_sigma_px)


def is_blank(image, min_std: float = 0.005) -> bool:
    """A frame with (almost) no contrast: lens cap, projector off, dropped exposure."""
    return float(np.std(image)) < min_std

