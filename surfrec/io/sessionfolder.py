"""Write a synthetic session folder (layout in docs/synthetic-sessions.md).

OUTDIR/target/left/frame_00000.png ... OUTDIR/waves/timestamps.csv,
OUTDIR/truth.h5 and OUTDIR/SCENARIO.md. The folder is assembled under a
temporary name and renamed into place when complete.
"""

from __future__ import annotations

import csv
import time
from pathlib import Path

import numpy as np

from surfrec.io.images import save_image
from surfrec.io.outputs import atomic_folder
from surfrec.io.truthfile import write_truth

FRAME_NAME = "frame_{:05d}.png"


def write_session(scenario, outdir, *, force: bool = False, progress=None, workers: int = 1) -> dict:
    """Render ``scenario`` and write the whole session folder.

    Returns
    -------
    dict with render_seconds (total) and the folder path.
    """
    from surfrec.synth.session import render_session, truth_surface_grids

    outdir = Path(outdir)
    with atomic_folder(outdir, force=force) as tmp:
        for g in scenario.groups:
            for side in ("left", "right"):
                (tmp / g.name / side).mkdir(parents=True)

        def sink(group, i, left, right):
            save_image(tmp / group / "left" / FRAME_NAME.format(i), left)
            save_image(tmp / group / "right" / FRAME_NAME.format(i), right)

        t0 = time.monotonic()
        records = render_session(scenario, sink, progress=progress, workers=workers)
        render_seconds = time.monotonic() - t0
        surfaces = truth_surface_grids(scenario)
        for g in scenario.groups:
            if g.kind == "speckle":
                _write_timestamps(tmp / g.name / "timestamps.csv", g.times)
        write_truth(tmp / "truth.h5", scenario=_scenario_record(scenario),
                    rigs={k: r.to_dict() for k, r in scenario.rigs.items()},
                    groups=_group_records(scenario, records, surfaces), effects=records.get("_effects"))
        (tmp / "SCENARIO.md").write_text(scenario_markdown(scenario), encoding="utf-8")
    return {"render_seconds": render_seconds, "path": str(outdir)}


def _write_timestamps(path, times):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["frame", "left_s", "right_s"])
        for i, t in enumerate(times):
            # Hardware-triggered cameras: both exposures start together.
            w.writerow([i, f"{t:.9f}", f"{t:.9f}"])


def _scenario_record(sc) -> dict:
    return {"name": sc.name, "description": sc.description, "seed": sc.seed, "quick": sc.quick,
            "sensor": sc.sensor.to_dict(), "lighting": sc.lighting.to_dict(), "board": sc.board,
            "water": sc.water, "post": sc.post.to_dict() if sc.post else None,
            "notes": {**sc.notes, "speckle_grain_camera_px": sc.speckle_grain_px,
                      "speckle_grain_projector_px": sc.projector_grain_px,
                      "board_supersample": 4, "speckle_seed_rule": "numpy default_rng([seed, group_id, frame, 0])",
                      "camera_effects": sc.effects.to_dict()["enabled"] if sc.effects is not None else []}}


def _group_records(sc, records, surfaces) -> dict:
    out = {}
    for g in sc.groups:
        rec = records[g.name]
        attrs = {"kind": g.kind, "rig": g.rig, "group_id": g.group_id}
        entry = {"attrs": attrs, "data": {}, "surface": None}
        if g.kind == "board":
            attrs["n_frames"] = len(g.views)
            entry["data"] = {k: (np.asarray(v, dtype=str) if k == "aimed_at" else v) for k, v in rec.items()}
        else:
            attrs["n_frames"] = len(g.times)
            attrs["fps"] = float(g.fps)
            attrs["surface"] = g.surface.to_dict()
            entry["data"] = {"time": rec["time"]}
            entry["surface"] = surfaces[g.name]
        out[g.name] = entry
    return out


def scenario_markdown(sc) -> str:
    """SCENARIO.md: the invented scenario in a few lines and the commands to process it."""
    left = sc.rigs["rig"].left
    w, h = left.image_size
    lines = [
        f"# Synthetic session: `{sc.name}`{' (quick)' if sc.quick else ''}",
        "",
        "An invented laboratory session rendered by `surfrec synth`; every number in `truth.h5`.",
        "",
        "**Setting.** A ripple tank 1.2 m x 0.8 m, water 60 mm deep and dyed white so the surface is a "
        "diffuse screen. Two cameras of "
        f"{w}x{h} px hang about 0.9 m above the water, 250 mm apart and verged on the field centre; a "
        "speckle projector between them shows a new random pattern every frame "
        f"(speckles about {sc.speckle_grain_px:g} camera px).",
        "",
        f"**This run.** {sc.description}",
        "",
        "**Folders.** " + ", ".join(
            f"`{g.name}/` ({len(g.views) if g.kind == 'board' else len(g.times)} "
            f"{'target views' if g.kind == 'board' else 'frame pairs'})" for g in sc.groups)
        + f". The target is a chessboard of {sc.board['cols']}x{sc.board['rows']} inner corners, "
        f"{sc.board['square_mm']:g} mm squares.",
        "",
        "## Processing it",
        "",
        "```sh",
        f"surfrec calibrate --left 'target/left/*.png' --right 'target/right/*.png' "
        f"--board {sc.board['cols']}x{sc.board['rows']} --square {sc.board['square_mm']:g} -o rig.json",
        "surfrec datum --rig rig.json --left still/left --right still/right -o datum.h5",
        "surfrec match --rig rig.json --datum datum.h5 --left waves/left --right waves/right "
        "--timestamps waves/timestamps.csv -o disparity.h5",
        "surfrec heights disparity.h5 --rig rig.json --datum datum.h5 -o heights.h5",
        "surfrec assess heights.h5 --truth truth.h5",
    ]
    if sc.effects is not None and sc.effects.any:
        lines[lines.index("## Processing it"):lines.index("## Processing it")] = _effects_markdown(sc) + [""]
    if "periods" in sc.notes:
        # Whole wave periods: the run serves the wave analysis too.
        depth = sc.water["depth_mm"]
        lines.append(f"surfrec spectrum heights.h5 --depth {depth:g} -o spectrum")
        if sc.post is not None:
            lines.append(f"surfrec modes heights.h5 --radii 50,105 --depth {depth:g} -o modes")
    lines += [
        "```",
        "",
        "`surfrec inspect truth.h5` summarises the ground truth.",
        "",
    ]
    return "\n".join(lines)


def _effects_markdown(sc) -> list:
    """The camera-effects paragraph of SCENARIO.md."""
    fx = sc.effects
    p = fx.to_dict()
    said = {
        "vignetting": "lens vignetting V = 1 - a rho^2 - b rho^4 on top of the natural cos^4 "
                      f"(left a, b = {p['vignetting']['left'][0]:g}, {p['vignetting']['left'][1]:g}; right "
                      f"{p['vignetting']['right'][0]:g}, {p['vignetting']['right'][1]:g})",
        "illumination": f"the projector's hotspot (Gaussian beam, sigma {p['illumination']['hotspot_sigma_deg']:g} "
                        "degrees) and a room lamp at "
                        f"({', '.join(f'{v:g}' for v in p['room_lamp_mm'])}) mm lighting the board and the ambient",
        "defocus": f"thin-lens defocus (f/{p['defocus']['f_number']['left']:g}, focus "
                   f"{p['defocus']['focus_mm']['left']:g} / {p['defocus']['focus_mm']['right']:g} mm, "
                   f"{1000 * p['defocus']['pixel_pitch_mm']:g} um pixels at full size)",
        "dust": f"{p['dust']['count']} dust shadows per camera",
        "defects": f"hot ({p['defects']['hot_fraction']:g}) and dead ({p['defects']['dead_fraction']:g}) pixels",
        "glints": "saturating glints of the projector and the lamp on the water (Beckmann lobes, m = "
                  f"{p['glints']['projector_roughness']:g} and {p['glints']['lamp_roughness']:g})",
        "noise": f"{p['noise']['read_noise_e']:g} e- read noise, {p['noise']['full_well_e']:g} e- full well, "
                 f"black level {p['noise']['black_level_dn12']:g} DN of 12 bits",
        "bitdepth": f"{p['bitdepth']['bits']}-bit data in {p['bitdepth']['container_bits']}-bit files",
        "motion": f"motion blur over a {1000 * p['motion']['exposure_s']:g} ms exposure",
    }
    return ["**Camera effects.** " + "; ".join(said[n] for n in p["enabled"]) + ". Every parameter, the "
            "per-camera vignetting and dust maps, the hot and dead pixels and, per frame, the pixels the "
            "glints saturate are in `truth.h5` (group `effects`); the truth surface is the same as "
            "without effects."]
