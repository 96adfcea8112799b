"""The calibration report figure: coverage, per-view RMS, residual vectors, rectified rows.

Colours are the Okabe–Ito palette (Okabe & Ito 2008, "Color Universal
Design"), distinguishable with the common forms of colour blindness; left
and right are also told apart by marker shape and by panel titles, never by
colour alone.
"""

from __future__ import annotations

import numpy as np

# Okabe–Ito colours.
BLUE = "#0072B2"
VERMILLION = "#D55E00"
GREEN = "#009E73"
ORANGE = "#E69F00"
SKY = "#56B4E9"
GREY = "#999999"
BLACK = "#000000"

SIDE_COLOUR = {"left": BLUE, "right": VERMILLION}


def calibration_figure(calib, *, title: str = ""):
    """Build the report figure of a calibration.

    Parameters
    ----------
    calib : surfrec.calib.calibrate.RigCalibration
    title : figure title.

    Returns
    -------
    matplotlib.figure.Figure
        Six panels: target points and covered cells per camera (image px),
        per-view reprojection RMS (px), residual vectors per camera
        (observed minus reprojected, magnified; the scale is stated in each
        panel) and the histogram of rectified row differences (px).
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    fig = Figure(figsize=(15.5, 9.2), layout="constrained")
    axes = fig.subplots(2, 3)
    w, h = calib.image_size
    for col, side in enumerate(("left", "right")):
        _coverage_panel(axes[0, col], calib, side, w, h)
        _residual_panel(axes[1, col], calib, side, w, h)
    _rms_panel(axes[0, 2], calib)
    _rows_panel(axes[1, 2], calib)
    mode = "re-posed (intrinsics kept)" if calib.mode != "full" else "full calibration"
    fig.suptitle(f"{title}  —  {mode}: reprojection RMS {calib.rms_px:.3f} px, epipolar RMS "
                 f"{calib.epipolar_rms_px:.3f} px, baseline {calib.baseline_mm:.2f} mm, "
                 f"convergence {calib.convergence_deg:.2f} deg", fontsize=11)
    return fig


def _image_axes(ax, w, h):
    ax.set_xlim(-0.5, w - 0.5)
    ax.set_ylim(h - 0.5, -0.5)  # image rows run down
    ax.set_aspect("equal")
    ax.set_xlabel("u (px)")
    ax.set_ylabel("v (px)")


def _coverage_panel(ax, calib, side, w, h):
    from matplotlib.patches import Rectangle

    nc, nr = calib.coverage["cells"]
    occ = calib.coverage[f"occupied_{side}"]
    for r in range(nr):
        for c in range(nc):
            x0, y0 = c * w / nc - 0.5, r * h / nr - 0.5
            ax.add_patch(Rectangle((x0, y0), w / nc, h / nr, facecolor=SKY if occ[r, c] else "white",
                                   alpha=0.35 if occ[r, c] else 1.0, edgecolor=GREY, linewidth=0.6))
    role = side if calib.mode == "full" else "stereo"
    marker = "o" if side == "left" else "s"
    for v in calib.views:
        pts = calib.points_of(side, v.index) if role in v.roles else None
        if pts is not None:
            ax.plot(pts[:, 0], pts[:, 1], marker, ms=2.2, color=SIDE_COLOUR[side], alpha=0.8, linestyle="none")
    _image_axes(ax, w, h)
    n = sum(role in v.roles for v in calib.views)
    ax.set_title(f"{side} camera: target points of {n} views; {100 * calib.coverage[side]:.0f}% of "
                 f"{nc}x{nr} cells covered (shaded)", fontsize=10)


def _residual_panel(ax, calib, side, w, h):
    pairs = list(calib.points.get(side, {}).values())
    if not pairs:
        ax.text(0.5, 0.5, "no residuals", ha="center", va="center", transform=ax.transAxes)
        _image_axes(ax, w, h)
        return
    pts = np.concatenate([p for p, _ in pairs])
    res = np.concatenate([e for _, e in pairs])
    mag = np.hypot(res[:, 0], res[:, 1])
    # Magnify so that the 95th-percentile residual is drawn 3% of the image width long.
    ref = float(np.percentile(mag, 95)) if mag.size else 0.0
    ref = ref if ref > 0 else 1.0
    key = _nice(ref)
    gain = 0.03 * w / ref
    ax.quiver(pts[:, 0], pts[:, 1], res[:, 0] * gain, res[:, 1] * gain, angles="xy", scale_units="xy", scale=1,
              color=SIDE_COLOUR[side], width=0.0022, headwidth=3.5, headlength=4)
    # Scale bar: `key` px of residual, drawn to the same magnification.
    x0, y0 = 0.04 * w, 0.95 * h
    ax.plot([x0, x0 + key * gain], [y0, y0], color=BLACK, linewidth=2)
    ax.text(x0, y0 - 0.02 * h, f"{key:g} px residual (arrows magnified {gain:.0f}x)", fontsize=8, va="bottom")
    _image_axes(ax, w, h)
    rms = float(np.sqrt((mag ** 2).mean()))
    ax.set_title(f"{side} camera: residuals, observed - reprojected (RMS {rms:.3f} px)", fontsize=10)


def _rms_panel(ax, calib):
    views = calib.views
    x = np.arange(len(views))
    width = 0.4
    for k, side in enumerate(("left", "right")):
        vals = [getattr(v, f"rms_{side}_px") for v in views]
        hatch = None if side == "left" else "//"
        ax.bar(x + (k - 0.5) * width, [np.nan if val is None else val for val in vals], width, color=SIDE_COLOUR[side],
               hatch=hatch, edgecolor="white", linewidth=0.3, label=f"{side} camera")
    top = max([v.rms_px for v in views if v.rms_px is not None] + [1e-3])
    skipped = [i for i, v in enumerate(views) if not v.roles]
    if skipped:
        ax.plot(skipped, [0.04 * top] * len(skipped), "x", color=BLACK, ms=7, label="not used (see report)")
    ax.set_xticks(x)
    ax.set_xticklabels([str(v.index) for v in views], fontsize=7)
    ax.set_xlabel("view")
    ax.set_ylabel("reprojection RMS (px)")
    med = float(np.median([v.rms_px for v in views if v.rms_px is not None])) if top > 1e-3 else 0.0
    ax.axhline(med, color=GREEN, linewidth=1.2, label=f"median {med:.3f} px (both cameras)")
    from surfrec.calib.calibrate import MAX_GOOD_RMS_PX, OUTLIER_FACTOR, OUTLIER_FLOOR_PX

    limit = max(OUTLIER_FACTOR * med, OUTLIER_FLOOR_PX)
    ymax = 1.35 * top
    note = ""
    if limit < 1.5 * top:
        ax.axhline(limit, color=ORANGE, linestyle="--", linewidth=1.2, label=f"outlier limit {limit:.2f} px")
        ymax = max(ymax, 1.15 * limit)
    else:
        note = f"\n(outlier limit {limit:.2f} px and rule of thumb {MAX_GOOD_RMS_PX:g} px are off this scale)"
    if MAX_GOOD_RMS_PX < ymax and limit < 1.5 * top:
        ax.axhline(MAX_GOOD_RMS_PX, color=BLACK, linestyle=":", linewidth=1.0,
                   label=f"rule of thumb {MAX_GOOD_RMS_PX:g} px")
    ax.set_ylim(0, ymax)
    ax.legend(fontsize=8, loc="upper left", ncols=2)
    ax.set_title("per-view reprojection RMS (final model)" + note, fontsize=10)


def _rows_panel(ax, calib):
    d = np.asarray(calib.row_errors_px, float)
    if d.size:
        lim = max(float(np.percentile(np.abs(d), 99.5)), 1e-3)
        ax.hist(np.clip(d, -lim, lim), bins=41, range=(-lim, lim), color=GREEN, edgecolor="white", linewidth=0.3)
        ax.axvline(0, color=BLACK, linewidth=0.8)
    ax.set_xlabel("v_left - v_right after rectification (px)")
    ax.set_ylabel("target points")
    ax.set_title(f"rectified rows: epipolar RMS {calib.epipolar_rms_px:.3f} px over {d.size} point pairs",
                 fontsize=10)


def _nice(x: float) -> float:
    """A round number (1, 2 or 5 times a power of ten) near x."""
    p = 10 ** np.floor(np.log10(x))
    for m in (1, 2, 5, 10):
        if m * p >= x * 0.7:
            return float(m * p)
    return float(10 * p)
