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
@click.option("--saturation", type=click.FloatRange(min=0, max=1, min_open=True), default=0.98, show_default=True,
              metavar="FRACTION",
              help="Fraction of full scale at and above which a pixel counts as saturated (a glint): saturated "
                   "pixels, with a 2 px halo, and the datum's hot and dead pixels never enter a correlation "
                   "window.")
@click.option("--bad-pixels/--no-bad-pixels", "bad_pixels", default=True, show_default=True,
              help="Leave saturated, hot and dead pixels out of the correlation windows (--no-bad-pixels: "
                   "use every pixel as it is, for comparison).")
@click.option("--shape-order", type=click.IntRange(1, 2), default=1, show_default=True, metavar="1|2",
              help="Shape function of the sub-pixel refinement: 1 (disparity and its slopes) or 2 (also its "
                   "curvature). Use 2, with a window about 1.4 times larger, when the waves are short compared "
                   "with the window: it removes the curvature bias and keeps the 1-sigma honest, at about twice "
                   "the random error per window (docs/performance.md).")
@force_option
@verbosity
def command(rig_path, datum_path, left, right, output, fps, timestamps, window, spacing, time_window,
            max_excursion, mask_path, start, stop, step, rectify_method, saturation, bad_pixels, shape_order, force):
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
    from surfrec.match.session import match_frames, prepare_matching
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

    mask_image = _read_mask(mask_path, rig) if mask_path else None
    try:
        setup = prepare_matching(rig, datum, lf[frames[0]], times, window=window, spacing=spacing,
                                 time_window=time_window, max_excursion_mm=max_excursion,
                                 rectify_method=rectify_method, mask_image=mask_image, shape_order=shape_order,
                                 saturation=saturation if bad_pixels else None, bad_pixels=bad_pixels)
    except ValueError as exc:
        raise InputError(f"{datum_path} {exc}") from None
    params, gu, gv = setup.params, setup.grid_u, setup.grid_v
    log.info("matching %d frame pairs: grid %dx%d (spacing %d px), window %d px (speckle %.1f px), band +-%d px, "
             "time window %d", len(frames), len(gu), len(gv), params.spacing, params.window, setup.speckle_px,
             setup.band, time_window)

    attrs = {f"param_{k}": v for k, v in params.to_dict().items() if v is not None}
    attrs.update({f"bad_pixels_{k}": v for k, v in
                  (setup.defects.to_dict() if setup.defects is not None else {"off": 1}).items()})
    attrs.update({"rig_sha256": rig_hash, "datum_sha256": file_sha256(datum_path),
                  "history": " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]),
                  "frames": f"{start}:{stop}:{step}", "speckle_px": float(setup.speckle_px),
                  "left_first": lf.names[0], "left_last": lf.names[-1],
                  "right_first": rf.names[0], "right_last": rf.names[-1],
                  "timing": "timestamps" if timestamps else f"fps={fps:g}"})
    writer = DisparityWriter(out, gu, gv, attrs, len(frames))
    from surfrec.cli.progress import Progress

    t0 = time.monotonic()
    totals = {}
    try:
        with Progress(len(frames), "matching") as progress:
            for k, res in enumerate(match_frames(setup, lf, rf, frames)):
                for key, val in res.reasons.items():
                    totals[key] = totals.get(key, 0) + val
                writer.append(time=float(times[res.index] - times[frames[0]]), frame_index=res.index,
                              flags=res.flags, disparity=res.disparity, disparity_sigma=res.disparity_sigma,
                              score=res.score)
                progress(k + 1)
        wall = time.monotonic() - t0
        writer.close({"wall_seconds": wall, "seconds_per_frame": wall / len(frames), "rejected": totals})
    except BaseException:
        writer.abort()
        raise
    log.info("wrote %s: %d frames, %.2f s per frame pair", out, len(frames), wall / len(frames))
    click.echo(str(out))


def _read_mask(mask_path, rig):
    from surfrec.errors import InputError
    from surfrec.io.images import open_frames

    m = open_frames(mask_path, expected_size=rig.image_size, name="mask")
    if len(m) != 1:
        raise InputError(f"mask {mask_path}: expected one image, found {len(m)}")
    return m.read_raw(0)
