"""truth.h5: everything a synthetic session was rendered from ("surfrec.truth", version 1).

Layout
------
root attributes
    format, version, scenario, seed, quick, created, software, description,
    world_frame (text), rigs / sensor / lighting / board / water / post /
    notes (JSON text).
/groups/NAME (one per frame folder)
    attributes: kind ("board" | "speckle"), rig, n_frames, fps, surface (JSON)
    board groups: rotation (N,3,3) board->world, origin (N,3) mm,
    corners_left / corners_right (N, M, 2) px (true projections of the
    inner corners), visible_left / visible_right (N) bool, aimed_at (N) str.
    speckle groups: time (T) s; surface/x (Nx) mm, surface/y (Ny) mm,
    surface/height (T, Ny, Nx) mm, surface/seen (Ny, Nx) bool — the exact
    surface sampled on a regular world grid over the area both cameras see.

/effects (only for a session rendered with camera effects)
    attribute params (JSON): every effect parameter and the enabled list;
    /effects/cameras/left and /right: vignetting (H, W) lens fall-off, dust
    (H, W) transmission, dust_spots (N, 4) column px, row px, radius px,
    centre transmission, hot_pixels (N, 2) and dead_pixels (M, 2) row, column
    px, hot_stuck (N) bool, hot_level (N) fraction of full scale,
    defocus_sigma_still_px (H, W) px; /effects/glints/GROUP/left and /right
    (T, H, W) bool: the pixels that glints saturate, per frame.

The analytic surface can be rebuilt exactly from the group's ``surface``
attribute with :func:`surfrec.synth.surfaces.surface_from_dict`.
"""

from __future__ import annotations

import datetime as _dt
import json
from pathlib import Path

import h5py
import numpy as np

from surfrec._version import __version__
from surfrec.io.hdf5file import open_checked

FORMAT = "surfrec.truth"
VERSION = 1

WORLD_FRAME = ("tank frame: x along the tank, y across it, z up, mm; still water at z = 0; "
               "cameras map world points by X_cam = R X_world + t")


def write_truth(path, *, scenario: dict, rigs: dict, groups: dict, effects: dict | None = None):
    """Write truth.h5.

    Parameters
    ----------
    path : output file (written in place; the caller makes it atomic).
    scenario : dict of JSON-serialisable root items (name, seed, quick,
        description, sensor, lighting, board, water, post, notes).
    rigs : {name: rig dict (cameras and projector)}.
    groups : {name: {"attrs": {...}, "data": {name: array}, "surface": {...} or None}}.
    effects : {"params": dict, "cameras": {side: {name: array}}, "glints": {group: {side: array}}}
        or None (a clean render: no /effects group).
    """
    with h5py.File(path, "w") as f:
        f.attrs["format"] = FORMAT
        f.attrs["version"] = VERSION
        f.attrs["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        f.attrs["software"] = f"surfrec {__version__}"
        f.attrs["world_frame"] = WORLD_FRAME
        for key in ("name", "description"):
            f.attrs["scenario" if key == "name" else key] = str(scenario[key])
        f.attrs["seed"] = int(scenario["seed"])
        f.attrs["quick"] = bool(scenario["quick"])
        for key in ("sensor", "lighting", "board", "water", "post", "notes"):
            f.attrs[key] = json.dumps(scenario.get(key))
        f.attrs["rigs"] = json.dumps(rigs)
        gg = f.create_group("groups")
        for name, g in groups.items():
            h = gg.create_group(name)
            for k, v in g["attrs"].items():
                h.attrs[k] = json.dumps(v) if isinstance(v, (dict, list)) else v
            for k, v in g.get("data", {}).items():
                v = np.asarray(v)
                if v.dtype.kind == "U":
                    h.create_dataset(k, data=v.astype(object), dtype=h5py.string_dtype())
                else:
                    h.create_dataset(k, data=v)
            surf = g.get("surface")
            if surf is not None:
                s = h.create_group("surface")
                s.create_dataset("x", data=surf["x"])
                s.create_dataset("y", data=surf["y"])
                s.create_dataset("seen", data=surf["seen"], compression="gzip")
                s.create_dataset("height", data=surf["height"].astype(np.float32), compression="gzip",
                                 shuffle=True, chunks=(1,) + surf["height"].shape[1:])
                s["height"].attrs["units"] = "mm"
                s["x"].attrs["units"] = "mm"
                s["y"].attrs["units"] = "mm"
        if effects is not None:
            e = f.create_group("effects")
            e.attrs["params"] = json.dumps(effects["params"])
            for side, maps in effects.get("cameras", {}).items():
                c = e.create_group(f"cameras/{side}")
                for k, v in maps.items():
                    c.create_dataset(k, data=np.asarray(v), compression="gzip", shuffle=True)
            for name, sides in effects.get("glints", {}).items():
                for side, masks in sides.items():
                    e.create_dataset(f"glints/{name}/{side}", data=np.asarray(masks, bool), compression="gzip",
                                     chunks=(1,) + np.shape(masks)[1:])


def read_truth(path) -> dict:
    """Read truth.h5 into plain Python objects (arrays loaded, except surface heights).

    Returns
    -------
    dict with keys: scenario, seed, quick, description, rigs, sensor,
    lighting, board, water, post, notes, groups ({name: {attrs..., arrays...}}).

    Raises
    ------
    InputError
        If the file is not a readable surfrec truth file.
    """
    p = Path(path)
    with open_checked(p, FORMAT, VERSION, "truth") as f:
        out = {k: _attr(f.attrs[k]) for k in f.attrs}
        for key in ("sensor", "lighting", "board", "water", "post", "notes", "rigs"):
            out[key] = json.loads(out[key])
        groups = {}
        for name, h in f["groups"].items():
            g = {k: _attr(v) for k, v in h.attrs.items()}
            if isinstance(g.get("surface"), str):
                g["surface"] = json.loads(g["surface"])
            for k, ds in h.items():
                if isinstance(ds, h5py.Dataset):
                    g[k] = ds.asstr()[()] if h5py.check_string_dtype(ds.dtype) else ds[()]
            if "surface" in h and isinstance(h["surface"], h5py.Group):
                s = h["surface"]
                g["surface_grid"] = {"x": s["x"][()], "y": s["y"][()], "seen": s["seen"][()],
                                     "shape": s["height"].shape}
            groups[name] = g
        out["groups"] = groups
        out["effects"] = json.loads(f["effects"].attrs["params"]) if "effects" in f else None
    return out


def read_truth_effects(path) -> dict | None:
    """The camera effects of a synthetic session: parameters, fixed maps and glint masks.

    Returns
    -------
    None for a clean render, else {"params": dict, "cameras": {side: {name: array}},
    "glints": {group: {side: (T, H, W) bool}}} (layout in the module docstring).
    """
    with open_checked(Path(path), FORMAT, VERSION, "truth") as f:
        if "effects" not in f:
            return None
        e = f["effects"]
        out = {"params": json.loads(e.attrs["params"]), "cameras": {}, "glints": {}}
        for side, c in e.get("cameras", {}).items():
            out["cameras"][side] = {k: ds[()] for k, ds in c.items()}
        for name, g in e.get("glints", {}).items():
            out["glints"][name] = {side: ds[()] for side, ds in g.items()}
        return out


def read_truth_surface(path, group: str = "waves", frames=slice(None)) -> tuple:
    """Exact surface heights of a speckle group on the truth grid.

    Returns
    -------
    x (Nx) mm, y (Ny) mm, height (T', Ny, Nx) mm
    """
    with h5py.File(path, "r") as f:
        s = f["groups"][group]["surface"]
        return s["x"][()], s["y"][()], s["height"][frames]


def _attr(v):
    if isinstance(v, bytes):
        return v.decode()
    if isinstance(v, np.generic):
        return v.item()
    return v
