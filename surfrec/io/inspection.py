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


def summarise(path, *, progress=None) -> dict:
    """Summarise any surfrec file.

    Parameters
    ----------
    path : str or Path
    progress : callable(done, total) or None
        Called during the streamed pass over the frames of a disparity or
        heights file (the other kinds are read at once).

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
    if fmt in _STREAMED:
        return fn(Path(path), progress=progress)
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


# ------------------------------------------------------------------ frame files
#
# disparity.h5 and heights.h5 can hold tens of thousands of frames: their
# summaries read the attributes and the small datasets at once, then make one
# streamed pass over the frames in blocks of about STREAM_BLOCK_BYTES, so
# memory stays flat whatever the run length.

STREAM_BLOCK_BYTES = 32 << 20


def _block_frames(frame_bytes: int) -> int:
    return max(1, STREAM_BLOCK_BYTES // max(frame_bytes, 1))


def _time_summary(time, units: str = "s") -> dict:
    """Time span, frame rate and regularity of a time axis (s)."""
    t = np.asarray(time, np.float64)
    out = {"frames": int(t.size), "units": units}
    if t.size == 0:
        return out
    out.update(first_s=float(t[0]), last_s=float(t[-1]), span_s=float(t[-1] - t[0]))
    if t.size > 1:
        dt = np.diff(t)
        med = float(np.median(dt))
        out["frame_rate_hz"] = round(1.0 / med, 6) if med > 0 else None
        # Irregular when any step differs from the median step by more than 1%
        # (a dropped frame doubles one step).
        out["regular"] = bool(med > 0 and np.all(np.abs(dt - med) <= 0.01 * med))
        if not out["regular"]:
            out["step_range_s"] = [float(dt.min()), float(dt.max())]
    return out


def _axis_summary(a, unit: str) -> dict:
    a = np.asarray(a, np.float64)
    step = float(np.median(np.diff(a))) if a.size > 1 else None
    return {"n": int(a.size), f"range_{unit}": [float(a[0]), float(a[-1])], f"step_{unit}": step}


def _flag_counts(flags, masks, meanings) -> dict:
    """Frames carrying each flag bit, and the clean ones."""
    flags = np.asarray(flags, np.int64)
    names = meanings.split() if isinstance(meanings, str) else list(meanings or [])
    out = {"clean": int(np.count_nonzero(flags == 0))}
    for m, name in zip(masks, names):
        out[name] = int(np.count_nonzero(flags & int(m)))
    return out


def _json_attr(value):
    if isinstance(value, str) and value[:1] in "{[":
        try:
            return json.loads(value)
        except json.JSONDecodeError:
            return value
    return value


def _rounded(x, digits=6):
    return None if x is None or not np.isfinite(x) else float(f"{float(x):.{digits}g}")


def _summarise_disparity(p: Path, progress=None) -> dict:
    from surfrec.io.disparityfile import read_disparity

    head = read_disparity(p, frames=slice(0, 0))
    a = head["attrs"]
    nt = int(head["time"].size)
    nv, nu = int(head["v"].size), int(head["u"].size)
    with h5py.File(p, "r") as f:
        fl = f["frame_flags"]
        masks = [int(m) for m in fl.attrs.get("flag_masks", [])]
        meanings = _text(fl.attrs.get("flag_meanings", ""))
    lo, hi = np.inf, -np.inf
    valid_frac, sigma_med, score_med = [], [], []
    block = _block_frames(3 * 4 * nv * nu)
    for i in range(0, nt, block):
        d = read_disparity(p, frames=slice(i, min(nt, i + block)))
        disp, sig, score = d["disparity"], d["disparity_sigma"], d["score"]
        ok = np.isfinite(disp)
        for k in range(disp.shape[0]):
            v = ok[k]
            valid_frac.append(float(v.mean()) if v.size else 0.0)
            if v.any():
                lo = min(lo, float(disp[k][v].min()))
                hi = max(hi, float(disp[k][v].max()))
                sigma_med.append(float(np.median(sig[k][v])))
                score_med.append(float(np.median(score[k][v])))
        if progress is not None:
            progress(min(nt, i + block), nt)
    params = {k[len("param_"):]: _plain(v) for k, v in a.items() if k.startswith("param_")}
    vf = np.asarray(valid_frac)
    return {
        "path": str(p), "format": "surfrec.disparity", "version": int(a.get("version", 1)),
        "dimensions": {"time": nt, "v": nv, "u": nu},
        "time": _time_summary(head["time"]) | {"timing": a.get("timing")},
        "grid": {"u": _axis_summary(head["u"], "px"), "v": _axis_summary(head["v"], "px"),
                 "points": nv * nu},
        "valid_percent": {"mean": _rounded(100 * vf.mean(), 4) if vf.size else None,
                          "min": _rounded(100 * vf.min(), 4) if vf.size else None,
                          "max": _rounded(100 * vf.max(), 4) if vf.size else None},
        "disparity_range_px": [_rounded(lo), _rounded(hi)] if np.isfinite(lo) else None,
        "median_sigma_px": _rounded(np.median(sigma_med)) if sigma_med else None,
        "median_score": _rounded(np.median(score_med), 4) if score_med else None,
        "frame_flags": _flag_counts(head["frame_flags"], masks, meanings),
        "rejected_points": _json_attr(a.get("rejected")),
        "matcher": params | {"speckle_px": _rounded(a.get("speckle_px"), 4)},
        "provenance": {"software": a.get("software"), "created": a.get("created"), "history": a.get("history"),
                       "rig_sha256": a.get("rig_sha256"), "datum_sha256": a.get("datum_sha256"),
                       "frames": a.get("frames"),
                       "left_images": _span(a.get("left_first"), a.get("left_last")),
                       "right_images": _span(a.get("right_first"), a.get("right_last")),
                       "seconds_per_frame": _rounded(a.get("seconds_per_frame"), 4)},
        "notes": ["statistics of sigma and score are medians over frames of each frame's median"],
    }


def _span(first, last):
    if first is None:
        return None
    return first if last in (None, first) else f"{first} ... {last}"


# Root attributes of heights.h5 shown in their own sections, not under "parameters".
_HEIGHTS_SHOWN = {"Conventions", "title", "history", "source", "format", "version", "created", "time_origin",
                  "time_origin_source", "world_to_left_camera", "n_frames", "rig_sha256", "datum_sha256",
                  "disparity_sha256", "still_correction", "height_systematic_mm", "software"}


def _summarise_heights(p: Path, progress=None) -> dict:
    from surfrec.io.heightsfile import read_heights

    head = read_heights(p, frames=slice(0, 0))
    a = head["attrs"]
    x, y = head["x"], head["y"]
    nt, ny, nx = int(head["time"].size), int(y.size), int(x.size)
    foot = np.asarray(head["footprint"], bool)
    n_foot = int(foot.sum())
    with h5py.File(p, "r") as f:
        fl = f["frame_flags"]
        masks = [int(m) for m in fl.attrs.get("flag_masks", fl.attrs.get("flag_values", []))]
        meanings = _text(fl.attrs.get("flag_meanings", ""))
    lo, hi = np.inf, -np.inf
    cover, sigma_med = [], []
    sum_sq, n_valid, outside = 0.0, 0, 0
    block = _block_frames(2 * 4 * ny * nx)
    for i in range(0, nt, block):
        d = read_heights(p, frames=slice(i, min(nt, i + block)))
        h, s = d["height"], d["height_uncertainty"]
        for k in range(h.shape[0]):
            ok = np.isfinite(h[k])
            cover.append(float((ok & foot).sum()) / n_foot if n_foot else 0.0)
            outside += int((ok & ~foot).sum())
            if ok.any():
                v = h[k][ok].astype(np.float64)
                lo, hi = min(lo, float(v.min())), max(hi, float(v.max()))
                sum_sq += float(v @ v)
                n_valid += v.size
                sv = s[k][ok & np.isfinite(s[k])]
                if sv.size:
                    sigma_med.append(float(np.median(sv)))
        if progress is not None:
            progress(min(nt, i + block), nt)
    cv = np.asarray(cover)
    still = a.get("still_correction")
    datum_attrs = _json_attr(a.get("datum_attributes")) or {}
    disp_attrs = _json_attr(a.get("disparity_attributes")) or {}
    if not isinstance(datum_attrs, dict):
        datum_attrs = {}
    if not isinstance(disp_attrs, dict):
        disp_attrs = {}
    groups = {"parameters": {}, "matcher": {}, "systematic_error": {}, "run": {}}
    for k, v in a.items():
        if k in _HEIGHTS_SHOWN or k in _HEIGHTS_EMBEDDED or k.endswith("_file"):
            continue
        v = _plain(_json_attr(v))
        if k.startswith("match_param_"):
            groups["matcher"][k[len("match_param_"):]] = v
        elif k.startswith("systematic_") or k.startswith("calibration_rms"):
            groups["systematic_error"][k] = v
        elif k in _HEIGHTS_RUN or k.startswith("resample_nodes_") or k == "resample_max_iterations":
            groups["run"][k] = v
        else:
            groups["parameters"][k] = v
    return {
        "path": str(p), "format": "surfrec.heights", "version": int(a.get("version", 1)), "title": a.get("title"),
        "dimensions": {"time": nt, "y": ny, "x": nx},
        "time": _time_summary(head["time"], head["time_units"]) | {"origin": a.get("time_origin"),
                                                                     "origin_source": a.get("time_origin_source")},
        "grid": {"x": _axis_summary(x, "mm"), "y": _axis_summary(y, "mm"), "nodes": ny * nx,
                 "footprint_nodes": n_foot, "footprint_percent": _rounded(100.0 * n_foot / max(ny * nx, 1), 4)},
        "coverage_percent": {"mean": _rounded(100 * cv.mean(), 4) if cv.size else None,
                             "min": _rounded(100 * cv.min(), 4) if cv.size else None,
                             "max": _rounded(100 * cv.max(), 4) if cv.size else None},
        "valid_outside_footprint": outside,
        "height_range_mm": [_rounded(lo), _rounded(hi)] if np.isfinite(lo) else None,
        "height_rms_mm": _rounded(np.sqrt(sum_sq / n_valid)) if n_valid else None,
        "median_uncertainty_mm": _rounded(np.median(sigma_med)) if sigma_med else None,
        "systematic_uncertainty_mm": _rounded(a.get("height_systematic_mm")),
        "frame_flags": _flag_counts(head["frame_flags"], masks, meanings),
        "provenance": {"software": a.get("source") or a.get("software"), "created": a.get("created"),
                       "history": a.get("history"), "conventions": a.get("Conventions"),
                       "rig": a.get("rig_file"), "rig_sha256": a.get("rig_sha256"),
                       "datum": a.get("datum_file"), "datum_sha256": a.get("datum_sha256"),
                       "disparity": a.get("disparity_file"), "disparity_sha256": a.get("disparity_sha256"),
                       "datum_origin_mm": _plain(datum_attrs.get("origin_mm")),
                       "datum_rotate_deg": datum_attrs.get("rotate_deg"),
                       "matched_frames": disp_attrs.get("frames"),
                       "still_correction": None if still is None else ("on" if bool(still) else "off")},
        **groups,
        "notes": ["coverage_percent: valid nodes over footprint nodes (the area both cameras see, exclusions "
                  "removed), per frame",
                  "median_uncertainty_mm: the median over frames of each frame's median 1-sigma (random part)"],
    }


# Embedded copies of the inputs' metadata: provenance, summarised above, not parameters to list.
_HEIGHTS_EMBEDDED = {"rig_json", "datum_attributes", "disparity_attributes"}
# Figures of the heights run itself.
_HEIGHTS_RUN = {"wall_seconds", "seconds_per_frame", "coverage_median", "coverage_min", "abs_height_p95_mm"}


def _text(v):
    return v.decode() if isinstance(v, bytes) else str(v)


def _plain(v):
    if isinstance(v, bytes):
        return v.decode()
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    return v


_SUMMARISERS = {"surfrec.truth": _summarise_truth, "surfrec.datum": _summarise_datum, "surfrec.rig": _summarise_rig,
                "surfrec.disparity": _summarise_disparity, "surfrec.heights": _summarise_heights}
_STREAMED = {"surfrec.disparity", "surfrec.heights"}

_KIND_NAMES = {"surfrec.truth": "truth of a synthetic session", "surfrec.rig": "stereo rig calibration",
               "surfrec.datum": "still-water datum", "surfrec.disparity": "disparities of a run",
               "surfrec.heights": "height fields of a run"}


# ------------------------------------------------------------------- text form

_WIDTH = 100


def format_text(summary: dict, indent: int = 0) -> str:
    """Render a summary dict for people.

    A header line names the file and its kind; then one ``key  value`` line
    per item, keys aligned within each section (the keys are those of the
    ``--json`` object, so a script author finds them there), nested sections
    indented, lists of numbers comma-separated, lists of text as bullets,
    long text wrapped, and "-" for values that are not known.
    """
    lines = []
    if indent == 0 and "format" in summary and "path" in summary:
        kind = _KIND_NAMES.get(summary["format"], summary["format"])
        lines.append(f"{summary['path']}: {kind} ({summary['format']} v{summary.get('version', '?')})")
        summary = {k: v for k, v in summary.items() if k not in ("path", "format", "version")}
        indent = 1
    lines.extend(_section(summary, indent))
    return "\n".join(lines)


def _section(d: dict, indent: int) -> list:
    pad = "  " * indent
    scalars = [k for k, v in d.items() if (not isinstance(v, dict) or _inline(v) is not None or not v)
               and not _is_text_list(v)]
    width = min(max((len(str(k)) for k in scalars), default=0), 32)
    out = []
    for k, v in d.items():
        if isinstance(v, dict):
            if not v:
                out.append(f"{pad}{str(k).ljust(width)}  -")
                continue
            inline = _inline(v)
            if inline is not None and len(pad) + width + 2 + len(inline) <= _WIDTH:
                out.append(f"{pad}{str(k).ljust(width)}  {inline}")
                continue
            out.append(f"{pad}{k}:")
            out.extend(_section(v, indent + 1))
        elif _is_text_list(v):
            out.append(f"{pad}{k}:" + ("" if v else " none"))
            for item in v:
                out.extend(_wrap(f"- {item}", pad + "  ", pad + "    "))
        else:
            text = _value(v)
            first = f"{pad}{str(k).ljust(width)}  "
            out.extend(_wrap(text, first, " " * len(first)))
    return out


def _inline(d: dict):
    """One-line form of a small dict of numbers ("time 6, y 111, x 151"), or None."""
    def number(v):
        return isinstance(v, (int, float)) and not isinstance(v, bool)

    def short(v):
        return number(v) or (isinstance(v, (list, tuple)) and 0 < len(v) <= 4 and all(number(x) for x in v))

    if len(d) > 6 or not all(short(v) for v in d.values()):
        return None
    return ", ".join(f"{k} {_fmt(v) if number(v) else '[' + _value(v) + ']'}" for k, v in d.items())


def _is_text_list(v):
    return isinstance(v, (list, tuple)) and any(isinstance(x, str) and len(x) > 24 for x in v)


def _value(v) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (list, tuple)):
        if not v:
            return "-"
        return ", ".join(_value(x) for x in v)
    return _fmt(v)


def _wrap(text: str, first: str, rest: str) -> list:
    import textwrap

    if len(first) + len(text) <= _WIDTH:
        return [first + text]
    # Hashes and paths have no spaces; wrap only at spaces, never inside a word.
    return textwrap.wrap(text, width=_WIDTH, initial_indent=first, subsequent_indent=rest,
                         break_long_words=False, break_on_hyphens=False) or [first]


def _fmt(x):
    if isinstance(x, float):
        return f"{x:.6g}"
    return str(x)
