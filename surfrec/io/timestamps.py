"""Frame timestamps: a CSV with header ``frame,left_s,right_s``, one row per frame pair."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from surfrec.errors import InputError


def read_timestamps(path, n_frames: int | None = None, *, tolerance_s: float | None = None):
    """Read and validate a timestamps file.

    Parameters
    ----------
    path : CSV file.  n_frames : the number of frame pairs it must describe.
    tolerance_s : largest allowed |left_s - right_s| (default: a tenth of the
        median frame interval).

    Returns
    -------
    time : (T,) s from the first frame (the left camera's clock).

    Raises
    ------
    InputError naming the file and the row: missing header, non-numbers,
    wrong length, times that do not increase, left/right disagreement.
    """
    p = Path(path)
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except OSError as exc:
        raise InputError(f"timestamps file {p} cannot be read ({exc.strerror})") from None
    if not rows or [c.strip() for c in rows[0]] != ["frame", "left_s", "right_s"]:
        raise InputError(f"timestamps file {p}: the first line must be the header 'frame,left_s,right_s'")
    data = []
    for k, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != 3:
            raise InputError(f"timestamps file {p}, line {k}: expected 3 values, got {len(row)}")
        try:
            data.append([float(c) for c in row])
        except ValueError:
            raise InputError(f"timestamps file {p}, line {k}: not numbers: {','.join(row)}") from None
    a = np.array(data, dtype=float).reshape(-1, 3)
    if not np.all(np.isfinite(a)):
        raise InputError(f"timestamps file {p}: NaN or infinite values")
    if n_frames is not None and len(a) != n_frames:
        raise InputError(f"timestamps file {p} has {len(a)} rows but there are {n_frames} frame pairs")
    if len(a) >= 2 and not np.all(np.diff(a[:, 1]) > 0):
        k = int(np.argmax(np.diff(a[:, 1]) <= 0)) + 3
        raise InputError(f"timestamps file {p}, line {k}: left_s does not increase")
    if len(a) >= 2 and not np.all(np.diff(a[:, 2]) > 0):
        k = int(np.argmax(np.diff(a[:, 2]) <= 0)) + 3
        raise InputError(f"timestamps file {p}, line {k}: right_s does not increase")
    if len(a) >= 2:
        tol = tolerance_s if tolerance_s is not None else 0.1 * float(np.median(np.diff(a[:, 1])))
        gap = np.abs(a[:, 1] - a[:, 2])
        if np.any(gap > tol):
            k = int(np.argmax(gap > tol)) + 2
            raise InputError(f"timestamps file {p}, line {k}: left and right times differ by {gap[k - 2]:.6g} s "
                             f"(more than {tol:.3g} s): the cameras are not synchronised")
    return a[:, 1] - a[0, 1] if len(a) else a[:, 1]


def read_camera_times(path):
    """Read a timestamps file as two cameras' clocks, for pairing frames by time.

    The layout is that of :func:`read_timestamps` (header ``frame,left_s,right_s``),
    but a cell may be empty: a camera that dropped a frame has one time fewer,
    so its column is shorter (or has a blank where the frame is missing). The
    k-th non-empty ``left_s`` is the time of the k-th left image, likewise for
    the right camera.

    Returns
    -------
    left_s, right_s : (N_left,), (N_right,) float arrays, s, as written (each strictly increasing).

    Raises
    ------
    InputError naming the file and the line: missing header, non-numbers,
    NaN/infinite values, times that do not increase.
    """
    p = Path(path)
    try:
        with open(p, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"timestamps file {p} cannot be read ({getattr(exc, 'strerror', None) or exc})") from None
    except csv.Error as exc:
        raise InputError(f"timestamps file {p} is not a CSV file ({exc})") from None
    if not rows or [c.strip() for c in rows[0]] != ["frame", "left_s", "right_s"]:
        raise InputError(f"timestamps file {p}: the first line must be the header 'frame,left_s,right_s'")
    cols = ([], [])
    lines = ([], [])
    for k, row in enumerate(rows[1:], start=2):
        if not row or all(not c.strip() for c in row):
            continue
        if len(row) != 3:
            raise InputError(f"timestamps file {p}, line {k}: expected 3 values, got {len(row)}")
        for side in (0, 1):
            cell = row[1 + side].strip()
            if not cell:
                continue
            try:
                value = float(cell)
            except ValueError:
                raise InputError(f"timestamps file {p}, line {k}: not a number: {cell!r}") from None
            if not np.isfinite(value):
                raise InputError(f"timestamps file {p}, line {k}: NaN or infinite time")
            cols[side].append(value)
            lines[side].append(k)
    out = []
    for side, name in ((0, "left_s"), (1, "right_s")):
        a = np.array(cols[side], dtype=float)
        if a.size == 0:
            raise InputError(f"timestamps file {p}: no {name} times")
        bad = np.flatnonzero(np.diff(a) <= 0)
        if bad.size:
            raise InputError(f"timestamps file {p}, line {lines[side][bad[0] + 1]}: {name} does not increase")
        out.append(a)
    return out[0], out[1]
