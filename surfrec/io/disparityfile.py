"""disparity.h5: per-frame disparities on the matching grid ("surfrec.disparity", version 1).

Layout (docs/file-formats.md): ``u`` (Nu), ``v`` (Nv) rectified left-image px of the
grid; ``time`` (T) s from the first frame; ``disparity``,
``disparity_sigma``, ``score`` (T, Nv, Nu) float32 (NaN where invalid);
``frame_flags`` (T) uint8 with ``flag_values`` / ``flag_meanings``;
``valid_count`` (T) int32; ``frame_index`` (T) int64, the frame's index in
the input sequence. Root attributes: format, version, created, software,
history (command line), the matcher parameters (``param_*``), rig and datum
SHA-256, and the names of the input files' first and last frames.

The file is written as ``.NAME.partial-*`` beside the target, one frame at a
time (datasets chunked by frame, so memory stays flat), and renamed into
place only when the run completed.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from pathlib import Path

import h5py
import numpy as np

from surfrec._version import __version__
from surfrec.errors import InputError
from surfrec.io.hdf5file import open_checked

FORMAT = "surfrec.disparity"
VERSION = 1
_FRAME_VARS = ("disparity", "disparity_sigma", "score")


class DisparityWriter:
    """Stream frames into a new disparity.h5 (call :meth:`close` to publish it).

    Parameters
    ----------
    path : final file name.  u, v : grid (px).  attrs : root attributes.
    n_frames : expected number of frames (datasets are resizable anyway).
    """

    def __init__(self, path, u, v, attrs: dict, n_frames: int):
        import tempfile

        self.path = Path(path)
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.partial-", suffix=".h5", dir=self.path.parent)
        os.close(fd)
        self.tmp = Path(tmp)
        self.f = h5py.File(self.tmp, "w")
        f = self.f
        f.attrs["format"] = FORMAT
        f.attrs["version"] = VERSION
        f.attrs["created"] = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        f.attrs["software"] = f"surfrec {__version__}"
        for k, val in attrs.items():
            f.attrs[k] = json.dumps(val) if isinstance(val, (dict, list, tuple)) else val
        nv, nu = len(v), len(u)
        f.create_dataset("u", data=np.asarray(u, np.float64)).attrs["units"] = "px"
        f.create_dataset("v", data=np.asarray(v, np.float64)).attrs["units"] = "px"
        chunk = (1, nv, nu)
        for name in _FRAME_VARS:
            ds = f.create_dataset(name, shape=(0, nv, nu), maxshape=(None, nv, nu), dtype=np.float32,
                                  chunks=chunk, compression="gzip", compression_opts=4, shuffle=True,
                                  fillvalue=np.nan)
            ds.attrs["units"] = "1" if name == "score" else "px"
        f.create_dataset("time", shape=(0,), maxshape=(None,), dtype=np.float64, chunks=(1024,)).attrs["units"] = "s"
        fl = f.create_dataset("frame_flags", shape=(0,), maxshape=(None,), dtype=np.uint8, chunks=(1024,))
        from surfrec.match.pipeline import FLAG_MEANINGS, FLAG_VALUES

        fl.attrs["flag_masks"] = np.array(FLAG_VALUES, np.uint8)
        fl.attrs["flag_meanings"] = FLAG_MEANINGS
        f.create_dataset("valid_count", shape=(0,), maxshape=(None,), dtype=np.int32, chunks=(1024,))
        f.create_dataset("frame_index", shape=(0,), maxshape=(None,), dtype=np.int64, chunks=(1024,))
        self.n = 0

    def append(self, *, time: float, frame_index: int, flags: int, disparity, disparity_sigma, score):
        """Add one frame (arrays (Nv, Nu) px)."""
        f = self.f
        i = self.n
        for name, arr in (("disparity", disparity), ("disparity_sigma", disparity_sigma), ("score", score)):
            ds = f[name]
            ds.resize(i + 1, axis=0)
            ds[i] = arr
        for name, val in (("time", time), ("frame_flags", flags), ("frame_index", frame_index),
                          ("valid_count", int(np.isfinite(disparity).sum()))):
            ds = f[name]
            ds.resize(i + 1, axis=0)
            ds[i] = val
        self.n += 1
        if self.n % 64 == 0:
            f.flush()

    def close(self, extra_attrs: dict | None = None):
        """Finish the file and rename it into place."""
        for k, val in (extra_attrs or {}).items():
            self.f.attrs[k] = json.dumps(val) if isinstance(val, (dict, list, tuple)) else val
        self.f.close()
        os.replace(self.tmp, self.path)

    def abort(self):
        """Remove the partial file (after an error or an interrupt)."""
        try:
            self.f.close()
        except Exception:  # the file may already be broken: removing it is all that matters
            pass
        self.tmp.unlink(missing_ok=True)


def read_disparity(path, frames=slice(None)) -> dict:
    """Read disparity.h5 (validated): grid, times, flags, attributes and the chosen frames.

    Returns
    -------
    dict with u, v, time, frame_flags, valid_count, frame_index, attrs, and
    disparity, disparity_sigma, score for ``frames``.
    """
    p = Path(path)
    with open_checked(p, FORMAT, VERSION, "disparity") as f:
        for key in ("u", "v", "time", "disparity", "disparity_sigma", "score", "frame_flags"):
            if key not in f:
                raise InputError(f"{p}: missing dataset '{key}'")
        nt, nv, nu = f["disparity"].shape
        if f["u"].shape != (nu,) or f["v"].shape != (nv,) or f["time"].shape != (nt,):
            raise InputError(f"{p}: inconsistent shapes of 'u', 'v', 'time' and 'disparity'")
        out = {k: f[k][()] for k in ("u", "v", "time", "frame_flags")}
        out["valid_count"] = f["valid_count"][()] if "valid_count" in f else None
        out["frame_index"] = f["frame_index"][()] if "frame_index" in f else np.arange(nt)
        out["attrs"] = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
        for k in _FRAME_VARS:
            out[k] = f[k][frames]
    return out
