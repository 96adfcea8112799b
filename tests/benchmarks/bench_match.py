"""Matcher accuracy and speed beside OpenCV's StereoSGBM, on the same rectified frame pairs.

Run by hand on a synthetic session (default: render the full `waves` session first):

    surfrec synth /tmp/bench-session
    python tests/benchmarks/bench_match.py /tmp/bench-session [--frames 8]

Both matchers get the true rig (so calibration error is left out) and the
band centre comes from the true still-water disparity, as a datum would give
it. Errors are against the exact truth disparities at the grid points
(surfrec.synth.truthdisparity, computed from the rendered surface). Time per
frame pair (wall clock and CPU time of the process, both as medians; with
all threads and with one compute thread each) includes rectifying both
frames on both sides: for StereoSGBM by
cv2.remap (bilinear) to 8 bits, as it needs. StereoSGBM settings (issue 4):
blockSize 5, P1 = 8*5^2, P2 = 32*5^2, uniquenessRatio 10, MODE_SGBM,
numDisparities the smallest multiple of 16 covering the scene's disparity
range with 16 px to spare on each side; its 1/16 px output is read at the
same grid points.

Also measured: the error each rectification resampling adds (still water),
the random error against the theoretical floor
sigma_d = sqrt(2) sigma_noise / sqrt(sum of squared gradients) (Pan et al.
2008), and how the time scales with spacing, window and time window.
"""

from __future__ import annotations

import argparse
import statistics
import time

import cv2
import numba
import numpy as np

from surfrec.io.images import open_frames
from surfrec.io.truthfile import read_truth
from surfrec.match.pipeline import MatchParams, band_halfwidth_px, match_frame, matching_grid
from surfrec.match.rectification import FrameRectifier
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import StillWater, surface_from_dict
from surfrec.synth.truthdisparity import true_disparity
from surfrec.synth.truthrig import true_rig_from_truth


def _setup(session):
    tr = read_truth(f"{session}/truth.h5")
    rig = true_rig_from_truth(tr)
    left = Camera.from_dict(tr["rigs"]["rig"]["left"])
    right = Camera.from_dict(tr["rigs"]["rig"]["right"])
    return tr, rig, left, right


def _ours(session, group, frames, params, rig, left, right, tr, timing=True):
    gu, gv = matching_grid(rig.image_size, params.spacing, params.window)
    uu, vv = np.meshgrid(gu, gv)
    ref, _ = true_disparity(left, right, rig.rectification, StillWater(), 0.0, uu, vv)
    c = rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2]
    band = band_halfwidth_px(ref, abs(left.centre[2]), c, params.max_excursion_mm)
    fr = FrameRectifier(rig, params.rectify_method)
    lf, rf = open_frames(f"{session}/{group}/left"), open_frames(f"{session}/{group}/right")
    g = tr["groups"][group]
    surf = surface_from_dict(g["surface"])
    errs, sig, times, valid = [], [], [], []
    cpu = []
    half = params.time_window // 2
    for i in frames:
        idx = [j for j in range(i - half, i + half + 1) if 0 <= j < len(lf)]
        raw = [(lf[j], rf[j]) for j in idx]
        t0, c0 = time.perf_counter(), time.process_time()
        ls = np.stack([fr.left(a) for a, _ in raw])
        rs = np.stack([fr.right(b) for _, b in raw])
        taus = np.array(idx, float) - i
        out = match_frame(ls, rs, taus, gu, gv, ref, band, params)
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
        dt, _ = true_disparity(left, right, rig.rectification, surf, float(g["time"][i]), uu, vv)
        errs.append(out["disparity"] - dt)
        sig.append(out["disparity_sigma"])
        valid.append(np.isfinite(out["disparity"]).mean())
    _ours.cpu = cpu
    return np.array(errs), np.array(sig), times, valid, (uu, vv, ref)


def _sgbm(session, group, frames, rig, left, right, tr, uu, vv, ref):
    fr = FrameRectifier(rig, "linear")
    lf, rf = open_frames(f"{session}/{group}/left"), open_frames(f"{session}/{group}/right")
    g = tr["groups"][group]
    surf = surface_from_dict(g["surface"])
    dmin, dmax = np.nanmin(ref) - 5, np.nanmax(ref) + 5  # the scene's range, waves included
    min_disp = int(np.floor(dmin)) - 16
    num = int(np.ceil((dmax + 16 - min_disp) / 16.0)) * 16
    sgbm = cv2.StereoSGBM_create(minDisparity=min_disp, numDisparities=num, blockSize=5, P1=8 * 25, P2=32 * 25,
                                 uniquenessRatio=10, mode=cv2.STEREO_SGBM_MODE_SGBM)
    errs, times, cpu = [], [], []
    mx_l, my_l = fr.maps["left"]
    mx_r, my_r = fr.maps["right"]
    for i in frames:
        a, b = lf.read_raw(i), rf.read_raw(i)
        t0, c0 = time.perf_counter(), time.process_time()
        la = cv2.remap(a, mx_l, my_l, cv2.INTER_LINEAR)
        rb = cv2.remap(b, mx_r, my_r, cv2.INTER_LINEAR)
        disp = sgbm.compute(la, rb).astype(np.float32) / 16.0
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
        d = disp[vv, uu]
        d[d < min_disp] = np.nan
        dt, _ = true_disparity(left, right, rig.rectification, surf, float(g["time"][i]), uu, vv)
        errs.append(d - dt)
    _sgbm.cpu = cpu
    return np.array(errs), times, (min_disp, num)


def _stats(e):
    e = e[np.isfinite(e)]
    return np.sqrt(np.mean(e ** 2)), np.mean(e), np.percentile(np.abs(e), 95)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("session")
    ap.add_argument("--frames", type=int, default=8)
    args = ap.parse_args()
    tr, rig, left, right = _setup(args.session)
    n = len(tr["groups"]["waves"]["time"])
    frames = list(range(min(args.frames, n)))
    print(f"session {args.session}: {rig.image_size[0]}x{rig.image_size[1]} px, OpenCV {cv2.__version__} "
          f"({cv2.getNumThreads()} threads)\n")

    p = MatchParams()
    for threads in (None, 1):
        if threads:
            # One compute thread each: what a worker of `surfrec run` gets, and the fair per-core figure.
            numba.set_num_threads(1)
            cv2.setNumThreads(1)
        label = "one thread each" if threads else f"all threads ({numba.get_num_threads()} numba, "\
            f"{cv2.getNumThreads()} OpenCV)"
        e_ours, s_ours, t_ours, v_ours, (uu, vv, ref) = _ours(args.session, "waves", frames, p, rig, left, right, tr)
        c_ours = _ours.cpu
        e_sg, t_sg, (md, nd) = _sgbm(args.session, "waves", frames, rig, left, right, tr, uu, vv, ref)
        c_sg = _sgbm.cpu
        r_o, b_o, p_o = _stats(e_ours)
        r_s, b_s, p_s = _stats(e_sg)
        print(f"### Wave frames, {label} ({len(frames)} frame pairs, grid {uu.shape[1]}x{uu.shape[0]} "
              f"at spacing {p.spacing} px)\n")
        print("| matcher | wall s per frame pair (median) | CPU s per frame pair (median) | valid | RMS error px "
              "| bias px | 95% abs error px |")
        print("|---|---|---|---|---|---|---|")
        print(f"| surfrec (window {p.window}, B-spline {p.spline_order}, rectify {p.rectify_method}) | "
              f"{statistics.median(t_ours):.3f} | {statistics.median(c_ours):.3f} | {np.mean(v_ours):.3f} | "
              f"{r_o:.4f} | {b_o:+.4f} | {p_o:.4f} |")
        print(f"| StereoSGBM (minDisparity {md}, numDisparities {nd}) | {statistics.median(t_sg):.3f} | "
              f"{statistics.median(c_sg):.3f} | {np.isfinite(e_sg).mean():.3f} | {r_s:.4f} | {b_s:+.4f} | "
              f"{p_s:.4f} |")
        print(f"\nratios: RMS error surfrec/SGBM = {r_o / r_s:.3f}; wall time surfrec/SGBM = "
              f"{statistics.median(t_ours) / statistics.median(t_sg):.2f}; CPU time surfrec/SGBM = "
              f"{statistics.median(c_ours) / statistics.median(c_sg):.2f}\n")
    numba.set_num_threads(numba.config.NUMBA_NUM_THREADS)
    cv2.setNumThreads(-1)

    # Rectification resampling, on still water (no surface-shape error).
    ns = len(tr["groups"]["still"]["time"])
    sframes = list(range(ns))
    print("### Error added by the rectification resampling (still-water frames)\n")
    print("| rectify | RMS error px | bias px |")
    print("|---|---|---|")
    for method in ("linear", "cubic", "lanczos4", "bspline3", "bspline5"):
        pm = MatchParams(rectify_method=method)
        e, *_ = _ours(args.session, "still", sframes, pm, rig, left, right, tr)
        r, b, _ = _stats(e)
        print(f"| {method} | {r:.4f} | {b:+.4f} |")

    # Random error against the theoretical floor, on still water.
    e, s, *_ = _ours(args.session, "still", sframes, p, rig, left, right, tr)
    sensor = tr["sensor"]
    print("\n### Random error against the theoretical floor (still water)\n")
    floor = _floor(args.session, rig, sensor, uu, vv, p.window)
    observed = np.sqrt(np.nanmean(e ** 2, axis=0))
    ratio = np.nanmedian(observed / floor)
    print(f"median over points of observed RMS / floor = {ratio:.2f}; "
          f"median estimated sigma / observed RMS = {np.nanmedian(np.nanmean(s, axis=0) / observed):.2f}\n")

    print("### Time and accuracy against settings (wave frames, median)\n")
    print("The matcher's own 1-sigma against the observed RMS error tells how honest it is: a first-order "
          "shape function on a surface curved on the window's scale leaves a systematic misfit that the "
          "sigma does not include.\n")
    print("| spacing | window | time window | shape order | wall s per frame pair | RMS error px "
          "| median sigma / RMS |")
    print("|---|---|---|---|---|---|---|")
    for spacing, window, tw, so in ((4, 15, 1, 1), (8, 15, 1, 1), (2, 15, 1, 1), (4, 11, 1, 1), (4, 21, 1, 1),
                                    (4, 11, 3, 1), (4, 9, 5, 1), (4, 15, 1, 2), (4, 21, 1, 2)):
        pm = MatchParams(spacing=spacing, window=window, time_window=tw, shape_order=so)
        e, sg, t, *_ = _ours(args.session, "waves", frames[:4], pm, rig, left, right, tr)
        rms = _stats(e)[0]
        print(f"| {spacing} | {window} | {tw} | {so} | {statistics.median(t):.3f} | {rms:.4f} "
              f"| {np.nanmedian(sg) / rms:.2f} |")


def _floor(session, rig, sensor, uu, vv, window):
    """Theoretical 1-sigma per grid point from the noise model and the window's gradients."""
    from scipy import ndimage

    fr = FrameRectifier(rig, "bspline3")
    lf = open_frames(f"{session}/still/left")
    full = 2 ** sensor["bits"] - 1
    floors = []
    for i in range(len(lf)):
        img = fr.left(lf.read_raw(i).astype(np.float64))
        # Sensor noise in DN: shot noise of the signal plus read noise (the renderer's model).
        electrons = np.clip(img / full - sensor["black_level"], 0, None) * sensor["full_well_e"]
        var_dn = (electrons + sensor["read_noise_e"] ** 2) * (full / sensor["full_well_e"]) ** 2
        gx = ndimage.convolve1d(img, np.array([-1, 8, 0, -8, 1]) / 12.0, axis=1)
        k = np.ones((window, window))
        g2 = ndimage.convolve(gx ** 2, k, mode="nearest")
        nv = ndimage.convolve(var_dn, k, mode="nearest") / k.size
        floors.append(np.sqrt(2.0 * nv / g2)[vv, uu])
    return np.sqrt(np.mean(np.square(floors), axis=0))


if __name__ == "__main__":
    main()
