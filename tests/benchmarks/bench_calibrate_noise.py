"""Monte Carlo: how accurate can a calibration from a session's view geometry be, sequential vs joint?

Usage::

    python tests/benchmarks/bench_calibrate_noise.py SESSION [--noise 0.035] [--repeats 20]

Takes the true corner projections of SESSION/truth.h5 (every view whose
corners all lie in the image), adds Gaussian noise of --noise px per
coordinate (0.035 px is what the detector reaches on the synthetic views,
tests/test_calib_targets.py), calibrates --repeats times, and prints the
median and 90th percentile of the errors against truth for the sequential
estimate (Zhang per camera, then the stereo pose with intrinsics held) and
for the default with the joint refinement. It separates what the view
geometry allows from what detection adds.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

from surfrec.calib.calibrate import calibrate_rig, rotation_angle_deg
from surfrec.calib.targets import Board, Detection
from surfrec.io.truthfile import read_truth
from surfrec.synth.cameras import Camera, stereo_from_cameras

sys.path.insert(0, str(Path(__file__).parent))
from bench_calibrate import ray_error_px  # noqa: E402


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("session", type=Path)
    ap.add_argument("--noise", type=float, default=0.035)
    ap.add_argument("--repeats", type=int, default=20)
    args = ap.parse_args(argv)
    t = read_truth(args.session / "truth.h5")
    g = t["groups"]["target"]
    cams = {s: Camera.from_dict(t["rigs"]["rig"][s]) for s in ("left", "right")}
    r_t, t_t = stereo_from_cameras(cams["left"], cams["right"])
    board = Board("chessboard", int(t["board"]["cols"]), int(t["board"]["rows"]), float(t["board"]["square_mm"]))
    w, h = cams["left"].image_size
    rng = np.random.default_rng(5)

    def inside(c):
        return np.all(c > 0) and np.all(c[:, 0] < w - 1) and np.all(c[:, 1] < h - 1)

    rows = {"sequential": [], "joint": []}
    for _ in range(args.repeats):
        dets = {side: [Detection(True, c + args.noise * rng.standard_normal(c.shape)) if inside(c)
                       else Detection(False, None, "outside") for c in g[f"corners_{side}"]] for side in cams}
        for name, refine in (("sequential", False), ("joint", True)):
            c = calibrate_rig(dets["left"], dets["right"], board, (w, h), refine=refine)
            ray = [np.sqrt(np.mean(ray_error_px(getattr(c, f"{s}_matrix"), getattr(c, f"{s}_distortion"),
                                                cams[s])[0] ** 2)) for s in ("left", "right")]
            rows[name].append([*ray, rotation_angle_deg(c.rotation @ r_t.T),
                               100 * abs(c.baseline_mm / np.linalg.norm(t_t) - 1),
                               100 * abs(c.right_matrix[0, 0] / cams["right"].matrix[0, 0] - 1)])
    print(f"{args.session}: {len(g['corners_left'])} views, {w}x{h} px, noise {args.noise} px, {args.repeats} repeats")
    print("estimate     | ray RMS left px | ray RMS right px | rotation deg | |baseline| % | |fx right| %   (median / p90)")
    for name, v in rows.items():
        v = np.array(v)
        cells = " | ".join(f"{np.median(v[:, k]):.4f} / {np.percentile(v[:, k], 90):.4f}" for k in range(5))
        print(f"{name:12s} | {cells}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
