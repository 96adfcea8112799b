"""``surfrec assess``: how accurate is a heights.h5 — against a synthetic session's truth, or from its own noise."""

from __future__ import annotations

import json
import logging
import math

import click

from surfrec.cli.inspect import _finite_or_none, _jsonable
from surfrec.cli.options import json_option, verbosity

log = logging.getLogger("surfrec")

# Issue 5's targets on the default synthetic session (stated in the report,
# not enforced: other sessions have other needs).
TARGET_RMS_MM = 0.05
TARGET_COVERAGE = 0.95
TARGET_RATIO_TOL = 0.01

# Per-frame rows are printed in the text report up to this many frames (all
# of them are always in --json).
MAX_TEXT_ROWS = 40
PROGRESS_MIN_FRAMES = 200


@click.command("assess")
@click.argument("heights", metavar="HEIGHTS.h5", type=click.Path(dir_okay=False))
@click.option("--truth", "truth_path", default=None, metavar="TRUTH.h5", type=click.Path(dir_okay=False),
              help="truth.h5 of the synthetic session the heights were measured in: compare with the exact "
                   "surface (otherwise only the noise floor estimated from the data is reported).")
@click.option("--group", default="waves", show_default=True, metavar="NAME",
              help="Frame group of the truth that the heights were measured from.")
@click.option("--lag", type=click.IntRange(min=1), default=None, metavar="N",
              help="Frames between the samples the noise estimator differences (default: the matcher's "
                   "--time-window when the file records it, else 1: frames that share input frames have "
                   "correlated noise).")
@json_option
@verbosity
def command(heights, truth_path, group, lag, as_json):
    """Report the accuracy of HEIGHTS.h5.

    With --truth: the height error (measured minus exact) in two ways — in
    the true geometry (the file's nodes taken back to the left camera through
    its own world_to_left_camera, then into the tank through the true camera
    pose) and in the true datum frame (the file's numbers read at face value
    in the datum frame built from the true camera and still water): RMS,
    bias, 95th percentile of |error|; the coverage (valid nodes over nodes
    both true cameras see); and the amplitude of the known plane wave per
    frame, fitted by least squares at its known wavenumber and frequency,
    with the ratio across a known amplitude step.

    Always: the noise floor estimated from the data (the 3rd temporal
    difference of each node's series, which removes the resolved motion,
    with a robust scale), beside the file's own median 1-sigma.
    """
    from surfrec.io.heightsfile import read_heights

    head = read_heights(heights, frames=slice(0, 0))
    nt = int(head["n_frames"])
    if nt == 0:
        from surfrec.errors import InputError

        raise InputError(f"{heights} holds no frames")
    lag = lag or _recorded_time_window(head["attrs"]) or 1
    comparison, truth_info = (None, None)
    if truth_path is not None:
        comparison, truth_info = _comparison(head, heights, truth_path, group)
    report = _run(heights, head, comparison, truth_info, lag)
    if as_json:
        click.echo(json.dumps(_finite_or_none(report), indent=2, default=_jsonable, allow_nan=False))
    else:
        click.echo(_text(report))


# ------------------------------------------------------------------ set-up


def _embedded(attrs, key) -> dict:
    """A JSON attribute set that ``surfrec heights`` embeds (``datum_attributes``, ``disparity_attributes``)."""
    value = attrs.get(key)
    if isinstance(value, str):
        try:
            value = json.loads(value)
        except json.JSONDecodeError:
            return {}
    return value if isinstance(value, dict) else {}


def _recorded_time_window(attrs) -> int | None:
    """The matcher's --time-window, as heights.h5 records it (``match_param_time_window``)."""
    value = attrs.get("match_param_time_window", _embedded(attrs, "disparity_attributes").get("param_time_window"))
    try:
        n = int(value)
    except (TypeError, ValueError):
        return None
    return n if n >= 1 else None


def _datum_adjustment(attrs):
    """The datum's --origin (mm) and --rotate (deg), from the datum attributes heights.h5 embeds."""
    d = _embedded(attrs, "datum_attributes")
    origin, rotate = (0.0, 0.0), 0.0
    try:
        o = [float(v) for v in d.get("origin_mm", (0.0, 0.0))]
        if len(o) == 2 and all(math.isfinite(v) for v in o):
            origin = (o[0], o[1])
        rotate = float(d.get("rotate_deg", 0.0))
    except (TypeError, ValueError):
        pass
    return origin, (rotate if math.isfinite(rotate) else 0.0)


def _first_frame_index(attrs) -> int:
    """Index in the run of the file's first frame: the matcher's ``frames`` record "start:stop:step", else 0."""
    value = _embedded(attrs, "disparity_attributes").get("frames")
    if isinstance(value, str) and value.count(":") == 2:
        try:
            return max(0, int(value.split(":")[0] or 0))
        except ValueError:
            pass
    return 0


def _comparison(head, heights_path, truth_path, group):
    import numpy as np

    from surfrec.analysis.assess import TruthComparison
    from surfrec.errors import InputError
    from surfrec.io.truthfile import read_truth
    from surfrec.synth.cameras import Camera
    from surfrec.synth.surfaces import surface_from_dict

    truth = read_truth(truth_path)
    groups = truth["groups"]
    if group not in groups:
        names = ", ".join(n for n, g in groups.items() if g.get("kind") == "speckle")
        raise InputError(f"{truth_path} has no frame group {group!r} (speckle groups: {names})")
    g = groups[group]
    if g.get("kind") != "speckle" or not isinstance(g.get("surface"), dict):
        raise InputError(f"frame group {group!r} of {truth_path} holds target views, not a water surface")
    rig = truth["rigs"][g["rig"]]
    left, right = Camera.from_dict(rig["left"]), Camera.from_dict(rig["right"])
    surface = surface_from_dict(g["surface"])
    t_truth = np.asarray(g["time"], np.float64)
    first = _first_frame_index(head["attrs"])
    nt = int(head["n_frames"])
    if first >= t_truth.size:
        raise InputError(f"{heights_path} starts at frame {first} but group {group!r} of {truth_path} has "
                         f"{t_truth.size} frames: not the session these heights come from")
    offset = float(t_truth[first])
    times = np.asarray(head["time"], np.float64) + offset
    # A heights file longer than the truth's run cannot come from it.
    span = float(t_truth[-1] - t_truth[0]) if t_truth.size > 1 else 0.0
    step = float(np.median(np.diff(t_truth))) if t_truth.size > 1 else 1.0
    if nt > t_truth.size - first or times[-1] > t_truth[-1] + 0.5 * step:
        raise InputError(f"{heights_path} holds {nt} frames over {float(head['time'][-1] - head['time'][0]):.6g} s "
                         f"but group {group!r} of {truth_path} has {t_truth.size} frames over {span:.6g} s: "
                         "not the session these heights come from")
    origin, rotate = _datum_adjustment(head["attrs"])
    post = truth.get("post")
    step_time = None
    notes = truth.get("notes") or {}
    if isinstance(notes.get("amplitude_step"), dict) and "frame" in notes["amplitude_step"]:
        k = int(notes["amplitude_step"]["frame"])
        if 0 <= k < t_truth.size:
            step_time = float(t_truth[k])
    comp = TruthComparison(head["x"], head["y"], surface, head["attrs"]["world_to_left_camera"], left, right,
                           origin=origin, rotate_deg=rotate, post=post, step_time_s=step_time)
    info = {"path": str(truth_path), "scenario": truth.get("scenario"), "group": group, "quick": truth.get("quick"),
            "time_offset_s": offset, "first_frame_index": first, "times": times,
            "datum_origin_mm": list(origin), "datum_rotate_deg": rotate,
            "step_frame": notes.get("amplitude_step", {}).get("frame") if isinstance(notes.get("amplitude_step"),
                                                                                     dict) else None}
    return comp, info


# ------------------------------------------------------------------ the pass


def _run(heights, head, comparison, truth_info, lag):
    import numpy as np

    from surfrec.analysis.assess import HighPassNoise
    from surfrec.cli.progress import Progress
    from surfrec.io.heightsfile import read_heights

    nt = int(head["n_frames"])
    ny, nx = head["y"].size, head["x"].size
    noise = HighPassNoise(orders=(3, 2, 4), lag=lag)
    predicted = []
    flagged = int(np.count_nonzero(head["frame_flags"]))
    block = max(1, (32 << 20) // max(8 * ny * nx, 1))
    # A bar or log lines only for runs long enough to take a while.
    progress = Progress(nt, "assessing frames") if nt > PROGRESS_MIN_FRAMES else None
    try:
        for i in range(0, nt, block):
            d = read_heights(heights, frames=slice(i, min(nt, i + block)))
            h, s = d["height"], d["height_uncertainty"]
            noise.add(h)
            for k in range(h.shape[0]):
                ok = np.isfinite(h[k]) & np.isfinite(s[k])
                if ok.any():
                    predicted.append(float(np.median(s[k][ok])))
                if comparison is not None:
                    comparison.add(h[k], float(truth_info["times"][i + k]), i + k, sigma=s[k])
                if progress is not None:
                    progress(i + k + 1)
    finally:
        if progress is not None:
            progress.close()
    nf = noise.result()
    report = {"path": str(heights), "n_frames": nt, "grid": {"nx": int(nx), "ny": int(ny)},
              "flagged_frames": flagged,
              "noise_floor": nf | {"estimator": f"1.4826 x median |D| / sqrt(C(2n, n)), D the n-th temporal "
                                                f"difference at lag {lag} of each node's series (n = 3)"},
              "predicted_sigma_median_mm": float(np.median(predicted)) if predicted else None}
    if nf["sigma_mm"] and report["predicted_sigma_median_mm"]:
        report["noise_to_predicted"] = nf["sigma_mm"] / report["predicted_sigma_median_mm"]
    if comparison is not None:
        res = comparison.result()
        info = {k: v for k, v in truth_info.items() if k != "times"}
        report["truth"] = info
        report.update(res)
        report["targets"] = _targets(res)
    return report


def _targets(res):
    """Issue 5's targets, judged on what a user of the file gets (the true datum frame)."""
    out = {}
    rms = res["true_datum_frame"]["rms_mm"]
    if rms is not None:
        out["rms_mm"] = {"target": f"<= {TARGET_RMS_MM}", "value": rms, "geometry": "true_datum_frame",
                         "true_geometry": res["true_geometry"]["rms_mm"], "met": bool(rms <= TARGET_RMS_MM)}
    if res.get("coverage") is not None:
        out["coverage"] = {"target": f">= {TARGET_COVERAGE}", "value": res["coverage"],
                           "met": bool(res["coverage"] >= TARGET_COVERAGE)}
    pw = res.get("plane_wave") or {}
    if pw.get("step_ratio") is not None:
        true = pw["true_step_ratio"]
        out["step_ratio"] = {"target": f"{true:.2f} +/- {TARGET_RATIO_TOL}", "value": pw["step_ratio"],
                             "met": bool(abs(pw["step_ratio"] - true) <= TARGET_RATIO_TOL)}
    return out


# ------------------------------------------------------------------ the report


def _f(v, fmt="{:.4f}", none="-"):
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return none
    return fmt.format(v)


def _text(r) -> str:
    lines = [f"{r['path']}: {r['n_frames']} frames, {r['grid']['nx']} x {r['grid']['ny']} nodes"
             + (f", {r['flagged_frames']} flagged" if r["flagged_frames"] else "")]
    if "truth" in r:
        t = r["truth"]
        lines.append(f"truth: {t['path']} (scenario {t['scenario']}, group {t['group']}; the file's time 0 is "
                     f"truth frame {t['first_frame_index']}, t = {t['time_offset_s']:.6g} s)")
        lines.append("")
        lines.append("height error, measured - exact (mm)      RMS     bias  p95 |e|  max |e|  systematic  random")
        labels = {"true_geometry": "true geometry", "true_datum_frame": "true datum frame"}
        for g, label in labels.items():
            st = r[g]
            lines.append(f"  {label:<36}{_f(st['rms_mm']):>7}  {_f(st['bias_mm'], '{:+.4f}'):>7}  "
                         f"{_f(st['p95_abs_mm']):>7}  {_f(st['max_abs_mm']):>7}  {_f(st['systematic_rms_mm']):>10}  "
                         f"{_f(st['random_rms_mm']):>6}")
        lines.append("  true geometry: the nodes through the file's own world_to_left_camera, then the true camera "
                     "pose (the rig's 3-D error); true datum frame: the values at face value in the datum frame of "
                     "the true camera and still water (what a user of the file gets). systematic: RMS of each "
                     "node's mean error; random: RMS of each node's spread over frames.")
        un = r.get("uncertainty") or {}
        if un.get("random_to_sigma") is not None:
            lines.append(f"1-sigma check (true datum frame): random error / predicted 1-sigma = "
                         f"{un['random_to_sigma']:.2f} (pooled over nodes); median |error| / 1-sigma / 0.6745 = "
                         f"{un['error_to_sigma_median']:.2f} (with the systematic part); 1 is honest")
        cov = r.get("coverage")
        lines.append(f"coverage: {_f(cov and 100 * cov, '{:.2f}')}% of the nodes both true cameras see are valid"
                     f" ({r['seen_nodes']} node-frames seen); {r['valid_outside_seen']} valid node-frames outside "
                     "their view")
        pw = r.get("plane_wave")
        if pw:
            lines.append("")
            lines.append(f"plane wave (known: k = {pw['wavenumber_rad_mm']:.5f} rad/mm, wavelength "
                         f"{pw['wavelength_mm']:.2f} mm, {pw['direction_deg']:g} deg, {pw['frequency_hz']:g} Hz): "
                         "amplitude by least squares per frame")
        rows = r["per_frame"]
        show = rows if len(rows) <= MAX_TEXT_ROWS else None
        if show is not None:
            head = "  frame    t (s)   RMS geom  RMS datum  coverage"
            if pw:
                head += "   amplitude       true     ratio"
            lines.append(head)
            for row in show:
                cover = row["coverage"]
                line = (f"  {row['frame']:>5}  {row['time_s']:>7.4f}  {_f(row['true_geometry_rms_mm']):>9}  "
                        f"{_f(row['true_datum_frame_rms_mm']):>9}  {_f(cover and 100 * cover, '{:.2f}%'):>8}")
                if pw:
                    line += (f"  {_f(row.get('amplitude_mm'), '{:.5f}'):>10}  "
                             f"{_f(row.get('true_amplitude_mm'), '{:.5f}'):>9}  "
                             f"{_f(row.get('amplitude_ratio'), '{:.5f}'):>8}")
                lines.append(line)
        else:
            lines.append(f"  ({len(rows)} frames: the per-frame table is in --json)")
        if pw and pw.get("step_ratio") is not None:
            lines.append(f"amplitude step at t = {pw['step_time_s']:.6g} s: ratio {pw['step_ratio']:.4f} "
                         f"(true {pw['true_step_ratio']:.4f}) = mean {pw['mean_after_mm']:.5f} mm after / "
                         f"{pw['mean_before_mm']:.5f} mm before ({pw['frames_before_step']} + "
                         f"{pw['frames_after_step']} frames)")
        elif pw and pw.get("step_time_s") is not None:
            lines.append(f"amplitude step at t = {pw['step_time_s']:.6g} s: not inside this file's frames")
    lines.append("")
    nf = r["noise_floor"]
    if nf["sigma_mm"] is None:
        lines.append(f"noise floor from the data: too few frames ({nf['frames']}) for a 3rd difference at lag "
                     f"{nf['lag']}")
    else:
        others = ", ".join(f"{o}: {_f(v)}" for o, v in nf["sigma_by_order_mm"].items() if o != str(nf["order"]))
        verdict = "consistent" if nf["consistent"] else (
            "NOT consistent, so read it as an upper bound: the high-pass leaks resolved motion (few frames per "
            "wave period, a sudden change) or the noise is correlated in time")
        lines.append(f"noise floor from the data: {nf['sigma_mm']:.4f} mm per sample (3rd temporal difference at "
                     f"lag {nf['lag']}, robust scale; orders {others} mm: {verdict})")
    if r.get("predicted_sigma_median_mm") is not None:
        ratio = f"; measured / predicted = {r['noise_to_predicted']:.2f}" if "noise_to_predicted" in r else ""
        lines.append(f"predicted 1-sigma (median of the file's height_uncertainty): "
                     f"{r['predicted_sigma_median_mm']:.4f} mm{ratio}")
    if r.get("targets"):
        parts = []
        tg = r["targets"]
        if "rms_mm" in tg:
            parts.append(f"RMS {tg['rms_mm']['target']} mm (true datum frame): "
                         f"{'met' if tg['rms_mm']['met'] else 'NOT met'}")
        if "coverage" in tg:
            parts.append(f"coverage {tg['coverage']['target']}: {'met' if tg['coverage']['met'] else 'NOT met'}")
        if "step_ratio" in tg:
            parts.append(f"step ratio {tg['step_ratio']['target']}: "
                         f"{'met' if tg['step_ratio']['met'] else 'NOT met'}")
        lines.append("targets of issue 5 (default session): " + "; ".join(parts))
    return "\n".join(_wrapped(lines))


def _wrapped(lines, width=100):
    """Long sentences wrapped for a terminal, continuation lines indented; tables are narrower already."""
    import textwrap

    out = []
    for line in lines:
        if len(line) <= width:
            out.append(line)
            continue
        lead = " " * (len(line) - len(line.lstrip()))
        out.extend(textwrap.wrap(line, width=width, subsequent_indent=lead + "  ", break_long_words=False,
                                 break_on_hyphens=False))
    return out
