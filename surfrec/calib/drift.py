"""Has the rig moved since it was calibrated? A check from ordinary speckle frames.

A calibrated, rectified stereo pair sees every scene point on the same row of
both rectified images: the vertical disparity ``dv = v_left - v_right`` is
zero everywhere. When a camera is bumped it no longer is, and the pattern of
``dv`` across the image says how: a common pitch shifts every point alike, a
roll of one camera about its optical axis tilts the rows (``dv`` grows with
``u``, with opposite signs at the two sides and a median near zero). Because
the projector casts a new speckle pattern every frame, the same matching also
tells whether left frame t really was taken with right frame t: the right
pairing correlates, a neighbour frame does not.

The steps, each a pure function on arrays:

1. :func:`rectified_views` -- remapping tables into two *check views* that
   share the rig's rectifying rotations (so rows are the rig's rows) but are
   framed at the cameras' own scale around each camera's field (see there
   for why not the rig's own projections);
2. :func:`coarse_disparity` -- a few large tiles searched along whole rows
   (and a few px up and down) find the disparity range from the data;
3. :func:`check_sync` -- the tile correlation of left frame t against right
   frames t-K ... t+K;
4. :func:`measure_vertical_disparity` -- a grid of a few hundred points
   matched in two dimensions: integer ZNCC search around the coarse
   disparity, then :func:`refine_shift` (inverse-compositional Gauss-Newton
   of a 2-D translation, zero-normalised);
5. :func:`assess_drift` -- median, 95th percentile of ``|dv|`` and the trend
   ``dv = a + b (u - u0) + c (v - v0)`` with the roll it implies.

:func:`check_rig` runs them all on a few frame pairs.

Pixel convention: the centre of the top-left pixel is (0, 0); u to the
right, v down. ``shift`` is where a left point is found in the right image,
``(u_right - u_left, v_right - v_left)``; disparity ``d = -shift_u`` and
vertical disparity ``dv = -shift_v`` (docs/conventions.md: d = u_left - u_right).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Sequence

import cv2
import numpy as np
from scipy import ndimage

from surfrec.errors import InputError

__all__ = [
    "RectifiedViews",
    "CoarseDisparity",
    "PointMatches",
    "SyncResult",
    "DriftResult",
    "RigCheck",
    "rectified_views",
    "coarse_disparity",
    "grid_points",
    "refine_shift",
    "match_points",
    "measure_vertical_disparity",
    "check_sync",
    "assess_drift",
    "check_rig",
]

# Tiles of the coarse search: big enough that a wrong frame pairing stays
# far below a right one (a 64x48 window of 4-px speckle holds ~200 speckle
# grains, so chance correlations stay below ~0.35 over a whole-row search).
_TILE = (64, 48)  # (width, height) px
_TILE_GRID = (4, 3)  # tiles across, down
# Fourth-order central difference (weights for ndimage.correlate1d): accurate
# gradients for the Gauss-Newton Hessian of fine (4 px) speckle, where
# [-1, 0, 1]/2 underestimates them and slows convergence.
_DERIV = np.array([1.0, -8.0, 0.0, 8.0, -1.0]) / 12.0
_SIDES = ("left", "right")


# ----------------------------------------------------------------- results


@dataclass
class RectifiedViews:
    """Remapping tables into the check views, and how they relate to the rig's rectification.

    Attributes
    ----------
    image_size : (width, height) px of the check views (the rig's image size).
    maps : ((map_x, map_y) left, (map_x, map_y) right), float32 (height, width):
        source pixel, original image px, of every check-view pixel.
    valid : (left, right) bool (height, width): check-view pixels whose
        source lies inside the original image.
    matrices : (left, right) (3, 3) camera matrices of the check views, px.
    rig_projections : (P1, P2) (3, 4) of the rig's rectification.
    focal_px : focal length of the check views, px (the cameras' mean).
    """

    image_size: tuple[int, int]
    maps: tuple
    valid: tuple
    matrices: tuple
    rig_projections: tuple
    focal_px: float

    def remap(self, image: np.ndarray, side: str) -> np.ndarray:
        """One original frame (H, W) of camera ``side`` ("left" or "right") in its check view.

        float32, 0 where the view sees beyond the original image.
        """
        mx, my = self.maps[_SIDES.index(side)]
        # Lanczos (8x8) rather than cubic or linear: the interpolation error
        # depends on each pixel's sub-pixel phase, which the maps fix, so it
        # does not average out over frames; on 4-px speckle it left a static
        # vertical disparity of 0.012 px RMS per point (linear), 0.023 px
        # (OpenCV's cubic) and 0.007 px (Lanczos, as good as cubic B-splines).
        return cv2.remap(np.asarray(image, np.float32), mx, my, cv2.INTER_LANCZOS4,
                         borderMode=cv2.BORDER_CONSTANT, borderValue=0.0)

    @property
    def px_scale(self) -> float:
        """Rig-rectified px per check-view px (vertically, left camera)."""
        return float(self.rig_projections[0][1, 1] / self.focal_px)

    def to_rig(self, u, v, dv):
        """Left check-view points and their vertical disparity -> the rig's rectified px.

        Both views share the rig's rectifying rotations, so a check-view row
        maps to a rig-rectified row by the ratio of focal lengths and the
        principal points: exactly, not to first order.

        Parameters
        ----------
        u, v : (N,) left check-view px.
        dv : (N,) vertical disparity v_left - v_right, check-view px.

        Returns
        -------
        u_rig, v_rig, dv_rig : (N,) left rig-rectified px and the vertical
            disparity in rig-rectified px.
        """
        u = np.asarray(u, float)
        v = np.asarray(v, float)
        dv = np.asarray(dv, float)
        kl, kr = self.matrices
        p1, p2 = self.rig_projections
        f = self.focal_px
        xl = (u - kl[0, 2]) / f
        yl = (v - kl[1, 2]) / f
        yr = (v - dv - kr[1, 2]) / f
        u_rig = p1[0, 0] * xl + p1[0, 1] * yl + p1[0, 2]
        v_rig = p1[1, 1] * yl + p1[1, 2]
        v_rig_right = p2[1, 1] * yr + p2[1, 2]
        return u_rig, v_rig, v_rig - v_rig_right


@dataclass
class CoarseDisparity:
    """Disparity range found by whole-row tile search on one or more frame pairs.

    Attributes
    ----------
    plane : (3,) disparity d = p0 + p1 u + p2 v, px, left check-view u, v px.
    vertical : median vertical disparity of the good tiles, px.
    vertical_plane : (3,) vertical disparity dv = q0 + q1 u + q2 v, px, from
        the same tiles (a rolled camera tilts it, so the fine search follows it).
    spread : RMS departure of the good tiles from the plane, px.
    tiles : (M, 5) u, v (tile centre, left px), d, dv (px), score (ZNCC) of every tile.
    score : upper-quartile tile score (ZNCC in [-1, 1]); high for a true pairing.
    n_good : number of tiles above the score threshold.
    """

    plane: np.ndarray
    vertical: float
    vertical_plane: np.ndarray
    spread: float
    tiles: np.ndarray
    score: float
    n_good: int

    def disparity(self, u, v):
        """Predicted disparity, px, at left check-view (u, v) px."""
        return self.plane[0] + self.plane[1] * np.asarray(u, float) + self.plane[2] * np.asarray(v, float)

    def vertical_at(self, u, v):
        """Predicted vertical disparity, px, at left check-view (u, v) px."""
        q = self.vertical_plane
        return q[0] + q[1] * np.asarray(u, float) + q[2] * np.asarray(v, float)


@dataclass
class PointMatches:
    """Points of the left view matched in the right view.

    Attributes
    ----------
    u, v : (N,) left px (integer grid positions).
    disparity : (N,) u_left - u_right, px; NaN where dropped.
    vertical : (N,) v_left - v_right, px; NaN where dropped.
    score : (N,) ZNCC of the refined match; NaN where the search failed.
    """

    u: np.ndarray
    v: np.ndarray
    disparity: np.ndarray
    vertical: np.ndarray
    score: np.ndarray

    @property
    def valid(self) -> np.ndarray:
        return np.isfinite(self.vertical)


@dataclass
class SyncResult:
    """Frame pairing found by correlating left frame t with right frames t+k.

    Attributes
    ----------
    offset : the k whose pairing correlates best (0: in step); right frame
        t + offset was taken with left frame t.
    scores : {k: median over the pairings (t, t + k) of their tile score
        (see CoarseDisparity.score)}.
    determined : False when no pairing or several pairings correlate (a
        pattern that does not change between frames cannot tell).
    min_score : the threshold a true pairing passes.
    """

    offset: int
    scores: dict
    determined: bool
    min_score: float

    @property
    def in_step(self) -> bool:
        return self.offset == 0

    def to_dict(self) -> dict:
        return {"offset_frames": int(self.offset), "determined": bool(self.determined),
                "in_step": bool(self.in_step), "min_score": self.min_score,
                "scores": {str(k): _num(s) for k, s in sorted(self.scores.items())}}


@dataclass
class DriftResult:
    """Vertical disparity statistics over the matched points, in the rig's rectified px.

    Attributes
    ----------
    n_points : points used.
    median_px : median of dv.
    p95_abs_px : 95th percentile of |dv|.
    trend : dict with ``offset_px`` (a, at the centre (u0, v0) of the
        points), ``slope_u_px_per_1000px`` (1000 b), ``slope_v_px_per_1000px``
        (1000 c), ``centre_px`` (u0, v0), ``residual_rms_px`` (of dv about
        the fitted plane: the matching noise once the geometry is removed).
    roll_deg : relative roll of the views about the optical axis implied by
        the u-slope, degrees: the right image content turned by this angle
        relative to the left, from +u toward +v (clockwise as displayed, v
        down), i.e. -atan(b).
    tolerance_px : the threshold on p95_abs_px.
    moved : p95_abs_px > tolerance_px.
    """

    n_points: int
    median_px: float
    p95_abs_px: float
    trend: dict
    roll_deg: float
    tolerance_px: float
    moved: bool

    def to_dict(self) -> dict:
        return {"n_points": int(self.n_points), "median_px": _num(self.median_px),
                "p95_abs_px": _num(self.p95_abs_px), "tolerance_px": self.tolerance_px,
                "trend": {k: ([_num(x) for x in v] if isinstance(v, (list, tuple)) else _num(v))
                          for k, v in self.trend.items()},
                "roll_deg": _num(self.roll_deg), "moved": bool(self.moved)}


@dataclass
class RigCheck:
    """Everything :func:`check_rig` found.

    Attributes
    ----------
    holds : True when the rig holds and the cameras are in step.
    messages : the findings, one line each ("rig holds", "rig has moved: ...",
        "cameras out of step by N frames ...").
    warnings : what the check could not tell (e.g. the synchronisation, when
        the pattern does not change between frames).
    drift : DriftResult (measured on the best pairing of frames).
    sync : SyncResult.
    n_frames : frame pairs matched.
    px_scale : rig-rectified px per check-view px (the check views have the
        cameras' own scale, so about 1 for a rectification that does not zoom).
    points : PointMatches of every frame (check-view px), for plots and tests.
    point_dv : (N,) per-point median dv over the frames, rig-rectified px.
    point_uv : (N, 2) the points, left rig-rectified px.
    """

    holds: bool
    messages: list
    warnings: list
    drift: DriftResult
    sync: SyncResult
    n_frames: int
    px_scale: float
    points: list = field(default_factory=list, repr=False)
    point_dv: np.ndarray = field(default=None, repr=False)
    point_uv: np.ndarray = field(default=None, repr=False)

    @property
    def message(self) -> str:
        return "; ".join(self.messages)

    def to_dict(self) -> dict:
        return {"holds": bool(self.holds), "message": self.message, "warnings": list(self.warnings),
                "n_frames": int(self.n_frames),
                "rig_px_per_camera_px": _num(self.px_scale),
                "vertical_disparity": self.drift.to_dict(), "sync": self.sync.to_dict()}


# ----------------------------------------------------------------- views


def rectified_views(matrix_left, dist_left, matrix_right, dist_right, rectification: dict,
                    image_size) -> RectifiedViews:
    """Remapping tables into check views that keep the rig's rows.

    The views use the rig's rectifying rotations R1, R2, so that a scene point
    lands on the same row of both exactly when the rig's rectification puts it
    on the same row; only their framing differs from the rig's P1, P2: a focal
    length equal to the cameras' mean (speckle keeps its size) and each
    camera's principal ray at the centre of its view (the shared vertical
    principal point is the mean of the two). Why not P1, P2 themselves:
    for a verged rig, OpenCV's zero-disparity rectification can zoom in so
    far that the two rectified images share no part of the scene at all, and
    nothing could be matched. The horizontal framing does not touch vertical
    disparity, and the vertical scale is undone exactly by
    :meth:`RectifiedViews.to_rig`, so results come out in the rig's
    rectified px.

    Parameters
    ----------
    matrix_left, matrix_right : (3, 3) camera matrices, px.
    dist_left, dist_right : (5,) Brown–Conrady [k1, k2, p1, p2, k3].
    rectification : dict with R1, R2 (3, 3) and P1, P2 (3, 4), the rig's
        (OpenCV convention, as in rig.json).
    image_size : (width, height) px of the original images (and of the views).

    Returns
    -------
    RectifiedViews
    """
    from surfrec.calib.rectify import rectification_maps

    w, h = int(image_size[0]), int(image_size[1])
    kl = np.asarray(matrix_left, float)
    kr = np.asarray(matrix_right, float)
    r1 = np.asarray(rectification["R1"], float)
    r2 = np.asarray(rectification["R2"], float)
    p1 = np.asarray(rectification["P1"], float)
    p2 = np.asarray(rectification["P2"], float)
    f = float(np.mean([kl[0, 0], kl[1, 1], kr[0, 0], kr[1, 1]]))
    dirs = []
    for k, r in ((kl, r1), (kr, r2)):
        ray = r @ np.linalg.solve(k, [k[0, 2], k[1, 2], 1.0])
        dirs.append(ray[:2] / ray[2])
    cy = (h - 1) / 2 - f * 0.5 * (dirs[0][1] + dirs[1][1])
    matrices, maps, valid = [], [], []
    for (k, d, r), direction in zip(((kl, dist_left, r1), (kr, dist_right, r2)), dirs):
        m = np.array([[f, 0.0, (w - 1) / 2 - f * direction[0]], [0.0, f, cy], [0.0, 0.0, 1.0]])
        mx, my = rectification_maps(k, d, r, m, (w, h))
        # Lanczos interpolation reads 3 to 4 px beyond the sample: keep clear of the edge.
        ok = (mx >= 3) & (mx <= w - 5) & (my >= 3) & (my <= h - 5)
        matrices.append(m)
        maps.append((mx, my))
        valid.append(ok)
    return RectifiedViews((w, h), tuple(maps), tuple(valid), tuple(matrices), (p1, p2), f)


# ----------------------------------------------------------------- coarse search


def coarse_disparity(left_rect: np.ndarray, right_rect: np.ndarray, *, valid_left=None, valid_right=None,
                     vertical_range: int = 8, min_score: float = 0.6) -> CoarseDisparity:
    """Find the disparity range: a few large tiles searched along whole rows.

    Each tile of the left view is correlated (ZNCC, cv2.matchTemplate with
    TM_CCOEFF_NORMED) with every position of the right view in a band of
    rows ``+-vertical_range`` px around its own, so that disparities of any
    size, even beyond half the image width, are found without a guess; a
    plane is then fitted to the good tiles' disparities.

    Parameters
    ----------
    left_rect, right_rect : (H, W) float rectified views.
    valid_left, valid_right : (H, W) bool, pixels that hold image data
        (default: all).
    vertical_range : px searched above and below each tile's row.
    min_score : ZNCC a tile needs to count as matched.

    Returns
    -------
    CoarseDisparity (a plane of NaN and score -1 when no tile matched).
    """
    layout = _tile_layout(np.shape(left_rect), valid_left, valid_right)
    return _fit_coarse(_tile_matches(left_rect, right_rect, layout, vertical_range), min_score)


@dataclass
class _TileLayout:
    corners: list  # (x0, y0) top-left corners of the left tiles, px
    ok_left: np.ndarray  # windows wholly inside the left data, by top-left corner
    ok_right: np.ndarray  # the same for the right view


def _tile_layout(shape, valid_left, valid_right) -> _TileLayout:
    h, w = shape
    valid_left = np.ones((h, w), bool) if valid_left is None else np.asarray(valid_left, bool)
    valid_right = np.ones((h, w), bool) if valid_right is None else np.asarray(valid_right, bool)
    tw, th = _TILE
    ok_l = _window_ok(valid_left, tw, th)
    ok_r = _window_ok(valid_right, tw, th)
    ys, xs = np.nonzero(ok_l)
    if xs.size == 0:
        return _TileLayout([], ok_l, ok_r)
    # Tile corners spread over the part of the left view that holds data.
    gx = np.round(np.linspace(xs.min(), xs.max(), _TILE_GRID[0] + 2)[1:-1]).astype(int)
    gy = np.round(np.linspace(ys.min(), ys.max(), _TILE_GRID[1] + 2)[1:-1]).astype(int)
    return _TileLayout([(x0, y0) for y0 in gy for x0 in gx], ok_l, ok_r)


def _tile_matches(left, right, layout: _TileLayout, vertical_range):
    left = np.asarray(left, np.float32)
    right = np.asarray(right, np.float32)
    h, w = left.shape
    tw, th = _TILE
    vr = int(vertical_range)
    ok_l, ok_r = layout.ok_left, layout.ok_right
    rows = []
    for x0, y0 in layout.corners:
        if not ok_l[y0, x0]:
            rows.append((x0 + (tw - 1) / 2, y0 + (th - 1) / 2, np.nan, np.nan, -1.0))
            continue
        lo, hi = max(0, y0 - vr), min(h - th, y0 + vr)
        band = right[lo:hi + th]
        res = cv2.matchTemplate(band, left[y0:y0 + th, x0:x0 + tw], cv2.TM_CCOEFF_NORMED)
        res[~ok_r[lo:hi + 1, :w - tw + 1]] = -1.0
        res[~np.isfinite(res)] = -1.0
        iy, ix = np.unravel_index(int(np.argmax(res)), res.shape)
        # Sub-pixel peak by parabolas (plenty for a search range).
        dx = _parabola_peak(res[iy, ix - 1:ix + 2]) if 0 < ix < res.shape[1] - 1 else 0.0
        dy = _parabola_peak(res[iy - 1:iy + 2, ix]) if 0 < iy < res.shape[0] - 1 else 0.0
        ur, vr_ = ix + dx, lo + iy + dy
        rows.append((x0 + (tw - 1) / 2, y0 + (th - 1) / 2, x0 - ur, y0 - vr_, float(res[iy, ix])))
    return np.array(rows, float).reshape(-1, 5)


def _fit_coarse(tiles, min_score):
    if tiles.size == 0:
        return CoarseDisparity(np.full(3, np.nan), math.nan, np.full(3, np.nan), math.nan, tiles, -1.0, 0)
    good = tiles[:, 4] >= min_score
    # The upper quartile, not the median: tiles whose scene lies outside the
    # right view (a large disparity, a parallel rig) score low even for the
    # true pairing, while chance peaks of a wrong pairing stay below ~0.4.
    score = float(np.percentile(tiles[:, 4], 75))
    if not np.any(good):
        return CoarseDisparity(np.full(3, np.nan), math.nan, np.full(3, np.nan), math.nan, tiles, score, 0)
    t = tiles[good]
    plane = np.array([np.median(t[:, 2]), 0.0, 0.0])
    keep = np.ones(len(t), bool)
    if len(t) >= 4:
        a = np.c_[np.ones(len(t)), t[:, 0], t[:, 1]]
        for _ in range(3):
            plane = np.linalg.lstsq(a[keep], t[keep, 2], rcond=None)[0]
            res = np.abs(a @ plane - t[:, 2])
            # A tile off by more than a few px matched something else (or a
            # surface far from the rest): leave it out of the plane.
            new = res <= max(3.0, 3.0 * np.median(res[keep]))
            if new.sum() < 3 or np.array_equal(new, keep):
                break
            keep = new
    resid = t[keep, 2] - (plane[0] + plane[1] * t[keep, 0] + plane[2] * t[keep, 1])
    spread = float(np.sqrt(np.mean(resid**2)))
    vertical = float(np.median(t[keep, 3]))
    vplane = np.array([vertical, 0.0, 0.0])
    if keep.sum() >= 4:
        vplane = np.linalg.lstsq(np.c_[np.ones(keep.sum()), t[keep, 0], t[keep, 1]], t[keep, 3], rcond=None)[0]
    return CoarseDisparity(plane, vertical, vplane, spread, tiles, score, int(good.sum()))


def _window_ok(valid, ww, wh):
    """(H-wh+1, W-ww+1) bool: windows of ww x wh px, top-left at each index, wholly valid."""
    frac = cv2.boxFilter(valid.astype(np.float32), -1, (ww, wh), anchor=(0, 0), normalize=True,
                         borderType=cv2.BORDER_CONSTANT)
    h, w = valid.shape
    return frac[:h - wh + 1, :w - ww + 1] > 0.9999


def _parabola_peak(c):
    denom = c[0] - 2 * c[1] + c[2]
    # A flat or non-concave triple has no interior peak: stay at the sample.
    if not np.isfinite(denom) or denom >= 0:
        return 0.0
    return float(np.clip(0.5 * (c[0] - c[2]) / denom, -0.5, 0.5))


# ----------------------------------------------------------------- 2-D matching


def refine_shift(reference: np.ndarray, moving: np.ndarray, points, initial, *, window: int = 21,
                 max_iterations: int = 20, tolerance: float = 1e-3, max_step: float = 2.0):
    """Sub-pixel 2-D shifts of small windows: inverse-compositional Gauss-Newton.

    For each point p (integer px of ``reference``) finds the shift s that
    minimises the zero-normalised sum of squared differences between the
    window of ``reference`` centred on p and the window of ``moving``
    centred on p + s (the criterion of correlation-based image matching,
    invariant to offset and gain; e.g. Pan, Li and Tong, Exp. Mech. 53 (2013)
    1277). ``moving`` is sampled with cubic B-splines; the reference window
    and its gradients are fixed, which makes each iteration one
    interpolation. Written by hand because OpenCV and scikit-image offer no
    vectorised per-window refinement of this kind (cv2.findTransformECC
    handles one window per call).

    Parameters
    ----------
    reference, moving : (H, W) float images.
    points : (N, 2) integer (u, v) px in ``reference``; windows must lie
        inside it.
    initial : (N, 2) starting shifts (du, dv) px, within about a pixel of
        the answer (an integer ZNCC peak).
    window : odd window size, px.
    max_iterations, tolerance : stop when every update is below
        ``tolerance`` px, or after ``max_iterations``.
    max_step : a point whose shift leaves ``initial`` by more than this (px)
        has diverged and is returned as NaN.

    Returns
    -------
    shift : (N, 2) float64 (du, dv) px, ``moving(p + shift) ~ reference(p)``;
        NaN where the refinement diverged or left the image.
    score : (N,) float64 ZNCC of the final windows, in [-1, 1].
    """
    reference = np.asarray(reference, np.float64)
    moving = np.asarray(moving, np.float64)
    pts = np.asarray(points, int).reshape(-1, 2)
    shift = np.array(initial, np.float64).reshape(-1, 2)
    start = shift.copy()
    n = len(pts)
    if window < 5 or window % 2 == 0:
        raise ValueError(f"window must be an odd number of px >= 5, got {window}")
    r = window // 2
    h, w = reference.shape
    if n and (pts[:, 0].min() - r < 0 or pts[:, 1].min() - r < 0 or pts[:, 0].max() + r >= w
              or pts[:, 1].max() + r >= h):
        raise ValueError("every reference window must lie inside the reference image")
    if n == 0:
        return np.empty((0, 2)), np.empty(0)
    oy, ox = np.mgrid[-r:r + 1, -r:r + 1]
    ox = ox.ravel().astype(float)
    oy = oy.ravel().astype(float)
    # Gradients on the windows only (2 px wider for the 5-tap filter), not the whole image.
    q = np.arange(-r - 2, r + 3)
    rows = np.clip(pts[:, 1, None, None] + q[None, :, None], 0, h - 1)
    cols = np.clip(pts[:, 0, None, None] + q[None, None, :], 0, w - 1)
    big = reference[rows, cols]
    inner = (slice(None), slice(2, -2), slice(2, -2))
    fx = ndimage.correlate1d(big, _DERIV, axis=2, mode="nearest")[inner].reshape(n, -1)
    fy = ndimage.correlate1d(big, _DERIV, axis=1, mode="nearest")[inner].reshape(n, -1)
    f = big[inner].reshape(n, -1)
    f = f - f.mean(axis=1, keepdims=True)
    f_norm = np.sqrt(np.sum(f * f, axis=1))
    hess = np.empty((n, 2, 2))
    hess[:, 0, 0] = np.sum(fx * fx, axis=1)
    hess[:, 0, 1] = hess[:, 1, 0] = np.sum(fx * fy, axis=1)
    hess[:, 1, 1] = np.sum(fy * fy, axis=1)
    det = hess[:, 0, 0] * hess[:, 1, 1] - hess[:, 0, 1] ** 2
    # A textureless window has no defined shift: its Hessian is singular.
    textured = (det > 1e-12 * np.maximum(hess[:, 0, 0] * hess[:, 1, 1], 1e-300)) & (f_norm > 1e-9)
    coeffs = ndimage.spline_filter(moving, order=3, mode="mirror")
    active = textured.copy()
    for _ in range(max_iterations):
        idx = np.nonzero(active)[0]
        if idx.size == 0:
            break
        g_i = _sample(coeffs, pts[idx, 0:1] + shift[idx, 0:1] + ox, pts[idx, 1:2] + shift[idx, 1:2] + oy)
        g_i = g_i - g_i.mean(axis=1, keepdims=True)
        g_norm = np.sqrt(np.sum(g_i * g_i, axis=1))
        # A blank moving window (outside the data) cannot be matched.
        blank = g_norm <= 1e-9
        g_norm[blank] = 1.0
        res = f[idx] - (f_norm[idx] / g_norm)[:, None] * g_i
        bx = np.sum(fx[idx] * res, axis=1)
        by = np.sum(fy[idx] * res, axis=1)
        hi = hess[idx]
        d = det[idx]
        step_x = -(hi[:, 1, 1] * bx - hi[:, 0, 1] * by) / d
        step_y = -(hi[:, 0, 0] * by - hi[:, 0, 1] * bx) / d
        # Inverse composition of translations: the update is subtracted.
        shift[idx, 0] -= step_x
        shift[idx, 1] -= step_y
        far = np.hypot(*(shift[idx] - start[idx]).T) > max_step
        gone = blank | far | ~np.isfinite(shift[idx]).all(axis=1)
        textured[idx[gone]] = False
        done = np.maximum(np.abs(step_x), np.abs(step_y)) < tolerance
        active[idx[done | gone]] = False
    # Score the windows where the shifts ended (one more interpolation).
    ok = np.nonzero(textured)[0]
    score = np.full(n, np.nan)
    if ok.size:
        g_f = _sample(coeffs, pts[ok, 0:1] + shift[ok, 0:1] + ox, pts[ok, 1:2] + shift[ok, 1:2] + oy)
        g_f = g_f - g_f.mean(axis=1, keepdims=True)
        g_norm = np.sqrt(np.sum(g_f * g_f, axis=1))
        with np.errstate(invalid="ignore", divide="ignore"):
            score[ok] = np.sum(f[ok] * g_f, axis=1) / (f_norm[ok] * g_norm)
    shift[~textured] = np.nan
    score[~np.isfinite(score)] = np.nan
    return shift, score


def _sample(coeffs, x, y):
    h, w = coeffs.shape
    # Outside the image the B-spline would extrapolate a mirror image: give
    # zero texture instead so that such windows are dropped as blank.
    out = ndimage.map_coordinates(coeffs, [y.ravel(), x.ravel()], order=3, mode="mirror", prefilter=False)
    out = out.reshape(x.shape)
    outside = (x < 0) | (x > w - 1) | (y < 0) | (y > h - 1)
    if np.any(outside):
        rows = np.any(outside, axis=1)
        out[rows] = 0.0
    return out


def match_points(reference: np.ndarray, moving: np.ndarray, points, predicted, *, window: int = 21,
                 search=(6, 3), valid_moving=None):
    """Match windows of ``reference`` in ``moving``: integer ZNCC search, then :func:`refine_shift`.

    Parameters
    ----------
    reference, moving : (H, W) float images.
    points : (N, 2) integer (u, v) px in ``reference``.
    predicted : (N, 2) expected shifts (du, dv) px.
    window : odd window size, px.
    search : (horizontal, vertical) px searched either side of the
        prediction by cv2.matchTemplate (TM_CCOEFF_NORMED).
    valid_moving : (H, W) bool, pixels of ``moving`` that hold data.

    Returns
    -------
    shift : (N, 2) (du, dv) px; NaN where no match.
    score : (N,) ZNCC after refinement; NaN where no match.
    """
    reference = np.asarray(reference, np.float32)
    moving = np.asarray(moving, np.float32)
    pts = np.asarray(points, int).reshape(-1, 2)
    pred = np.asarray(predicted, float).reshape(-1, 2)
    h, w = moving.shape
    r = window // 2
    sx, sy = int(search[0]), int(search[1])
    ok_m = None if valid_moving is None else _window_ok(np.asarray(valid_moving, bool), window, window)
    init = np.full((len(pts), 2), np.nan)
    for i, ((u, v), (du, dv)) in enumerate(zip(pts, pred)):
        if not (np.isfinite(du) and np.isfinite(dv)):
            continue
        cu, cv = int(round(u + du)), int(round(v + dv))
        x0, x1 = max(0, cu - sx - r), min(w, cu + sx + r + 1)
        y0, y1 = max(0, cv - sy - r), min(h, cv + sy + r + 1)
        if x1 - x0 < window + 2 or y1 - y0 < window + 2:
            continue
        res = cv2.matchTemplate(moving[y0:y1, x0:x1], reference[v - r:v + r + 1, u - r:u + r + 1],
                                cv2.TM_CCOEFF_NORMED)
        if ok_m is not None:
            res[~ok_m[y0:y1 - window + 1, x0:x1 - window + 1]] = -1.0
        res[~np.isfinite(res)] = -1.0
        jy, jx = np.unravel_index(int(np.argmax(res)), res.shape)
        if res[jy, jx] <= 0:
            continue
        # A peak on the edge of the search area is a search that fell short.
        if not (0 < jx < res.shape[1] - 1 and 0 < jy < res.shape[0] - 1):
            continue
        dx = _parabola_peak(res[jy, jx - 1:jx + 2])
        dy = _parabola_peak(res[jy - 1:jy + 2, jx])
        init[i] = (x0 + jx + r + dx - u, y0 + jy + r + dy - v)
    shift = np.full((len(pts), 2), np.nan)
    score = np.full(len(pts), np.nan)
    found = np.isfinite(init).all(axis=1)
    if np.any(found):
        s, c = refine_shift(reference, moving, pts[found], init[found], window=window)
        shift[found] = s
        score[found] = c
    return shift, score


def grid_points(valid_left, valid_right, coarse: CoarseDisparity, *, n_points: int = 400, window: int = 21,
                search=(6, 3)) -> np.ndarray:
    """A regular grid of about ``n_points`` left px whose windows and search areas hold data in both views.

    Parameters
    ----------
    valid_left, valid_right : (H, W) bool.
    coarse : the disparity range (predicts where each point is in the right view).
    n_points : wanted number of points.
    window, search : as in :func:`match_points`.

    Returns
    -------
    (N, 2) int (u, v) px, left view.
    """
    valid_left = np.asarray(valid_left, bool)
    valid_right = np.asarray(valid_right, bool)
    h, w = valid_left.shape
    r = window // 2
    margin_x, margin_y = r + int(search[0]) + 2, r + int(search[1]) + 2
    ok_l = cv2.erode(valid_left.astype(np.uint8), np.ones((window + 2, window + 2), np.uint8),
                     borderType=cv2.BORDER_CONSTANT, borderValue=0).astype(bool)
    ok_r = cv2.erode(valid_right.astype(np.uint8), np.ones((2 * margin_y + 1, 2 * margin_x + 1), np.uint8),
                     borderType=cv2.BORDER_CONSTANT, borderValue=0).astype(bool)

    def usable(step):
        us = np.arange(r + 2, w - r - 2, step)
        vs = np.arange(r + 2, h - r - 2, step)
        uu, vv = np.meshgrid(us, vs)
        uu, vv = uu.ravel(), vv.ravel()
        ur = np.round(uu - coarse.disparity(uu, vv)).astype(int)
        vr = np.round(vv - coarse.vertical_at(uu, vv)).astype(int)
        inside = (ur >= 0) & (ur < w) & (vr >= 0) & (vr < h)
        keep = ok_l[vv, uu] & inside
        keep[inside] &= ok_r[vr[inside], ur[inside]]
        return np.c_[uu[keep], vv[keep]]

    probe = usable(4)
    if len(probe) == 0:
        return probe
    step = max(window // 2, int(round(4 * math.sqrt(len(probe) / max(n_points, 1)))))
    return usable(step)


def measure_vertical_disparity(left_rect: np.ndarray, right_rect: np.ndarray, *, valid_left=None,
                               valid_right=None, coarse: CoarseDisparity | None = None, points=None,
                               n_points: int = 400, window: int = 21, search=(6, 3),
                               min_score: float = 0.7) -> PointMatches:
    """Match a grid of points of the left rectified view in the right one, in two dimensions.

    Parameters
    ----------
    left_rect, right_rect : (H, W) float rectified views (rows are epipolar
        lines when the rig holds).
    valid_left, valid_right : (H, W) bool, pixels that hold image data.
    coarse : the disparity range (found with :func:`coarse_disparity` when None).
    points : (N, 2) int (u, v) left px to match (a grid from
        :func:`grid_points` when None).
    n_points : size of that grid.
    window : matching window, odd px (21 px holds ~25 grains of 4-px speckle).
    search : (horizontal, vertical) px searched around the coarse prediction.
    min_score : matches with a lower ZNCC are dropped (NaN).

    Returns
    -------
    PointMatches: disparity u_left - u_right and vertical disparity
    v_left - v_right, px of the views.
    """
    h, w = np.shape(left_rect)
    valid_left = np.ones((h, w), bool) if valid_left is None else np.asarray(valid_left, bool)
    valid_right = np.ones((h, w), bool) if valid_right is None else np.asarray(valid_right, bool)
    if coarse is None:
        coarse = coarse_disparity(left_rect, right_rect, valid_left=valid_left, valid_right=valid_right)
    if not np.all(np.isfinite(coarse.plane)):
        empty = np.empty(0)
        return PointMatches(empty, empty, empty, empty, empty)
    if points is None:
        points = grid_points(valid_left, valid_right, coarse, n_points=n_points, window=window, search=search)
    pts = np.asarray(points, int).reshape(-1, 2)
    pred = -np.c_[coarse.disparity(pts[:, 0], pts[:, 1]), coarse.vertical_at(pts[:, 0], pts[:, 1])]
    shift, score = match_points(left_rect, right_rect, pts, pred, window=window, search=search,
                                valid_moving=valid_right)
    bad = ~(score >= min_score)
    shift[bad] = np.nan
    return PointMatches(pts[:, 0].astype(float), pts[:, 1].astype(float), -shift[:, 0], -shift[:, 1], score)


# ----------------------------------------------------------------- sync


def check_sync(left_rect: Sequence[np.ndarray], right_rect: Sequence[np.ndarray], *, valid_left=None,
               valid_right=None, max_offset: int = 2, vertical_range: int = 8,
               min_score: float = 0.6) -> tuple[SyncResult, dict]:
    """Which right frame goes with each left frame? Correlate left t with right t+k.

    The projector casts a new random pattern every frame, so only the right
    pairing correlates: the tile search of :func:`coarse_disparity` gives a
    ZNCC near 1 for it and a chance level (~0.3 for a whole-row search) for
    a neighbour frame.

    Parameters
    ----------
    left_rect, right_rect : sequences of (H, W) rectified views; left frame
        t is compared with right frames t - max_offset ... t + max_offset
        where they exist (pass a few more right frames than left ones to
        test every left frame at every offset).
    valid_left, valid_right : (H, W) bool.
    max_offset : largest frame offset tried.
    vertical_range : px searched above and below each tile's row.
    min_score : median tile ZNCC a true pairing reaches.

    Returns
    -------
    SyncResult, and {k: [CoarseDisparity of each pairing (t, t + k)]}.
    """
    coarse = {}
    layout = _tile_layout(np.shape(left_rect[0]), valid_left, valid_right) if len(left_rect) else None
    for k in range(-int(max_offset), int(max_offset) + 1):
        found = []
        for t in range(len(left_rect)):
            if 0 <= t + k < len(right_rect):
                tiles = _tile_matches(left_rect[t], right_rect[t + k], layout, vertical_range)
                found.append(_fit_coarse(tiles, min_score))
        if found:
            coarse[k] = found
    scores = {k: float(np.median([c.score for c in cs])) for k, cs in coarse.items()}
    if not scores:
        return SyncResult(0, {}, False, min_score), coarse
    good = [k for k, s in scores.items() if s >= min_score]
    best = max(scores, key=lambda k: (scores[k], -abs(k)))
    if len(good) == 1:
        return SyncResult(good[0], scores, True, min_score), coarse
    # No pairing matched (another scene, a far move) or several did (a
    # pattern that stays the same): the pairing cannot be told.
    return SyncResult(0 if 0 in good or not good else best, scores, False, min_score), coarse


# ----------------------------------------------------------------- verdict


def assess_drift(u, v, dv, *, tolerance: float = 0.3) -> DriftResult:
    """Statistics and trend of the vertical disparity of matched points.

    Fits ``dv = a + b (u - u0) + c (v - v0)`` by least squares about the
    centre (u0, v0) of the points, after leaving out points more than five
    scaled median absolute deviations from a first fit (mismatches, not
    geometry). A relative roll of the views by a small angle theta about the
    optical axis turns rows by theta, so ``b = -tan(theta)`` (pinhole model);
    a relative pitch shifts every row (a); a change of vertical focal length
    scales rows about the centre (c).

    Parameters
    ----------
    u, v : (N,) point positions, px (left rectified view).
    dv : (N,) vertical disparity v_left - v_right, px (NaN: not measured).
    tolerance : the rig has moved when the 95th percentile of |dv| exceeds it, px.

    Returns
    -------
    DriftResult
    """
    u = np.asarray(u, float).ravel()
    v = np.asarray(v, float).ravel()
    dv = np.asarray(dv, float).ravel()
    if not (u.shape == v.shape == dv.shape):
        raise ValueError("u, v and dv must have the same length")
    ok = np.isfinite(u) & np.isfinite(v) & np.isfinite(dv)
    u, v, dv = u[ok], v[ok], dv[ok]
    n = len(dv)
    if n < 3:
        nan = math.nan
        return DriftResult(n, nan, nan, {"offset_px": nan, "slope_u_px_per_1000px": nan,
                                         "slope_v_px_per_1000px": nan, "centre_px": [nan, nan],
                                         "residual_rms_px": nan}, nan, tolerance, False)
    u0, v0 = float(np.mean(u)), float(np.mean(v))
    a = np.c_[np.ones(n), u - u0, v - v0]
    keep = np.ones(n, bool)
    coef = np.linalg.lstsq(a, dv, rcond=None)[0]
    for _ in range(3):
        res = dv - a @ coef
        mad = 1.4826 * np.median(np.abs(res[keep] - np.median(res[keep])))
        # Floor: a noise-free fit must not throw away good points for rounding.
        new = np.abs(res) <= max(5 * mad, 1e-3)
        if new.sum() < 3 or np.array_equal(new, keep):
            break
        keep = new
        coef = np.linalg.lstsq(a[keep], dv[keep], rcond=None)[0]
    res = dv[keep] - a[keep] @ coef
    d = dv[keep]
    median = float(np.median(d))
    p95 = float(np.percentile(np.abs(d), 95))
    trend = {"offset_px": float(coef[0]), "slope_u_px_per_1000px": float(1000 * coef[1]),
             "slope_v_px_per_1000px": float(1000 * coef[2]), "centre_px": [u0, v0],
             "residual_rms_px": float(np.sqrt(np.mean(res**2)))}
    roll = float(np.degrees(-np.arctan(coef[1])))
    return DriftResult(int(keep.sum()), median, p95, trend, roll, float(tolerance), bool(p95 > tolerance))


# ----------------------------------------------------------------- driver


MOVED = "rig has moved: recalibrate (or re-pose with --keep-intrinsics)"
HOLDS = "rig holds"


def check_rig(left_frames: Sequence[np.ndarray], right_frames: Sequence[np.ndarray], views: RectifiedViews, *,
              tolerance: float = 0.3, max_offset: int = 2, n_points: int = 400, window: int = 21,
              vertical_range: int = 8, min_score: float = 0.7) -> RigCheck:
    """Does the calibration still hold for these frames? Drift and synchronisation in one pass.

    Parameters
    ----------
    left_frames : sequence of (H, W) original (unrectified) left frames,
        float, the first few of a run.
    right_frames : the right frames, as many as the left ones or up to
        ``max_offset`` more (the extra ones let every left frame be tried
        against later right frames).
    views : :func:`rectified_views` of the rig.
    tolerance : px of the rig's rectified images; the rig has moved when
        the 95th percentile of |vertical disparity| exceeds it.
    max_offset : largest frame offset of the synchronisation check.
    n_points : grid points matched per frame pair.
    window : matching window, odd px.
    vertical_range : px of vertical disparity the coarse search covers.
    min_score : ZNCC below which a point match is dropped.

    Returns
    -------
    RigCheck. The findings are in ``messages``; this function raises
    nothing for a moved rig (the caller decides).
    """
    nl = len(left_frames)
    nr = len(right_frames)
    if nl == 0:
        raise InputError("no frame pairs to check")
    left_rect = [views.remap(f, "left") for f in left_frames]
    right_rect = [views.remap(f, "right") for f in right_frames]
    vl, vr = views.valid
    sync, coarse = check_sync(left_rect, right_rect, valid_left=vl, valid_right=vr, max_offset=max_offset,
                              vertical_range=vertical_range)
    messages = []
    k = sync.offset
    pairs = [(t, t + k) for t in range(nl) if 0 <= t + k < nr]
    if not sync.determined and max(sync.scores.values(), default=-1) < sync.min_score:
        drift = assess_drift([], [], [], tolerance=tolerance)
        messages.append(
            f"no match between the left and right images within {vertical_range} px of vertical disparity "
            f"and {max_offset} frames of offset: the rig has moved far, or the images are not a stereo pair "
            "of one scene; recalibrate (or re-pose with --keep-intrinsics)")
        return RigCheck(False, messages, [], drift, sync, 0, views.px_scale)
    # One disparity range from every good tile of the chosen pairing.
    good = [c for c in coarse.get(k, []) if c.n_good]
    tiles = np.concatenate([c.tiles for c in good]) if good else np.empty((0, 5))
    plan = _fit_coarse(tiles, sync.min_score)
    search = (max(6, int(math.ceil(3 * plan.spread)) + 2), 3)
    pts = grid_points(vl, vr, plan, n_points=n_points, window=window, search=search)
    matches = []
    for tl, tr in pairs:
        matches.append(measure_vertical_disparity(left_rect[tl], right_rect[tr], valid_left=vl, valid_right=vr,
                                                  coarse=plan, points=pts, window=window, search=search,
                                                  min_score=min_score))
    if matches and len(pts):
        dv = np.stack([m.vertical for m in matches])
        count = np.sum(np.isfinite(dv), axis=0)
        # A point counts when most frames matched it; the median over frames
        # keeps one bad frame (a glint, a passing bubble) from moving it.
        keep = count >= max(1, (len(matches) + 1) // 2)
        point_dv = np.full(len(pts), np.nan)
        if np.any(keep):
            point_dv[keep] = np.nanmedian(dv[:, keep], axis=0)
        u_rig, v_rig, dv_rig = views.to_rig(pts[:, 0], pts[:, 1], point_dv)
    else:
        u_rig = v_rig = dv_rig = np.empty(0)
    drift = assess_drift(u_rig, v_rig, dv_rig, tolerance=tolerance)
    if drift.n_points < 10:
        messages.append(f"only {drift.n_points} points matched: cannot tell whether the rig holds; "
                        "check that the images show the speckle-lit water")
    elif drift.moved:
        messages.append(MOVED)
    if sync.determined and k != 0:
        messages.append(f"cameras out of step by {abs(k)} frames (left frame t matches right frame t{k:+d})")
    warnings = []
    if not sync.determined:
        warnings.append("the frame synchronisation cannot be checked: more than one frame offset correlates "
                        "(" + ", ".join(f"{j:+d}: {c:.2f}" for j, c in sorted(sync.scores.items()))
                        + "); does the projected pattern change every frame?")
    holds = not messages
    if holds:
        messages.append(HOLDS)
    return RigCheck(holds, messages, warnings, drift, sync, len(matches), views.px_scale, matches,
                    dv_rig, np.c_[u_rig, v_rig])


def _num(x):
    x = float(x)
    return x if math.isfinite(x) else None
