"""Options shared by several subcommands, documented once so all commands spell them alike."""

from __future__ import annotations

import logging
import sys

import click


def _set_verbosity(ctx, param, value):
    # -v and -q combine into one level; library logging stays quiet unless asked.
    store = ctx.ensure_object(dict)
    store[param.name] = value
    verbose, quiet = store.get("verbose", 0), store.get("quiet", False)
    level = logging.WARNING if quiet else (logging.DEBUG if verbose >= 2 else logging.INFO)
    if quiet and verbose:
        level = logging.INFO
    logger = logging.getLogger("surfrec")
    logger.setLevel(level)
    if not any(getattr(h, "_surfrec", False) for h in logger.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(message)s"))
        handler._surfrec = True
        logger.addHandler(handler)
        logger.propagate = False
    return value


def verbosity(f):
    """``-v/--verbose`` (repeatable; also shows tracebacks) and ``-q/--quiet``."""
    f = click.option("-q", "--quiet", is_flag=True, expose_value=False, is_eager=True,
                     callback=_set_verbosity, help="Only warnings and errors on stderr.")(f)
    f = click.option("-v", "--verbose", count=True, expose_value=False, is_eager=True,
                     callback=_set_verbosity,
                     help="More detail on stderr; shows a traceback on errors.")(f)
    return f


force_option = click.option(
    "--force", is_flag=True, default=False,
    help="Overwrite an existing output (otherwise the command refuses).")

json_option = click.option(
    "--json", "as_json", is_flag=True, default=False,
    help="Print one JSON object on stdout for scripts instead of the text report.")

seed_option = click.option(
    "--seed", type=click.IntRange(min=0), default=0, show_default=True, metavar="N",
    help="Seed of the random generators (speckle patterns, noise, target poses).")


def output_option(kind: str = "file", required: bool = True):
    """``-o/--output``: the one file a command writes, or its output folder."""
    what = "Output folder." if kind == "folder" else "Output file."
    return click.option("-o", "--output", "output", required=required, metavar="PATH",
                        type=click.Path(dir_okay=(kind == "folder"), file_okay=(kind == "file")),
                        help=what + " Never overwritten without --force.")


def available_cores() -> int:
    """Cores this process may use: its CPU affinity (which batch schedulers set), else the CPU count."""
    import os

    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # macOS, Windows
        return max(1, os.cpu_count() or 1)


workers_option = click.option(
    "--workers", type=click.IntRange(min=1), default=None, metavar="N",
    help="Worker processes (default: the cores this process may use, from its CPU affinity).")
