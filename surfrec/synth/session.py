"""Render every frame of a scenario; hand each frame pair to a sink.

Nothing here touches files: the ``surfrec synth`` command passes a sink that
writes the images, and keeps the returned truth records for ``truth.h5``.
"""

from __future__ import annotations

import dataclasses
import multiprocessing as mp
from typing import Callable

import numpy as np

from surfrec.synth import render as rd
from surfrec.synth.scenarios import Scenario, board_corners_world, board_fully_visible

BOARD_SUPERSAMPLE = 4  # edges of the checkers need finer sampling than smooth speckle


def frame_count(scenario: Scenario) -> int:
    """Number of frame pairs the scenario renders, all groups together."""
    return sum(len(g.views) if g.kind == "board" else len(g.times) for g in scenario.groups)


class _Bundles:
    """Ray bundles of one camera side per (rig, supersampling), built on first use."""

    def __init__(self, scenario, side):
        self.scenario = scenario
        self.side = side
        self.cache = {}

    def get(self, rig_name, s):
        key = (rig_name, s)
        if key not in self.cache:
            cam = getattr(self.scenario.rigs[rig_name], self.side)
            # Bundles (and their tables) of another rig with the same camera are reusable.
            for (other, s2), b in self.cache.items():
                if s2 == s and b.camera is cam:
                    self.cache[key] = b
                    return b
            self.cache[key] = rd.RayBundle(cam, s)
        return self.cache[key]


SIDES = ("left", "right")


def render_side(scenario: Scenario, side: str):
    """Render every frame of one camera, in session order.

    Yields
    ------
    (group_name, index, image, extra) with image uint8/uint16 (height, width)
    and extra None, or with camera effects a dict {"glint": (height, width)
    bool of the pixels glints saturate, or None}.
    """
    fx = scenario.effects
    if fx is not None and fx.any:
        yield from _render_side_effects(scenario, side)
        return
    k = SIDES.index(side)
    bundles = _Bundles(scenario, side)
    for g in scenario.groups:
        rig = scenario.rigs[g.rig]
        if g.kind == "board":
            sensor = dataclasses.replace(scenario.sensor, supersample=BOARD_SUPERSAMPLE)
            for i, view in enumerate(g.views):
                rad = rd.render_radiance_board(bundles.get(g.rig, BOARD_SUPERSAMPLE), view.rotation, view.origin,
                                               scenario.board, scenario.lighting)
                noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                yield g.name, i, rd.expose(rad, sensor, noise), None
        else:
            s = scenario.sensor.supersample
            for i, t in enumerate(g.times):
                # Both cameras draw the same pattern: the projector shows one per frame.
                pattern = rd.speckle_pattern(rig.projector.resolution, scenario.projector_grain_px,
                                             np.random.default_rng([scenario.seed, g.group_id, i, 0]))
                rad = rd.render_radiance_speckle(bundles.get(g.rig, s), g.surface, float(t), rig.projector,
                                                 pattern, scenario.lighting, scenario.post)
                noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                yield g.name, i, rd.expose(rad, scenario.sensor, noise), None


def camera_fixed_maps(scenario: Scenario) -> dict:
    """The fixed per-camera effect maps of a scenario (see surfrec.synth.effects.camera_fixed).

    Returns
    -------
    {"left": CameraFixed, "right": CameraFixed}; the maps belong to the physical
    camera (its sensor and lens), so a camera that was moved keeps them.
    """
    from surfrec.synth import effects as efx

    first = next(iter(scenario.rigs.values()))
    return {side: efx.camera_fixed(scenario.effects, getattr(first, side), side, scenario.seed) for side in SIDES}


def _render_side_effects(scenario: Scenario, side: str):
    """render_side with the scenario's camera effects (surfrec.synth.effects)."""
    from surfrec.synth import effects as efx

    fx = scenario.effects
    k = SIDES.index(side)
    bundles = _Bundles(scenario, side)
    fixed = camera_fixed_maps(scenario)[side]
    lamp = np.asarray(fx.room_lamp_mm, float) if fx.on("illumination") else None
    for g in scenario.groups:
        rig = scenario.rigs[g.rig]
        cam = getattr(rig, side)
        if g.kind == "board":
            sensor = dataclasses.replace(scenario.sensor, supersample=BOARD_SUPERSAMPLE)
            bundle = bundles.get(g.rig, BOARD_SUPERSAMPLE)
            depth = np.empty((bundle.shape[0] // BOARD_SUPERSAMPLE, bundle.shape[1] // BOARD_SUPERSAMPLE)) \
                if fx.on("defocus") else None
            for i, view in enumerate(g.views):
                rad = rd.render_radiance_board(bundle, view.rotation, view.origin, scenario.board, scenario.lighting,
                                               lamp=lamp, lamp_ref=efx.board_lamp_reference(lamp) if lamp is not None
                                               else 1.0, depth_out=depth)
                sigma = None if depth is None else efx.defocus_sigma_px(depth, cam, side, fx.defocus)
                noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                img, _ = efx.expose_with_effects(rad, sensor, noise, fixed, defocus_px=sigma)
                yield g.name, i, img, {"glint": None}
        else:
            s = scenario.sensor.supersample
            bundle = bundles.get(g.rig, s)
            light = efx.speckle_light(fx, rig.projector, s)
            # Defocus from the still-water depth: the waves' few mm change the blur by a few per cent.
            sigma = (efx.defocus_sigma_px(efx.still_water_depth(bundle), cam, side, fx.defocus)
                     if fx.on("defocus") else None)
            glint = np.empty(bundle.shape, np.float32) if fx.on("glints") else None
            for i, t in enumerate(g.times):
                pattern = rd.speckle_pattern(rig.projector.resolution, scenario.projector_grain_px,
                                             np.random.default_rng([scenario.seed, g.group_id, i, 0]))
                rad = rd.render_radiance_speckle(bundle, g.surface, float(t), rig.projector, pattern,
                                                 scenario.lighting, scenario.post, light=light, glint_out=glint)
                noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                img, mask = efx.expose_with_effects(rad, scenario.sensor, noise, fixed, defocus_px=sigma, glint=glint)
                yield g.name, i, img, {"glint": mask}


def _side_worker(scenario, side, queue):
    try:
        for item in render_side(scenario, side):
            queue.put((side, item))
        queue.put((side, None))
    except BaseException as exc:  # hand the failure to the parent, which re-raises it
        queue.put((side, exc))


def _pairs_parallel(scenario):
    # One process per camera: each builds only its own ray bundles, so nothing
    # is computed twice, and the two cameras render at the same time.
    ctx = mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")
    queue = ctx.Queue(maxsize=8)
    procs = [ctx.Process(target=_side_worker, args=(scenario, side, queue), daemon=True) for side in SIDES]
    for p in procs:
        p.start()
    pending = {side: {} for side in SIDES}
    finished = set()
    try:
        while len(finished) < 2 or any(pending[s] for s in SIDES):
            side, item = queue.get()
            if item is None:
                finished.add(side)
                continue
            if isinstance(item, BaseException):
                raise item
            name, i, image, extra = item
            other = "right" if side == "left" else "left"
            if (name, i) in pending[other]:
                pair = {side: (image, extra), other: pending[other].pop((name, i))}
                yield name, i, pair["left"], pair["right"]
            else:
                pending[side][(name, i)] = (image, extra)
    finally:
        for p in procs:
            if p.is_alive():
                p.terminate()
            p.join()


def _pairs_serial(scenario):
    for (name, i, left, lx), (_, _, right, rx) in zip(render_side(scenario, "left"), render_side(scenario, "right")):
        yield name, i, (left, lx), (right, rx)


def render_session(scenario: Scenario, sink: Callable, progress: Callable | None = None, *,
                   workers: int = 1) -> dict:
    """Render all frame groups of ``scenario``.

    Parameters
    ----------
    scenario : Scenario
    sink : callable(group_name, index, left_image, right_image)
        Receives each rendered frame pair (uint8/uint16 arrays, (height, width)).
    progress : callable(n_done) or None
        Called after each frame pair.
    workers : int
        1 renders in this process; 2 or more renders the two cameras in two
        processes at once (the images are identical either way).

    Returns
    -------
    records : dict
        Per group, the truth that the images were rendered from: board
        poses and true corner pixels, or frame times.
    """
    pairs = _pairs_parallel(scenario) if workers >= 2 else _pairs_serial(scenario)
    done = 0
    glints = {}
    for name, i, (left, lx), (right, rx) in pairs:
        sink(name, i, left, right)
        for side, extra in (("left", lx), ("right", rx)):
            if extra is not None and extra.get("glint") is not None:
                glints.setdefault(name, {}).setdefault(side, {})[i] = extra["glint"]
        done += 1
        if progress:
            progress(done)
    records = truth_records(scenario)
    if scenario.effects is not None and scenario.effects.any:
        records["_effects"] = effects_record(scenario, glints)
    return records


def effects_record(scenario: Scenario, glints: dict | None = None) -> dict:
    """The camera effects of a scenario as truth: parameters, fixed maps, glint masks.

    Returns
    -------
    {"params": dict (JSON-ready), "cameras": {side: {"vignetting": (H, W) float32 lens
    fall-off, "dust": (H, W) float32 transmission, "dust_spots": (N, 4) column px, row px,
    radius px, centre transmission, "hot_pixels": (N, 2) row, column px, "hot_stuck": (N)
    bool, "hot_level": (N) fraction of full scale, "dead_pixels": (M, 2) row, column px,
    "defocus_sigma_still_px": (H, W) px}}, "glints": {group: {side: (T, H, W) bool}}}
    (entries only for the effects that are on).
    """
    from surfrec.synth import effects as efx

    fx = scenario.effects
    fixed = camera_fixed_maps(scenario)
    cams = {}
    for side in SIDES:
        f = fixed[side]
        shape = f.shape
        c = {}
        if f.vignette is not None:
            c["vignetting"] = f.vignette
        if f.dust is not None:
            c["dust"] = f.dust
            c["dust_spots"] = f.dust_spots
        if fx.on("defects"):
            c["hot_pixels"] = np.stack(np.unravel_index(f.hot_index, shape), -1)
            c["hot_stuck"] = f.hot_stuck
            c["hot_level"] = f.hot_level
            c["dead_pixels"] = np.stack(np.unravel_index(f.dead_index, shape), -1)
        if fx.on("defocus"):
            first = next(iter(scenario.rigs.values()))
            cam = getattr(first, side)
            bundle = rd.RayBundle(cam, 1)
            c["defocus_sigma_still_px"] = efx.defocus_sigma_px(efx.still_water_depth(bundle), cam, side,
                                                               fx.defocus).astype(np.float32)
        cams[side] = c
    out_glints = {}
    for name, sides in (glints or {}).items():
        out_glints[name] = {side: np.stack([m[i] for i in sorted(m)]) for side, m in sides.items()}
    return {"params": fx.to_dict(), "cameras": cams, "glints": out_glints}




def truth_records(scenario: Scenario) -> dict:
    """Board poses, true corner pixels and visibility per target group; times per speckle group."""
    records = {}
    for g in scenario.groups:
        rig = scenario.rigs[g.rig]
        if g.kind == "board":
            rec = {"rotation": [], "origin": [], "aimed_at": [], "corners_left": [], "corners_right": [],
                   "visible_left": [], "visible_right": []}
            for view in g.views:
                for side in SIDES:
                    cam = getattr(rig, side)
                    rec[f"corners_{side}"].append(cam.project(board_corners_world(view, scenario.board)))
                    rec[f"visible_{side}"].append(board_fully_visible(view, scenario.board, cam))
                rec["rotation"].append(view.rotation)
                rec["origin"].append(view.origin)
                rec["aimed_at"].append(view.aimed_at)
            records[g.name] = {k: np.asarray(v) for k, v in rec.items()}
        else:
            records[g.name] = {"time": np.asarray(g.times, float)}
    return records


def truth_surface_grids(scenario: Scenario, step_mm: float | None = None) -> dict:
    """The exact surface of every speckle group on a regular world grid.

    Returns
    -------
    {group_name: {"x": (Nx,) mm, "y": (Ny,) mm, "seen": (Ny, Nx) bool,
    "height": (T, Ny, Nx) mm}} over the still-water area both cameras see.
    """
    from surfrec.synth.scenarios import common_footprint

    step = step_mm or (2.0 if scenario.quick else 1.0)
    out = {}
    for g in scenario.groups:
        if g.kind != "speckle":
            continue
        x, y, seen = common_footprint(scenario.rigs[g.rig], step)
        xx, yy = np.meshgrid(x, y)
        h = np.stack([g.surface.height(xx, yy, float(t)) for t in g.times])
        if scenario.post is not None:
            inside = (xx - scenario.post.centre[0]) ** 2 + (yy - scenario.post.centre[1]) ** 2 < scenario.post.radius ** 2
            h[:, inside] = np.nan
        out[g.name] = {"x": x, "y": y, "seen": seen, "height": h}
    return out
