"""Figures of ``surfrec modes``: |R_m| and its phase against m with error bars, and the amplitude field.

Style as :mod:`surfrec.plots.heights` (Agg backend imported inside, Okabe–Ito colours).
"""

from __future__ import annotations

import numpy as np

from surfrec.plots.heights import BLACK, BLUE, GREY, ORANGE, VERMILLION


def _figure(size):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure(figsize=size, layout="constrained")


def reflection_figure(m, R, sigma_abs, sigma_phase_deg, *, title: str = "", expected=None, subtitle: str = ""):
    """|R_m| and arg R_m against m with 1-sigma error bars.

    Parameters
    ----------
    m (M,) int; R (M,) complex; sigma_abs, sigma_phase_deg (M,) 1-sigma.
    title : first title line.
    expected : (M,) complex reference values to draw (e.g. a rigid cylinder), or None.
    subtitle : a line on the method (frequency, k, centre, radii, uncertainty method).
    """
    fig = _figure((8.5, 6.5))
    ax1 = fig.add_subplot(2, 1, 1)
    ax2 = fig.add_subplot(2, 1, 2, sharex=ax1)
    m = np.asarray(m)
    ax1.errorbar(m, np.abs(R), yerr=sigma_abs, fmt="o", color=BLUE, ecolor=BLUE, capsize=4, markersize=6,
                 label="|R_m| measured (±1σ)")
    ax1.axhline(1.0, color=GREY, linewidth=0.9)
    ph = np.degrees(np.angle(R))
    ax2.errorbar(m, ph, yerr=sigma_phase_deg, fmt="o", color=BLUE, ecolor=BLUE, capsize=4, markersize=6,
                 label="arg R_m measured (±1σ)")
    if expected is not None:
        ax1.plot(m, np.abs(expected), marker="_", markersize=16, linestyle="none", color=VERMILLION,
                 markeredgewidth=2, label="expected")
        ax2.plot(m, np.degrees(np.angle(expected)), marker="_", markersize=16, linestyle="none", color=VERMILLION,
                 markeredgewidth=2, label="expected")
    lo = min(0.9, float(np.nanmin(np.abs(R) - np.nan_to_num(sigma_abs))) - 0.02)
    hi = max(1.1, float(np.nanmax(np.abs(R) + np.nan_to_num(sigma_abs))) + 0.02)
    ax1.set_ylim(lo, hi)
    ax1.set_ylabel("|R_m| = |outgoing / incoming|")
    ax2.set_ylabel("arg R_m (degrees)")
    ax2.set_ylim(-185, 185)
    ax2.set_yticks([-180, -90, 0, 90, 180])
    ax2.set_xlabel("angular order m")
    ax2.set_xticks(m)
    for ax in (ax1, ax2):
        ax.grid(True, color="#E5E5E5", linewidth=0.6)
        ax.legend(loc="best", fontsize=8)
    head = f"{title}\n" if title else ""
    fig.suptitle(f"{head}reflection coefficient per angular order{(chr(10) + subtitle) if subtitle else ''}",
                 fontsize=10)
    return fig


def amplitude_figure(x, y, amplitude, *, centre, radii, title: str = "", frequency_hz: float = 0.0):
    """|A| and arg A of the complex amplitude field with the analysed annulus.

    Parameters
    ----------
    x (Nx,), y (Ny,) mm; amplitude (Ny, Nx) complex mm (NaN where missing).
    centre (cx, cy) mm; radii (r1, r2) mm.
    """
    from matplotlib.patches import Circle

    fig = _figure((13.0, 5.2))
    a = np.asarray(amplitude)
    for i, (vals, cmap, lab, lim) in enumerate(((np.abs(a), "cividis", "|A| (mm)", None),
                                                 (np.degrees(np.angle(a)), "twilight", "arg A (degrees)",
                                                  (-180, 180)))):
        ax = fig.add_subplot(1, 2, i + 1)
        vals = np.where(np.isfinite(a), vals, np.nan)
        kw = {"vmin": lim[0], "vmax": lim[1]} if lim else {}
        mesh = ax.pcolormesh(x, y, np.ma.masked_invalid(vals), cmap=cmap, shading="nearest", rasterized=True, **kw)
        bar = fig.colorbar(mesh, ax=ax)
        bar.set_label(lab)
        for r in radii:
            ax.add_patch(Circle(centre, r, fill=False, edgecolor="white", linewidth=2.4))
            ax.add_patch(Circle(centre, r, fill=False, edgecolor=ORANGE if i == 0 else BLACK, linewidth=1.2,
                                linestyle="--"))
        ax.plot([centre[0]], [centre[1]], marker="+", color=VERMILLION, markersize=10, markeredgewidth=2)
        ax.set_aspect("equal")
        ax.set_xlabel("x (mm, datum frame)")
        ax.set_ylabel("y (mm, datum frame)")
        ax.set_facecolor("#D9D9D9")
    head = f"{title}\n" if title else ""
    fig.suptitle(f"{head}complex amplitude at {frequency_hz:.4g} Hz (exp(-iωt)); annulus r = {radii[0]:g} to "
                 f"{radii[1]:g} mm about ({centre[0]:.2f}, {centre[1]:.2f}) mm; grey: no data", fontsize=10)
    return fig
