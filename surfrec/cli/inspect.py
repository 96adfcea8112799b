"""``surfrec inspect``: summarise any file that surfrec writes."""

from __future__ import annotations

import json

import click

from surfrec.cli.options import json_option, verbosity

# The streamed pass over a disparity or heights file reports progress only
# for runs long enough to take a while.
PROGRESS_MIN_FRAMES = 500


@click.command("inspect")
@click.argument("file", type=click.Path(dir_okay=True))
@json_option
@verbosity
def command(file, as_json):
    """Summarise FILE: its kind, dimensions, time span, grid, ranges and provenance.

    Works on every file surfrec writes: truth.h5 of a synthetic session,
    rig.json, datum.h5, disparity.h5 and heights.h5. Disparity and heights
    files are read frame block by frame block, so a whole night's run never
    sits in memory.
    """
    from surfrec.io.inspection import format_text, summarise

    bar = {}

    def progress(done, total):
        if total < PROGRESS_MIN_FRAMES:
            return
        if "p" not in bar:
            from surfrec.cli.progress import Progress

            bar["p"] = Progress(total, "reading frames")
        bar["p"](done)

    try:
        summary = summarise(file, progress=progress)
    finally:
        if "p" in bar:
            bar["p"].close()
    if as_json:
        click.echo(json.dumps(_finite_or_none(summary), indent=2, default=_jsonable, allow_nan=False))
    else:
        click.echo(format_text(summary))


def _finite_or_none(obj):
    """Strict JSON has no NaN or infinity (an attribute may hold one): those become null."""
    import math

    if hasattr(obj, "tolist") and not isinstance(obj, float):
        obj = obj.tolist()  # numpy arrays and scalars
    if isinstance(obj, dict):
        return {k: _finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_none(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def _jsonable(x):
    try:
        return x.tolist()
    except AttributeError:
        return str(x)
