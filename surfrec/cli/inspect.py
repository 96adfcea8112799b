"""``surfrec inspect``: summarise any file that surfrec writes."""

from __future__ import annotations

import json

import click

from surfrec.cli.options import json_option, verbosity


@click.command("inspect")
@click.argument("file", type=click.Path(dir_okay=True))
@json_option
@verbosity
def command(file, as_json):
    """Summarise FILE: its kind, dimensions, time span, grid, ranges and provenance.

    Works on every file surfrec writes (for now the truth.h5 of a synthetic
    session).
    """
    from surfrec.io.inspection import format_text, summarise

    summary = summarise(file)
    if as_json:
        click.echo(json.dumps(summary, indent=2, default=_jsonable))
    else:
        click.echo(format_text(summary))


def _jsonable(x):
    try:
        return x.tolist()
    except AttributeError:
        return str(x)
