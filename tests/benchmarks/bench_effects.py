"""Cost of the camera effects: one full-size frame of one camera, clean and with every effect.

    python tests/benchmarks/bench_effects.py [--quick] [--repeat N]

Clean and effects renders alternate in the same process (the machine is shared and noisy); the
medians of wall and CPU time per frame are printed with their ratio.
"""

import argparse
import time

import numpy as np

from surfrec.synth import effects as efx
from surfrec.synth import render as rd
from surfrec.synth.scenarios import build_scenario
from surfrec.synth.session import BOARD_SUPERSAMPLE, camera_fixed_maps


def _timed(fn):
    w0, c0 = time.perf_counter(), time.process_time()
    fn()
    return time.perf_counter() - w0, time.process_time() - c0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    clean = build_scenario("waves", quick=args.quick)
    fx = build_scenario("waves", quick=args.quick, effects="all")
    rig = clean.rigs["rig"]
    cam = rig.left
    s = clean.sensor.supersample
    bundle = rd.RayBundle(cam, s)
    board_bundle = rd.RayBundle(cam, BOARD_SUPERSAMPLE)
    g = clean.group("waves")
    view = clean.group("target").views[0]
    pattern = rd.speckle_pattern(rig.projector.resolution, clean.projector_grain_px, np.random.default_rng(0))
    fixed = camera_fixed_maps(fx)["left"]
    light = efx.speckle_light(fx.effects, rig.projector, s)
    sigma = efx.defocus_sigma_px(efx.still_water_depth(bundle), cam, "left", fx.effects.defocus)
    glint = np.empty(bundle.shape, np.float32)
    lamp = np.asarray(fx.effects.room_lamp_mm)
    bsensor_c = rd.SensorModel(**{**clean.sensor.to_dict(), "supersample": BOARD_SUPERSAMPLE})
    bsensor_f = rd.SensorModel(**{**fx.sensor.to_dict(), "supersample": BOARD_SUPERSAMPLE})
    bdepth = np.empty((board_bundle.shape[0] // BOARD_SUPERSAMPLE, board_bundle.shape[1] // BOARD_SUPERSAMPLE))

    def speckle_clean():
        rad = rd.render_radiance_speckle(bundle, g.surface, 0.006, rig.projector, pattern, clean.lighting)
        rd.expose(rad, clean.sensor, np.random.default_rng(1))

    def speckle_fx():
        rad = rd.render_radiance_speckle(bundle, g.surface, 0.006, rig.projector, pattern, fx.lighting, light=light,
                                         glint_out=glint)
        efx.expose_with_effects(rad, fx.sensor, np.random.default_rng(1), fixed, defocus_px=sigma, glint=glint)

    def board_clean():
        rad = rd.render_radiance_board(board_bundle, view.rotation, view.origin, clean.board, clean.lighting)
        rd.expose(rad, bsensor_c, np.random.default_rng(1))

    def board_fx():
        rad = rd.render_radiance_board(board_bundle, view.rotation, view.origin, fx.board, fx.lighting, lamp=lamp,
                                       lamp_ref=efx.board_lamp_reference(lamp), depth_out=bdepth)
        efx.expose_with_effects(rad, bsensor_f, np.random.default_rng(1), fixed,
                                defocus_px=efx.defocus_sigma_px(bdepth, cam, "left", fx.effects.defocus))

    speckle_fx()  # compile the numba kernel and warm caches outside the timing
    board_fx()
    for name, pair in (("speckle frame", (speckle_clean, speckle_fx)), ("target view", (board_clean, board_fx))):
        times = {"clean": [], "effects": []}
        for _ in range(args.repeat):
            times["clean"].append(_timed(pair[0]))
            times["effects"].append(_timed(pair[1]))
        med = {k: np.median(np.array(v), axis=0) for k, v in times.items()}
        print(f"{name}: clean wall {med['clean'][0]:.2f} s cpu {med['clean'][1]:.2f} s; effects wall "
              f"{med['effects'][0]:.2f} s cpu {med['effects'][1]:.2f} s; ratio wall "
              f"{med['effects'][0] / med['clean'][0]:.2f} cpu {med['effects'][1] / med['clean'][1]:.2f}")


if __name__ == "__main__":
    main()
