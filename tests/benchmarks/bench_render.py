"""Render time of the synthetic sessions, beside a reference operation in the same run.

Run by hand (not collected by pytest):

    python tests/benchmarks/bench_render.py [--repeat 3] [--only quick|full]

For each session size it times, per camera frame: building the ray bundle
(once per camera), a speckle frame of the `waves` surface, a speckle frame
of the `scatter` surface (time-harmonic: along-ray tables, built once), and
a target view. The reference is OpenCV's cv2.remap (bicubic) of an image of
the same supersampled size through a precomputed map: the cheapest possible
per-sample image warp, so the ratio says how many "remaps" one frame costs
and is steadier than seconds on a shared machine.
"""

from __future__ import annotations

import argparse
import statistics
import time

import cv2
import numpy as np

from surfrec.synth import render as rd
from surfrec.synth.scenarios import build_scenario


def _median_time(fn, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def bench(quick: bool, repeat: int):
    sc = build_scenario("waves", quick=quick, seed=0)
    rig = sc.rigs["rig"]
    s = sc.sensor.supersample
    t0 = time.perf_counter()
    bundle = rd.RayBundle(rig.left, s)
    t_bundle = time.perf_counter() - t0
    board_bundle = rd.RayBundle(rig.left, 4)
    g = sc.group("waves")
    pattern = rd.speckle_pattern(rig.projector.resolution, sc.projector_grain_px, np.random.default_rng(0))

    def speckle():
        rad = rd.render_radiance_speckle(bundle, g.surface, 0.01, rig.projector, pattern, sc.lighting)
        rd.expose(rad, sc.sensor, np.random.default_rng(1))

    view = sc.group("target").views[0]

    board_sensor = rd.SensorModel(supersample=4)

    def board():
        rad = rd.render_radiance_board(board_bundle, view.rotation, view.origin, sc.board, sc.lighting)
        rd.expose(rad, board_sensor, np.random.default_rng(1))

    scat = build_scenario("scatter", quick=quick, seed=0)
    sg = scat.group("waves")
    sbundle = rd.RayBundle(scat.rigs["rig"].left, s)
    t0 = time.perf_counter()
    rd._HarmonicAlongRays(sbundle, sg.surface)  # warm the per-camera table, timed separately
    t_table = time.perf_counter() - t0
    sbundle.tables[("harmonic", id(sg.surface))] = rd._HarmonicAlongRays(sbundle, sg.surface)

    def scatter():
        rad = rd.render_radiance_speckle(sbundle, sg.surface, 0.01, scat.rigs["rig"].projector, pattern,
                                         scat.lighting, scat.post)
        rd.expose(rad, scat.sensor, np.random.default_rng(1))

    h, w = bundle.shape
    src = np.random.default_rng(0).random((h, w), dtype=np.float32)
    mx, my = np.meshgrid(np.arange(w, dtype=np.float32) + 0.37, np.arange(h, dtype=np.float32) + 0.21)

    def reference():
        cv2.remap(src, mx, my, cv2.INTER_CUBIC)

    ref = _median_time(reference, repeat)
    rows = [("ray bundle (once per camera)", t_bundle), ("scatter along-ray table (once per camera)", t_table),
            ("speckle frame, waves surface", _median_time(speckle, repeat)),
            ("speckle frame, scatter surface", _median_time(scatter, repeat)),
            ("target view (4x4 samples)", _median_time(board, repeat))]
    size = "x".join(map(str, rig.left.image_size))
    print(f"\n### {'quick' if quick else 'full'} session, {size} px, {s}x{s} samples per pixel "
          f"({h * w / 1e6:.1f} M rays)\n")
    print(f"reference: cv2.remap INTER_CUBIC of a {w}x{h} float32 image: {ref * 1e3:.1f} ms (median of {repeat})\n")
    print("| step (one camera) | seconds (median) | ratio to reference |")
    print("|---|---|---|")
    for name, t in rows:
        print(f"| {name} | {t:.3f} | {t / ref:.0f} |")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--only", choices=["quick", "full"])
    args = ap.parse_args()
    print(f"OpenCV {cv2.__version__}, threads {cv2.getNumThreads()}, numpy {np.__version__}")
    for quick in (True, False):
        if args.only and args.only != ("quick" if quick else "full"):
            continue
        bench(quick, args.repeat)


if __name__ == "__main__":
    main()
