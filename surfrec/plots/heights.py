"""Pictures of height fields for people: one frame as a map, and the time series at a point.

Colour map. Heights are signed about the still water, so the map is
diverging and centred on zero with symmetric limits: equal colours mean
equal magnitudes above and below the datum. Our map runs from a dark blue
(troughs) through the Okabe–Ito sky blue to a near-white at zero, then the
Okabe–Ito orange to a dark burnt orange (crests). Why blue and orange: the
blue–yellow opponent channel survives the red–green deficiencies
(protanopia, deuteranopia — the common forms, about 8% of men), and the
Okabe–Ito blue and orange stay apart under tritanopia too (Okabe & Ito
2008, "Color Universal Design"); red–green maps (or a rainbow) do not. The
two arms have the same CIE lightness at equal distances from zero, so
neither sign looks larger, and lightness falls monotonically away from zero,
so the magnitude reads in greyscale. Sign does not rest on hue alone:
contour lines are drawn solid above zero and dashed below it (the
cartographic convention), and grid nodes without a measurement are hatched
grey, a colour the map never uses.

matplotlib is imported inside the functions (Agg backend), so importing this
module costs nothing; the CLI saves the figure through surfrec.io.outputs.
"""

from __future__ import annotations

import numpy as np

# Okabe–Ito colours, and the two dark ends of the height map.
BLUE = "#0072B2"
SKY = "#56B4E9"
ORANGE = "#E69F00"
VERMILLION = "#D55E00"
GREY = "#999999"
BLACK = "#000000"

# Anchors of the height map at -1, -0.5, 0, 0.5, 1 of the limit. The dark
# ends are chosen for equal CIE L* (30 and 31) and the middle stops are the
# Okabe–Ito sky blue and orange (L* 70 and 71).
HEIGHT_MAP_ANCHORS = ("#0B4682", SKY, "#F5F5F2", ORANGE, "#7C3500")
HEIGHT_MAP_NAME = "surfrec_height"
NO_DATA_FACE = "#D9D9D9"
# symmetric_limits: beyond this many times the 99.9th percentile of |h| the
# largest values count as outliers and are clipped (marked on the colour bar).
OUTLIER_FACTOR = 1.25
NO_DATA_HATCH_COLOUR = "#8C8C8C"


def height_colormap():
    """The diverging blue–orange colour map of height maps (see the module docstring).

    Returns
    -------
    matplotlib.colors.LinearSegmentedColormap with 256 levels; NaN
    (no data) is transparent, so the hatched no-data background shows.
    """
    from matplotlib.colors import LinearSegmentedColormap

    cmap = LinearSegmentedColormap.from_list(HEIGHT_MAP_NAME, list(zip(np.linspace(0, 1, 5), HEIGHT_MAP_ANCHORS)),
                                             N=256)
    return cmap.with_extremes(bad=(0, 0, 0, 0))


def symmetric_limits(values, *, percentile: float = 99.9, limit: float | None = None):
    """Colour limits symmetric about zero.

    Parameters
    ----------
    values : array of heights, mm (NaN ignored).
    percentile : the limit is this percentile of |values| (so one outlier
        does not wash out the map; the colour bar marks clipped values).
    limit : a fixed limit, mm, instead (to compare frames on one scale).

    Returns
    -------
    (vmin, vmax) mm with vmin = -vmax < 0: the largest |value| unless it
    exceeds :data:`OUTLIER_FACTOR` times the percentile (then the
    percentile); 1 mm when there is no finite value, and never below 1
    micrometre (a flat field still gets a scale).
    """
    if limit is not None:
        lim = float(limit)
        if not (np.isfinite(lim) and lim > 0):
            raise ValueError(f"the colour limit must be a positive number of mm, got {limit!r}")
        return -lim, lim
    a = np.abs(np.asarray(values, np.float64))
    a = a[np.isfinite(a)]
    if a.size == 0:
        return -1.0, 1.0
    lim = float(np.percentile(a, percentile))
    top = float(a.max())
    # Clip only real outliers: when the largest value is close to the
    # percentile, the whole range fits and nothing needs an arrow.
    if top <= OUTLIER_FACTOR * lim:
        lim = top
    lim = max(lim, 1e-3)
    return -lim, lim


def heights_figure(x, y, height, *, frame: int, time_s: float, title: str = "", limit: float | None = None,
                   point=None, series=None, flags: str = ""):
    """Build the preview figure: the height map of one frame, and optionally a point's time series.

    Parameters
    ----------
    x (Nx,), y (Ny,) : datum-frame mm of the grid nodes.
    height : (Ny, Nx) mm, NaN where no valid measurement.
    frame : the frame's index in the file.
    time_s : the frame's time, s.
    title : first line of the figure title (e.g. the file name).
    limit : fixed symmetric colour limit, mm (default: from the frame, see
        :func:`symmetric_limits`).
    point : (X, Y) datum-frame mm to mark on the map, or None.
    series : with ``point``, a dict: time (T,) s, height (T,) mm, sigma (T,)
        mm or None, method ("bilinear" or "nearest").
    flags : the frame's flag names, shown in the title when not empty.

    Returns
    -------
    matplotlib.figure.Figure
        Left: the map, x to the right and y up, equal aspect, axes in mm,
        colour bar in mm. Right (with ``point``): height against time with
        its ±1-sigma band, and sigma against time below it.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    h = np.asarray(height, np.float64)
    span_x, span_y = x[-1] - x[0], y[-1] - y[0]
    # Size the map panel to the grid's aspect so the equal-aspect axes fill it.
    map_w = 7.0
    map_h = float(np.clip(map_w * span_y / max(span_x, 1e-9), 2.5, 10.0))
    if series is None:
        fig = Figure(figsize=(map_w + 2.2, map_h + 1.6), layout="constrained")
        ax_map = fig.add_subplot(1, 1, 1)
    else:
        fig = Figure(figsize=(map_w + 8.4, max(map_h + 1.6, 5.6)), layout="constrained")
        grid = fig.add_gridspec(2, 2, width_ratios=[map_w + 1.6, 6.4], height_ratios=[2.3, 1.0])
        ax_map = fig.add_subplot(grid[:, 0])
        ax_h = fig.add_subplot(grid[0, 1])
        ax_s = fig.add_subplot(grid[1, 1], sharex=ax_h)
    _map_panel(fig, ax_map, x, y, h, limit=limit, point=point)
    valid = np.isfinite(h)
    cover = 100.0 * valid.mean() if h.size else 0.0
    rng = f"{np.nanmin(h):+.3f} to {np.nanmax(h):+.3f} mm" if valid.any() else "no valid nodes"
    flag_text = f"  [{flags}]" if flags else ""
    head = f"{title}\n" if title else ""
    fig.suptitle(f"{head}frame {frame}, t = {time_s:.6g} s{flag_text}: {cover:.1f}% of nodes valid, "
                 f"height {rng}", fontsize=11)
    if series is not None:
        _series_panels(ax_h, ax_s, series, point, time_s)
    return fig


def _map_panel(fig, ax, x, y, h, *, limit, point):
    from matplotlib.patches import Patch, Rectangle
    from matplotlib.ticker import MaxNLocator

    vmin, vmax = symmetric_limits(h, limit=limit)
    cmap = height_colormap()
    dx = (x[1] - x[0]) if x.size > 1 else 1.0
    dy = (y[1] - y[0]) if y.size > 1 else 1.0
    x0, x1, y0, y1 = x[0] - dx / 2, x[-1] + dx / 2, y[0] - dy / 2, y[-1] + dy / 2
    # Hatched background: shows through wherever the map is NaN (no data).
    ax.add_patch(Rectangle((x0, y0), x1 - x0, y1 - y0, facecolor=NO_DATA_FACE, edgecolor=NO_DATA_HATCH_COLOUR,
                           hatch="////", linewidth=0, zorder=0))
    masked = np.ma.masked_invalid(h)
    mesh = ax.pcolormesh(x, y, masked, cmap=cmap, vmin=vmin, vmax=vmax, shading="nearest", zorder=1,
                         rasterized=True)
    finite = h[np.isfinite(h)]
    clipped_lo = finite.size and finite.min() < vmin
    clipped_hi = finite.size and finite.max() > vmax
    extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get((bool(clipped_lo),
                                                                                      bool(clipped_hi)), "neither")
    # An inset colour bar keeps exactly the map's height whatever the aspect.
    cax = ax.inset_axes([1.03, 0.0, 0.04, 1.0])
    bar = fig.colorbar(mesh, cax=cax, extend=extend)
    bar.set_label("height above still water (mm)")
    bar.ax.axhline(0.0, color=BLACK, linewidth=0.8)
    contour_note = ""
    if finite.size > 3 and x.size > 2 and y.size > 2:
        levels = MaxNLocator(nbins=8, steps=[1, 2, 5, 10], symmetric=True).tick_values(vmin, vmax)
        interval = float(levels[1] - levels[0]) if levels.size > 1 else None
        levels = levels[(levels > vmin) & (levels < vmax)]
        neg, pos = levels[levels < 0], levels[levels > 0]
        kw = dict(colors=BLACK, linewidths=0.5, alpha=0.55, zorder=2)
        if neg.size:
            ax.contour(x, y, masked, levels=neg, linestyles="dashed", **kw)
        if pos.size:
            ax.contour(x, y, masked, levels=pos, linestyles="solid", **kw)
        if finite.min() < 0 < finite.max():
            ax.contour(x, y, masked, levels=[0.0], colors=BLACK, linewidths=1.1, zorder=2)
        if interval:
            contour_note = f"; contours every {interval:g} mm, dashed below 0"
    if point is not None:
        # A ring in black and white shows on any colour of the map.
        ax.plot([point[0]], [point[1]], marker="o", markersize=11, markerfacecolor="none",
                markeredgecolor="white", markeredgewidth=3.0, zorder=4)
        ax.plot([point[0]], [point[1]], marker="o", markersize=11, markerfacecolor="none",
                markeredgecolor=BLACK, markeredgewidth=1.3, zorder=5)
        ax.plot([point[0]], [point[1]], marker="+", markersize=7, color=BLACK, zorder=5)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)  # y up: the datum frame's y runs up the image seen from the cameras
    ax.set_aspect("equal")
    ax.set_xlabel("x (mm, datum frame)")
    ax.set_ylabel("y (mm, datum frame)")
    step = f"grid {dx:g} x {dy:g} mm" if x.size > 1 and y.size > 1 else "one node"
    ax.set_title(f"{x.size} x {y.size} nodes, {step}{contour_note}", fontsize=9.5)
    if not np.all(np.isfinite(h)):
        ax.legend(handles=[Patch(facecolor=NO_DATA_FACE, edgecolor=NO_DATA_HATCH_COLOUR, hatch="////",
                                 label="no valid measurement")],
                  loc="upper right", fontsize=8, framealpha=0.9)


def _series_panels(ax_h, ax_s, series, point, time_s):
    t = np.asarray(series["time"], np.float64)
    hv = np.asarray(series["height"], np.float64)
    sig = series.get("sigma")
    few = t.size <= 60
    marker = dict(marker="o", markersize=3.5) if few else {}
    if sig is not None:
        sig = np.asarray(sig, np.float64)
        med = float(np.nanmedian(sig)) if np.isfinite(sig).any() else float("nan")
        ax_h.fill_between(t, hv - sig, hv + sig, color=SKY, alpha=0.45, linewidth=0,
                          label=f"±1σ (height_uncertainty; median {med:.3g} mm)")
    ax_h.plot(t, hv, color=BLUE, linewidth=1.4, label="height", **marker)
    if np.isfinite(hv).any() and np.nanmin(hv) < 0 < np.nanmax(hv):
        ax_h.axhline(0.0, color=GREY, linewidth=0.8)
    ax_h.axvline(time_s, color=VERMILLION, linestyle="--", linewidth=1.2, label="frame on the map")
    how = "bilinear from the 4 nearest nodes" if series.get("method", "bilinear") == "bilinear" else "nearest node"
    ax_h.set_title(f"at x = {point[0]:g} mm, y = {point[1]:g} mm ({how})", fontsize=10)
    ax_h.set_ylabel("height (mm)")
    ax_h.legend(loc="best", fontsize=8, framealpha=0.9)
    ax_h.grid(True, color="#E5E5E5", linewidth=0.6)
    ax_h.tick_params(labelbottom=False)
    if sig is not None:
        ax_s.plot(t, sig, color=BLACK, linewidth=1.1, **marker)
        ax_s.axvline(time_s, color=VERMILLION, linestyle="--", linewidth=1.2)
        top = np.nanmax(sig) if np.isfinite(sig).any() else 1.0
        ax_s.set_ylim(0.0, 1.15 * top if top > 0 else 1.0)
    else:
        ax_s.text(0.5, 0.5, "no height_uncertainty in the file", transform=ax_s.transAxes, ha="center")
    ax_s.set_ylabel("1σ (mm)")
    ax_s.set_xlabel("time (s)")
    ax_s.grid(True, color="#E5E5E5", linewidth=0.6)
    n_bad = int(np.sum(~np.isfinite(hv)))
    if n_bad:
        ax_s.text(0.01, 0.95, f"{n_bad} of {hv.size} frames without a valid value here", transform=ax_s.transAxes,
                  ha="left", va="top", fontsize=8)
