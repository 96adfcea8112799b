"""``surfrec modes``: incoming and outgoing cylindrical waves per angular order, and R_m with honest errors."""

from __future__ import annotations

import json
import logging
import math

import click

from surfrec.cli.options import force_option, json_option, output_option, verbosity
from surfrec.cli.spectrum import _positive, evenly_sampled, parse_numbers, read_frames, water_options

log = logging.getLogger("surfrec")

#: Time-bootstrap blocks aimed for (fewer when the matcher's time window makes blocks longer).
TARGET_TIME_BLOCKS = 40


def _radii(ctx, param, value):
    vals = parse_numbers(2, "R1,R2 in mm")(ctx, param, value)
    if vals is not None and not (0 < vals[0] < vals[1]):
        raise click.BadParameter(f"expected 0 < R1 < R2 (mm), got {value!r}", ctx=ctx, param=param)
    return vals


@click.command("modes")
@click.argument("heights", metavar="HEIGHTS.h5", type=click.Path(dir_okay=False))
@output_option("folder")
@click.option("--radii", required=True, callback=_radii, metavar="R1,R2",
              help="Radial range of the fit about the centre, mm (clear of the scatterer and of missing data).")
@click.option("--depth", type=float, default=None, callback=_positive, metavar="MM",
              help="Still-water depth, mm: the wavenumber comes from the dispersion relation at it. Required "
                   "unless --fit-k.")
@click.option("--fit-k", is_flag=True, default=False,
              help="Fit the wavenumber to the data instead (starting from the dispersion relation at --depth, "
                   "or from the field's dominant wavenumber).")
@click.option("--centre", default=None, callback=parse_numbers(2, "X,Y in mm"), metavar="X,Y",
              help="Centre of the polar grid, datum-frame mm (write --centre=-40,30 for a negative X); default: "
                   "estimated from the data and reported.")
@click.option("--frequency", type=float, default=None, callback=_positive, metavar="F",
              help="Wave frequency, Hz; default: the strongest peak of the field-average Welch spectrum.")
@click.option("--orders", type=click.IntRange(min=0, max=30), default=4, show_default=True, metavar="M",
              help="Report the orders -M..M.")
@click.option("--bootstrap", "n_boot", type=click.IntRange(min=0, max=5000), default=200, show_default=True,
              metavar="N", help="Replicates of each block bootstrap (0: no uncertainties).")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True, metavar="N",
              help="Seed of the bootstrap draws.")
@water_options
@click.option("--dpi", type=click.IntRange(min=50, max=600), default=130, show_default=True,
              help="Resolution of the PNGs.")
@json_option
@force_option
@verbosity
def command(heights, output, radii, depth, fit_k, centre, frequency, orders, n_boot, seed, gravity, surface_tension,
            dpi, as_json, force):
    """Decompose the wave field of HEIGHTS.h5 at one frequency into cylindrical waves about a centre.

    \b
    Time convention exp(-i omega t): the elevation is Re[A(x, y) exp(-i omega t)]
    and, about the centre,
        A(r, theta) = sum_m [ a_m H2_m(k r) + b_m H1_m(k r) ] exp(i m theta),
    H1 outgoing, H2 incoming; R_m = b_m / a_m (outgoing / incoming).
    A plane wave of amplitude A0 has |a_m| = |b_m| = A0/2.

    Steps: the complex amplitude A at every node by least squares over the
    largest whole number of periods (at least 2) of the record; resampled
    onto a polar grid (6-point Lagrange interpolation); the coefficients per
    order m by FFT over theta (least squares on rings with gaps); a_m and
    b_m by least squares over the radii at the wavenumber of the dispersion
    relation for --depth (or fitted, --fit-k).

    Uncertainties (1-sigma): block bootstrap, twice — over time (blocks of
    whole frames drawn with replacement, at least as long as the matcher's
    --time-window) and over azimuth (circular block bootstrap of the fit's
    residual in wedges of 1/16 of the circle); the larger of the two is
    quoted. Neighbouring nodes share most of their correlation windows, so a
    plain least-squares covariance would understate the error several-fold.
    A given --centre is held fixed in the bootstrap.

    \b
    Centre estimate (no --centre): least squares of the model of a
    mirror-symmetric scatterer (a body of revolution: b_m/a_m = b_-m/a_-m),
    which fixes the centre across the incident wave (and re-estimates it in
    every time replicate). Along a single incident plane wave the field
    cannot fix it (the set-up stays mirror-symmetric about the incidence
    line); that component is the centroid of the hole the post leaves in
    the data, biased by occlusion. Give --centre when the position is known.

    \b
    OUTPUT/modes.csv        per order: incoming, outgoing (mm, deg), R_m and 1-sigma
    OUTPUT/reflection.png   |R_m| and arg R_m against m with error bars
    OUTPUT/amplitude.png    |A| and arg A with the annulus
    OUTPUT/report.json      every parameter and result
    """
    import numpy as np

    from surfrec.analysis.modes import MAX_RING_MISSING, HarmonicFit, analyse_modes, estimate_centre, polar_grid, whole_periods
    from surfrec.analysis.spectrum import (MIN_FRAMES, WelchAccumulator, default_segment, dominant_wavenumber,
                                           find_spectral_peaks, segment_starts)
    from surfrec.cli.assess import _recorded_time_window
    from surfrec.errors import InputError
    from surfrec.io.heightsfile import read_heights
    from surfrec.io.outputs import atomic_folder, check_output
    from surfrec.plots.modes import amplitude_figure, reflection_figure
    from surfrec.waves.dispersion import wavenumber

    out = check_output(output, force=force, kind="folder")
    if depth is None and not fit_k:
        raise InputError("give --depth MM (the wavenumber then comes from the dispersion relation) or --fit-k")
    head = read_heights(heights, frames=slice(0, 0))
    x, y, time = head["x"], head["y"], head["time"]
    ny, nx = y.size, x.size
    if nx < 8 or ny < 8:
        raise InputError(f"{heights}: a grid of {nx} x {ny} nodes is too small for a modal analysis")
    start, stop, dt, gap_note = evenly_sampled(head, heights)
    n = stop - start
    if centre is not None and not (x[0] <= centre[0] <= x[-1] and y[0] <= centre[1] <= y[-1]):
        raise InputError(f"--centre {centre[0]:g},{centre[1]:g} mm lies outside the field (x {x[0]:g} to "
                         f"{x[-1]:g} mm, y {y[0]:g} to {y[-1]:g} mm)")

    step = float(min(x[1] - x[0], y[1] - y[0]))
    r1, r2 = radii
    if r2 - r1 < 2 * step:
        raise InputError(f"--radii {r1:g},{r2:g}: the range must span at least two grid steps ({2 * step:g} mm)")
    if centre is not None:
        room = min(centre[0] - x[0], x[-1] - centre[0], centre[1] - y[0], y[-1] - centre[1]) - 3 * step
        if r2 > room:
            raise InputError(f"--radii {r1:g},{r2:g}: a ring of {r2:g} mm about ({centre[0]:.4g}, {centre[1]:.4g}) "
                             f"mm reaches beyond the data (grid x {x[0]:g} to {x[-1]:g}, y {y[0]:g} to {y[-1]:g} "
                             f"mm); the largest radius that fits is {max(room, 0):.4g} mm")

    # Frequency: given, or the strongest peak of the field-average spectrum.
    freq_estimated = frequency is None
    if frequency is None:
        if n < MIN_FRAMES:
            raise InputError(f"{heights}: {n} evenly sampled frames are too few to estimate the frequency; "
                             "give --frequency")
        seg = default_segment(n)
        acc = WelchAccumulator(1.0 / dt, seg)
        for s in segment_starts(n, seg, seg // 2):
            acc.add(read_heights(heights, frames=slice(start + s, start + s + seg))["height"].reshape(seg, -1))
        peaks = find_spectral_peaks(acc.frequency, acc.result(), max_peaks=1)
        if not peaks:
            raise InputError(f"{heights}: no clear spectral peak to take the frequency from; give --frequency")
        frequency = peaks[0]["frequency_hz"]
        log.info("frequency estimated from the strongest Welch peak: %.6g Hz", frequency)
    n_use, periods = whole_periods(n, dt, frequency)

    # The complex amplitude at every node, normal equations kept per block of frames for the bootstrap.
    tw = _recorded_time_window(head["attrs"]) or 1
    block = max(tw, math.ceil(n_use / TARGET_TIME_BLOCKS))
    fit = HarmonicFit(ny * nx, frequency, n_use, block)
    for i, blk in read_frames(heights, start, start + n_use, shape=(ny, nx)):
        fit.add(time[i:i + blk.shape[0]], blk)
    amp = fit.amplitude().reshape(ny, nx)
    if not np.isfinite(amp).any():
        raise InputError(f"{heights}: no node is valid in 80% of the frames used")

    # Wavenumber: from the dispersion relation, or a starting value for the fit.
    water = {"gravity": gravity, "surface_tension": surface_tension}
    k_theory = float(wavenumber(frequency, depth, **water)) if depth is not None else None
    k0 = k_theory if k_theory is not None else dominant_wavenumber(amp, x, y)["k"]

    margin = 3 * step  # the 6-point stencil needs 3 nodes beyond the ring

    def check_ring(c):
        room = min(c[0] - x[0], x[-1] - c[0], c[1] - y[0], y[-1] - c[1]) - margin
        if r2 > room:
            raise InputError(f"--radii {r1:g},{r2:g}: a ring of {r2:g} mm about ({c[0]:.4g}, {c[1]:.4g}) mm reaches "
                             f"beyond the data (grid x {x[0]:g} to {x[-1]:g}, y {y[0]:g} to {y[-1]:g} mm); the "
                             f"largest radius that fits is {max(room, 0):.4g} mm")

    centre_source = "given"
    centre_info = None
    if centre is None:
        # No centre has more room than the middle of the grid: rings that do not fit there fit nowhere,
        # and the centre estimate needs them.
        check_ring((0.5 * (x[0] + x[-1]), 0.5 * (y[0] + y[-1])))
        radii_g, _ = polar_grid(r1, r2, step, k0 * r2)
        centre, centre_info = estimate_centre(amp, x, y, k0, radii_g)
        if fit_k:
            # The centre estimate needs k and the k fit needs the centre: alternate twice.
            for _ in range(2):
                check_ring(centre)
                k0 = analyse_modes(fit, x, y, centre=centre, radii=(r1, r2), k=k0, orders=orders, fit_k=True,
                                   n_boot=0)["k"]
                centre, centre_info = estimate_centre(amp, x, y, k0, radii_g, guess=centre_info["start_mm"])
        if centre_info["mode"] == "line":
            centre_source = (f"estimated (mirror-symmetric scatterer fit) across the incident wave, along "
                             f"{centre_info['direction_deg']:.1f} deg; the component along the incident wave is "
                             f"the {centre_info['start']}'s, which the field does not determine")
            log.warning("warning: the centre is estimated across the incident wave only; along it, it is the %s "
                        "centroid (biased by occlusion, about 1 mm in the synthetic sessions, which moves |R_m| "
                        "by several %%): give --centre when the post's position is known", centre_info["start"])
        else:
            centre_source = f"estimated (mirror-symmetric scatterer fit, 2-D, from the {centre_info['start']})"
        log.info("centre estimated: (%.3f, %.3f) mm", *centre)
        if not (x[0] <= centre[0] <= x[-1] and y[0] <= centre[1] <= y[-1]):
            raise InputError(f"the estimated centre ({centre[0]:.3g}, {centre[1]:.3g}) mm lies outside the field; "
                             "give --centre")
    check_ring(centre)

    res = analyse_modes(fit, x, y, centre=centre, radii=(r1, r2), k=k0, orders=orders, fit_k=fit_k, n_boot=n_boot,
                        seed=seed, centre_direction=None if centre_info is None else centre_info["direction"],
                        centre_m_max=None if centre_info is None else centre_info["m_max"])
    miss = res["ring_missing"]
    used_rings = int(np.count_nonzero(miss <= MAX_RING_MISSING))
    if used_rings < miss.size:
        log.warning("warning: %d of %d rings miss more than %.0f%% of their points and are left out",
                    miss.size - used_rings, miss.size, 100 * MAX_RING_MISSING)
    elif miss.max() > 0:
        log.info("%d rings have gaps (at most %.0f%% missing): fitted by least squares over their valid points",
                 int(np.count_nonzero(miss > 0)), 100 * miss.max())

    modes = []
    sig = res["sigma"]
    for i, m in enumerate(res["m"]):
        a, b, R = res["a_in"][i], res["b_out"][i], res["R"][i]
        modes.append({"m": int(m), "incoming": [float(abs(a)), float(np.degrees(np.angle(a)))],
                      "outgoing": [float(abs(b)), float(np.degrees(np.angle(b)))],
                      "R_abs": float(abs(R)), "R_phase_deg": float(np.degrees(np.angle(R))),
                      "R_abs_sigma": _num(sig["R_abs"][i]), "R_phase_sigma_deg": _num(sig["R_phase_deg"][i]),
                      "R_abs_sigma_time": _num(sig["R_abs_time"][i]),
                      "R_abs_sigma_azimuth": _num(sig["R_abs_azimuth"][i]),
                      "R_phase_sigma_deg_time": _num(sig["R_phase_deg_time"][i]),
                      "R_phase_sigma_deg_azimuth": _num(sig["R_phase_deg_azimuth"][i]),
                      "relative_misfit": _num(res["residual_rel"][i])})
    report = {"frequency_hz": float(frequency), "wavenumber_rad_per_mm": float(res["k"]),
              "centre_mm": [float(centre[0]), float(centre[1])], "radii_mm": [float(r1), float(r2)],
              "modes": modes,
              "path": str(heights), "frequency_source": "estimated (strongest Welch peak)" if freq_estimated
              else "given", "wavenumber_source": "fitted (--fit-k)" if fit_k else
              f"dispersion relation at depth {depth:g} mm",
              "wavenumber_theory_rad_per_mm": k_theory, "wavenumber_sigma_rad_per_mm": res["k_sigma"],
              "centre_source": centre_source,
              "centre_estimate": None if centre_info is None else {
                  "start": centre_info["start"], "start_mm": list(centre_info["start_mm"]),
                  "mode": centre_info["mode"], "determined_direction_deg": centre_info["direction_deg"],
                  "curvature_ratio": centre_info["curvature_ratio"], "misfit_mm2": centre_info["misfit"],
                  "sigma_mm_across": res["centre_sigma_mm"]},
              "frames": {"start": start, "used": n_use, "periods": periods, "dt_s": dt, "gap_note": gap_note},
              "convention": "elevation Re[A exp(-i omega t)]; A = sum_m (a_m H2_m(kr) + b_m H1_m(kr)) exp(i m theta); "
                            "H1 outgoing, H2 incoming; R_m = outgoing / incoming; amplitudes in mm as "
                            "[magnitude, phase_deg]",
              "uncertainty": {"method": "block bootstrap over time (blocks of whole frames) and over azimuth "
                                        "(circular block bootstrap of the residual on the polar grid); the larger "
                                        "1-sigma of the two is quoted; " + (
                                            "centre held fixed (given)" if centre_info is None else
                                            "centre re-estimated in each time replicate across the incident wave "
                                            "(held fixed along it, and in the azimuthal bootstrap)"),
                              "replicates": n_boot, "time_blocks": res["time_blocks"],
                              "time_block_frames": res["time_block_frames"],
                              "azimuth_sectors": res["azimuth_sectors"]},
              "rings": {"n": int(miss.size), "used": used_rings, "max_missing_fraction": float(miss.max())},
              "gravity_m_s2": gravity, "surface_tension_n_m": surface_tension}
    title = str(heights)
    sub = (f"{frequency:.4g} Hz, k = {res['k']:.5g} rad/mm, centre ({centre[0]:.2f}, {centre[1]:.2f}) mm, r = "
           f"{r1:g}-{r2:g} mm\n±1σ: block bootstrap (time and azimuth, larger), {n_boot} replicates")
    with atomic_folder(out, force=force) as tmp:
        fig = reflection_figure(res["m"], res["R"], np.nan_to_num(sig["R_abs"]), np.nan_to_num(sig["R_phase_deg"]),
                                title=title, subtitle=sub)
        fig.savefig(tmp / "reflection.png", dpi=dpi)
        fig = amplitude_figure(x, y, amp, centre=centre, radii=(r1, r2), title=title, frequency_hz=frequency)
        fig.savefig(tmp / "amplitude.png", dpi=dpi)
        cols = ["m", "incoming_abs_mm", "incoming_phase_deg", "outgoing_abs_mm", "outgoing_phase_deg", "R_abs",
                "R_phase_deg", "R_abs_sigma", "R_phase_sigma_deg", "R_abs_sigma_time", "R_abs_sigma_azimuth",
                "R_phase_sigma_deg_time", "R_phase_sigma_deg_azimuth", "relative_misfit"]
        with open(tmp / "modes.csv", "w") as fh:
            fh.write(",".join(cols) + "\n")
            for md in modes:
                row = [md["m"], *md["incoming"], *md["outgoing"]] + [md[c] for c in cols[5:]]
                fh.write(",".join("" if v is None else (f"{v:.9g}" if isinstance(v, float) else str(v))
                                  for v in row) + "\n")
        with open(tmp / "report.json", "w") as fh:
            json.dump(report, fh, indent=2)
    if as_json:
        click.echo(json.dumps(report, allow_nan=False))
    else:
        click.echo(_text(report, out))


def _num(v):
    return float(v) if v is not None and math.isfinite(float(v)) else None


def _text(r, out):
    f = r["frames"]
    lines = [f"{r['path']}: {r['frequency_hz']:.6g} Hz ({r['frequency_source']}), {f['used']} frames = "
             f"{f['periods']:.4g} periods",
             f"wavenumber {r['wavenumber_rad_per_mm']:.6g} rad/mm ({r['wavenumber_source']}"
             + (f", sigma {r['wavenumber_sigma_rad_per_mm']:.2g}" if r["wavenumber_sigma_rad_per_mm"] else "") + ")",
             f"centre ({r['centre_mm'][0]:.3f}, {r['centre_mm'][1]:.3f}) mm"
             + (f" ±{r['centre_estimate']['sigma_mm_across']:.3f} mm across the incident wave"
                if r.get("centre_estimate") and r["centre_estimate"]["sigma_mm_across"] else "")
             + f" ({r['centre_source']}); radii "
             f"{r['radii_mm'][0]:g} to {r['radii_mm'][1]:g} mm, {r['rings']['used']} rings",
             "convention: exp(-i omega t), H1 outgoing, H2 incoming, R_m = outgoing / incoming",
             "    m   incoming (mm, deg)   outgoing (mm, deg)      |R_m|   ±1σ      arg R_m (deg)  ±1σ"]
    for md in r["modes"]:
        sa = "-" if md["R_abs_sigma"] is None else f"{md['R_abs_sigma']:.4f}"
        sp = "-" if md["R_phase_sigma_deg"] is None else f"{md['R_phase_sigma_deg']:.2f}"
        lines.append(f"  {md['m']:>3}   {md['incoming'][0]:>8.5f} {md['incoming'][1]:>8.2f}   "
                     f"{md['outgoing'][0]:>8.5f} {md['outgoing'][1]:>8.2f}   {md['R_abs']:>9.5f} {sa:>7}   "
                     f"{md['R_phase_deg']:>10.3f} {sp:>6}")
    u = r["uncertainty"]
    lines.append(f"1-sigma: {u['method']}; {u['replicates']} replicates, {u['time_blocks']} time blocks of "
                 f"{u['time_block_frames']} frames, {u['azimuth_sectors']} azimuthal wedges")
    lines.append(f"wrote {out}/modes.csv, reflection.png, amplitude.png, report.json")
    return "\n".join(lines)
