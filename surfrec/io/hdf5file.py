"""Opening a surfrec HDF5 file for reading: exists, opens, and says it is the kind asked for.

Shared by the readers of datum.h5, disparity.h5, heights.h5 and truth.h5, so that every
kind gives the same one-line errors.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np

from surfrec.errors import InputError


def _plain(value):
    # HDF5 attributes come back as bytes, numpy scalars or str, depending on who wrote them.
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.generic):
        return value.item()
    return value


def open_checked(path, fmt: str, version: int, kind: str) -> h5py.File:
    """The file opened read-only, after checking its ``format`` and ``version`` root attributes.

    Parameters
    ----------
    path : file path.  fmt : expected ``format`` attribute (e.g. "surfrec.datum").
    version : expected ``version`` attribute.  kind : the file's name in messages ("datum").

    Returns
    -------
    h5py.File, open for reading (use it in a ``with`` block).

    Raises
    ------
    InputError
        The file does not exist, is not HDF5, or is another kind or version.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"{kind} file {p} does not exist")
    try:
        f = h5py.File(p, "r")
    except (OSError, ValueError) as exc:
        raise InputError(f"{p}: not a readable HDF5 file ({exc})") from None
    found = _plain(f.attrs.get("format"))
    found_version = _plain(f.attrs.get("version"))
    if found != fmt:
        f.close()
        raise InputError(f"{p}: not a surfrec {kind} file ('format' is {found!r}, expected {fmt!r})")
    if not isinstance(found_version, int) or isinstance(found_version, bool) or found_version != version:
        f.close()
        raise InputError(f"{p}: {kind} file of another version ('version' is {found_version!r}; this surfrec "
                         f"reads version {version})")
    return f
