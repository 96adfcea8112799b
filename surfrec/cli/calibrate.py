"""``surfrec calibrate``: calibrate a stereo rig from views of a target (or re-pose it)."""

from __future__ import annotations

import json
import logging
import time

import click

from surfrec.cli.options import (available_cores, force_option, json_option, output_option, verbosity,
                                 workers_option)

log = logging.getLogger("surfrec")


def _board_size(ctx, param, value):
    from surfrec.calib.targets import parse_board_size

    try:
        return parse_board_size(value)
    except ValueError as exc:
        raise click.BadParameter(str(exc), ctx=ctx, param=param) from None


@click.command("calibrate")
@click.option("--left", "left_spec", required=True, metavar="IMAGES",
              help="Left camera's target views: a quoted glob, a folder, a multi-page TIFF, @LIST or -.")
@click.option("--right", "right_spec", required=True, metavar="IMAGES",
              help="Right camera's target views, paired with the left ones by index.")
@click.option("--board", "board_size", required=True, metavar="COLSxROWS", callback=_board_size,
              help="Inner corners of the chessboard (or circles of a circle grid), columns x rows, e.g. 11x8.")
@click.option("--square", "square_mm", required=True, metavar="MM",
              type=click.FloatRange(min=0, min_open=True),
              help="Side of a chessboard square, or the circle centre spacing, in mm (for asymmetric grids "
                   "OpenCV's grid unit: circles in a row are 2 x MM apart).")
@click.option("--board-kind", type=click.Choice(["chessboard", "circles", "asymmetric-circles"]),
              default="chessboard", show_default=True, help="Kind of target.")
@click.option("--keep-intrinsics", "old_rig", metavar="OLD_RIG.json", type=click.Path(dir_okay=False),
              help="Re-pose after a camera moved: keep both cameras' intrinsics and distortion from OLD_RIG.json "
                   "and estimate only the stereo pose and rectification, from 3 or more views both cameras see.")
@click.option("--report", "report_png", metavar="PNG", type=click.Path(dir_okay=False),
              help="Also write a picture for people: corner coverage per camera, per-view RMS, residual vectors.")
@output_option("file")
@json_option
@workers_option
@force_option
@verbosity
def command(left_spec, right_spec, board_size, square_mm, board_kind, old_rig, report_png, output, as_json,
            workers, force):
    """Calibrate a stereo rig from views of a target and write rig.json.

    Finds the target in every view of both cameras (views pair by index). A
    view in which only one camera sees the whole target still serves that
    camera's intrinsics (such views cover the image corners, where
    distortion is largest); views both cameras see serve the stereo pose.
    Each camera's intrinsics and Brown-Conrady distortion come from Zhang's
    method, the stereo pose from the views both see with the intrinsics
    held, then everything is refined jointly over all views, and the
    rectification is computed. A view whose reprojection RMS exceeds both
    3 x the median and 0.3 px is dropped as an outlier and the fit repeated.

    The report lists what each view served and why views were skipped, the
    reprojection RMS (per view and overall, px), the epipolar error of the
    rectified corner pairs (px), the baseline (mm), the convergence angle
    (degrees) and the fraction of an 8x6 grid of image cells that hold
    target points, per camera. It warns, by rules of thumb of camera
    calibration practice, when fewer than 10 good views serve a fit, when
    the RMS exceeds 0.5 px, or when the views cover less than 75% of the
    cells or miss an image corner cell.

    With --keep-intrinsics OLD_RIG.json only the stereo pose and the
    rectification are estimated again, and the report says how far the pose
    moved (degrees, mm).
    """
    from surfrec.io.outputs import check_output

    out = check_output(output, force=force)
    report = None
    if report_png:
        from pathlib import Path

        if Path(report_png).resolve() == Path(output).resolve():
            raise click.BadParameter("the report must not be the rig file itself", param_hint="'--report'")
        report = check_output(report_png, force=force)

    from surfrec.calib.targets import Board
    from surfrec.io.images import open_frames, pair_frames
    from surfrec.io.rigfile import check_image_size, file_sha256, read_rig

    board = Board(board_kind, board_size[0], board_size[1], square_mm)
    old = None
    if old_rig:
        old = read_rig(old_rig)
    left = open_frames(left_spec, name="left images")
    right = open_frames(right_spec, name="right images")
    pair_frames(left, right)
    if left.size != right.size:
        from surfrec.errors import InputError

        raise InputError(f"left images are {left.size[0]}x{left.size[1]} px but right images are "
                         f"{right.size[0]}x{right.size[1]} px; both cameras must have the same image size")
    if old is not None:
        check_image_size(old, left.size, "the target views")

    t0 = time.monotonic()
    dets = _detect_all(left, right, board, workers or available_cores())
    t_detect = time.monotonic() - t0
    n = len(left)
    n_left = sum(d.found for d in dets["left"])
    n_right = sum(d.found for d in dets["right"])
    log.info("found the %s in %d of %d left and %d of %d right views (%.1f s)", board.describe(), n_left, n,
             n_right, n, t_detect)
    for side, count in (("left", n_left), ("right", n_right)):
        if count == 0:
            from surfrec.errors import InputError

            what = "inner corners" if board.kind == "chessboard" else "circles"
            raise InputError(f"no {board.describe()} found in any of the {n} {side} views; check --board "
                             f"({what}, columns x rows) and --board-kind")

    from surfrec.calib.calibrate import calibrate_rig, repose_rig

    t1 = time.monotonic()
    if old is None:
        calib = calibrate_rig(dets["left"], dets["right"], board, left.size, names=left.names,
                              right_names=right.names)
    else:
        calib = repose_rig(dets["left"], dets["right"], board, left.size, left_matrix=old.left_matrix,
                           left_distortion=old.left_distortion, right_matrix=old.right_matrix,
                           right_distortion=old.right_distortion, old_rotation=old.rotation,
                           old_translation=old.translation, names=left.names,
                           right_names=right.names)
    t_fit = time.monotonic() - t1
    log.info("calibrated in %.1f s (target detection %.1f s)", t_fit, t_detect)

    inputs = {"left": left_spec, "right": right_spec, "view_pairs": n,
              "detection_seconds": round(t_detect, 2), "fit_seconds": round(t_fit, 2)}
    if old is not None:
        inputs["keep_intrinsics"] = {"path": str(old_rig), "sha256": file_sha256(old_rig)}
    rig = _to_rig(calib, inputs)
    from surfrec.io.rigfile import write_rig

    write_rig(rig, out)
    if report is not None:
        _write_report(calib, report, title=f"{out.name}: {board.describe()}, {n} view pairs")
    for w in calib.warnings:
        log.warning("warning: %s", w)

    summary = {"output": str(out), "report": str(report) if report else None, **calib.summary(),
               "inputs": inputs}
    if as_json:
        click.echo(json.dumps(summary, indent=2))
    else:
        click.echo(format_report(calib, out, report))


# ------------------------------------------------------------ detection

_WORKER = {}


def _worker_init(left, right, board):
    import cv2

    cv2.setNumThreads(1)  # one process per core already; OpenCV's own threads would oversubscribe
    _WORKER.update(left=left, right=right, board=board)


def _detect_one(job):
    from surfrec.calib.targets import find_target

    side, i = job
    return find_target(_WORKER[side].read_raw(i), _WORKER["board"])


def _detect_all(left, right, board, workers: int) -> dict:
    """Find the target in every frame of both runs; a process pool when workers > 1."""
    from surfrec.cli.progress import Progress

    jobs = [(side, i) for i in range(len(left)) for side in ("left", "right")]
    results = {}
    with Progress(len(jobs), "finding the target") as progress:
        if workers <= 1 or len(jobs) <= 2:
            _worker_init(left, right, board)
            for k, job in enumerate(jobs):
                results[job] = _detect_one(job)
                progress(k + 1)
        else:
            import multiprocessing as mp
            from concurrent.futures import ProcessPoolExecutor

            ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
            with ProcessPoolExecutor(max_workers=min(workers, len(jobs)), mp_context=ctx,
                                     initializer=_worker_init, initargs=(left, right, board)) as pool:
                for k, (job, det) in enumerate(zip(jobs, pool.map(_detect_one, jobs, chunksize=1))):
                    results[job] = det
                    progress(k + 1)
    return {side: [results[(side, i)] for i in range(len(left))] for side in ("left", "right")}


# -------------------------------------------------------------- output

def _to_rig(calib, inputs):
    from surfrec.io.rigfile import StereoRig

    quality = calib.quality_dict()
    quality["inputs"] = inputs
    return StereoRig(image_size=calib.image_size, left_matrix=calib.left_matrix,
                     left_distortion=calib.left_distortion, right_matrix=calib.right_matrix,
                     right_distortion=calib.right_distortion, rotation=calib.rotation,
                     translation=calib.translation, rectification=calib.rectification,
                     residuals=calib.residuals_dict(), board=calib.board.to_dict(),
                     extra={"calibration": quality})


def _write_report(calib, path, title):
    from surfrec.io.outputs import atomic_file
    from surfrec.plots.calibration import calibration_figure

    fig = calibration_figure(calib, title=title)
    with atomic_file(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110)


def format_report(calib, out, report=None) -> str:
    """The terminal report of a calibration (plain text, px / mm / degrees)."""
    b = calib.board
    w, h = calib.image_size
    unit = "squares" if b.kind == "chessboard" else "spacing"
    lines = [f"{'re-posed' if calib.mode != 'full' else 'calibrated'} from {len(calib.views)} view pairs of the "
             f"{b.describe()} ({b.square_mm:g} mm {unit}), {w}x{h} px"]
    names = _short_names([v.name for v in calib.views])
    width = max([len(n) for n in names] + [4])
    lines.append(f"  {'view':<{width}}  {'left':<5} {'right':<5}  {'served':<18} {'RMS px':>7}  notes")
    for v, name in zip(calib.views, names):
        served = " ".join(v.roles) if v.roles else "skipped"
        rms = f"{v.rms_px:7.3f}" if v.rms_px is not None else f"{'-':>7}"
        lines.append(f"  {name:<{width}}  {'found' if v.found_left else '-':<5} "
                     f"{'found' if v.found_right else '-':<5}  {served:<18} {rms}  {'; '.join(v.notes)}")
    unc = calib.quality_dict().get("uncertainty", {})
    for side in ("left", "right"):
        k = getattr(calib, f"{side}_matrix")
        d = getattr(calib, f"{side}_distortion")
        s = unc.get(side, {})
        sig = (f"  (1-sigma {s['fx']:.2f} {s['fy']:.2f} {s['cx']:.2f} {s['cy']:.2f})" if s else "")
        kept = " (kept from the old rig)" if calib.mode != "full" else ""
        lines.append(f"{side + ' camera:':<14}fx {k[0, 0]:.2f} fy {k[1, 1]:.2f} px, cx {k[0, 2]:.2f} "
                     f"cy {k[1, 2]:.2f} px{sig}{kept}")
        lines.append(f"{'':<14}k1 {d[0]:.5g} k2 {d[1]:.5g} p1 {d[2]:.3g} p2 {d[3]:.3g} k3 {d[4]:.5g}")
        role = side if calib.mode == "full" else "stereo"
        n_used = sum(role in v.roles for v in calib.views)
        cells = calib.coverage["cells"]
        lines.append(f"{'':<14}{n_used} views, target points in {100 * calib.coverage[side]:.0f}% of "
                     f"{cells[0]}x{cells[1]} image cells")
    n_st = sum("stereo" in v.roles for v in calib.views)
    lines.append(f"{'stereo:':<14}baseline {calib.baseline_mm:.3f} mm, convergence {calib.convergence_deg:.3f} deg, "
                 f"{n_st} views")
    seq = calib.residuals_dict()["sequential"]
    seq_txt = ", ".join(f"{k.replace('_rms_px', '')} {v:.3f}" for k, v in seq.items())
    lines.append(f"{'residuals:':<14}reprojection RMS {calib.rms_px:.3f} px ({'joint fit; ' if calib.joint_fit else ''}"
                 f"sequential: {seq_txt}), epipolar RMS {calib.epipolar_rms_px:.3f} px (rectified rows)")
    if calib.pose_change is not None:
        pc = calib.pose_change
        lines.append(f"{'pose moved:':<14}{pc['rotation_deg']:.4f} deg, translation {pc['translation_mm']:.3f} mm "
                     f"(baseline {pc['baseline_change_mm']:+.3f} mm)")
    for wmsg in calib.warnings:
        lines.append(f"{'warning:':<14}{wmsg}")
    lines.append(f"wrote {out}" + (f" and {report}" if report else ""))
    return "\n".join(lines)


def _short_names(names):
    """File names without their folders when those alone tell the views apart (the full names are in rig.json)."""
    import os

    short = [os.path.basename(n) or n for n in names]
    return short if len(set(short)) == len(short) else list(names)
