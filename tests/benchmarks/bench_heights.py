"""Heights stage: resampling error and speed beside scipy's griddata, end-to-end accuracy, cost against matching.

Run by hand on a synthetic session (the default `waves` session, full size):

    surfrec synth /tmp/hfull
    python tests/benchmarks/bench_heights.py /tmp/hfull [--work /tmp/hfull-work]

1. Resampling alone, on exact disparities (surfrec.synth.truthdisparity at
   the matching grid, true rig, no images): our per-node fixed point with
   third-order interpolation in (u, v), the same with bilinear
   interpolation, and the reference method, scipy.interpolate.griddata
   (Delaunay triangulation of the scattered (x, y) per frame, then linear or
   Clough-Tocher cubic), on the same nodes. Errors against the exact surface
   in the true geometry; the per-point noise they are set against is the
   datum's noise floor.
2. End to end, from the rendered frames: rig -> datum -> match -> heights
   with the true rig and with a rig calibrated from the session's target
   views (`surfrec calibrate`), each with and without the still-water
   correction. Errors against the exact surface, comparing in the true
   geometry two ways: (a) the file's world_to_left_camera and the true
   left-camera pose (what a user of the file gets), (b) the datum frame built
   from the true camera (leaves out how well the datum frame itself was
   registered); and (c) = (b) after removing a lateral shift and a constant
   by least squares (what is left once the frame registration is set aside).
3. Cost: the heights command's seconds per frame beside the match command's,
   both timed in this run on the same frames.

Outputs missing from --work are made with the CLI first (several minutes).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
from scipy.interpolate import griddata

from surfrec.geometry.datum import datum_frame
from surfrec.geometry.resample import (HeightResampler, default_grid_step, footprint_mask, grid_axes,
                                       heights_on_matching_grid, still_water_points)
from surfrec.io.heightsfile import read_heights
from surfrec.io.rigfile import write_rig
from surfrec.io.truthfile import read_truth
from surfrec.match.pipeline import matching_grid
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import surface_from_dict
from surfrec.synth.truthdisparity import true_disparity
from surfrec.synth.truthrig import true_rig_from_truth


def cli(*args, log=None):
    t0 = time.perf_counter()
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args)], capture_output=True, text=True)
    if res.returncode != 0:
        raise SystemExit(f"surfrec {' '.join(map(str, args))} failed:\n{res.stderr}")
    return time.perf_counter() - t0


def tank_error(surface, left, m, x, y, h, t):
    xx, yy = np.meshgrid(x, y)
    cam = np.stack([xx, yy, h], -1) @ m[:3, :3].T + m[:3, 3]
    w = (cam - left.translation) @ left.rotation
    return w[..., 2] - surface.height(w[..., 0], w[..., 1], t), w


def part1(truth, frames):
    rig = true_rig_from_truth(truth)
    rect = rig.rectification
    left = Camera.from_dict(truth["rigs"]["rig"]["left"])
    right = Camera.from_dict(truth["rigs"]["rig"]["right"])
    surface = surface_from_dict(truth["groups"]["waves"]["surface"])
    times = np.asarray(truth["groups"]["waves"]["time"])
    n = left.rotation[:, 2]
    m = datum_frame(n, float(n @ left.translation))
    gu, gv = matching_grid(rig.image_size, 4, 17)
    uu, vv = np.meshgrid(gu.astype(float), gv.astype(float))
    still = still_water_points(gu, gv, m, rect["R1"], rect["P1"])
    step = default_grid_step(still)
    ext = (np.nanmin(still[..., 0]), np.nanmax(still[..., 0]), np.nanmin(still[..., 1]), np.nanmax(still[..., 1]))
    x, y = grid_axes(ext, step, snap=True)
    fp = footprint_mask(x, y, gu, gv, m, rect["R1"], rect["P1"])
    xx, yy = np.meshgrid(x, y)
    methods = {"surfrec, third order (default)": "cubic", "surfrec, bilinear": "linear",
               "griddata linear": "g-linear", "griddata cubic (Clough-Tocher)": "g-cubic"}
    errs = {k: [] for k in methods}
    secs = {k: [] for k in methods}
    stats = []
    for i in frames:
        t = float(times[i])
        d, _ = true_disparity(left, right, rect, surface, t, uu, vv)
        outs = {}
        for name, meth in methods.items():
            if meth in ("cubic", "linear"):
                res = HeightResampler(gu, gv, rect["Q"], rect["R1"], rect["P1"], m, x, y, mask=fp, method=meth)
                res(d)  # compile / warm up
                t0 = time.perf_counter()
                h, _, st = res(d, np.full(d.shape, 0.005))
                secs[name].append(time.perf_counter() - t0)
                if meth == "cubic":
                    stats.append(st)
            else:
                t0 = time.perf_counter()
                pts, _ = heights_on_matching_grid(gu, gv, d, rect["Q"], rect["R1"], m)
                ok = np.all(np.isfinite(pts), axis=-1)
                h = griddata(pts[ok][:, :2], pts[ok][:, 2], (xx, yy), method=meth[2:])
                secs[name].append(time.perf_counter() - t0)
                h[~fp] = np.nan
            outs[name] = tank_error(surface, left, m, x, y, h, t)[0]
        common = np.logical_and.reduce([np.isfinite(e) for e in outs.values()])
        for name in methods:
            errs[name].append(outs[name][common])
    print(f"grid {x.size} x {y.size} nodes, step {step:g} mm; matching grid {gu.size} x {gv.size}; "
          f"frames {list(frames)}; nodes compared: those all four methods cover")
    print()
    print("| method | s per frame (median) | RMS error µm | 99.9% abs error µm | max abs error µm |")
    print("|---|---|---|---|---|")
    for name in methods:
        e = np.abs(np.concatenate(errs[name])) * 1e3
        print(f"| {name} | {statistics.median(secs[name]):.3f} | {np.sqrt(np.mean(e ** 2)):.4f} | "
              f"{np.percentile(e, 99.9):.3f} | {e.max():.3f} |")
    st = stats[-1]
    print()
    print(f"fixed point: at most {max(s.max_iterations for s in stats)} iterations; nodes third-order "
          f"{st.cubic}, bilinear {st.bilinear}, invalid {st.invalid}, unconverged {st.unconverged} (last frame)")


def ensure(session: Path, work: Path, kind: str):
    rig = work / f"{kind}_rig.json"
    if not rig.exists():
        if kind == "true":
            write_rig(true_rig_from_truth(read_truth(session / "truth.h5")), rig)
        else:
            cli("calibrate", "--left", f"{session}/target/left/*.png", "--right", f"{session}/target/right/*.png",
                "--board", "11x8", "--square", "15", "-o", rig, "-q")
    datum = work / f"{kind}_datum.h5"
    if not datum.exists():
        cli("datum", "--rig", rig, "--left", session / "still" / "left", "--right", session / "still" / "right",
            "-o", datum, "-q")
    disp = work / f"{kind}_disp.h5"
    if not disp.exists():
        cli("match", "--rig", rig, "--datum", datum, "--left", session / "waves" / "left", "--right",
            session / "waves" / "right", "--timestamps", session / "waves" / "timestamps.csv", "-o", disp, "-q")
    return rig, datum, disp


def evaluate(path, truth):
    r = read_heights(path)
    left = Camera.from_dict(truth["rigs"]["rig"]["left"])
    surface = surface_from_dict(truth["groups"]["waves"]["surface"])
    times = np.asarray(truth["groups"]["waves"]["time"])
    n = left.rotation[:, 2]
    m_true = datum_frame(n, float(n @ left.translation))
    out = {}
    for label, m in (("a", r["attrs"]["world_to_left_camera"]), ("b", m_true)):
        es, rows, cov = [], [], []
        for i, h in enumerate(r["height"].astype(np.float64)):
            e, w = tank_error(surface, left, m, r["x"], r["y"], h, float(times[i]))
            ok = r["footprint"] & np.isfinite(e)
            cov.append(ok.sum() / r["footprint"].sum())
            gx, gy = surface.gradient(w[..., 0], w[..., 1], float(times[i]))
            es.append(e[ok])
            rows.append(np.stack([np.ones(ok.sum()), gx[ok], gy[ok]], 1))
        e = np.concatenate(es)
        out[label] = (float(np.sqrt(np.mean(e ** 2))), float(np.mean(e)), float(np.percentile(np.abs(e), 95)))
        out["coverage"] = float(np.mean(cov))
        if label == "b":
            a = np.concatenate(rows)
            c, *_ = np.linalg.lstsq(a, e, rcond=None)
            out["c"] = float(np.sqrt(np.mean((e - a @ c) ** 2)))
            out["shift_mm"] = float(np.hypot(c[1], c[2]))
    out["sigma"] = float(np.nanmedian(r["height_uncertainty"]))
    out["systematic"] = float(r["attrs"]["height_systematic_mm"])
    out["s_per_frame"] = float(r["attrs"]["seconds_per_frame"])
    return out


def part2(session, work, truth, kinds):
    print("| rig | still correction | (a) RMS / bias / p95 mm | (b) RMS / bias / p95 mm | (c) RMS mm | lateral shift "
          "mm | coverage | median sigma_h mm | height_systematic_mm |")
    print("|---|---|---|---|---|---|---|---|---|")
    for kind in kinds:
        rig, datum, disp = ensure(session, work, kind)
        for corr in (True, False):
            out = work / f"{kind}_heights{'' if corr else '_raw'}.h5"
            cli("heights", disp, "--rig", rig, "--datum", datum, "-o", out, "--force", "-q",
                *([] if corr else ["--no-still-correction"]))
            r = evaluate(out, truth)
            a, b = r["a"], r["b"]
            print(f"| {kind} | {'on' if corr else 'off'} | {a[0]:.4f} / {a[1]:+.4f} / {a[2]:.4f} | "
                  f"{b[0]:.4f} / {b[1]:+.4f} / {b[2]:.4f} | {r['c']:.4f} | {r['shift_mm']:.3f} | "
                  f"{r['coverage']:.4f} | {r['sigma']:.4f} | {r['systematic']:.4f} |")


def part3(session, work, n_frames):
    rig, datum, disp = ensure(session, work, "true")
    short = work / "timing_disp.h5"
    cli("match", "--rig", rig, "--datum", datum, "--left", session / "waves" / "left", "--right",
        session / "waves" / "right", "--timestamps", session / "waves" / "timestamps.csv", "-o", short,
        "--stop", n_frames, "--force", "-q")
    import h5py

    with h5py.File(short, "r") as f:
        match_s = float(f.attrs["seconds_per_frame"])
    out = work / "timing_heights.h5"
    wall = cli("heights", short, "--rig", rig, "--datum", datum, "-o", out, "--force", "-q")
    a = read_heights(out, frames=slice(0, 0))["attrs"]
    heights_s = float(a["seconds_per_frame"])
    # The steady state, in process: read a frame, resample, write it (after a warm-up frame).
    from surfrec.io.datumfile import read_datum
    from surfrec.io.disparityfile import read_disparity
    from surfrec.io.heightsfile import HeightsWriter
    from surfrec.io.rigfile import read_rig
    from surfrec.geometry.resample import plan_grid

    rg, dt = read_rig(rig), read_datum(datum)
    meta = read_disparity(disp, frames=slice(0, 0))
    rect = rg.rectification
    plan = plan_grid(meta["u"], meta["v"], rect["R1"], rect["P1"], dt)
    res = HeightResampler(meta["u"], meta["v"], rect["Q"], rect["R1"], rect["P1"], dt.world_to_left_camera,
                          plan.x, plan.y, mask=plan.footprint, still=plan.still)
    w = HeightsWriter(work / "steady.h5", plan.x, plan.y, attrs={"world_to_left_camera": dt.world_to_left_camera},
                      time_origin_iso=None, n_frames=meta["time"].size, footprint=plan.footprint)
    per = []
    for i in range(meta["time"].size):
        t0 = time.perf_counter()
        b = read_disparity(disp, frames=slice(i, i + 1))
        h, s, _ = res(b["disparity"][0], b["disparity_sigma"][0])
        w.append(float(b["time"][i]), h, s, 0)
        per.append(time.perf_counter() - t0)
    w.close()
    steady = statistics.median(per[1:])
    print(f"match: {match_s:.3f} s per frame pair ({n_frames} frames, recorded by the command); heights: "
          f"{heights_s:.3f} s per frame in the command ({n_frames} frames, incl. loading the compiled kernel "
          f"once; {wall:.1f} s wall with imports), {steady:.4f} s per frame steady state "
          f"(read + resample + write, median over {len(per) - 1} frames)")
    print(f"ratio heights / match: {heights_s / match_s:.3f} (command), {steady / match_s:.4f} (steady state)")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("session", type=Path)
    ap.add_argument("--work", type=Path, default=None, help="folder for rigs, datums, disparities, heights")
    ap.add_argument("--parts", default="123")
    ap.add_argument("--timing-frames", type=int, default=6)
    args = ap.parse_args()
    work = args.work or Path(f"{args.session}-heights-bench")
    work.mkdir(exist_ok=True)
    truth = read_truth(args.session / "truth.h5")
    info = json.dumps({"session": str(args.session), "image_size": truth["rigs"]["rig"]["left"]["image_size"]})
    print(info)
    if "1" in args.parts:
        print("\n### 1. Resampling alone (exact disparities)\n")
        part1(truth, [0, 11, 23] if truth["groups"]["waves"]["n_frames"] >= 24 else [0, 2])
    if "2" in args.parts:
        print("\n### 2. End to end (rendered frames), 24 wave frames\n")
        part2(args.session, work, truth, ["true", "calibrated"])
    if "3" in args.parts:
        print("\n### 3. Cost against matching\n")
        part3(args.session, work, args.timing_frames)


if __name__ == "__main__":
    main()
