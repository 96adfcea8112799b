"""``surfrec match``: disparities of a run of speckle frames on a regular grid."""

from __future__ import annotations

import logging
import shlex
import sys
import time

import click

from surfrec.cli.options import force_option, output_option, verbosity

log = logging.getLogger("surfrec")


def _odd(ctx, param, value):
    if value is not None and (value < 1 or value % 2 == 0):
        raise click.BadParameter("must be an odd whole number", ctx=ctx, param=param)
    return value


@click.command("match")
@click.option("--rig", "rig_path", required=True, type=click.Path(dir_okay=False), help="Calibrated rig (rig.json).")
@click.option("--datum", "datum_path", required=True, type=click.Path(dir_okay=False),
              help="Still-water datum (datum.h5) made with the same rig.")
@click.option("--left", required=True, metavar="IMAGES", help="Left frames: quoted glob, folder, multi-page TIFF, @LIST or -.")
@click.option("--right", required=True, metavar="IMAGES", help="Right frames, paired with the left ones by index.")
@output_option("file")
@click.option("--fps", type=click.FloatRange(min=0, min_open=True), default=None, metavar="F",
              help="Frame rate, frames/s (or give --timestamps).")
@click.option("--timestamps", type=click.Path(dir_okay=False, exists=False), default=None, metavar="CSV",
              help="Timestamps file with header frame,left_s,right_s (or give --fps).")
@click.option("--window", type=int, default=None, callback=_odd, metavar="PX",
              help="Correlation window side, odd px (default: the datum's, else about 3.5 speckles).")
@click.option("--spacing", type=click.IntRange(min=1), default=None, metavar="PX",
              help="Grid spacing, px (default: the datum's, else 4).")
@click.option("--time-window", type=int, default=1, show_default=True, callback=_odd, metavar="N",
              help="Spatio-temporal window: correlate N consecutive frames together (odd). Each frame brings a "
                   "fresh speckle pattern, so N frames carry N times the information of one and allow a smaller "
                   "--window; a linear-in-time disparity term keeps a moving surface sharp. Use it when the "
                   "surface moves by well under a speckle between frames (high frame rates).")
@click.option("--max-excursion", type=click.FloatRange(min=0, min_open=True), default=5.0, show_default=True,
              metavar="MM", help="Largest surface excursion from the still-water datum; sets the search band.")
@click.option("--mask", "mask_path", type=click.Path(dir_okay=False), default=None, metavar="PNG",
              help="Left-camera (unrectified) mask image, non-zero = measure: leaves out walls, posts, glare.")
@click.option("--start", type=click.IntRange(min=0), default=0, show_default=True, metavar="N", help="First frame.")
@click.option("--stop", type=click.IntRange(min=0), default=None, metavar="N", help="Stop before this frame.")
@click.option("--step", type=click.IntRange(min=1), default=1, show_default=True, metavar="N",
              help="Process every N-th frame.")
@click.option("--rectify", "rectify_method", type=click.Choice(["bspline3", "bspline5", "cubic", "lanczos4", "linear"]),
              default="bspline3", show_default=True,
              help="Resampling used to rectify the frames (see docs/performance.md for the error each adds).")
@force_option
@verbosity
def command(rig_path, datum_path, left, right, output, fps, timestamps, window, spacing, time_window,
            max_excursion, mask_path, start, stop, step, rectify_method, force):
    """Match the speckle between the two views of every frame pair.

    Rectifies each frame with maps computed once, searches each grid point in
    a narrow band around the datum's still-water disparity (ZNCC), refines it
    to a small fraction of a pixel (inverse-compositional Gauss-Newton, first-
    order shape function) and writes disparity, its estimated 1-sigma and the
    ZNCC score per point and frame to disparity.h5. A frame's result depends
    only on the frames in its own time window, the rig and the datum.
    """
    import numpy as np

    from surfrec.errors import InputError
    from surfrec.io.datumfile import read_datum
    from surfrec.io.disparityfile import DisparityWriter
    from surfrec.io.images import open_frames, pair_frames
    from surfrec.io.outputs import check_output
    from surfrec.io.rigfile import file_sha256, read_rig
    from surfrec.io.timestamps import read_timestamps
    from surfrec.match.pipeline import (FLAG_BLANK, FLAG_FEW_VALID, MatchParams, RectifiedCache,
                                        band_halfwidth_px, is_blank, match_frame, matching_grid,
                                        reference_on_grid, time_window_indices)
    from surfrec.match.rectification import FrameRectifier
    from surfrec.match.speckle import default_window, speckle_size_px
    if (fps is None) == (timestamps is None):
        raise InputError("give exactly one of --fps or --timestamps")
    out = check_output(output, force=force)
    rig = read_rig(rig_path)
    datum = read_datum(datum_path)
    rig_hash = file_sha256(rig_path)
    if datum.rig_sha256 and datum.rig_sha256 != rig_hash:
        raise InputError(f"{datum_path} was made with another rig than {rig_path} (rig SHA-256 differs); "
                         "make the datum again with this rig")
    lf = open_frames(left, expected_size=rig.image_size, name="left images")
    rf = open_frames(right, expected_size=rig.image_size, name="right images")
    pair_frames(lf, rf)
    n = len(lf)
    times = read_timestamps(timestamps, n) if timestamps else np.arange(n) / fps
    stop = n if stop is None else stop
    if start >= n or stop <= start:
        raise InputError(f"--start {start} --stop {stop} selects no frames of the {n} given")
    stop = min(stop, n)
    frames = list(range(start, stop, step))

    speckle = speckle_size_px(lf[frames[0]])
    # The datum's grid by default, so the reference disparity needs no interpolation.
    window = window or _int_attr(datum.attrs, "window_px") or default_window(speckle)
    spacing = spacing or _int_attr(datum.attrs, "spacing_px") or 4
    params = MatchParams(window=window, spacing=spacing, time_window=time_window, max_excursion_mm=max_excursion,
                         rectify_method=rectify_method)
    rectifier = FrameRectifier(rig, rectify_method)
    gu, gv = matching_grid(rig.image_size, spacing, window)
    centre = reference_on_grid(datum.u, datum.v, datum.disparity, gu, gv)
    if not np.isfinite(centre).any():
        raise InputError(f"{datum_path} holds no valid reference disparity on the matching grid")
    c = float(rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2])
    band = band_halfwidth_px(centre, abs(datum.plane_offset), c, max_excursion)
    params.band_px = band
    measure = None
    if mask_path:
        measure = _mask_on_grid(mask_path, rig, rectifier, gu, gv, window)
    dt_frame = float(np.median(np.diff(times))) if n > 1 else 1.0
    log.info("matching %d frame pairs: grid %dx%d (spacing %d px), window %d px (speckle %.1f px), band +-%d px, "
             "time window %d", len(frames), len(gu), len(gv), spacing, window, speckle, band, time_window)

    attrs = {f"param_{k}": v for k, v in params.to_dict().items() if v is not None}
    attrs.update({"rig_sha256": rig_hash, "datum_sha256": file_sha256(datum_path),
                  "history": " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]),
                  "frames": f"{start}:{stop}:{step}", "speckle_px": float(speckle),
                  "left_first": lf.names[0], "left_last": lf.names[-1],
                  "right_first": rf.names[0], "right_last": rf.names[-1],
                  "timing": "timestamps" if timestamps else f"fps={fps:g}"})
    writer = DisparityWriter(out, gu, gv, attrs, len(frames))
    cache = RectifiedCache(rectifier, lf, rf, keep=time_window + step)
    from surfrec.cli.progress import Progress

    t0 = time.monotonic()
    totals = {}
    try:
        with Progress(len(frames), "matching") as progress:
            for k, i in enumerate(frames):
                idx = time_window_indices(i, n, time_window)
                pairs = [cache.get(j) for j in idx]
                lefts = np.stack([p[0] for p in pairs])
                rights = np.stack([p[1] for p in pairs])
                taus = (times[idx] - times[i]) / dt_frame
                flags = 0
                if is_blank(pairs[idx.index(i)][0]) or is_blank(pairs[idx.index(i)][1]):
                    flags |= FLAG_BLANK
                    nan = np.full((len(gv), len(gu)), np.nan, np.float32)
                    res = {"disparity": nan, "disparity_sigma": nan, "score": nan, "reasons": {}}
                else:
                    coef = np.stack([cache.right_coefficients(j, params.spline_order) for j in idx])
                    res = match_frame(lefts, rights, taus, gu, gv, centre, band, params, measure=measure,
                                      right_coef=coef)
                valid = np.isfinite(res["disparity"]).mean()
                if valid < 0.5 and not flags:
                    flags |= FLAG_FEW_VALID
                for key, val in res["reasons"].items():
                    totals[key] = totals.get(key, 0) + val
                writer.append(time=float(times[i] - times[frames[0]]), frame_index=i, flags=flags,
                              disparity=res["disparity"], disparity_sigma=res["disparity_sigma"], score=res["score"])
                progress(k + 1)
        wall = time.monotonic() - t0
        writer.close({"wall_seconds": wall, "seconds_per_frame": wall / len(frames), "rejected": totals})
    except BaseException:
        writer.abort()
        raise
    log.info("wrote %s: %d frames, %.2f s per frame pair", out, len(frames), wall / len(frames))
    click.echo(str(out))


def _int_attr(attrs, key):
    try:
        value = int(attrs.get(key))
    except (TypeError, ValueError):
        return None
    return value if value > 0 else None


def _mask_on_grid(mask_path, rig, rectifier, gu, gv, window):
    import numpy as np

    from surfrec.errors import InputError
    from surfrec.io.images import open_frames
    from surfrec.match.validity import window_fully_inside

    m = open_frames(mask_path, expected_size=rig.image_size, name="mask")
    if len(m) != 1:
        raise InputError(f"mask {mask_path}: expected one image, found {len(m)}")
    rect = rectifier.mask(m.read_raw(0))
    vv, uu = np.meshgrid(gv, gu, indexing="ij")
    return window_fully_inside(rect, uu, vv, window)
