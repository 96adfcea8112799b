"""Render every frame of a scenario; hand each frame pair to a sink.

Nothing here touches files: the ``surfrec synth`` command passes a sink that
writes the images, and keeps the returned truth records for ``truth.h5``.
"""

from __future__ import annotations

import dataclasses
from typing import Callable

import numpy as np

from surfrec.synth import render as rd
from surfrec.synth.scenarios import Scenario, board_corners_world, board_fully_visible

BOARD_SUPERSAMPLE = 4  # edges of the checkers need finer sampling than smooth speckle


def frame_count(scenario: Scenario) -> int:
    """Number of frame pairs the scenario renders, all groups together."""
    return sum(len(g.views) if g.kind == "board" else len(g.times) for g in scenario.groups)


class _Bundles:
    """Ray bundles per (rig, camera, supersampling), built on first use."""

    def __init__(self, scenario):
        self.scenario = scenario
        self.cache = {}

    def get(self, rig_name, side, s):
        key = (rig_name, side, s)
        if key not in self.cache:
            # Keep only the bundles of the rig in use: each is a few hundred MB at full size.
            for k in [k for k in self.cache if k[0] != rig_name]:
                del self.cache[k]
            cam = getattr(self.scenario.rigs[rig_name], side)
            self.cache[key] = rd.RayBundle(cam, s)
        return self.cache[key]


def render_session(scenario: Scenario, sink: Callable, progress: Callable | None = None) -> dict:
    """Render all frame groups of ``scenario``.

    Parameters
    ----------
    scenario : Scenario
    sink : callable(group_name, index, left_image, right_image)
        Receives each rendered frame pair (uint8/uint16 arrays, (height, width)).
    progress : callable(n_done) or None
        Called after each frame pair.

    Returns
    -------
    records : dict
        Per group, the truth that the images were rendered from: board
        poses and true corner pixels, or frame times.
    """
    bundles = _Bundles(scenario)
    records = {}
    done = 0
    for g in scenario.groups:
        rig = scenario.rigs[g.rig]
        if g.kind == "board":
            s = BOARD_SUPERSAMPLE
            sensor = dataclasses.replace(scenario.sensor, supersample=s)
            rec = {"rotation": [], "origin": [], "aimed_at": [], "corners_left": [], "corners_right": [],
                   "visible_left": [], "visible_right": []}
            for i, view in enumerate(g.views):
                images = []
                for k, side in enumerate(("left", "right")):
                    cam = getattr(rig, side)
                    rad = rd.render_radiance_board(bundles.get(g.rig, side, s), view.rotation, view.origin,
                                                   scenario.board, scenario.lighting)
                    noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                    images.append(rd.expose(rad, sensor, noise))
                    rec[f"corners_{side}"].append(cam.project(board_corners_world(view, scenario.board)))
                    rec[f"visible_{side}"].append(board_fully_visible(view, scenario.board, cam))
                rec["rotation"].append(view.rotation)
                rec["origin"].append(view.origin)
                rec["aimed_at"].append(view.aimed_at)
                sink(g.name, i, images[0], images[1])
                done += 1
                if progress:
                    progress(done)
            records[g.name] = {k: np.asarray(v) for k, v in rec.items()}
        else:
            s = scenario.sensor.supersample
            for i, t in enumerate(g.times):
                pattern = rd.speckle_pattern(rig.projector.resolution, scenario.projector_grain_px,
                                             np.random.default_rng([scenario.seed, g.group_id, i, 0]))
                images = []
                for k, side in enumerate(("left", "right")):
                    rad = rd.render_radiance_speckle(bundles.get(g.rig, side, s), g.surface, float(t),
                                                     rig.projector, pattern, scenario.lighting, scenario.post)
                    noise = np.random.default_rng([scenario.seed, g.group_id, i, k + 1])
                    images.append(rd.expose(rad, scenario.sensor, noise))
                sink(g.name, i, images[0], images[1])
                done += 1
                if progress:
                    progress(done)
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
