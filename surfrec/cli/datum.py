"""``surfrec datum``: the still-water datum from a few frames of still water."""

from __future__ import annotations

import logging
import math
import shlex
import sys
import time

import click

from surfrec.cli.options import force_option, output_option, verbosity

log = logging.getLogger("surfrec")

# Rectified frames kept in memory for the wide search (each a fresh speckle
# pattern; a handful already makes the coarse peak unambiguous).
WIDE_SEARCH_FRAMES = 8


def _origin(ctx, param, value):
    if value is None:
        return (0.0, 0.0)
    parts = value.split(",")
    try:
        x, y = (float(p) for p in parts)
    except ValueError:
        raise click.BadParameter(f"expected X,Y in mm (two numbers and a comma, e.g. 120,-35), got {value!r}",
                                 ctx=ctx, param=param) from None
    if not (math.isfinite(x) and math.isfinite(y)):
        raise click.BadParameter(f"X and Y must be finite numbers, got {value!r}", ctx=ctx, param=param)
    return (x, y)


def _odd_window(ctx, param, value):
    if value is not None and (value < 5 or value % 2 == 0):
        raise click.BadParameter(f"must be an odd whole number of px, 5 or more, got {value}", ctx=ctx, param=param)
    return value


def _finite(ctx, param, value):
    if value is not None and not math.isfinite(value):
        raise click.BadParameter("must be a finite number", ctx=ctx, param=param)
    return value


@click.command("datum")
@click.option("--rig", "rig_path", required=True, metavar="RIG.json", type=click.Path(dir_okay=False),
              help="The calibrated rig (rig.json from `surfrec calibrate`).")
@click.option("--left", required=True, metavar="IMAGES",
              help="Left camera frames of still water: a quoted glob, a folder, a multi-page TIFF, @LIST or -.")
@click.option("--right", required=True, metavar="IMAGES", help="Right camera frames, paired with --left by index.")
@output_option("file")
@click.option("--origin", default=None, callback=_origin, metavar="X,Y",
              help="Move the datum origin to the point X,Y (mm) of the default datum frame, to get tank "
                   "coordinates; default 0,0 (where the left optical axis meets the water). "
                   "Write --origin=-120,35 for a negative X.")
@click.option("--rotate", "rotate_deg", type=float, default=0.0, show_default=True, callback=_finite,
              metavar="DEG",
              help="Turn the datum x axis by DEG degrees counter-clockwise about z (seen from the cameras), "
                   "about the (moved) origin.")
@click.option("--window", type=int, default=None, callback=_odd_window, metavar="PX",
              help="Correlation window side, odd px (default: about 3.5 speckles, from the first frame; "
                   "the same rule as `surfrec match`).")
@click.option("--spacing", type=click.IntRange(min=1), default=4, show_default=True, metavar="PX",
              help="Grid spacing, px (use the spacing of `surfrec match`, so both share one grid).")
@click.option("--residual-degree", type=click.IntRange(min=0, max=10), default=6, show_default=True, metavar="N",
              help="Total degree of the polynomial that holds the still-water residual (the bend calibration "
                   "errors give the flat water).")
@click.option("--residual-step", type=click.FloatRange(min=0, min_open=True), default=2.0, show_default=True,
              metavar="MM", help="Grid step of the stored still-water residual, datum-frame mm.")
@click.option("--rectify", "rectify_method",
              type=click.Choice(["bspline3", "bspline5", "cubic", "lanczos4", "linear"]), default="bspline3",
              show_default=True, help="Resampling used to rectify the frames (as in `surfrec match`).")
@click.option("--defects-left", "defects_left_path", default=None, metavar="PNG", type=click.Path(dir_okay=False),
              help="A map of the left camera's fixed defects (hot and dead pixels), an image of the camera's "
                   "size, non-zero = defective; added to the defects found in the still frames.")
@click.option("--defects-right", "defects_right_path", default=None, metavar="PNG", type=click.Path(dir_okay=False),
              help="The same for the right camera.")
@click.option("--find-defects/--no-find-defects", default=True, show_default=True,
              help="Find each camera's hot and dead pixels in the still frames (pixels that do not follow the "
                   "changing speckle) and store them in the datum, for `surfrec match` to leave out.")
@force_option
@verbosity
def command(rig_path, left, right, output, origin, rotate_deg, window, spacing, residual_degree, residual_step,
            rectify_method, defects_left_path, defects_right_path, find_defects, force):
    """Define the still-water datum from a few frames of still water.

    Rectifies the frames, finds the disparity field with a wide search (no
    prior: a coarse correlation over every disparity the images allow, then
    a robust smooth fit), matches a regular grid at full resolution,
    triangulates, fits the still-water plane robustly (outliers rejected,
    then least squares), and builds the datum frame: origin where the left
    optical axis meets the water, z up toward the cameras, x along the left
    camera's x axis (then moved by --origin and turned by --rotate). Also
    stores the reference disparity on the grid (for `surfrec match`), the
    smooth shape by which the still water departs from the plane (the
    still-water residual, subtracted by `surfrec heights`) and the per-point
    scatter across frames (the rig's noise floor). Each camera's fixed
    defects (hot and dead pixels) are found in the still frames and stored
    too; saturated pixels and defects never enter a correlation window.

    Reports the plane-fit RMS, the size of the residual shape and the median
    noise floor (mm), and warns when they suggest that the water moved or
    the calibration is off.
    """
    import numpy as np

    from surfrec._version import __version__
    from surfrec.cli.progress import Progress
    from surfrec.errors import InputError
    from surfrec.geometry.datum import fit_still_water
    from surfrec.io.datumfile import write_datum
    from surfrec.io.images import open_frames, pair_frames
    from surfrec.io.outputs import check_output
    from surfrec.io.rigfile import file_sha256, read_rig
    from surfrec.match.prior import match_frames_on_grid, matching_grid, pyramid_level, valid_region, wide_search
    from surfrec.match.defects import HALO_PX, SATURATION, DefectSettings, prepare_frame
    from surfrec.match.rectification import FrameRectifier
    from surfrec.match.speckle import default_window, speckle_size_px

    if left == "-" and right == "-":
        raise InputError("--left and --right cannot both read file names from standard input ('-')")
    t0 = time.monotonic()
    out = check_output(output, force=force)
    rig = read_rig(rig_path)
    rig_hash = file_sha256(rig_path)
    lf = open_frames(left, expected_size=rig.image_size, name="left images")
    rf = open_frames(right, expected_size=rig.image_size, name="right images")
    pair_frames(lf, rf)
    n = len(lf)

    rectifier = FrameRectifier(rig, rectify_method)
    valid_left = valid_region(*rectifier.maps["left"], rig.image_size)
    valid_right = valid_region(*rectifier.maps["right"], rig.image_size)
    defects = _fixed_defects(lf, rf, rig, find_defects, defects_left_path, defects_right_path)
    settings = DefectSettings(SATURATION, HALO_PX, defects["left"], defects["right"])

    def prepared(i):
        (a, bad_a), (b, bad_b) = (prepare_frame(lf[i], "left", rectifier, settings),
                                  prepare_frame(rf[i], "right", rectifier, settings))
        return a, b, bad_a, bad_b

    first = [prepared(i) for i in range(min(n, WIDE_SEARCH_FRAMES))]
    speckle = speckle_size_px(lf[0])  # on the original frame, as `match` measures it, so both pick one window
    window = window or default_window(speckle)
    level = pyramid_level(speckle)
    grid_u, grid_v = matching_grid(rig.image_size, spacing, window)
    if grid_u.size < 4 or grid_v.size < 4:
        raise InputError(f"a {window} px window and {spacing} px spacing leave no matching grid in "
                         f"{rig.image_size[0]}x{rig.image_size[1]} px images")
    log.info("datum from %d still frame pairs of %dx%d px: speckle %.1f px, window %d px, grid %dx%d "
             "(spacing %d px)", n, *rig.image_size, speckle, window, grid_u.size, grid_v.size, spacing)
    try:
        prior = wide_search(np.stack([p[0] for p in first]), np.stack([p[1] for p in first]), level=level,
                            valid_left=valid_left, valid_right=valid_right)
    except ValueError as exc:
        raise InputError(f"still frames ({lf.names[0]} ...): no disparity field found ({exc})") from None
    log.info("wide search (images reduced %dx): %d of %d coarse points agree; disparity %.2f to %.2f px; "
             "band +-%d px", 2 ** prior.level, prior.n_used, prior.n_coarse, *_prior_range(prior, grid_u, grid_v),
             prior.band_px)

    def pairs():
        # The first frames are rectified already; the others one at a time, as they are matched.
        for i in range(n):
            yield first[i] if i < len(first) else prepared(i)

    with Progress(n, "matching still frames") as progress:
        matches = match_frames_on_grid(pairs(), grid_u, grid_v, prior, window, progress=progress,
                                       valid_left=valid_left, valid_right=valid_right)
    first.clear()

    rect = rig.rectification
    try:
        # A glint of the still water (saturated pixels) is no occluder: it neither marks a halo
        # nor leaves the footprint; the water under it is seen by both cameras, and the
        # reference there comes from the smooth still-water fit.
        glint = matches.bad_pixels.sum(axis=0) >= max(1, math.ceil(n / 2))
        fit = fit_still_water(matches.disparity, grid_u, grid_v, rect["Q"], rect["R1"], sigma=matches.sigma,
                              attempted=matches.attempted & ~matches.bad_pixels, fill=glint, window=window, origin=origin, rotate_deg=rotate_deg,
                              degree=residual_degree, step_mm=residual_step)
    except ValueError as exc:
        raise InputError(f"still frames: {exc} (were they taken with this rig, of lit, still water?)") from None
    seconds = time.monotonic() - t0
    datum = fit.datum
    datum.rig_sha256 = rig_hash
    datum.defects_left, datum.defects_right = defects["left"], defects["right"]
    datum.attrs = {
        "software": f"surfrec {__version__}",
        "created": _now(),
        "history": " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]),
        "rig": str(rig_path),
        "left_images": str(left), "right_images": str(right),
        "left_first": lf.names[0], "left_last": lf.names[-1],
        "right_first": rf.names[0], "right_last": rf.names[-1],
        "window_px": int(window), "spacing_px": int(spacing), "speckle_px": float(speckle),
        "rectify_method": rectify_method, "spline_order": 5, "min_score": 0.6, "max_sigma_px": 0.2,
        "wide_search_level": int(prior.level), "wide_search_points": int(prior.n_coarse),
        "wide_search_used": int(prior.n_used), "band_px": int(prior.band_px),
        "saturation": SATURATION, "halo_px": HALO_PX,
        "defects_left": int(defects["left"].sum()) if defects["left"] is not None else 0,
        "defects_right": int(defects["right"].sum()) if defects["right"] is not None else 0,
        "defects_found_in_still_frames": int(bool(find_defects)),
        "defects_left_file": str(defects_left_path or ""), "defects_right_file": str(defects_right_path or ""),
        **{f"rejected_{k}": int(v) for k, v in matches.reasons.items()},
        **datum.attrs,
        "seconds": round(seconds, 3),
    }
    write_datum(out, datum)
    for w in fit.warnings:
        log.warning("warning: %s", w)
    log.info("made the datum in %.1f s", seconds)
    click.echo(_report(fit, rig_path, rig.image_size, window, spacing, out))


def _fixed_defects(lf, rf, rig, find, left_path, right_path):
    """Each camera's fixed defect map: found in the still frames and/or read from the user's maps."""
    import numpy as np

    from surfrec.errors import InputError
    from surfrec.io.datumfile import MAX_DEFECT_FRACTION
    from surfrec.io.images import open_frames
    from surfrec.match.defects import estimate_fixed_defects

    out = {}
    for side, frames, path in (("left", lf, left_path), ("right", rf, right_path)):
        m = None
        if find and len(frames) >= 2:
            m = estimate_fixed_defects(np.stack([frames[i] for i in range(len(frames))]))
        elif find:
            log.warning("warning: one still frame pair only: hot and dead pixels cannot be told from speckle "
                        "(give two or more frames, or --defects-%s)", side)
        if path:
            given = open_frames(path, expected_size=rig.image_size, name=f"{side} defect map")
            if len(given) != 1:
                raise InputError(f"{side} defect map {path}: expected one image, found {len(given)}")
            g = given.read_raw(0) != 0
            if g.mean() > MAX_DEFECT_FRACTION:
                raise InputError(f"{side} defect map {path}: marks {100 * g.mean():.1f}% of the pixels defective "
                                 f"(non-zero = defective; more than {100 * MAX_DEFECT_FRACTION:g}% is not a defect map)")
            m = g if m is None else (m | g)
        if m is not None:
            log.info("%s camera: %d fixed defects (hot or dead pixels)", side, int(m.sum()))
        out[side] = m
    return out


def _prior_range(prior, u, v):
    import numpy as np

    vv, uu = np.meshgrid(v, u, indexing="ij")
    d = prior(uu, vv)
    return float(np.nanmin(d)), float(np.nanmax(d))


def _now():
    import datetime as dt

    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")


def _report(fit, rig_path, size, window, spacing, out) -> str:
    import numpy as np

    d = fit.datum
    s = fit.stats
    n = d.plane_normal
    tilt = math.degrees(math.acos(min(1.0, abs(float(n[2])))))
    lines = [
        f"datum from {d.n_frames} still frame pair{'s' if d.n_frames != 1 else ''} of {size[0]}x{size[1]} px, "
        f"rig {rig_path}",
        f"plane (left camera frame): normal [{n[0]:+.6f}, {n[1]:+.6f}, {n[2]:+.6f}], n.X = {d.plane_offset:.3f} mm; "
        f"{-d.plane_offset:.3f} mm from the left camera, {tilt:.3f} deg from its optical axis",
        f"grid: {d.u.size}x{d.v.size} points (spacing {spacing} px, window {window} px), "
        f"{s['n_valid']} valid ({100.0 * s['n_valid'] / s['n_grid']:.1f}%)"
        + (f", {s['n_occluded']} dropped beside failed points (an occluder, a shadow, glare)"
           if s["n_occluded"] else ""),
        f"plane-fit RMS: {s['fit_rms_mm']:.4f} mm ({s['n_inliers']} of {s['n_points']} points of all frames)",
        f"still-water residual (smooth shape, subtracted by heights): {s['residual_rms_mm']:.4f} mm RMS, "
        f"{s['residual_peak_to_valley_mm']:.4f} mm peak to valley; "
        f"{d.residual_x.size}x{d.residual_y.size} grid, step {d.residual_x[1] - d.residual_x[0]:g} mm",
    ]
    noise = s["noise_floor_median_mm"]
    if np.isfinite(noise):
        pred = s["predicted_noise_mm"]
        lines.append(f"noise floor (per-point scatter across frames): median {noise:.4f} mm"
                     + (f" (the matcher's own estimate: {pred:.4f} mm)" if np.isfinite(pred) else ""))
    else:
        lines.append("noise floor: not measured (one frame; give two or more still frames)")
    lines.append(f"wrote {out}")
    return "\n".join(lines)
