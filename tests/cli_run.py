"""Running `surfrec` as a user does, for the command-line tests."""

import subprocess
import sys


def run(*args):
    """`surfrec ARGS...` in a fresh interpreter; returns the CompletedProcess (text stdout/stderr)."""
    return subprocess.run([sys.executable, "-m", "surfrec.cli.main", *map(str, args)], capture_output=True, text=True)


def run_here(*args):
    """The same command in this process (click's CliRunner; the group's error policy applies the same),
    for the many bad-input cases: a fresh interpreter for each would cost a second apiece."""
    from click.testing import CliRunner

    from surfrec.cli.main import cli

    r = CliRunner().invoke(cli, [str(a) for a in args])
    r.returncode = r.exit_code
    return r
