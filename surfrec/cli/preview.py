"""``surfrec preview``: a picture of one frame of heights.h5, and the time series at a point."""

from __future__ import annotations

import logging
import math

import click

from surfrec.cli.options import force_option, output_option, verbosity

log = logging.getLogger("surfrec")


def parse_point(ctx, param, value):
    """Click callback: ``X,Y`` (mm) -> (x, y) floats, or None."""
    if value is None:
        return None
    try:
        x, y = (float(p) for p in value.split(","))
    except ValueError:
        raise click.BadParameter(f"expected X,Y in mm (two numbers and a comma, e.g. 40,-30), got {value!r}",
                                 ctx=ctx, param=param) from None
    if not (math.isfinite(x) and math.isfinite(y)):
        raise click.BadParameter(f"X and Y must be finite numbers, got {value!r}", ctx=ctx, param=param)
    return (x, y)


def _positive(ctx, param, value):
    if value is not None and not (math.isfinite(value) and value > 0):
        raise click.BadParameter("must be a positive number of mm", ctx=ctx, param=param)
    return value


@click.command("preview")
@click.argument("heights", metavar="HEIGHTS.h5", type=click.Path(dir_okay=False))
@output_option("file")
@click.option("--frame", type=int, default=0, show_default=True, metavar="N",
              help="Frame to draw, 0-based index in the file.")
@click.option("--point", default=None, callback=parse_point, metavar="X,Y",
              help="Also plot the time series at this point, datum-frame mm (write --point=-40,30 for a "
                   "negative X).")
@click.option("--method", type=click.Choice(["bilinear", "nearest"]), default="bilinear", show_default=True,
              help="How --point reads the grid: bilinear from the 4 nodes around it, or the nearest node.")
@click.option("--limit", type=float, default=None, callback=_positive, metavar="MM",
              help="Colour scale from -MM to +MM (default: from the frame, symmetric about zero), to put "
                   "several previews on one scale.")
@click.option("--dpi", type=click.IntRange(min=50, max=600), default=150, show_default=True,
              help="Resolution of the PNG.")
@force_option
@verbosity
def command(heights, output, frame, point, method, limit, dpi, force):
    """Draw one frame of HEIGHTS.h5 as a height map (PNG), with an optional time series.

    The map uses a diverging blue-orange colour scale centred on zero with
    symmetric limits (readable with the common colour-vision deficiencies),
    contours solid above the still water and dashed below, a colour bar in
    mm and axes in datum-frame mm (x to the right, y up, equal aspect).
    With --point X,Y a second panel shows the height at that point against
    time with its 1-sigma band, and the 1-sigma itself below it.
    """
    from pathlib import Path

    import numpy as np

    from surfrec.analysis.series import point_weights, sample_point
    from surfrec.errors import InputError
    from surfrec.io.heightsfile import read_heights
    from surfrec.io.outputs import atomic_file, check_output
    from surfrec.plots.heights import heights_figure

    out = check_output(output, force=force)
    if out.suffix.lower() != ".png":
        raise InputError(f"output {out} must be a .png file")
    head = read_heights(heights, frames=slice(0, 0))
    nt = int(head["n_frames"])
    if nt == 0:
        raise InputError(f"{heights} holds no frames")
    if not 0 <= frame < nt:
        raise InputError(f"--frame {frame} is out of range: {heights} holds {nt} frames (0 to {nt - 1})")
    x, y, time = head["x"], head["y"], head["time"]
    series = None
    if point is not None:
        rows, cols, w = point_weights(x, y, point[0], point[1], method=method)
        hs, ss = [], []
        # Whole frames in blocks: HDF5 decompresses whole chunks (one frame each) anyway.
        block = max(1, (32 << 20) // max(8 * x.size * y.size, 1))
        for i in range(0, nt, block):
            d = read_heights(heights, frames=slice(i, min(nt, i + block)))
            h_i, s_i = sample_point(d["height"], d["height_uncertainty"], rows, cols, w)
            hs.append(h_i)
            ss.append(s_i)
        series = {"time": time, "height": np.concatenate(hs), "sigma": np.concatenate(ss), "method": method}
        if not np.isfinite(series["height"]).any():
            log.warning("warning: no frame has a valid height at (%g, %g) mm", *point)
    d = read_heights(heights, frames=slice(frame, frame + 1))
    flags = _flag_names(int(head["frame_flags"][frame]))
    fig = heights_figure(x, y, d["height"][0], frame=frame, time_s=float(time[frame]), title=Path(heights).name,
                         limit=limit, point=point, series=series, flags=flags)
    with atomic_file(out) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png")
    click.echo(f"wrote {out}")


def _flag_names(value: int) -> str:
    from surfrec.io.heightsfile import FLAG_MEANINGS, FLAG_VALUES

    return ", ".join(name for bit, name in zip(FLAG_VALUES, FLAG_MEANINGS.split()) if value & bit)
