"""``surfrec spectrum``: frequency spectra (Welch), the frequency-wavenumber spectrum and a dispersion check."""

from __future__ import annotations

import json
import logging
import math

import click

from surfrec.cli.options import force_option, output_option, verbosity
from surfrec.cli.preview import parse_point

log = logging.getLogger("surfrec")

# The space-time FFT holds one segment of frames x nodes in memory (complex): keep it near 256 MB.
FK_MAX_SAMPLES = 16_000_000


def parse_numbers(n: int, what: str):
    """Click callback factory: ``A,B,...`` (n numbers) -> tuple of floats, or None."""

    def callback(ctx, param, value):
        if value is None:
            return None
        try:
            vals = tuple(float(p) for p in value.split(","))
        except ValueError:
            vals = ()
        if len(vals) != n or not all(math.isfinite(v) for v in vals):
            raise click.BadParameter(f"expected {what} ({n} numbers separated by commas), got {value!r}",
                                     ctx=ctx, param=param)
        return vals

    return callback


def _positive(ctx, param, value):
    if value is not None and not (math.isfinite(value) and value > 0):
        raise click.BadParameter("must be a positive number", ctx=ctx, param=param)
    return value


def water_options(f):
    """``--gravity`` and ``--surface-tension`` (handbook defaults), shared by spectrum and modes."""
    from surfrec.waves import water

    f = click.option("--surface-tension", type=float, default=water.SURFACE_TENSION, show_default=True,
                     callback=_positive, metavar="N/M",
                     help="Surface tension of the dispersion relation, N/m (default: clean water at 20 C, "
                          "handbook value).")(f)
    f = click.option("--gravity", type=float, default=water.STANDARD_GRAVITY, show_default=True,
                     callback=_positive, metavar="M/S2", help="Gravity of the dispersion relation, m/s^2.")(f)
    return f


def evenly_sampled(head, path):
    """Frames start:stop of the longest evenly sampled stretch of a heights file, its step (s) and a note."""
    from surfrec.analysis.series import regular_stretch

    nt = int(head["n_frames"])
    if nt == 0:
        from surfrec.errors import InputError

        raise InputError(f"{path} holds no frames")
    start, stop, dt, gaps = regular_stretch(head["time"])
    note = None
    if gaps:
        note = (f"{path}: the time axis has {gaps} irregular step(s) (dropped frames); analysing the longest "
                f"evenly sampled stretch, frames {start} to {stop - 1} ({stop - start} of {nt})")
        log.warning("warning: %s", note)
    return start, stop, dt, note


def read_frames(path, start, stop, *, block_bytes=32 << 20, shape=None):
    """Yield (first index, heights block) over frames start:stop, a block of frames at a time."""
    from surfrec.io.heightsfile import read_heights

    per = 4 * (shape[0] * shape[1] if shape else 1)
    block = max(1, block_bytes // max(per, 1))
    for i in range(start, stop, block):
        d = read_heights(path, frames=slice(i, min(stop, i + block)))
        yield i, d["height"]


@click.command("spectrum")
@click.argument("heights", metavar="HEIGHTS.h5", type=click.Path(dir_okay=False))
@output_option("folder")
@click.option("--point", default=None, callback=parse_point, metavar="X,Y",
              help="Frequency spectrum of the series at this point, datum-frame mm, read bilinearly (write "
                   "--point=-40,30 for a negative X).")
@click.option("--area", default=None, callback=parse_numbers(4, "XMIN,XMAX,YMIN,YMAX in mm"),
              metavar="XMIN,XMAX,YMIN,YMAX",
              help="Frequency spectrum averaged over the nodes of this rectangle, datum-frame mm.")
@click.option("--depth", type=float, default=None, callback=_positive, metavar="MM",
              help="Still-water depth of the dispersion relation, mm (default: deep water).")
@water_options
@click.option("--segment", type=click.IntRange(min=8), default=None, metavar="N",
              help="Welch segment length, frames (default: the whole record below 512 frames, else a power of "
                   "two near an eighth of it, 256 to 4096). Segments overlap by half, Hann window.")
@click.option("--peaks", "max_peaks", type=click.IntRange(min=1, max=20), default=5, show_default=True,
              help="At most this many spectral peaks (10 dB prominence) are reported and checked.")
@click.option("--dpi", type=click.IntRange(min=50, max=600), default=130, show_default=True,
              help="Resolution of the PNGs.")
@force_option
@verbosity
def command(heights, output, point, area, depth, gravity, surface_tension, segment, max_peaks, dpi, force):
    """Spectra of HEIGHTS.h5 and a dispersion check, written to the folder OUTPUT.

    \b
    OUTPUT/spectrum.png             Welch PSD (mm^2/Hz) with the peaks marked
    OUTPUT/spectrum.csv             frequency_hz, psd_mm2_per_hz (and the field average)
    OUTPUT/frequency_wavenumber.png power over frequency and |k| with the dispersion curve
    OUTPUT/peaks.csv                per peak: frequency, measured and theoretical wavenumber
    OUTPUT/report.json              every parameter and result

    The frequency spectrum is Welch's: mean-detrended, Hann-windowed,
    half-overlapping segments, one-sided density scaled as
    scipy.signal.welch. It is that of --point, the average over --area, or
    (by default) the average over every node; a node with a missing value
    in a segment is left out of that segment, never zero-filled. The
    frequency-wavenumber spectrum is the Hann-windowed space-time FFT of the
    whole grid, missing samples given zero weight in the window and the
    power normalised by the window actually used. For each peak the complex
    amplitude field at its frequency (least squares over the record) gives
    the wavenumber of its strongest plane-wave component, compared with
    omega^2 = (g k + sigma k^3 / rho) tanh(k H). With dropped frames (gaps in
    time) the longest evenly sampled stretch is analysed, and the report
    says so.
    """
    import numpy as np

    from surfrec.analysis.modes import HarmonicFit
    from surfrec.analysis.series import point_weights
    from surfrec.analysis.spectrum import (MIN_FRAMES, FrequencyWavenumberSpectrum, WelchAccumulator,
                                           default_segment, dispersion_check, dominant_wavenumber,
                                           find_spectral_peaks, segment_starts)
    from surfrec.errors import InputError
    from surfrec.io.heightsfile import read_heights
    from surfrec.io.outputs import atomic_folder, check_output
    from surfrec.plots.spectrum import frequency_spectrum_figure, frequency_wavenumber_figure
    from surfrec.waves.dispersion import angular_frequency

    out = check_output(output, force=force, kind="folder")
    if point is not None and area is not None:
        raise InputError("give --point or --area, not both")
    head = read_heights(heights, frames=slice(0, 0))
    x, y, time = head["x"], head["y"], head["time"]
    start, stop, dt, gap_note = evenly_sampled(head, heights)
    n = stop - start
    if n < MIN_FRAMES:
        raise InputError(f"{heights}: {n} evenly sampled frames; a spectrum needs at least {MIN_FRAMES}")
    if x.size < 4 or y.size < 4:
        raise InputError(f"{heights}: a grid of {x.size} x {y.size} nodes is too small for a wavenumber spectrum")
    fs = 1.0 / dt
    nperseg = default_segment(n) if segment is None else int(segment)
    if nperseg > n:
        raise InputError(f"--segment {nperseg} is longer than the {n} evenly sampled frames")
    noverlap = nperseg // 2
    depth_mm = float("inf") if depth is None else float(depth)
    water = {"gravity": gravity, "surface_tension": surface_tension}

    # What the frequency spectrum is of.
    ny, nx = y.size, x.size
    if point is not None:
        rows, cols, w = point_weights(x, y, point[0], point[1], method="bilinear")
        label = f"point ({point[0]:g}, {point[1]:g}) mm"
    elif area is not None:
        x0, x1, y0, y1 = area
        if not (x0 < x1 and y0 < y1):
            raise InputError(f"--area {x0:g},{x1:g},{y0:g},{y1:g}: expected XMIN < XMAX and YMIN < YMAX")
        cx = np.nonzero((x >= x0) & (x <= x1))[0]
        cy = np.nonzero((y >= y0) & (y <= y1))[0]
        if cx.size == 0 or cy.size == 0:
            raise InputError(f"--area {x0:g},{x1:g},{y0:g},{y1:g} mm holds no grid node (grid x {x[0]:g} to "
                             f"{x[-1]:g} mm, y {y[0]:g} to {y[-1]:g} mm)")
        label = f"area x {x0:g} to {x1:g}, y {y0:g} to {y1:g} mm ({cx.size * cy.size} nodes)"
    else:
        label = "field average"
    sel_acc = WelchAccumulator(fs, nperseg)
    field_acc = WelchAccumulator(fs, nperseg)
    fk_seg = int(min(nperseg, max(MIN_FRAMES, FK_MAX_SAMPLES // (ny * nx))))
    fk = FrequencyWavenumberSpectrum((fk_seg, ny, nx), dt, y[1] - y[0], x[1] - x[0])
    # Welch segments (and the space-time segments, when they are the same length) from one read each.
    for s in segment_starts(n, nperseg, noverlap):
        seg = read_heights(heights, frames=slice(start + s, start + s + nperseg))["height"].astype(np.float64)
        flat = seg.reshape(nperseg, -1)
        field_acc.add(flat)
        if point is not None:
            vals = seg[:, rows, cols]
            sel_acc.add(np.where(np.isfinite(vals).all(axis=1), vals @ w, np.nan))
        elif area is not None:
            sel_acc.add(seg[:, cy[0]:cy[-1] + 1, cx[0]:cx[-1] + 1].reshape(nperseg, -1))
        if fk_seg == nperseg:
            fk.add(seg)
    if fk_seg != nperseg:
        for s in segment_starts(n, fk_seg, fk_seg // 2):
            fk.add(read_heights(heights, frames=slice(start + s, start + s + fk_seg))["height"])
    freq = field_acc.frequency
    field_psd = field_acc.result()
    psd = field_psd if (point is None and area is None) else sel_acc.result()
    acc = field_acc if (point is None and area is None) else sel_acc
    if not np.isfinite(psd).any():
        raise InputError(f"{heights}: no {'series' if point or area else 'node'} is complete over any Welch "
                         f"segment of {nperseg} frames at the {label}; try a shorter --segment")
    peaks = find_spectral_peaks(freq, psd, max_peaks=max_peaks)

    # Wavenumber at each peak from the complex amplitude field (one pass for all peaks).
    fits = []
    for p in peaks:
        if p["frequency_hz"] * n * dt >= 1.0:
            fits.append((p, HarmonicFit(ny * nx, p["frequency_hz"], n, n)))
        else:
            p["note"] = "record shorter than one period: no wavenumber"
    if fits:
        for i, block in read_frames(heights, start, stop, shape=(ny, nx)):
            for _, hf in fits:
                hf.add(time[i:i + block.shape[0]], block)
    measured = []
    for p, hf in fits:
        amp = hf.amplitude().reshape(ny, nx)
        try:
            kw = dominant_wavenumber(amp, x, y)
        except InputError as exc:
            p["note"] = str(exc)
            continue
        chk = dispersion_check(p["frequency_hz"], kw["k"], depth_mm=depth_mm, **water)
        p.update({"wavenumber_measured_rad_per_mm": kw["k"], "direction_deg": kw["direction_deg"],
                  "wavelength_mm": kw["wavelength_mm"], "plane_wave_amplitude_mm": kw["amplitude_mm"], **chk})
        measured.append((kw["k"], p["frequency_hz"]))

    f_fk, k_fk, p_fk = fk.ring_power()
    k_line = np.linspace(0.0, float(k_fk[-1]), 400)[1:]
    f_line = angular_frequency(k_line, depth_mm, **water) / (2 * np.pi)
    keep = f_line <= f_fk[-1]
    report = {"path": str(heights), "frames": {"start": start, "stop": stop, "used": n, "of": int(head["n_frames"]),
                                               "dt_s": dt, "fs_hz": fs, "gap_note": gap_note},
              "spectrum_of": label, "welch": acc.params() | {"noverlap": noverlap},
              "frequency_wavenumber": {"segment_frames": fk_seg, "segments": fk.segments,
                                       "window": "Hann in t, y and x, times the validity mask",
                                       "missing_fraction": fk.missing_fraction,
                                       "resolution_hz": 1.0 / (fk_seg * dt),
                                       "k_resolution_rad_per_mm": float(k_fk[1] - k_fk[0])},
              "dispersion": {"depth_mm": None if not math.isfinite(depth_mm) else depth_mm,
                             "gravity_m_s2": gravity, "surface_tension_n_m": surface_tension,
                             "relation": "omega^2 = (g k + sigma k^3 / rho) tanh(k H) (Lamb; Lighthill)"},
              "peaks": peaks}
    title = str(heights)
    with atomic_folder(out, force=force) as tmp:
        fig = frequency_spectrum_figure(freq, psd, peaks=peaks, label=label, params=report["welch"], title=title,
                                        field_psd=field_psd if (point is not None or area is not None) else None)
        fig.savefig(tmp / "spectrum.png", dpi=dpi)
        fig = frequency_wavenumber_figure(f_fk, k_fk, p_fk, theory_k=k_line[keep], theory_f=f_line[keep],
                                          measured=measured, title=title, missing_fraction=fk.missing_fraction,
                                          depth_mm=depth_mm)
        fig.savefig(tmp / "frequency_wavenumber.png", dpi=dpi)
        with open(tmp / "spectrum.csv", "w") as fh:
            fh.write("frequency_hz,psd_mm2_per_hz,field_average_psd_mm2_per_hz\n")
            for fi, pi, qi in zip(freq, psd, field_psd):
                fh.write(f"{fi:.9g},{pi:.9g},{qi:.9g}\n")
        cols = ["frequency_hz", "psd_mm2_per_hz", "prominence_db", "wavenumber_measured_rad_per_mm",
                "wavenumber_theory_rad_per_mm", "relative_error", "direction_deg", "wavelength_mm",
                "phase_speed_measured_mm_s", "phase_speed_theory_mm_s", "plane_wave_amplitude_mm", "note"]
        with open(tmp / "peaks.csv", "w") as fh:
            fh.write(",".join(cols) + "\n")
            for p in peaks:
                fh.write(",".join(_csv(p.get(c)) for c in cols) + "\n")
        with open(tmp / "report.json", "w") as fh:
            json.dump(report, fh, indent=2, default=float)
    click.echo(_text(report, out))


def _csv(v):
    if v is None:
        return ""
    if isinstance(v, float):
        return f"{v:.9g}"
    s = str(v)
    return f'"{s}"' if "," in s else s


def _text(r, out) -> str:
    w = r["welch"]
    lines = [f"{r['path']}: spectrum of the {r['spectrum_of']}, frames {r['frames']['start']} to "
             f"{r['frames']['stop'] - 1} at {r['frames']['fs_hz']:.6g} frames/s",
             f"Welch: {w['nperseg']} frames per segment ({w['noverlap']} overlap), {w['window']} window, "
             f"{w['segments']} segments, resolution {w['resolution_hz']:.4g} Hz"
             + (f"; {w['series_segments_with_nan_skipped']} series-segments with missing values left out"
                if w["series_segments_with_nan_skipped"] else ""),
             f"frequency-wavenumber: {r['frequency_wavenumber']['segments']} segment(s) of "
             f"{r['frequency_wavenumber']['segment_frames']} frames, "
             f"{100 * r['frequency_wavenumber']['missing_fraction']:.1f}% of samples missing (zero weight in "
             "the window)"]
    d = r["dispersion"]
    depth = "deep water" if d["depth_mm"] is None else f"depth {d['depth_mm']:g} mm"
    lines.append(f"dispersion: {d['relation']}, {depth}, g = {d['gravity_m_s2']:g} m/s^2, "
                 f"sigma = {d['surface_tension_n_m']:g} N/m")
    if not r["peaks"]:
        lines.append("no spectral peak stands 10 dB above its surroundings")
    else:
        lines.append("  peak (Hz)   PSD (mm^2/Hz)   k measured   k theory   error     direction")
        for p in r["peaks"]:
            if "wavenumber_measured_rad_per_mm" in p:
                lines.append(f"  {p['frequency_hz']:>9.4f}   {p['psd_mm2_per_hz']:>13.4g}   "
                             f"{p['wavenumber_measured_rad_per_mm']:>10.5f}   "
                             f"{p['wavenumber_theory_rad_per_mm']:>8.5f}   {100 * p['relative_error']:>+6.2f}%  "
                             f"{p['direction_deg']:>7.1f} deg")
            else:
                lines.append(f"  {p['frequency_hz']:>9.4f}   {p['psd_mm2_per_hz']:>13.4g}   ({p.get('note', '')})")
    lines.append(f"wrote {out}/spectrum.png, frequency_wavenumber.png, spectrum.csv, peaks.csv, report.json")
    return "\n".join(lines)
