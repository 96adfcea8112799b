"""Figures of ``surfrec spectrum``: the frequency spectrum with its peaks, and the frequency-wavenumber map.

Style as :mod:`surfrec.plots.heights`: matplotlib's Agg backend imported
inside the functions, Okabe–Ito colours; the wavenumber map uses the
perceptually uniform, colour-blind-safe "cividis" map on a log (dB) scale,
and the dispersion relation is drawn dashed in white over a black edge so
it reads on any colour.
"""

from __future__ import annotations

import numpy as np

from surfrec.plots.heights import BLACK, BLUE, ORANGE, SKY, VERMILLION


def _figure(size):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure(figsize=size, layout="constrained")


def frequency_spectrum_figure(frequency, psd, *, peaks, label: str, params: dict, title: str = "",
                              field_psd=None):
    """Welch PSD against frequency (log scale), peaks marked.

    Parameters
    ----------
    frequency (F,) Hz; psd (F,) mm^2/Hz of the selection (point, area or field).
    peaks : list of dicts with ``frequency_hz`` and ``psd_mm2_per_hz``.
    label : what the spectrum is of ("field average", "point (x, y)" ...).
    params : Welch parameters (nperseg, window, resolution_hz, segments).
    title : first title line (the file name).
    field_psd : (F,) the field-average PSD to draw behind a point/area spectrum, or None.

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig = _figure((8.5, 5.0))
    ax = fig.add_subplot(1, 1, 1)
    f = np.asarray(frequency)
    keep = f > 0
    if field_psd is not None:
        ax.semilogy(f[keep], np.asarray(field_psd)[keep], color=SKY, linewidth=1.2, label="field average")
    ax.semilogy(f[keep], np.asarray(psd)[keep], color=BLUE, linewidth=1.6, label=label,
                marker="o" if keep.sum() < 60 else None, markersize=3)
    for i, p in enumerate(peaks):
        ax.axvline(p["frequency_hz"], color=ORANGE, linestyle="--", linewidth=1.0)
        ax.annotate(f"{p['frequency_hz']:.3g} Hz", (p["frequency_hz"], p["psd_mm2_per_hz"]),
                    textcoords="offset points", xytext=(6, 4 + 10 * (i % 2)), fontsize=8, color=VERMILLION)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("power spectral density (mm²/Hz)")
    ax.grid(True, which="both", color="#E5E5E5", linewidth=0.6)
    ax.legend(loc="best", fontsize=8)
    head = f"{title}\n" if title else ""
    ax.set_title(f"{head}Welch: {params['nperseg']} frames per segment, {params['window']} window, "
                 f"{params['segments']} segments, resolution {params['resolution_hz']:.3g} Hz", fontsize=10)
    return fig


def frequency_wavenumber_figure(frequency, k, power, *, theory_k=None, theory_f=None, measured=(),
                                title: str = "", missing_fraction: float = 0.0, depth_mm: float = np.inf):
    """Frequency against wavenumber magnitude, power in dB, the dispersion relation overlaid.

    Parameters
    ----------
    frequency (F,) Hz; k (K,) rad/mm bin centres; power (F, K) mm^2 per bin.
    theory_k, theory_f : the linear dispersion curve (rad/mm, Hz), or None.
    measured : list of (k rad/mm, f Hz) measured at the spectral peaks.
    title : first title line.
    missing_fraction : share of missing samples (stated on the figure).
    depth_mm : depth of the theory curve, mm (inf: deep water).
    """
    fig = _figure((8.5, 6.0))
    ax = fig.add_subplot(1, 1, 1)
    p = np.asarray(power, np.float64)
    top = np.nanmax(p) if np.isfinite(p).any() and np.nanmax(p) > 0 else 1.0
    db = 10 * np.log10(np.maximum(p, top * 1e-6) / top)
    mesh = ax.pcolormesh(k, frequency, db, cmap="cividis", vmin=-60, vmax=0, shading="nearest", rasterized=True)
    bar = fig.colorbar(mesh, ax=ax)
    bar.set_label("power (dB below the maximum)")
    if theory_k is not None:
        ax.plot(theory_k, theory_f, color=BLACK, linewidth=2.6)
        depth = "deep water" if not np.isfinite(depth_mm) else f"depth {depth_mm:g} mm"
        ax.plot(theory_k, theory_f, color="white", linewidth=1.3, linestyle="--",
                label=f"linear capillary–gravity dispersion ({depth})")
    for i, (km, fm) in enumerate(measured):
        ax.plot([km], [fm], marker="o", markersize=9, markerfacecolor="none", markeredgecolor=VERMILLION,
                markeredgewidth=2.0, label="measured at the spectral peaks" if i == 0 else None)
    ax.set_xlim(0, float(k[-1]))
    ax.set_ylim(0, float(frequency[-1]))
    ax.set_xlabel("wavenumber |k| (rad/mm)")
    ax.set_ylabel("frequency (Hz)")
    if theory_k is not None or measured:
        ax.legend(loc="upper left", fontsize=8, framealpha=0.9)
    head = f"{title}\n" if title else ""
    ax.set_title(f"{head}frequency–wavenumber power (Hann window in t, x, y; summed over direction); "
                 f"{100 * missing_fraction:.1f}% of samples missing", fontsize=9.5)
    return fig
