"""Safe output: never overwrite without --force, never leave a partial output looking complete.

Every file is written under a temporary name in the destination folder and
renamed into place only when complete (a rename within one file system is
atomic on POSIX). Folders are built the same way: a hidden ``.NAME.partial-*``
folder that becomes NAME at the end.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

from surfrec.errors import InputError


def check_output(path, *, force: bool, kind: str = "file") -> Path:
    """Validate an output path before any work starts.

    Parameters
    ----------
    path : str or Path
    force : bool
        Allow replacing an existing output.
    kind : "file" or "folder"

    Returns
    -------
    Path

    Raises
    ------
    InputError
        If the output exists (and not ``force``), is of the other kind, or its
        parent folder does not exist.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(f"cannot write {p}: folder {parent} does not exist")
    if p.exists() or p.is_symlink():
        if kind == "folder" and p.is_dir() and not any(p.iterdir()):
            return p
        if not force:
            raise InputError(f"output {p} already exists; use --force to replace it")
        if kind == "folder" and not p.is_dir():
            raise InputError(f"output {p} exists and is not a folder")
        if kind == "file" and p.is_dir():
            raise InputError(f"output {p} is a folder, expected a file name")
    return p


@contextlib.contextmanager
def atomic_file(path, *, suffix: str | None = None):
    """Yield a temporary path beside ``path``; rename it to ``path`` on success.

    On any exception the temporary file is removed and ``path`` is untouched.
    """
    p = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{p.name}.partial-", suffix=suffix or p.suffix, dir=p.parent or ".")
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        _fsync(tmp)
        os.replace(tmp, p)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


@contextlib.contextmanager
def atomic_folder(path, *, force: bool):
    """Yield a temporary folder beside ``path``; it becomes ``path`` on success.

    An existing ``path`` (allowed only with ``force``) is replaced only after
    the new folder is complete.
    """
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    tmp = Path(tempfile.mkdtemp(prefix=f".{p.name}.partial-", dir=parent))
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if p.exists() or p.is_symlink():
        if p.is_dir() and not p.is_symlink():
            if any(p.iterdir()) and not force:
                shutil.rmtree(tmp, ignore_errors=True)
                raise InputError(f"output {p} already exists; use --force to replace it")
            old = Path(tempfile.mkdtemp(prefix=f".{p.name}.old-", dir=parent))
            os.replace(p, old / p.name)
            os.replace(tmp, p)
            shutil.rmtree(old, ignore_errors=True)
            return
        p.unlink()
    os.replace(tmp, p)


def _fsync(path: Path):
    with open(path, "rb") as fh:
        os.fsync(fh.fileno())
