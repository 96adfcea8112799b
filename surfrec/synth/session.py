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
    (group_name, index, image) with image uint8/uint16 (height, width).
    """
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
                yield g.name, i, rd.expose(rad, sensor, noise)
        else:
            s = scenario.sensor.supersample
            for i, t in enumerate(g.times):
                # Both cameras draw the same pattern: the projector shows one per frame.
                pattern = rd.speckle_pattern(rig.projector.resolution, scenario.projector_grain_px,
                                             np.random.default_rng([scenario.seed, g.group_id, i, 0]))
                rad = rd.render_radiance_speckle(bundles.get(g.rig, s), g.surface, float(t), rig.projector,
                                                 pattern, scenario.lighting, scenario.post)
                noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                yield g.name, i, rd.expose(rad, scenario.sensor, noise)


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
            name, i, image = item
            other = "right" if side == "left" else "left"
            if (name, i) in pending[other]:
                pair = {side: image, other: pending[other].pop((name, i))}
                yield name, i, pair["left"], pair["right"]
            else:
                pending[side][(name, i)] = image
    finally:
        for p in procs:
            if p.is_alive():
                p.terminate()
            p.join()


def _pairs_serial(scenario):
    for (name, i, left), (_, _, right) in zip(render_side(scenario, "left"), render_side(scenario, "right")):
        yield name, i, left, right


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
    for name, i, left, right in pairs:
        sink(name, i, left, right)
        done += 1
        if progress:
            progress(done)
    return truth_records(scenario)


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
