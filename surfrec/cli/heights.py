"""``surfrec heights``: calibrated height fields on a regular datum-frame grid (heights.h5)."""

from __future__ import annotations

import logging
import shlex
import sys
import time

import click

from surfrec.cli.options import force_option, output_option, verbosity

log = logging.getLogger("surfrec")

# Frames read from disparity.h5 at a time: a few MB, so memory stays flat on any run length.
_BLOCK_FRAMES = 8


def _numbers(text, n, param, ctx, what):
    try:
        vals = [float(s) for s in text.split(",")]
    except ValueError:
        vals = []
    if len(vals) != n or not all(map(_finite, vals)):
        raise click.BadParameter(f"expected {what} (numbers in mm, separated by commas), got {text!r}",
                                 ctx=ctx, param=param)
    return vals


def _finite(v):
    return v == v and abs(v) != float("inf")


def _extent(ctx, param, value):
    if value is None:
        return None
    xmin, xmax, ymin, ymax = _numbers(value, 4, param, ctx, "XMIN,XMAX,YMIN,YMAX")
    if not (xmin < xmax and ymin < ymax):
        raise click.BadParameter(f"needs XMIN < XMAX and YMIN < YMAX, got {value!r}", ctx=ctx, param=param)
    return (xmin, xmax, ymin, ymax)


def _circles(ctx, param, value):
    out = []
    for text in value:
        x, y, r = _numbers(text, 3, param, ctx, "X,Y,R")
        if not r > 0:
            raise click.BadParameter(f"the radius must be positive, got {text!r}", ctx=ctx, param=param)
        out.append((x, y, r))
    return out


@click.command("heights")
@click.argument("disparity_path", metavar="DISPARITY.h5", type=click.Path(dir_okay=False))
@click.option("--rig", "rig_path", required=True, type=click.Path(dir_okay=False),
              help="The rig (rig.json) the disparities were matched with.")
@click.option("--datum", "datum_path", required=True, type=click.Path(dir_okay=False),
              help="The still-water datum (datum.h5) the disparities were matched with.")
@output_option("file")
@click.option("--grid-step", type=click.FloatRange(min=0, min_open=True), default=None, metavar="MM",
              help="Node spacing of the output grid, mm (default: the spacing of the matches on the water, "
                   "rounded down to 1, 1.2, 1.5, 2, 2.5, 3, 4 or 5 x 10^k).")
@click.option("--extent", callback=_extent, default=None, metavar="XMIN,XMAX,YMIN,YMAX",
              help="Grid extent, datum-frame mm (default: the area both cameras see).")
@click.option("--exclude-circle", "circles", multiple=True, callback=_circles, metavar="X,Y,R",
              help="Blank a disc, datum-frame mm (a post, a drain). Repeatable.")
@click.option("--exclude-polygon", "polygon_files", multiple=True, type=click.Path(dir_okay=False), metavar="FILE",
              help="Blank the polygons of a text file of 'x,y' vertices in mm, one per line, polygons separated "
                   "by blank lines, '#' comments (a wall, a wave maker). Repeatable.")
@click.option("--still-correction/--no-still-correction", default=True, show_default=True,
              help="Subtract the datum's still-water residual shape (the calibration's systematic bend of a flat "
                   "surface).")
@force_option
@verbosity
def command(disparity_path, rig_path, datum_path, output, grid_step, extent, circles, polygon_files,
            still_correction, force):
    """Triangulate the disparities of every frame and resample the heights onto a regular grid.

    Each match is triangulated on the left camera's ray through its pixel and
    carried into the datum frame; each output node's height is found where
    its vertical meets the measured surface (a per-node fixed point, exact for
    the moving points, no per-frame triangulation mesh). Nodes outside the
    measured area, excluded, or next to an invalid match are NaN. Writes
    height, its random 1-sigma and the frame flags to heights.h5 (netCDF-4 /
    CF-1.10), with the rig, the datum and every parameter embedded.
    """
    from pathlib import Path

    import numpy as np

    from surfrec.errors import InputError
    from surfrec.geometry.resample import MAX_NODES, grid_size
    from surfrec.io.datumfile import read_datum
    from surfrec.io.disparityfile import read_disparity
    from surfrec.io.heightsfile import HeightsWriter
    from surfrec.io.outputs import check_output
    from surfrec.io.polygons import read_polygons
    from surfrec.io.rigfile import file_sha256, read_rig

    out = check_output(output, force=force)
    for p, what in ((disparity_path, "disparity file"), (rig_path, "rig"), (datum_path, "datum file")):
        if not Path(p).is_file():
            raise InputError(f"{what} {p} does not exist")
    rig = read_rig(rig_path)
    datum = read_datum(datum_path)
    meta = read_disparity(disparity_path, frames=slice(0, 0))
    rig_hash, datum_hash = file_sha256(rig_path), file_sha256(datum_path)
    _check_provenance(meta["attrs"], datum, rig_hash, datum_hash, disparity_path, rig_path, datum_path)
    polygons = []
    for pf in polygon_files:
        polygons.extend(read_polygons(pf))

    if extent is not None and grid_step is not None:
        ny, nx = grid_size(extent, grid_step)
        if nx * ny > MAX_NODES:
            raise InputError(f"--grid-step {grid_step:g} over --extent {','.join(f'{v:g}' for v in extent)} gives "
                             f"{nx * ny:,} nodes per frame, above the limit of {MAX_NODES:,}; "
                             "choose a larger --grid-step or a smaller --extent")
    from surfrec.geometry.session import heights_of_frame, prepare_heights

    try:
        hsetup = prepare_heights(meta["u"], meta["v"], rig, datum, step=grid_step, extent=extent, circles=circles,
                                 polygons=polygons, still_correction=still_correction)
    except ValueError as exc:
        msg = str(exc)
        if "nodes per frame" in msg:
            msg += "; choose a larger --grid-step" + (" or a smaller --extent" if extent else "")
        raise InputError(msg) from None
    plan, resampler = hsetup.plan, hsetup.resampler
    fp = plan.footprint
    if extent is not None:
        inside = float(fp.mean())
        if inside < 0.5:
            log.warning("warning: only %.0f%% of the --extent lies inside the measured area (x %.1f..%.1f mm, "
                        "y %.1f..%.1f mm); the rest stays NaN", 100 * inside, *plan.measured_extent)
    if plan.step < 0.5 * plan.point_spacing_mm:
        log.warning("warning: --grid-step %g mm is finer than half the spacing of the matches on the water "
                    "(%.2f mm): the extra nodes are interpolated, not measured", plan.step, plan.point_spacing_mm)
    ny, nx = fp.shape
    n = int(meta["time"].size)
    if n == 0:
        raise InputError(f"{disparity_path} holds no frames")
    log.info("heights of %d frames on a %d x %d grid (step %g mm%s; x %g..%g mm, y %g..%g mm), "
             "%d nodes measurable; still-water correction %s",
             n, nx, ny, plan.step, "" if plan.step_given else ", from the matches' spacing", *plan.extent,
             int(fp.sum()), "on" if still_correction else "off")

    dattrs = meta["attrs"]
    origin = dattrs.get("time_origin")
    origin_source = "the first frame's clock time (disparity.h5 'time_origin')"
    if origin is None:
        origin = dattrs.get("created")
        origin_source = ("the start of the matching run (disparity.h5 'created'); the frames carry no clock time"
                         if origin else None)
    attrs = _provenance(rig_path, rig_hash, datum, datum_path, datum_hash, disparity_path, dattrs, plan, circles,
                        polygons, polygon_files, still_correction, resampler)
    if origin_source:
        attrs["time_origin_source"] = origin_source
    writer = HeightsWriter(out, plan.x, plan.y, attrs=attrs, time_origin_iso=origin, n_frames=n, footprint=fp)

    from surfrec.cli.progress import Progress
    from surfrec.geometry.resample import ResampleStats

    totals = ResampleStats()
    coverage = np.empty(n)
    abs95 = []
    t0 = time.monotonic()
    import h5py

    try:
        # Opened once (validated above by read_disparity); blocks of frames are read as they are
        # needed, while times and flags come from the metadata already in hand.
        with Progress(n, "heights") as progress, h5py.File(disparity_path, "r") as dfile:
            for b0 in range(0, n, _BLOCK_FRAMES):
                b1 = min(n, b0 + _BLOCK_FRAMES)
                block = {"disparity": dfile["disparity"][b0:b1], "disparity_sigma": dfile["disparity_sigma"][b0:b1]}
                for k in range(block["disparity"].shape[0]):
                    i = b0 + k
                    fh = heights_of_frame(hsetup, block["disparity"][k], block["disparity_sigma"][k],
                                          int(meta["frame_flags"][i]))
                    totals.add(fh.stats)
                    coverage[i] = fh.coverage
                    if np.isfinite(fh.abs_p95_mm):
                        abs95.append(fh.abs_p95_mm)
                    writer.append(float(meta["time"][i]), fh.height, fh.uncertainty, fh.flags)
                    progress(i + 1)
        wall = time.monotonic() - t0
        h95 = float(np.median(abs95)) if abs95 else float("nan")
        extra = {"wall_seconds": round(wall, 3), "seconds_per_frame": wall / n,
                 "coverage_median": float(np.median(coverage)), "coverage_min": float(coverage.min()),
                 "abs_height_p95_mm": h95,
                 "resample_nodes_third_order": totals.cubic, "resample_nodes_bilinear": totals.bilinear,
                 "resample_nodes_invalid": totals.invalid, "resample_nodes_unconverged": totals.unconverged,
                 "resample_max_iterations": totals.max_iterations}
        extra.update(_systematic(rig, datum, still_correction, h95, meta, resampler))
        writer.close(extra)
    except BaseException:
        writer.abort()
        raise
    log.info("wrote %s: %d frames, coverage %.1f%% (median over frames), %.3f s per frame; systematic part "
             "about %.4f mm", out, n, 100 * extra["coverage_median"], wall / n, extra["height_systematic_mm"])
    click.echo(str(out))


def _check_provenance(attrs, datum, rig_hash, datum_hash, disparity_path, rig_path, datum_path):
    from surfrec.errors import InputError

    made_rig, made_datum = attrs.get("rig_sha256"), attrs.get("datum_sha256")
    if made_rig and made_rig != rig_hash:
        raise InputError(f"{disparity_path} was made with another rig than {rig_path} (rig SHA-256 differs); "
                         "give the rig it was matched with")
    if made_datum and made_datum != datum_hash:
        raise InputError(f"{disparity_path} was made with another datum than {datum_path} (datum SHA-256 differs); "
                         "give the datum it was matched with")
    if datum.rig_sha256 and datum.rig_sha256 != rig_hash:
        raise InputError(f"{datum_path} was made with another rig than {rig_path} (rig SHA-256 differs)")
    if not made_rig or not made_datum:
        log.warning("warning: %s records no rig or datum SHA-256; cannot check that it was made with %s and %s",
                    disparity_path, rig_path, datum_path)


def _provenance(rig_path, rig_hash, datum, datum_path, datum_hash, disparity_path, dattrs, plan, circles, polygons,
                polygon_files, still_correction, resampler) -> dict:
    import json
    from pathlib import Path

    from surfrec.io.heightsfile import _json_default
    from surfrec.io.rigfile import file_sha256

    datum_root = {"world_to_left_camera": datum.world_to_left_camera.reshape(-1).tolist(),
                  "plane": [*datum.plane_normal.tolist(), float(datum.plane_offset)],
                  "fit_rms_mm": datum.fit_rms_mm, "n_frames": datum.n_frames, "rig_sha256": datum.rig_sha256,
                  **datum.attrs}
    match_params = {k: v for k, v in dattrs.items() if k.startswith("param_")}
    attrs = {
        "world_to_left_camera": datum.world_to_left_camera.reshape(-1),
        "history": " ".join(shlex.quote(a) for a in ["surfrec", *sys.argv[1:]]),
        "rig_file": str(rig_path), "rig_sha256": rig_hash, "rig_json": Path(rig_path).read_text(encoding="utf-8"),
        "datum_file": str(datum_path), "datum_sha256": datum_hash,
        "datum_attributes": json.dumps(datum_root, default=_json_default),
        "disparity_file": str(disparity_path), "disparity_sha256": file_sha256(disparity_path),
        "disparity_attributes": json.dumps(dattrs, default=_json_default),
        "grid_step_mm": plan.step, "grid_step_source": "given (--grid-step)" if plan.step_given else
        "default: the matches' spacing on the still water, rounded down",
        "point_spacing_mm": plan.point_spacing_mm,
        "extent_mm": list(plan.extent), "extent_source": "given (--extent)" if plan.extent_given else
        "default: the area both cameras see",
        "measured_extent_mm": list(plan.measured_extent),
        "exclude_circles_mm": json.dumps([list(c) for c in circles]),
        "exclude_polygon_files": json.dumps([str(p) for p in polygon_files]),
        "exclude_polygons_mm": json.dumps([p.tolist() for p in polygons]),
        "excluded_nodes": int(plan.excluded.sum()), "footprint_nodes": int(plan.footprint.sum()),
        "still_correction": bool(still_correction),
        "resample_method": "per-node fixed point h = H(pi(x, y, h)) along the left camera's rays; third-order "
                           "interpolation in rectified (u, v) (cubic convolution, quadratic at edges), bilinear "
                           "where no third-order stencil of valid points fits; NaN where the enclosing cell "
                           "holds an invalid match",
        "resample_tolerance_mm": resampler.tol_mm, "resample_max_iterations_allowed": resampler.max_iter,
        "uncertainty_method": "random part: |dh/dd| x disparity_sigma, interpolated bilinearly "
                              "(neighbouring matches taken as fully correlated)",
        **{f"match_{k}": v for k, v in match_params.items()},
    }
    return attrs


def _systematic(rig, datum, still_correction, h95, meta, resampler) -> dict:
    import numpy as np

    from surfrec.geometry.resample import heights_on_matching_grid
    from surfrec.geometry.uncertainty import height_scale_uncertainty, systematic_height_error

    rect = rig.rectification
    p1, p2 = rect["P1"], rect["P2"]
    focal = float(p1[0, 0])
    c = float(p1[0, 2] - p2[0, 2])
    core = float(np.nanmedian(np.abs(datum.disparity - c)))
    unc = (rig.extra.get("calibration") or {}).get("uncertainty") if isinstance(rig.extra, dict) else None
    eps = height_scale_uncertainty(focal, rig.baseline_mm, core, unc)
    out = systematic_height_error(still_correction=still_correction,
                                  rough_rms_mm=float(datum.attrs.get("rough_rms_mm", float("nan"))),
                                  residual_rms_mm=float(datum.attrs.get("residual_rms_mm", float("nan"))),
                                  scale_relative=eps, abs_height_mm=h95)
    # The calibration's reprojection RMS seen as height, for reference: how far a
    # corner-fit error of that size along the epipolar line moves a point.
    rms_px = float((rig.residuals or {}).get("rms_px", float("nan")))
    _, gain = heights_on_matching_grid(datum.u, datum.v, datum.disparity, rect["Q"], rect["R1"],
                                       datum.world_to_left_camera)
    out["calibration_rms_px"] = rms_px
    out["calibration_rms_as_height_mm"] = float(np.nanmedian(np.abs(gain)) * rms_px)
    out["systematic_note"] = ("height_systematic_mm = what the still-water correction leaves (datum rough_rms_mm; "
                              "plus its smooth residual when the correction is off) combined with the height-scale "
                              "error of the calibration's 1-sigma focal length, baseline and principal points "
                              "(systematic_scale_relative) at |h| = abs_height_p95_mm; NaN scale: the rig gives no "
                              "parameter uncertainties (counted as 0)")
    return out
