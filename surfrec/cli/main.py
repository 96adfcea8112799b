"""The ``surfrec`` command group.

Subcommands are loaded lazily (one module each in this package) so that
``surfrec --help`` and ``surfrec --version`` stay fast: the heavy numerical
imports happen inside the command that needs them.

Error policy (docs/conventions.md, "Exit status"): bad usage or bad input gives one
line on stderr and exit status 2 (a traceback only with ``--verbose``);
failures while processing exit 1; a check that ran and failed exits 3.
"""

from __future__ import annotations

import importlib
import logging
import sys

import click

from surfrec._version import __version__
from surfrec.errors import CheckFailed, InputError, ProcessingError

# name -> (module, one-line help); the module defines a click command `command`.
_SUBCOMMANDS = {
    "synth": ("surfrec.cli.synth", "Render an invented laboratory session with exact ground truth."),
    "calibrate": ("surfrec.cli.calibrate", "Calibrate a stereo rig from target views (or re-pose it) into rig.json."),
    "check-rig": ("surfrec.cli.check_rig", "Check that a calibration still holds, from speckle frames of a run."),
    "datum": ("surfrec.cli.datum", "Still-water datum from a few still frames: plane, datum frame, residual (datum.h5)."),
    "match": ("surfrec.cli.match", "Match the speckle between the views of every frame pair: disparity.h5."),
    "heights": ("surfrec.cli.heights", "Triangulate and resample the disparities onto a regular grid: heights.h5."),
    "run": ("surfrec.cli.run", "A whole overnight run from RUN.toml: match + heights, parallel, resumable, crash-safe."),
    "inspect": ("surfrec.cli.inspect", "Summarise any file that surfrec writes."),
    "preview": ("surfrec.cli.preview", "Draw one frame of heights.h5 as a height map (PNG), with a point's time series."),
    "assess": ("surfrec.cli.assess", "Accuracy of heights.h5: against a synthetic session's truth, or its noise floor."),
    "spectrum": ("surfrec.cli.spectrum", "Frequency and frequency-wavenumber spectra of heights.h5, with a dispersion check."),
    "modes": ("surfrec.cli.modes", "Incoming/outgoing cylindrical waves per angular order about a centre: R_m with errors."),
}

log = logging.getLogger("surfrec")


def _wants_traceback(argv: list[str]) -> bool:
    return any(a in ("-v", "--verbose") or (a.startswith("-v") and set(a[1:]) == {"v"}) for a in argv)


class SurfrecGroup(click.Group):
    """A click group with lazily imported subcommands and one-line errors."""

    def list_commands(self, ctx):
        return list(_SUBCOMMANDS)

    def get_command(self, ctx, name):
        entry = _SUBCOMMANDS.get(name)
        if entry is None:
            return None
        module = importlib.import_module(entry[0])
        return module.command

    def format_commands(self, ctx, formatter):
        # Use the static one-line help so that `--help` does not import every stage.
        rows = [(name, help_) for name, (_, help_) in _SUBCOMMANDS.items()]
        with formatter.section("Commands"):
            formatter.write_dl(rows)

    def main(self, args=None, prog_name=None, **extra):
        argv = list(sys.argv[1:] if args is None else args)
        verbose = _wants_traceback(argv)
        try:
            rv = super().main(args=argv, prog_name=prog_name or "surfrec", standalone_mode=False, **extra)
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except click.exceptions.Abort:
            click.echo("surfrec: interrupted", err=True)
            sys.exit(130)
        except click.UsageError as exc:
            cmd = exc.ctx.command_path if exc.ctx is not None else "surfrec"
            click.echo(f"{cmd}: error: {exc.format_message()} (see '{cmd} --help')", err=True)
            sys.exit(2)
        except click.ClickException as exc:
            click.echo(f"surfrec: error: {exc.format_message()}", err=True)
            sys.exit(exc.exit_code)
        except InputError as exc:
            if verbose:
                raise
            click.echo(f"surfrec: error: {exc}", err=True)
            sys.exit(2)
        except CheckFailed as exc:
            if verbose:
                raise
            click.echo(f"surfrec: {exc}", err=True)
            sys.exit(3)
        except ProcessingError as exc:
            if verbose:
                raise
            click.echo(f"surfrec: failed: {exc}", err=True)
            sys.exit(1)
        except KeyboardInterrupt:
            click.echo("surfrec: interrupted", err=True)
            sys.exit(130)
        except OSError as exc:
            # Disk full, permission denied, vanished files: name the file, no traceback.
            if verbose:
                raise
            where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
            click.echo(f"surfrec: failed: {exc.strerror or exc}{where}", err=True)
            sys.exit(1)
        except Exception as exc:  # an unexpected failure: one line, the traceback with --verbose
            if verbose:
                raise
            click.echo(f"surfrec: failed: {type(exc).__name__}: {exc} (run again with --verbose for details)",
                       err=True)
            sys.exit(1)
        if isinstance(rv, int) and rv:
            sys.exit(rv)
        sys.exit(0)


@click.group(cls=SurfrecGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, "--version", prog_name="surfrec", message="%(prog)s %(version)s")
def cli():
    """surfrec: calibrated height fields h(x, y, t) of small water waves from a
    speckle-lit stereo camera rig.

    Stages: synth -> calibrate (check-rig) -> datum -> match -> heights ->
    inspect/preview/assess -> spectrum/modes (wave analysis); `run` drives
    match + heights over a whole night (RUN.toml). Every command has
    -v/--verbose and -q/--quiet.
    Exit status: 0 success, 1 failure while processing, 2 bad usage or input,
    3 a check that ran and failed.
    """


if __name__ == "__main__":  # pragma: no cover
    cli()
