"""``surfrec synth``: render an invented laboratory session with exact ground truth."""

from __future__ import annotations

import logging
import time

import click

from surfrec.cli.options import available_cores, force_option, seed_option, verbosity, workers_option

log = logging.getLogger("surfrec")

SCENARIO_HELP = {
    "waves": "plane 5 Hz wave of 1.0 mm stepping to 1.1 mm, over a stationary dip (the default)",
    "scatter": "plane waves scattered by a surface-piercing post, whole wave periods",
    "plane": "a plain 4 Hz plane wave over whole wave periods, for the dispersion check",
    "ripples": "circular ripples from a point source, 12-bit data in 16-bit files",
    "moved": "the waves rig after the right camera turned 0.2 degrees: for check-rig and re-posing",
}


def _parse_effects(ctx, param, value):
    from surfrec.synth.effects import parse_effects

    try:
        return parse_effects(value)
    except ValueError as exc:
        raise click.BadParameter(str(exc), ctx=ctx, param=param) from None


@click.command("synth")
@click.argument("outdir", type=click.Path(file_okay=False))
@click.option("--scenario", type=click.Choice(list(SCENARIO_HELP)), default="waves", show_default=True,
              help="Which invented session to render: " + "; ".join(f"{k}: {v}" for k, v in SCENARIO_HELP.items()))
@click.option("--quick", is_flag=True, help="A small session (512x384 px, a few frames) that renders in seconds.")
@click.option("--camera-effects", "camera_effects", default="none", show_default=True, metavar="LIST",
              callback=_parse_effects,
              help="Camera effects to render: 'all', 'none' or a comma list of vignetting, illumination, "
                   "defocus, dust, defects, glints, noise, bitdepth, motion (docs/synthetic-sessions.md). "
                   "The truth surface is the same either way.")
@seed_option
@workers_option
@force_option
@verbosity
def command(outdir, scenario, quick, camera_effects, seed, workers, force):
    """Render a synthetic stereo session into OUTDIR.

    OUTDIR receives target/, still/ and waves/ folders of left/right PNG
    images, waves/timestamps.csv, truth.h5 (every camera, projector and
    surface parameter and the exact surface) and SCENARIO.md. The folder
    is built under a temporary name and appears only when complete. With two
    or more workers the two cameras render in parallel; the images do not
    depend on the worker count.
    """
    from surfrec.io.outputs import check_output

    out = check_output(outdir, force=force, kind="folder")
    from surfrec.cli.progress import Progress
    from surfrec.synth.scenarios import build_scenario
    from surfrec.synth.session import frame_count
    from surfrec.io.sessionfolder import write_session

    t0 = time.monotonic()
    sc = build_scenario(scenario, quick=quick, seed=seed, effects=camera_effects)
    total = frame_count(sc)
    log.info("rendering scenario %r%s: %d frame pairs of %dx%d px%s", scenario, " (quick)" if quick else "",
             total, *sc.rigs["rig"].left.image_size,
             f", camera effects: {', '.join(sc.effects.to_dict()['enabled'])}" if sc.effects else "")
    with Progress(total, "rendering") as progress:
        summary = write_session(sc, out, force=force, progress=progress,
                                workers=workers or available_cores())
    dt = time.monotonic() - t0
    log.info("wrote %s in %.1f s (%.2f s per frame pair)", out, dt, summary["render_seconds"] / max(total, 1))
    click.echo(str(out))
