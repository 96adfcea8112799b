"""Summaries of every file kind surfrec writes, for ``surfrec inspect``.

Each summariser reads only what it needs (attributes and small datasets) and
returns a JSON-serialisable dict; the CLI prints it as text or JSON.
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import numpy as np

from surfrec.errors import InputError


def file_format(path) -> str:
    """The ``format`` stamp of a surfrec file (HDF5 root attribute or JSON key)."""
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such file")
    if p.is_dir():
        raise InputError(f"{p} is a folder; give a file (for a synthetic session: {p / 'truth.h5'})")
    with open(p, "rb") as fh:
        head = fh.read(8)
    if head.startswith(b"\x89HDF"):
        try:
            with h5py.File(p, "r") as f:
                fmt = f.attrs.get("format")
        except OSError as exc:
            raise InputError(f"{p}: unreadable HDF5 file ({exc})") from None
        if fmt is None:
            raise InputError(f"{p}: an HDF5 file without a surfrec 'format' attribute")
        return fmt.decode() if isinstance(fmt, bytes) else str(fmt)
    if head.lstrip()[:1] == b"{":
        try:
            data = json.loads(p.read_text(encoding="utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise InputError(f"{p}: not valid JSON ({exc})") from None
        if not isinstance(data, dict) or "format" not in data:
            raise InputError(f"{p}: a JSON file without a surfrec 'format' key")
        return str(data["format"])
    raise InputError(f"{p}: not a file that surfrec writes (neither HDF5 nor JSON)")


def summarise(path) -> dict:
    """Summarise any surfrec file.

    Returns
    -------
    dict with at least "path", "format" and "version".

    Raises
    ------
    InputError
        For files of unknown kind or that cannot be read.
    """
    fmt = file_format(path)
    try:
        fn = _SUMMARISERS[fmt]
    except KeyError:
        raise InputError(f"{path}: surfrec cannot summarise files of format {fmt!r} yet") from None
    return fn(Path(path))


def _summarise_truth(p: Path) -> dict:
    from surfrec.io.truthfile import read_truth
    from surfrec.synth.cameras import Camera

    t = read_truth(p)
    rigs = {}
    for name, rig in t["rigs"].items():
        left, right = Camera.from_dict(rig["left"]), Camera.from_dict(rig["right"])
        r_lr = right.rotation @ left.rotation.T
        base = right.centre - left.centre
        axis_angle = np.degrees(np.arccos(np.clip(left.rotation[2] @ right.rotation[2], -1, 1)))
        rigs[name] = {
            "image_size_px": left.image_size,
            "focal_px": [round(left.matrix[0, 0], 2), round(right.matrix[0, 0], 2)],
            "baseline_mm": round(float(np.linalg.norm(base)), 3),
            "convergence_deg": round(float(axis_angle), 3),
            "rotation_left_to_right_deg": round(float(np.degrees(np.arccos(np.clip((np.trace(r_lr) - 1) / 2, -1, 1)))), 4),
            "height_above_water_mm": [round(float(left.centre[2]), 1), round(float(right.centre[2]), 1)],
        }
    groups = {}
    for name, g in t["groups"].items():
        entry = {"kind": g["kind"], "frames": int(g["n_frames"]), "rig": g["rig"]}
        if g["kind"] == "board":
            vl, vr = np.asarray(g["visible_left"], bool), np.asarray(g["visible_right"], bool)
            entry.update(seen_by_both=int(np.sum(vl & vr)), left_only=int(np.sum(vl & ~vr)),
                         right_only=int(np.sum(vr & ~vl)))
        else:
            time = np.asarray(g["time"])
            entry.update(fps=g.get("fps"), time_span_s=[float(time[0]), float(time[-1])],
                         surface=g["surface"]["kind"])
            if "surface_grid" in g:
                grid = g["surface_grid"]
                with h5py.File(p, "r") as f:
                    h = f["groups"][name]["surface"]["height"]
                    lo, hi = np.inf, -np.inf
                    for i in range(h.shape[0]):
                        a = h[i]
                        if np.isfinite(a).any():
                            lo, hi = min(lo, float(np.nanmin(a))), max(hi, float(np.nanmax(a)))
                entry.update(grid_x_mm=[float(grid["x"][0]), float(grid["x"][-1])],
                             grid_y_mm=[float(grid["y"][0]), float(grid["y"][-1])],
                             grid_step_mm=float(grid["x"][1] - grid["x"][0]) if len(grid["x"]) > 1 else None,
                             height_range_mm=[round(lo, 4), round(hi, 4)])
        groups[name] = entry
    return {
        "path": str(p), "format": t["format"], "version": int(t["version"]), "scenario": t["scenario"],
        "quick": bool(t["quick"]), "seed": int(t["seed"]), "created": t["created"], "software": t["software"],
        "description": t["description"], "rigs": rigs, "groups": groups,
        "sensor": {"bits": t["sensor"]["bits"], "container_bits": t["sensor"]["container_bits"],
                   "read_noise_e": t["sensor"]["read_noise_e"], "full_well_e": t["sensor"]["full_well_e"],
                   "psf_sigma_px": t["sensor"]["psf_sigma_px"]},
        "board": t["board"], "post": t["post"], "water": t["water"],
    }


def _summarise_datum(p: Path) -> dict:
    from surfrec.io.datumfile import read_datum

    d = read_datum(p)
    a = d.attrs
    n = d.plane_normal
    valid = int(np.count_nonzero(d.valid))
    noise = d.noise_floor[np.isfinite(d.noise_floor)]
    res = d.still_residual[np.isfinite(d.still_residual)]
    return {
        "path": str(p), "format": "surfrec.datum", "version": 1, "created": a.get("created"),
        "software": a.get("software"), "rig_sha256": d.rig_sha256, "n_frames": d.n_frames,
        "plane_normal_left_camera": [round(float(x), 8) for x in n],
        "plane_offset_mm": round(d.plane_offset, 4),
        "tilt_from_optical_axis_deg": round(float(np.degrees(np.arccos(min(1.0, abs(float(n[2])))))), 4),
        "origin_mm": a.get("origin_mm"), "rotate_deg": a.get("rotate_deg"),
        "fit_rms_mm": round(d.fit_rms_mm, 5),
        "grid": {"nu": int(d.u.size), "nv": int(d.v.size), "u_px": [float(d.u[0]), float(d.u[-1])],
                 "v_px": [float(d.v[0]), float(d.v[-1])], "spacing_px": a.get("spacing_px"),
                 "window_px": a.get("window_px"), "valid": valid,
                 "valid_fraction": round(valid / d.valid.size, 4)},
        "disparity_range_px": [round(float(np.nanmin(d.disparity)), 4), round(float(np.nanmax(d.disparity)), 4)],
        "still_residual": {"x_mm": [float(d.residual_x[0]), float(d.residual_x[-1])],
                           "y_mm": [float(d.residual_y[0]), float(d.residual_y[-1])],
                           "step_mm": float(d.residual_x[1] - d.residual_x[0]),
                           "rms_mm": round(float(np.sqrt(np.mean(res ** 2))), 5),
                           "peak_to_valley_mm": round(float(res.max() - res.min()), 5),
                           "degree": a.get("residual_degree")},
        "noise_floor_median_mm": round(float(np.median(noise)), 5) if noise.size else None,
    }


def _summarise_rig(p: Path) -> dict:
    from surfrec.io.rigfile import file_sha256, read_rig

    rig = read_rig(p)
    r = rig.rotation
    cams = {}
    for side in ("left", "right"):
        k = getattr(rig, f"{side}_matrix")
        cams[side] = {"focal_px": [round(float(k[0, 0]), 3), round(float(k[1, 1]), 3)],
                      "principal_point_px": [round(float(k[0, 2]), 3), round(float(k[1, 2]), 3)],
                      "distortion": [float(x) for x in getattr(rig, f"{side}_distortion")]}
    res = rig.residuals
    views = res.get("views", [])
    cal = rig.extra.get("calibration", {})
    return {
        "path": str(p), "format": "surfrec.rig", "version": 1, "created": rig.created, "software": rig.software,
        "image_size": list(rig.image_size), "board": rig.board, "cameras": cams,
        "baseline_mm": round(rig.baseline_mm, 4),
        "rotation_left_to_right_deg": round(float(np.degrees(np.arccos(np.clip((np.trace(r) - 1) / 2, -1, 1)))), 4),
        "convergence_deg": round(float(np.degrees(np.arccos(np.clip(r[2, 2], -1, 1)))), 4),
        "residuals": {"rms_px": res.get("rms_px"), "epipolar_rms_px": res.get("epipolar_rms_px"),
                      "views": len(views), "used": sum(1 for v in views if isinstance(v, dict) and v.get("used"))},
        "mode": cal.get("mode"), "coverage": cal.get("coverage"), "pose_change": cal.get("pose_change"),
        "warnings": cal.get("warnings", []),
        "sha256": file_sha256(p),
    }


_SUMMARISERS = {"surfrec.truth": _summarise_truth, "surfrec.datum": _summarise_datum, "surfrec.rig": _summarise_rig}


def format_text(summary: dict, indent: int = 0) -> str:
    """Render a summary dict as indented ``key: value`` lines for people."""
    lines = []
    pad = "  " * indent
    for k, v in summary.items():
        if isinstance(v, dict):
            lines.append(f"{pad}{k}:")
            lines.append(format_text(v, indent + 1))
        elif isinstance(v, (list, tuple)):
            lines.append(f"{pad}{k}: {', '.join(_fmt(x) for x in v)}")
        else:
            lines.append(f"{pad}{k}: {_fmt(v)}")
    return "\n".join(lines)


def _fmt(x):
    if isinstance(x, float):
        return f"{x:.6g}"
    return str(x)
