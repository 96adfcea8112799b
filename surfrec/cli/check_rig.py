"""``surfrec check-rig``: does a calibration still hold? From ordinary speckle frames, no target."""

from __future__ import annotations

import json
import logging
import time

import click

from surfrec.cli.options import json_option, verbosity

log = logging.getLogger("surfrec")

# Frame offsets the synchronisation check tries either way: a camera that
# dropped or doubled a frame at the start is one or two frames out.
MAX_OFFSET = 2


@click.command("check-rig")
@click.option("--rig", "rig_path", required=True, metavar="RIG.json", type=click.Path(dir_okay=False),
              help="The calibration to check (rig.json from `surfrec calibrate`).")
@click.option("--left", required=True, metavar="IMAGES",
              help="Left camera frames of the run: a quoted glob, a folder, a multi-page TIFF, @LIST or -.")
@click.option("--right", required=True, metavar="IMAGES", help="Right camera frames, paired with --left by index.")
@click.option("--tolerance", type=click.FloatRange(min=0.0, min_open=True), default=0.3, show_default=True,
              metavar="PX",
              help="The rig has moved when the 95th percentile of |vertical disparity| exceeds this, "
                   "in px of the rig's rectified images.")
@click.option("--frames", "n_frames", type=click.IntRange(min=1), default=5, show_default=True, metavar="N",
              help="Frame pairs checked, from the start of the run (a few take a few seconds).")
@json_option
@verbosity
def command(rig_path, left, right, tolerance, n_frames, as_json):
    """Check a calibration against the first frames of a run: drift and synchronisation.

    Rectifies the first N frame pairs with the rig, matches a grid of a few
    hundred points between the left and right images in two dimensions and
    reports the vertical disparity that remains (it is zero for a rig that
    holds): its median, the 95th percentile of its magnitude, and its trend
    across the image with the roll it implies (a camera turned about its
    optical axis tilts the rows: opposite signs at the two sides, a median
    near zero). It also matches left frame t against right frames t-2 ... t+2,
    since the projector's pattern changes every frame and only the right
    pairing correlates.

    Exit status 0 with "rig holds"; 3 with "rig has moved: recalibrate (or
    re-pose with --keep-intrinsics)" when the 95th percentile exceeds
    --tolerance, or "cameras out of step by N frames"; 2 for bad input.
    """
    from surfrec._version import __version__
    from surfrec.calib.drift import check_rig, rectified_views
    from surfrec.errors import CheckFailed, InputError
    from surfrec.io.images import open_frames, pair_frames
    from surfrec.io.rigfile import file_sha256, read_rig

    if left == "-" and right == "-":
        raise InputError("--left and --right cannot both read file names from standard input ('-')")
    t0 = time.monotonic()
    rig = read_rig(rig_path)
    left_seq = open_frames(left, expected_size=rig.image_size, name="left images")
    right_seq = open_frames(right, expected_size=rig.image_size, name="right images")
    pair_frames(left_seq, right_seq)
    n = min(n_frames, len(left_seq))
    # A few right frames past the last left one, so that every left frame
    # can be tried against later right frames too.
    n_right = min(n + MAX_OFFSET, len(right_seq))
    log.info("checking %s against %d frame pairs of %dx%d px", rig_path, n, *rig.image_size)
    views = rectified_views(rig.left_matrix, rig.left_distortion, rig.right_matrix, rig.right_distortion,
                            rig.rectification, rig.image_size)
    result = check_rig([left_seq[i] for i in range(n)], [right_seq[i] for i in range(n_right)], views,
                       tolerance=tolerance, max_offset=MAX_OFFSET)
    seconds = time.monotonic() - t0
    for w in result.warnings:
        log.warning("warning: %s", w)
    log.info("checked in %.1f s", seconds)
    if as_json:
        summary = {"format": "surfrec.check-rig", "software": f"surfrec {__version__}",
                   "rig": str(rig_path), "rig_sha256": file_sha256(rig_path),
                   "left": left_seq.names[:n], "right": right_seq.names[:n_right], **result.to_dict(),
                   "seconds": round(seconds, 3)}
        click.echo(json.dumps(summary, indent=2))
    else:
        click.echo(_report(result, rig_path, rig.image_size))
    if not result.holds:
        raise CheckFailed(result.message)
    if not as_json:  # the JSON object carries the verdict; stdout stays one object
        click.echo(result.message)


def _report(result, rig_path, size) -> str:
    d = result.drift
    t = d.trend
    s = result.sync
    lines = [f"rig {rig_path} ({size[0]}x{size[1]} px): {result.n_frames} frame pairs, {d.n_points} points matched"]
    if d.n_points >= 3:
        lines.append(f"vertical disparity (rig-rectified px): median {d.median_px:+.3f}, "
                     f"95th percentile of |dv| {d.p95_abs_px:.3f} (tolerance {d.tolerance_px:g})")
        lines.append(f"trend across the image: {t['offset_px']:+.3f} px at the centre, "
                     f"{t['slope_u_px_per_1000px']:+.3f} px per 1000 px along u, "
                     f"{t['slope_v_px_per_1000px']:+.3f} along v; implied roll {d.roll_deg:+.3f} deg; "
                     f"scatter about the trend {t['residual_rms_px']:.3f} px")
    others = ", ".join(f"{k:+d}: {v:.2f}" for k, v in sorted(s.scores.items()) if k != s.offset)
    best = s.scores.get(s.offset, float("nan"))
    if s.determined:
        state = "in step" if s.in_step else f"out of step by {abs(s.offset)} frames"
        lines.append(f"synchronisation: {state} (correlation {best:.2f} at offset {s.offset:+d}; others {others})")
    else:
        lines.append("synchronisation: cannot be told (correlation by frame offset: "
                     + ", ".join(f"{k:+d}: {v:.2f}" for k, v in sorted(s.scores.items())) + ")")
    return "\n".join(lines)
