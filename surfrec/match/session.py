"""Matching a run, set up once: the shared code path of ``surfrec match`` and ``surfrec run``.

:func:`prepare_matching` turns a rig, a datum, the run's frame times and the
matcher options into a :class:`MatchSetup` (grid, band centres, band width,
mask, rectifier); :func:`match_frames` matches any set of frames with it. A
frame's result depends only on the frames of its own time window, the rig
and the datum (docs/conventions.md), so matching frames 0..99 in one call and 100..199
in another gives exactly what one call over 0..199 gives: that is what lets
``surfrec run`` cut a run into chunks and process them in parallel.

Nothing here opens a file: frames come in as sequences that decode on
indexing (``surfrec.io.images.FrameSequence``, or plain lists of arrays).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from surfrec.match.pipeline import (FLAG_BLANK, FLAG_DROPPED, FLAG_FEW_VALID, FLAG_UNREADABLE, MatchParams,
                                    RectifiedCache, band_halfwidth_px, is_blank, match_frame, matching_grid,
                                    reference_on_grid, time_window_indices)

__all__ = ["MatchSetup", "FrameResult", "prepare_matching", "match_frames", "window_of"]

# A frame with fewer valid points than this fraction is flagged few_valid_points.
FEW_VALID_FRACTION = 0.5


@dataclass
class MatchSetup:
    """Everything needed to match any frame of one run (computed once per run, per process).

    Attributes
    ----------
    params : MatchParams (band_px filled in).
    rectifier : surfrec.match.rectification.FrameRectifier
    grid_u, grid_v : (Nu,), (Nv,) int, rectified left-image px.
    centre : (Nv, Nu) float, the datum's reference disparity on the grid, px (band centres).
    band : int, half-width of the integer search, px.
    measure : (Nv, Nu) bool or None, points the mask allows.
    times : (N,) float, s, the time of every frame of the run (left camera).
    dt_frame : float, s, the median frame interval (unit of the time-window taus).
    segment : (N,) int or None, contiguous-segment label of every frame: a time
        window never reaches across a dropped frame into another segment.
    speckle_px : float, the speckle size measured on the first frame, px.
    """

    params: MatchParams
    rectifier: object
    grid_u: np.ndarray
    grid_v: np.ndarray
    centre: np.ndarray
    band: int
    measure: np.ndarray | None
    times: np.ndarray
    dt_frame: float
    segment: np.ndarray | None = None
    speckle_px: float = float("nan")
    defects: object = None
    extra: dict = field(default_factory=dict)

    @property
    def shape(self):
        """(Nv, Nu) of every per-frame array."""
        return (len(self.grid_v), len(self.grid_u))


@dataclass
class FrameResult:
    """One matched frame: (Nv, Nu) float32 arrays (NaN invalid), its flags and rejection counts."""

    index: int
    disparity: np.ndarray
    disparity_sigma: np.ndarray
    score: np.ndarray
    flags: int
    reasons: dict


def prepare_matching(rig, datum, first_left_frame, times, *, window=None, spacing=None, time_window: int = 1,
                     max_excursion_mm: float = 5.0, rectify_method: str = "bspline3", mask_image=None,
                     segment=None, shape_order: int = 1, saturation: float | None = None,
                     halo_px: int | None = None, bad_pixels: bool = True) -> MatchSetup:
    """Set up the matching of one run.

    Parameters
    ----------
    rig : surfrec.io.rigfile.StereoRig
    datum : surfrec.io.datumfile.Datum, made with ``rig``.
    first_left_frame : (H, W) float array, the run's first left frame (its
        speckle size sets the default window).
    times : (N,) float, s, frame times of the run.
    window, spacing : int px or None (None: the datum's, else the speckle-size
        default window and 4 px).
    time_window : odd number of frames correlated together.
    max_excursion_mm : largest surface excursion from the datum, mm (sets the band).
    rectify_method : see surfrec.match.rectification.METHODS.
    mask_image : (H, W) array or None, left-camera (unrectified) mask, non-zero = measure.
    segment : (N,) int or None, contiguous-segment labels (see :class:`MatchSetup`).
    shape_order : 1 or 2, the IC-GN shape function (see MatchParams).
    saturation : fraction of full scale at and above which a pixel is
        saturated and left out of the correlation windows (None: the default,
        surfrec.match.defects.SATURATION; a value >= 1.5 turns the test off).
    halo_px : growth of saturated and defective areas, px (None: the default).
    bad_pixels : False uses every pixel as it is (no saturation test, no defect maps).
    The datum's fixed defect maps (hot and dead pixels), when it holds them,
    are left out of every window too.

    Returns
    -------
    MatchSetup

    Raises
    ------
    ValueError
        The datum holds no valid reference disparity on the grid, or defect
        maps of another image size.
    """
    from surfrec.match.defects import HALO_PX, SATURATION, DefectSettings
    from surfrec.match.rectification import FrameRectifier
    from surfrec.match.speckle import default_window, speckle_size_px
    from surfrec.match.validity import window_fully_inside

    times = np.asarray(times, dtype=np.float64)
    speckle = speckle_size_px(first_left_frame)
    # The datum's grid by default, so the reference disparity needs no interpolation.
    window = window or _int_attr(datum.attrs, "window_px") or default_window(speckle)
    spacing = spacing or _int_attr(datum.attrs, "spacing_px") or 4
    params = MatchParams(window=window, spacing=spacing, time_window=time_window, max_excursion_mm=max_excursion_mm,
                         rectify_method=rectify_method, shape_order=shape_order)
    rectifier = FrameRectifier(rig, rectify_method)
    gu, gv = matching_grid(rig.image_size, spacing, window)
    centre = reference_on_grid(datum.u, datum.v, datum.disparity, gu, gv)
    if not np.isfinite(centre).any():
        raise ValueError("holds no valid reference disparity on the matching grid")
    c = float(rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2])
    band = band_halfwidth_px(centre, abs(datum.plane_offset), c, max_excursion_mm)
    params.band_px = band
    measure = None
    if mask_image is not None:
        rect = rectifier.mask(mask_image)
        vv, uu = np.meshgrid(gv, gu, indexing="ij")
        measure = window_fully_inside(rect, uu, vv, window)
    dt_frame = float(np.median(np.diff(times))) if times.size > 1 else 1.0
    fixed = {}
    for side in ("left", "right"):
        m = getattr(datum, f"defects_{side}", None)
        if m is not None and tuple(m.shape[::-1]) != tuple(rig.image_size):
            raise ValueError(f"holds a {side} defect map of {m.shape[1]}x{m.shape[0]} px, but the rig's images are "
                             f"{rig.image_size[0]}x{rig.image_size[1]} px")
        fixed[side] = m
    defects = DefectSettings(SATURATION if saturation is None else saturation,
                             HALO_PX if halo_px is None else halo_px, fixed["left"], fixed["right"]) if bad_pixels else None
    return MatchSetup(params=params, rectifier=rectifier, grid_u=gu, grid_v=gv, centre=centre, band=band,
                      measure=measure, times=times, dt_frame=dt_frame,
                      segment=None if segment is None else np.asarray(segment), speckle_px=float(speckle),
                      defects=defects)


def window_of(setup: MatchSetup, i: int) -> list[int]:
    """Frames of frame i's time window: consecutive frames, clipped to the run and to i's segment."""
    idx = time_window_indices(i, setup.times.size, setup.params.time_window)
    if setup.segment is not None:
        idx = [j for j in idx if setup.segment[j] == setup.segment[i]]
    return idx


def match_frames(setup: MatchSetup, left_frames, right_frames, frames, *, unusable=None, on_bad_frame: str = "abort",
                 bad_frame_errors=(Exception,), cache=None):
    """Match the given frames, one at a time, in order.

    Parameters
    ----------
    setup : MatchSetup
    left_frames, right_frames : sequences indexed by frame number, giving
        (H, W) float frames (original camera images).
    frames : iterable of int, the frames to match.
    unusable : set of int or None, frames known to be missing (dropped): they
        come back as NaN frames flagged dropped and never enter a time window.
    on_bad_frame : "abort" (an unreadable frame raises) or "skip" (it becomes a
        NaN frame flagged unreadable and leaves the time windows of its neighbours).
    bad_frame_errors : exception types that mean "this frame cannot be read".
    cache : RectifiedCache or None (one is made; pass one to keep it between calls).

    Yields
    ------
    FrameResult, for each frame of ``frames`` in order.
    """
    p = setup.params
    frames = list(frames)
    if cache is None:
        step = int(np.median(np.diff(frames))) if len(frames) > 1 else 1
        cache = RectifiedCache(setup.rectifier, left_frames, right_frames, keep=p.time_window + max(1, step),
                               defects=setup.defects)
    unusable = set() if unusable is None else set(unusable)
    unreadable = set()
    shape = setup.shape

    def get(j):
        if j in unreadable:
            return None
        try:
            return cache.get(j)
        except bad_frame_errors:
            if on_bad_frame != "skip":
                raise
            unreadable.add(j)
            return None

    for i in frames:
        nan = np.full(shape, np.nan, np.float32)
        if i in unusable:
            yield FrameResult(i, nan, nan.copy(), nan.copy(), FLAG_DROPPED, {})
            continue
        here = get(i)
        if here is None:
            yield FrameResult(i, nan, nan.copy(), nan.copy(), FLAG_UNREADABLE, {})
            continue
        idx = [j for j in window_of(setup, i) if j not in unusable]
        pairs = {j: (here if j == i else get(j)) for j in idx}
        idx = [j for j in idx if pairs[j] is not None]
        if is_blank(here[0]) or is_blank(here[1]):
            yield FrameResult(i, nan, nan.copy(), nan.copy(), FLAG_BLANK, {})
            continue
        lefts = _stack([pairs[j][0] for j in idx])
        rights = _stack([pairs[j][1] for j in idx])
        taus = (setup.times[idx] - setup.times[i]) / setup.dt_frame
        coef = _stack([cache.right_coefficients(j, p.spline_order) for j in idx])
        bad_left, bad_right = _bad_stacks([cache.bad(j) for j in idx], lefts.shape)
        res = match_frame(lefts, rights, taus, setup.grid_u, setup.grid_v, setup.centre, setup.band, p,
                          measure=setup.measure, right_coef=coef, bad_left=bad_left, bad_right=bad_right)
        flags = 0
        if np.isfinite(res["disparity"]).mean() < FEW_VALID_FRACTION:
            flags |= FLAG_FEW_VALID
        yield FrameResult(i, res["disparity"], res["disparity_sigma"], res["score"], flags, res["reasons"])


def _bad_stacks(masks, shape):
    # (T, H, W) masks of the window's frames, or None for a side where no frame has a bad pixel.
    out = []
    for k in range(2):
        if all(m[k] is None for m in masks):
            out.append(None)
            continue
        stack = np.zeros(shape, np.uint8)
        for t, m in enumerate(masks):
            if m[k] is not None:
                stack[t] = m[k]
        out.append(stack)
    return out[0], out[1]


def _stack(arrays):
    # A time window of one frame needs no copy (the frames are whole images: copies cost time per frame).
    return arrays[0][None] if len(arrays) == 1 else np.stack(arrays)


def _int_attr(attrs, key):
    try:
        value = int(attrs.get(key))
    except (TypeError, ValueError):
        return None
    return value if value > 0 else None
