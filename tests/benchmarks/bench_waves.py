"""Wave analysis end to end: R_m of the scatter session and the dispersion error of the plane session.

Run by hand (not collected by pytest) on full-size sessions, rendered first when missing:

    surfrec synth /tmp/bw_scatter --scenario scatter
    surfrec synth /tmp/bw_plane --scenario plane
    python tests/benchmarks/bench_waves.py --scatter /tmp/bw_scatter --plane /tmp/bw_plane [--work /tmp/bw-work]
        [--rig true|calibrated] [--bootstrap N]

For each session: datum, match and heights with the session's exact rig (``--rig true``, the default:
leaves calibration out) or with a rig calibrated from its target views (``--rig calibrated``, what
the demo does), each stage timed. Then:

- scatter: ``surfrec modes --radii 50,105 --depth 60 --orders 3`` with the post's true centre
  (transformed into the file's datum frame) and with the centre estimated. References: a rigid
  vertical cylinder reflects every order fully, |R_m| = 1, with arg R_m from
  R_m = -H2_m'(ka) / H1_m'(ka) (MacCamy & Fuchs 1954; Dean & Dalrymple), computed with
  scipy.special by surfrec.waves.scattering.reflection_coefficients.
- plane: ``surfrec spectrum --depth 60``; the measured wavenumber at the wave frequency against the
  linear capillary-gravity relation (Lamb, Hydrodynamics; Lighthill, Waves in Fluids) with handbook
  water (surfrec.waves.water).

Prints one table and a JSON object (``--json-out`` writes it to a file). Wall-clock times on a shared
machine: quote them as indications only.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def _cli(*args):
    t0 = time.monotonic()
    res = subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args)], capture_output=True,
                         text=True)
    if res.returncode != 0:
        raise SystemExit(f"surfrec {args[0]} failed: {res.stderr.strip()}")
    return res, time.monotonic() - t0


def reconstruct(session: Path, work: Path, rig_kind: str) -> tuple[Path, dict]:
    """rig.json (true or calibrated), datum, match, heights in work; returns heights.h5 and stage times (s)."""
    from conftest import true_rig
    from surfrec.io.rigfile import write_rig

    work.mkdir(parents=True, exist_ok=True)
    times = {}
    rig = work / "rig.json"
    if not rig.exists():
        if rig_kind == "true":
            write_rig(true_rig(session / "truth.h5"), rig)
        else:
            _, times["calibrate"] = _cli("calibrate", "--left", f"{session}/target/left/*.png", "--right",
                                         f"{session}/target/right/*.png", "--board", "11x8", "--square", 15,
                                         "-o", rig, "-q")
    steps = [("datum", work / "datum.h5", ["datum", "--rig", rig, "--left", session / "still" / "left", "--right",
                                           session / "still" / "right", "-o", work / "datum.h5", "-q"]),
             ("match", work / "disparity.h5", ["match", "--rig", rig, "--datum", work / "datum.h5", "--left",
                                               session / "waves" / "left", "--right", session / "waves" / "right",
                                               "--timestamps", session / "waves" / "timestamps.csv", "-o",
                                               work / "disparity.h5", "-q"]),
             ("heights", work / "heights.h5", ["heights", work / "disparity.h5", "--rig", rig, "--datum",
                                               work / "datum.h5", "-o", work / "heights.h5", "-q"])]
    for name, out, args in steps:
        if not out.exists():
            _, times[name] = _cli(*args)
    return work / "heights.h5", times


def post_centre_in_file_frame(heights: Path, truth: Path):
    """The post's true centre (datum-frame mm of the file) and radius (mm)."""
    from surfrec.io.heightsfile import read_heights
    from surfrec.io.truthfile import read_truth
    from surfrec.synth.cameras import Camera

    t = read_truth(truth)
    left = Camera.from_dict(t["rigs"]["rig"]["left"])
    m = np.asarray(read_heights(heights, frames=slice(0, 0))["attrs"]["world_to_left_camera"]).reshape(4, 4)
    cam = left.rotation @ np.array([*t["post"]["centre_mm"], 0.0]) + left.translation
    inv = np.linalg.inv(m)
    return (inv[:3, :3] @ cam + inv[:3, 3])[:2], float(t["post"]["radius_mm"])


def scatter_figures(heights: Path, session: Path, work: Path, n_boot: int) -> dict:
    from surfrec.waves import reflection_coefficients, wavenumber

    centre, radius = post_centre_in_file_frame(heights, session / "truth.h5")
    k = float(wavenumber(5.0, 60.0))
    out = {"true_centre_mm": centre.tolist()}
    for label, extra in (("given centre", [f"--centre={centre[0]:.4f},{centre[1]:.4f}"]), ("estimated centre", [])):
        res, dt = _cli("modes", heights, "-o", work / f"modes-{label.split()[0]}", "--radii", "50,105", "--depth", 60,
                       "--orders", 3, "--bootstrap", n_boot, "--json", "--force", *extra)
        obj = json.loads(res.stdout)
        ms = np.array([d["m"] for d in obj["modes"]])
        R = np.array([d["R_abs"] * np.exp(1j * np.radians(d["R_phase_deg"])) for d in obj["modes"]])
        expected = reflection_coefficients(k, radius, np.abs(ms))
        c = np.array(obj["centre_mm"])
        out[label] = {"seconds": dt, "centre_mm": c.tolist(), "centre_error_mm": (c - centre).tolist(),
                      "centre_estimate": obj.get("centre_estimate"),
                      "R_abs_error": {int(m): float(abs(r) - 1) for m, r in zip(ms, R)},
                      "R_phase_error_deg": {int(m): float(np.degrees(np.angle(r / e)))
                                            for m, r, e in zip(ms, R, expected)},
                      "R_abs_sigma": {int(d["m"]): d["R_abs_sigma"] for d in obj["modes"]}}
    return out


def plane_figures(heights: Path, session: Path, work: Path) -> dict:
    import csv

    from surfrec.io.truthfile import read_truth
    from surfrec.waves import water, wavenumber

    t = read_truth(session / "truth.h5")
    surface = t["groups"]["waves"]["surface"]
    surface = json.loads(surface) if isinstance(surface, str) else surface
    f, depth = surface["frequency_hz"], t["water"]["depth_mm"]
    _, dt = _cli("spectrum", heights, "-o", work / "spectrum", "--depth", depth, "--force", "-q")
    with open(work / "spectrum" / "peaks.csv") as fh:
        peak = next(csv.DictReader(fh))
    k_th = float(wavenumber(f, depth, gravity=water.STANDARD_GRAVITY, surface_tension=water.SURFACE_TENSION))
    k = float(peak["wavenumber_measured_rad_per_mm"])
    return {"seconds": dt, "frequency_true_hz": f, "frequency_measured_hz": float(peak["frequency_hz"]),
            "k_measured_rad_per_mm": k, "k_theory_rad_per_mm": k_th, "relative_error": k / k_th - 1}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scatter", type=Path, help="a rendered scatter session (rendered here when missing)")
    ap.add_argument("--plane", type=Path, help="a rendered plane session (rendered here when missing)")
    ap.add_argument("--work", type=Path, default=Path("/tmp/bw-work"))
    ap.add_argument("--rig", choices=("true", "calibrated"), default="true")
    ap.add_argument("--bootstrap", type=int, default=50)
    ap.add_argument("--quick", action="store_true", help="render quick sessions when rendering")
    ap.add_argument("--json-out", type=Path)
    a = ap.parse_args(argv)
    result = {"rig": a.rig}
    for name, path in (("scatter", a.scatter), ("plane", a.plane)):
        if path is None:
            continue
        if not path.exists():
            _, result[f"{name}_render_seconds"] = _cli("synth", path, "--scenario", name, "-q",
                                                       *(["--quick"] if a.quick else []))
        work = a.work / f"{name}-{a.rig}"
        heights, times = reconstruct(path, work, a.rig)
        result[f"{name}_stage_seconds"] = times
        result[name] = scatter_figures(heights, path, work, a.bootstrap) if name == "scatter" else \
            plane_figures(heights, path, work)
    if "scatter" in result:
        for label in ("given centre", "estimated centre"):
            r = result["scatter"][label]
            print(f"scatter, {label}: centre error {np.round(r['centre_error_mm'], 3).tolist()} mm; "
                  f"max ||R_m|-1| {max(abs(v) for v in r['R_abs_error'].values()):.4f}, "
                  f"max phase error {max(abs(v) for v in r['R_phase_error_deg'].values()):.2f} deg (|m| <= 3); "
                  f"{r['seconds']:.1f} s")
            print("    |R_m|-1: " + ", ".join(f"{m}: {v:+.4f}" for m, v in r["R_abs_error"].items()))
    if "plane" in result:
        p = result["plane"]
        print(f"plane: f {p['frequency_measured_hz']:.4f} Hz (true {p['frequency_true_hz']:g}); k "
              f"{p['k_measured_rad_per_mm']:.6f} vs {p['k_theory_rad_per_mm']:.6f} rad/mm: "
              f"{100 * p['relative_error']:+.3f}%; {p['seconds']:.1f} s")
    for key in ("scatter_stage_seconds", "plane_stage_seconds"):
        if key in result:
            print(f"{key}: " + ", ".join(f"{k} {v:.0f}" for k, v in result[key].items()))
    text = json.dumps(result, indent=2, default=float)
    if a.json_out:
        a.json_out.write_text(text)
    print(text)


if __name__ == "__main__":
    main()
