"""Pixels that must not enter a correlation window: saturated, hot, dead.

Real cameras give frames with pixels that carry no speckle: specular glints
on the water saturate (in one camera and not the other, since they depend on
the view), some pixels are stuck hot or dead, and every saturated blob has a
halo in which the glint's light still adds to the speckle. Such pixels would
pull a window's ZNCC down and drag its sub-pixel estimate, so the matcher
leaves them out of the window sums (surfrec.match.kernels.icgn_refine).

Three steps per frame, on the original (unrectified) camera image
(:func:`prepare_frame`):

1. :meth:`DefectSettings.coded_mask`: saturated pixels grown over the
   glint's unsaturated shoulder (:func:`glint_shoulders`), coded GLINT, and
   the camera's fixed defects (estimated from the still-water frames by
   :func:`estimate_fixed_defects`, or given by the user), coded DEFECT, both
   grown by a halo (:func:`bad_pixel_mask`);
2. :func:`fill_bad_pixels`: those pixels replaced by a smooth fill from their
   good neighbours, so that the rectification's spline and the integer
   search see no extreme values — the fill carries no speckle, and the
   refinement leaves the pixels out entirely;
3. the mask is carried into the rectified view with the frame, bit by bit
   (:func:`rectify_mask`: a pixel is bad there when any of the original
   pixels it is interpolated from is).

The matcher then gives per-pixel weights only to windows that hold bad
pixels, and solves the windows that hold a glint again without their outlier
pixels (:func:`near_bad_pixels` picks them).

The steps use OpenCV's morphology and Gaussian filters; what is ours is the
rule for which pixels are bad.
"""

from __future__ import annotations

import cv2
import numpy as np

__all__ = ["DefectSettings", "bad_pixel_mask", "glint_shoulders", "fill_bad_pixels", "estimate_fixed_defects",
           "rectify_mask", "prepare_frame", "near_bad_pixels", "GLINT", "DEFECT"]

# Defaults (recorded in disparity.h5 with the other matcher settings).
GLINT = 1  # mask bit: saturated, or the unsaturated shoulder of a saturated area
DEFECT = 2  # mask bit: a fixed defect of the camera (hot, dead)
SATURATION = 0.98  # fraction of full scale at and above which a pixel counts as saturated
EXTREMUM_SPREADS = 0.4  # see estimate_fixed_defects
GLINT_ENVELOPE_PX = 9  # about two speckle grains of the default 4 px speckle
GLINT_RISE = 0.25  # see glint_shoulders
HALO_PX = 2  # growth of a saturated or defective area, px (PSF and interpolation taps)


class DefectSettings:
    """How bad pixels are found in each frame.

    Parameters
    ----------
    saturation : fraction of full scale (frames scaled to [0, 1]) at and above
        which a pixel is saturated; None or >= 1.5 turns the test off.
    halo_px : radius by which bad areas are grown, px.
    fixed_left, fixed_right : (H, W) bool or None, the cameras' fixed defect
        maps (hot and dead pixels), original image px.
    """

    def __init__(self, saturation: float | None = SATURATION, halo_px: int = HALO_PX, fixed_left=None,
                 fixed_right=None):
        self.saturation = saturation
        self.halo_px = int(halo_px)
        self.fixed = {"left": _as_mask(fixed_left), "right": _as_mask(fixed_right)}

    def coded_mask(self, frame, side: str) -> np.ndarray:
        """Bad pixels of one frame coded by cause (uint8, original px): GLINT | DEFECT bits, 0 good."""
        glint = bad_pixel_mask(frame, saturation=self.saturation, fixed=None, halo_px=self.halo_px)
        out = glint.astype(np.uint8) * np.uint8(GLINT)
        if self.fixed[side] is not None:
            defect = bad_pixel_mask(frame, saturation=None, fixed=self.fixed[side], halo_px=self.halo_px)
            out |= defect.astype(np.uint8) * np.uint8(DEFECT)
        return out

    def to_dict(self) -> dict:
        return {"saturation": float("nan") if self.saturation is None else float(self.saturation),
                "halo_px": self.halo_px,
                "fixed_defects_left": int(self.fixed["left"].sum()) if self.fixed["left"] is not None else 0,
                "fixed_defects_right": int(self.fixed["right"].sum()) if self.fixed["right"] is not None else 0}


def _as_mask(m):
    return None if m is None else np.asarray(m, dtype=bool)


def glint_shoulders(frame, saturated, *, envelope_px: int = GLINT_ENVELOPE_PX, rise: float = GLINT_RISE) -> np.ndarray:
    """Saturated areas grown over the glint's unsaturated shoulder.

    A glint adds light on top of the speckle, and past its saturated core the
    added light fades over several pixels: there the dark speckle grains are
    no longer dark. So the local minimum over ``envelope_px`` (a grey-level
    erosion, which follows the dark grains) rises above that of the
    surrounding field. A pixel belongs to the shoulder where its local
    minimum exceeds the field's (a robust, coarse background of the local
    minima) by more than ``rise`` of the field's speckle contrast (background
    of local maxima minus background of local minima), and it is connected
    to a saturated core: bright patches of the scene itself are left alone.

    Parameters
    ----------
    frame : (H, W) float, scaled to [0, 1].  saturated : (H, W) bool.
    envelope_px : px, side of the erosion (about two speckle grains).
    rise : dimensionless fraction of the local speckle contrast.

    Returns
    -------
    (H, W) bool, the saturated cores and their shoulders.
    """
    f = np.ascontiguousarray(frame, dtype=np.float32)
    k = cv2.getStructuringElement(cv2.MORPH_RECT, (envelope_px, envelope_px))
    lo = cv2.erode(f, k)
    hi = cv2.dilate(f, k)
    base_lo = _coarse_background(lo)
    base_hi = _coarse_background(hi)
    shoulder = (lo - base_lo) > rise * np.maximum(base_hi - base_lo, 1e-3)
    cand = np.ascontiguousarray(shoulder | saturated).view(np.uint8)
    n, labels = cv2.connectedComponents(cand, connectivity=8)
    keep = np.zeros(n, bool)
    keep[np.unique(labels[saturated])] = True
    keep[0] = False
    return keep[labels]


def _coarse_background(img, cell: int = 16):
    # The field's level on scales of many speckles: block means, a 5x5 median over blocks (robust to
    # a glint filling a few blocks), back to full size.
    h, w = img.shape
    small = cv2.resize(img, (max(1, w // cell), max(1, h // cell)), interpolation=cv2.INTER_AREA)
    if min(small.shape) >= 5:
        small = cv2.medianBlur(small, 5)
    return cv2.resize(small, (w, h), interpolation=cv2.INTER_LINEAR)


def bad_pixel_mask(frame, *, saturation: float | None = SATURATION, fixed=None, halo_px: int = HALO_PX,
                   envelope_px: int | None = GLINT_ENVELOPE_PX) -> np.ndarray:
    """Pixels of one frame that must not enter a correlation window.

    Parameters
    ----------
    frame : (H, W) float, scaled to [0, 1] of full scale (surfrec.io.images).
    saturation : fraction of full scale; pixels at or above it are saturated.
        None turns the test off.
    fixed : (H, W) bool or None, the camera's fixed defects (hot, dead).
    halo_px : px, radius by which the bad areas are grown: a glint's light
        spreads past its saturated core through the lens PSF, and every
        interpolation tap that touches a bad pixel carries it.
    envelope_px : px or None, see :func:`glint_shoulders` (None: saturated
        pixels only, no shoulders).

    Returns
    -------
    bad : (H, W) bool.
    """
    a = np.asarray(frame)
    if saturation is not None and saturation < 1.5:
        bad = a >= np.float32(saturation)
        if envelope_px and bad.any():
            bad = glint_shoulders(a, bad, envelope_px=envelope_px)
    else:
        bad = np.zeros(a.shape, bool)
    if fixed is not None:
        if fixed.shape != a.shape:
            raise ValueError(f"defect map of {fixed.shape[1]}x{fixed.shape[0]} px does not fit "
                             f"{a.shape[1]}x{a.shape[0]} px frames")
        bad |= fixed
    if halo_px > 0 and bad.any():
        k = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * halo_px + 1, 2 * halo_px + 1))
        bad = cv2.dilate(bad.view(np.uint8), k).view(bool)
    return bad


def fill_bad_pixels(frame, bad, *, sigma_px: float = 2.0) -> np.ndarray:
    """Replace bad pixels by a smooth fill from their good neighbours.

    Normalised convolution (Knutsson & Westin, CVPR 1993): G * (I m) / G * m
    with m the good-pixel indicator and G a Gaussian of ``sigma_px``, where
    G * m >= 1e-3 (near good pixels); deeper inside a large blob, the
    field's coarse level (block means of the good pixels, a robust 5x5 median
    over blocks). Good pixels keep their values exactly. The fill carries no
    speckle and never enters the refinement's sums (the pixels stay masked);
    it only keeps extreme values away from the interpolation and the integer
    search, so a cheap smooth fill is enough.

    Parameters
    ----------
    frame : (H, W) float32.  bad : (H, W) bool.
    sigma_px : px, width of the fill's Gaussian.

    Returns
    -------
    filled : (H, W) float32 (``frame`` itself when nothing is bad).
    """
    if not bad.any():
        return frame
    img = np.asarray(frame, np.float32)
    good = (~bad).astype(np.float32)
    out = img.copy()
    num = cv2.GaussianBlur(img * good, (0, 0), float(sigma_px), borderType=cv2.BORDER_REFLECT)
    den = cv2.GaussianBlur(good, (0, 0), float(sigma_px), borderType=cv2.BORDER_REFLECT)
    near = bad & (den > 1e-3)  # 1e-3: the fill is an average of at least this weight of good pixels
    out[near] = num[near] / den[near]
    deep = bad & ~near
    if deep.any():
        level = _coarse_background(np.where(bad, np.float32(np.median(img[~bad])) if (~bad).any() else 0.0, img))
        out[deep] = level[deep]
    return out


def prepare_frame(frame, side: str, rectifier, settings: DefectSettings | None):
    """One original frame made ready for matching: bad pixels found, filled, and both rectified.

    Parameters
    ----------
    frame : (H, W) float, original camera image scaled to [0, 1].
    side : "left" or "right".  rectifier : surfrec.match.rectification.FrameRectifier.
    settings : DefectSettings, or None to rectify the frame as it is.

    Returns
    -------
    rectified : (H, W) float32; bad : (H, W) uint8 rectified mask, non-zero = bad
        (bits GLINT for saturated pixels and their shoulders, DEFECT for the
        fixed defects), or None when the frame has no bad pixel.
    """
    if settings is None:
        return rectifier(frame, side), None
    code = settings.coded_mask(frame, side)
    bad = code != 0
    if not bad.any():
        return rectifier(frame, side), None
    filled = fill_bad_pixels(np.asarray(frame, np.float32), bad)
    maps = rectifier.maps[side]
    rect = np.zeros(maps[0].shape, np.uint8)
    for bit in (GLINT, DEFECT):
        part = (code & bit) != 0
        if part.any():
            rect |= rectify_mask(part, *maps) * np.uint8(bit)
    return rectifier(filled, side), rect


def near_bad_pixels(bad_left, bad_right, us, vs, shift, size: int, bits: int = 0xFF) -> np.ndarray:
    """Points with a bad pixel within a square of ``size`` px about them (left, or right at ``shift``).

    Parameters
    ----------
    bad_left, bad_right : (T, H, W) or (H, W) uint8 rectified masks, or None.
    us, vs : (N,) int px, rectified left.  shift : (N,) int px, the disparity (right = u - shift).
    size : odd px, side of the square.
    bits : which mask bits count (default: any).

    Returns
    -------
    (N,) bool.
    """
    out = np.zeros(np.shape(us), bool)
    for mask, off in ((bad_left, 0), (bad_right, shift)):
        if mask is None:
            continue
        m = (np.asarray(mask) & np.uint8(bits)) != 0
        m = m.any(axis=0) if m.ndim == 3 else m
        if not m.any():
            continue
        box = cv2.boxFilter(m.astype(np.float32), -1, (size, size), normalize=False, borderType=cv2.BORDER_CONSTANT)
        cu = np.asarray(us) - off
        inside = (cu >= 0) & (cu < box.shape[1])
        out[inside] |= box[np.asarray(vs)[inside], cu[inside]] > 0.5
    return out


def rectify_mask(bad, map_x, map_y) -> np.ndarray:
    """A bad-pixel mask carried into a rectified view.

    A rectified pixel is bad when any of the four original pixels around its
    source position is (bilinear footprint), and outside the image nothing
    is bad (those pixels are never matched).

    Parameters
    ----------
    bad : (H, W) bool, original px.  map_x, map_y : float32 rectification maps.

    Returns
    -------
    (H, W) uint8, 1 = bad.
    """
    m = np.ascontiguousarray(bad, dtype=np.uint8) * np.uint8(255)
    r = cv2.remap(m, map_x, map_y, cv2.INTER_LINEAR, borderMode=cv2.BORDER_CONSTANT, borderValue=0)
    return (r > 0).astype(np.uint8)


def estimate_fixed_defects(frames, *, threshold: float = 6.0, max_area_px: int = 4) -> np.ndarray:
    """Fixed defects (hot and dead pixels) of one camera, from speckle frames whose pattern changes.

    A working pixel sees the same smooth speckle as its neighbours (the
    speckle grain spans several pixels), so in every frame it lies close to
    the median of its 3x3 neighbourhood; a hot or dead pixel, stuck or
    offset, departs from it in every frame, always in the same direction.
    Since the projector shows a new pattern every frame, a working pixel
    departs far only by chance, and not in every frame in the same
    direction: a pixel is defective when its departure has one sign and
    exceeds three robust spreads (1.4826 MAD of that frame's departures,
    common practice) in every frame, and ``threshold`` spreads in the median
    frame; or when it stands beyond all 8 neighbours (brighter than the
    brightest, or darker than the darkest) in every frame, which smooth
    speckle never does at a single pixel: a stuck pixel, whatever its level. This is the usual test of
    defect-pixel correction against a median of the neighbours (common
    practice), made safe against chance by asking it of every frame.

    Only small groups among changing pixels count (at most ``max_area_px``
    connected pixels, with at most 2 of the 8 neighbours fixed): a larger group, or the corner of a structure that does not
    change (a fixed glint of the still water, an object), is not a sensor
    defect.

    Parameters
    ----------
    frames : (N, H, W) float, N >= 2 speckle frames of one camera, each with
        its own pattern, scaled to [0, 1].
    threshold : departure in robust spreads (dimensionless).
    max_area_px : px, the largest defect cluster.

    Returns
    -------
    defects : (H, W) bool.
    """
    a = np.asarray(frames, dtype=np.float32)
    if a.ndim != 3 or a.shape[0] < 2:
        raise ValueError("estimating the defect map needs at least two speckle frames with different patterns")
    z = np.empty(a.shape, np.float32)
    ext = np.empty(a.shape, np.float32)
    ring = np.ones((3, 3), np.uint8)
    ring[1, 1] = 0
    for t, frame in enumerate(a):
        f = np.ascontiguousarray(frame)
        r = f - cv2.medianBlur(f, 3)
        sigma = 1.4826 * float(np.median(np.abs(r - np.median(r))))
        z[t] = r / max(sigma, 1e-4)  # 1e-4 of full scale: below any sensor's noise, guards a flat frame
        # How far the pixel stands beyond all 8 neighbours (above the brightest or below the darkest),
        # in robust spreads of the differences between neighbouring pixels.
        d = np.diff(f, axis=1)
        sd = max(1.4826 * float(np.median(np.abs(d - np.median(d)))), 1e-4)
        ext[t] = np.maximum(f - cv2.dilate(f, ring), cv2.erode(f, ring) - f) / sd
    # (a) Beyond every neighbour in every frame by EXTREMUM_SPREADS: stuck hot or dead (smooth speckle
    # has no such single-pixel peaks: on rendered frames working pixels stay below 0.12).
    stuck = np.all(ext > EXTREMUM_SPREADS, axis=0)
    # (b) Off the median with one sign, beyond `floor` spreads in every frame and `threshold` in the
    # median frame: an offset (dark-current) hot pixel that still follows the speckle.
    floor = 3.0
    zmed = np.median(z, axis=0)
    high = stuck | (np.all(z > floor, axis=0) & (zmed > threshold))
    low = np.all(z < -floor, axis=0) & (zmed < -threshold)
    cand = high | low
    # Next to saturated pixels (a glint of the still water, masked in every frame anyway) the
    # speckle is distorted in every frame alike: no test of defects there.
    sat = np.any(a >= np.float32(SATURATION), axis=0)
    if sat.any():
        # Saturated areas only: a stuck hot pixel saturates too.
        n, labels, stats, _ = cv2.connectedComponentsWithStats(sat.view(np.uint8), connectivity=8)
        big = stats[:, cv2.CC_STAT_AREA] > max_area_px
        big[0] = False
        sat = big[labels]
    if sat.any():
        near = cv2.dilate(sat.view(np.uint8), cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (11, 11)))
        cand &= near == 0
    if not cand.any():
        return cand
    # A defect sits among pixels that follow the speckle; the corner of a fixed structure (a still
    # glint, an object's edge) departs from its median too, but several of its neighbours do not
    # change at all. So at most 2 of the 8 neighbours may be fixed (a frame-to-frame range below a
    # twentieth of the image's typical one).
    spread = a.max(axis=0) - a.min(axis=0)
    fixed = (spread < 0.05 * float(np.median(spread))).astype(np.float32)
    n_fixed = cv2.filter2D(fixed, -1, ring.astype(np.float32), borderType=cv2.BORDER_REFLECT)
    cand &= n_fixed <= 2.5
    if not cand.any():
        return cand
    n, labels, stats, _ = cv2.connectedComponentsWithStats(cand.view(np.uint8), connectivity=8)
    small = stats[:, cv2.CC_STAT_AREA] <= max_area_px
    small[0] = False
    return small[labels]


