"""heights.h5: calibrated height fields h(x, y, t), the product ("surfrec.heights", version 1).

The file is HDF5 written with h5py and is at the same time a valid
netCDF-4 file following the CF conventions (CF-1.10), so that xarray
(``engine="h5netcdf"`` or ``"netcdf4"``), the netCDF4 Python package,
``ncdump``, MATLAB's ``ncread`` and any HDF5 reader open it with labelled
coordinates and no custom reader.

Layout
------
dimensions (HDF5 dimension scales, attached to every variable that uses them)
    ``time`` (T, unlimited), ``y`` (Ny), ``x`` (Nx).
coordinate variables
    ``time`` (time) float64, CF time: ``units`` "seconds since <ISO date>"
    (the first frame's clock time, or the start of the run when no clock
    time is known; ``time_origin_source`` on the root says which),
    ``calendar`` "standard", ``axis`` T;
    ``y`` (y), ``x`` (x) float64 mm, datum (tank) frame, ``axis`` Y / X.
data variables
    ``height`` (time, y, x) float32 mm: the water surface above the
    still-water datum, ``_FillValue`` NaN where nothing valid was measured;
    ``height_uncertainty`` (time, y, x) float32 mm: the estimated 1-sigma of
    the random part (the systematic part is the root attribute
    ``height_systematic_mm``);
    ``frame_flags`` (time) uint8, CF ``flag_masks`` / ``flag_values`` /
    ``flag_meanings`` (the matcher's flags, plus this stage's);
    ``footprint`` (y, x) uint8: 1 at nodes inside the area both cameras see
    and not excluded, the area the coverage refers to.
root attributes
    ``Conventions`` "CF-1.10", ``title``, ``institution``-free provenance:
    ``history`` (the command line), ``source`` ("surfrec X.Y"), ``format``,
    ``version``, ``created``, ``world_to_left_camera`` (16 float64, the 4x4
    matrix row-major, datum-frame mm -> left-camera mm, as in datum.h5), and
    whatever the writer's caller adds (``surfrec heights`` adds the rig JSON
    and the datum's root attributes as text with their SHA-256, and every
    processing parameter).

netCDF rules kept here: attributes are one-dimensional and small (scalars,
strings, at most :data:`MAX_ATTR_VALUES` numbers); dicts and nested lists
become JSON text; booleans become int8 0/1. Text attributes are written as
fixed-length strings (netCDF ``char``, the classic type every netCDF reader
knows). Frame variables are chunked by frame (by frame x rows for large
grids, so a chunk stays near :data:`CHUNK_BYTES`) with gzip and shuffle, the
filters built into every HDF5 library.

Writing streams frame by frame into ``.NAME.partial-*`` beside the target and
renames it into place only when complete, so a partial file never looks
finished.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import tempfile
from pathlib import Path

import h5py
import numpy as np

from surfrec._version import __version__
from surfrec.errors import InputError
from surfrec.io.hdf5file import open_checked

FORMAT = "surfrec.heights"
VERSION = 1
CONVENTIONS = "CF-1.10"

# Frame flags: the matcher's (surfrec.match.pipeline) pass through unchanged;
# this stage adds one of its own in the next free bit.
FLAG_DROPPED = 1
FLAG_UNREADABLE = 2
FLAG_BLANK = 4
FLAG_FEW_VALID = 8
FLAG_FEW_HEIGHTS = 16
FLAG_VALUES = (FLAG_DROPPED, FLAG_UNREADABLE, FLAG_BLANK, FLAG_FEW_VALID, FLAG_FEW_HEIGHTS)
FLAG_MEANINGS = "dropped unreadable blank few_valid_points few_valid_heights"

# netCDF attributes should stay small (docs/conventions.md): longer numeric arrays are refused.
MAX_ATTR_VALUES = 256
# Target size of one compressed-variable chunk, bytes: big enough for gzip to
# work well, small enough for HDF5's default 1 MiB chunk cache and for readers
# that fetch one frame's tile.
CHUNK_BYTES = 1 << 20

# Low bound v108: allows attributes larger than 64 KiB (dense attribute storage)
# for long embedded JSON; high bound v110: readable by the HDF5 1.10 libraries
# that many netCDF installations (Debian's netcdf-bin among them) still link.
_LIBVER = ("v108", "v110")

_X_ATTRS = {"units": "mm", "long_name": "x, datum (tank) frame", "standard_name": "projection_x_coordinate",
            "axis": "X"}
_Y_ATTRS = {"units": "mm", "long_name": "y, datum (tank) frame", "standard_name": "projection_y_coordinate",
            "axis": "Y"}
_HEIGHT_ATTRS = {"units": "mm", "long_name": "water surface height above the still-water datum",
                 "standard_name": "water_surface_height_above_reference_datum"}
_SIGMA_ATTRS = {"units": "mm", "long_name": "height 1-sigma uncertainty, random part (disparity noise "
                                            "propagated through the geometry)",
                "standard_name": "water_surface_height_above_reference_datum standard_error"}
_FLAGS_ATTRS = {"long_name": "frame quality flags (bit field)", "standard_name": "status_flag"}
_FOOTPRINT_ATTRS = {"long_name": "1 inside the area both cameras see and not excluded", "units": "1"}

__all__ = ["FLAG_MEANINGS", "FLAG_VALUES", "FORMAT", "HeightsWriter", "VERSION", "frame_dataset_options",
           "read_heights", "same_frame_layout", "time_units", "write_heights"]


def time_units(time_origin_iso: str | None) -> tuple[str, str]:
    """CF ``units`` of the time axis for an ISO 8601 origin.

    Parameters
    ----------
    time_origin_iso : str or None
        Clock time of time 0 (ISO 8601, with or without a UTC offset; without
        one it is taken as UTC). None: unknown, the current time is used.

    Returns
    -------
    units : str
        "seconds since YYYY-MM-DD HH:MM:SS[.ffffff]" in UTC (the form
        udunits, cftime and pandas all parse).
    origin_iso : str
        The origin as full ISO 8601 with "+00:00".

    Raises
    ------
    InputError
        If ``time_origin_iso`` is not an ISO 8601 date-time.
    """
    if time_origin_iso is None:
        t = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0)
    else:
        try:
            t = _dt.datetime.fromisoformat(str(time_origin_iso).replace("Z", "+00:00"))
        except ValueError:
            raise InputError(f"time origin {time_origin_iso!r} is not an ISO 8601 date and time") from None
        t = t.replace(tzinfo=_dt.timezone.utc) if t.tzinfo is None else t.astimezone(_dt.timezone.utc)
    stamp = t.strftime("%Y-%m-%d %H:%M:%S") + (f".{t.microsecond:06d}" if t.microsecond else "")
    return f"seconds since {stamp}", t.isoformat()


def frame_dataset_options(ny: int, nx: int) -> dict:
    """h5py ``create_dataset`` options of a (T, Ny, Nx) frame variable (height, height_uncertainty).

    One place for the layout (float32, chunks of one frame by as many rows as
    keep a chunk near :data:`CHUNK_BYTES`, gzip level 4 with shuffle, NaN
    fill), so that a file written elsewhere with the same options — a run's
    journal chunks, written by the workers — can be copied into heights.h5
    chunk by chunk without decompressing (:meth:`HeightsWriter.append_block`).
    """
    rows = max(1, min(ny, CHUNK_BYTES // (4 * nx)))
    return dict(dtype=np.float32, chunks=(1, rows, nx), compression="gzip", compression_opts=4, shuffle=True,
                fillvalue=np.float32(np.nan))


def same_frame_layout(ds, ny: int, nx: int) -> bool:
    """Whether h5py dataset ``ds`` stores (n, Ny, Nx) frames exactly as :func:`frame_dataset_options` says."""
    o = frame_dataset_options(ny, nx)
    return (ds.ndim == 3 and ds.shape[1:] == (ny, nx) and ds.dtype == np.dtype(o["dtype"])
            and ds.chunks == o["chunks"] and ds.compression == o["compression"]
            and ds.compression_opts == o["compression_opts"] and bool(ds.shuffle) == o["shuffle"]
            and not ds.fletcher32 and ds.scaleoffset is None)


class HeightsWriter:
    """Stream frames into a new heights.h5; :meth:`close` publishes it, :meth:`abort` removes it.

    Parameters
    ----------
    path : str or Path
        Final file name (the caller has checked --force; the file appears
        only on :meth:`close`).
    x : (Nx,) array_like
        Node x, datum (tank) frame, mm, strictly increasing.
    y : (Ny,) array_like
        Node y, datum (tank) frame, mm, strictly increasing.
    attrs : dict
        Root attributes. Must hold ``world_to_left_camera`` (16 numbers,
        datum-frame mm -> left-camera mm, row-major). Values: str, numbers,
        bool, 1-D sequences of at most :data:`MAX_ATTR_VALUES` numbers, or
        dicts / nested lists (stored as JSON text); None values are left out.
    time_origin_iso : str or None
        Clock time of time 0 (see :func:`time_units`).
    n_frames : int
        Expected number of frames (the time axis grows past it if needed).
    footprint : (Ny, Nx) array_like of bool, optional
        Nodes inside the measurable area; stored as the ``footprint`` variable
        (all ones if not given).

    Examples
    --------
    >>> w = HeightsWriter("h.h5", x, y, attrs={"world_to_left_camera": m.ravel()},
    ...                   time_origin_iso=None, n_frames=len(times))     # doctest: +SKIP
    >>> for t, h, s in frames: w.append(t, h, s, 0)                     # doctest: +SKIP
    >>> w.close()                                                       # doctest: +SKIP
    """

    def __init__(self, path, x, y, *, attrs: dict, time_origin_iso: str | None, n_frames: int,
                 footprint=None):
        self.path = Path(path)
        x = _axis(x, "x")
        y = _axis(y, "y")
        self.shape = (y.size, x.size)
        attrs = dict(attrs)
        m = attrs.pop("world_to_left_camera", None)
        if m is None:
            raise ValueError("heights attributes must include 'world_to_left_camera' (16 numbers)")
        m = np.asarray(m, np.float64).reshape(-1)
        if m.size != 16 or not np.all(np.isfinite(m)):
            raise ValueError("'world_to_left_camera' must be 16 finite numbers (the 4x4 matrix, row-major)")
        units, origin = time_units(time_origin_iso)
        parent = self.path.parent if str(self.path.parent) else Path(".")
        fd, tmp = tempfile.mkstemp(prefix=f".{self.path.name}.partial-", suffix=".h5", dir=parent)
        os.close(fd)
        self.tmp = Path(tmp)
        self.n = 0
        self._closed = False
        try:
            self.f = h5py.File(self.tmp, "w", libver=_LIBVER, track_order=True)
            self._layout(x, y, m, attrs, units, origin, time_origin_iso is None, max(int(n_frames), 1), footprint)
        except BaseException:
            self.abort()
            raise

    def _layout(self, x, y, m, attrs, units, origin, origin_unknown, n_frames, footprint):
        f = self.f
        ny, nx = self.shape
        root = {"Conventions": CONVENTIONS, "title": "Water surface height fields measured by stereo speckle matching",
                "source": f"surfrec {__version__}", "format": FORMAT, "version": VERSION,
                "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                "time_origin": origin,
                "time_origin_source": "unknown: time of writing" if origin_unknown else "given"}
        root.update(attrs)
        for k, val in root.items():
            _set_attr(f, k, val)
        f.attrs["world_to_left_camera"] = m

        # Coordinate variables, made dimension scales named as their dimensions
        # (netCDF-4 reads an HDF5 dimension scale as a dimension and, when it
        # holds data, as its coordinate variable).
        tds = f.create_dataset("time", shape=(0,), maxshape=(None,), dtype=np.float64,
                               chunks=(max(1, min(n_frames, 4096)),))
        _set_attrs(tds, {"units": units, "long_name": "time from the first frame", "standard_name": "time",
                         "calendar": "standard", "axis": "T"})
        yds = f.create_dataset("y", data=y)
        _set_attrs(yds, _Y_ATTRS)
        xds = f.create_dataset("x", data=x)
        _set_attrs(xds, _X_ATTRS)
        for ds, name in ((tds, "time"), (yds, "y"), (xds, "x")):
            ds.make_scale(name)

        opts = frame_dataset_options(ny, nx)
        for name, a in (("height", _HEIGHT_ATTRS), ("height_uncertainty", _SIGMA_ATTRS)):
            ds = f.create_dataset(name, shape=(0, ny, nx), maxshape=(None, ny, nx), **opts)
            ds.attrs["_FillValue"] = np.float32(np.nan)
            _set_attrs(ds, a)
            for i, scale in enumerate((tds, yds, xds)):
                ds.dims[i].attach_scale(scale)
        fl = f.create_dataset("frame_flags", shape=(0,), maxshape=(None,), dtype=np.uint8,
                              chunks=(max(1, min(n_frames, 4096)),))
        _set_attrs(fl, _FLAGS_ATTRS)
        fl.attrs["flag_masks"] = np.array(FLAG_VALUES, np.uint8)
        fl.attrs["flag_values"] = np.array(FLAG_VALUES, np.uint8)
        _set_attr(fl, "flag_meanings", FLAG_MEANINGS)
        fl.dims[0].attach_scale(tds)
        fp = np.ones(self.shape, np.uint8) if footprint is None else np.asarray(footprint, bool).astype(np.uint8)
        if fp.shape != self.shape:
            raise ValueError(f"footprint has shape {fp.shape}, expected {self.shape} (Ny, Nx)")
        fds = f.create_dataset("footprint", data=fp, compression="gzip", shuffle=True)
        _set_attrs(fds, _FOOTPRINT_ATTRS)
        fds.dims[0].attach_scale(yds)
        fds.dims[1].attach_scale(xds)

    def append(self, time_s: float, height, uncertainty, flags: int) -> None:
        """Add one frame.

        Parameters
        ----------
        time_s : float
            s since the time origin.
        height : (Ny, Nx) array_like
            mm, datum frame, NaN where not measured (stored as float32).
        uncertainty : (Ny, Nx) array_like
            1-sigma, mm (stored as float32).
        flags : int
            Bit field of :data:`FLAG_VALUES`.
        """
        h = np.asarray(height, np.float32)
        s = np.asarray(uncertainty, np.float32)
        if h.shape != self.shape or s.shape != self.shape:
            raise ValueError(f"frame arrays have shapes {h.shape} and {s.shape}, expected {self.shape} (Ny, Nx)")
        f = self.f
        i = self.n
        for name, arr in (("height", h), ("height_uncertainty", s), ("time", float(time_s)),
                          ("frame_flags", int(flags))):
            ds = f[name]
            ds.resize(i + 1, axis=0)
            ds[i] = arr
        self.n += 1
        if self.n % 64 == 0:
            f.flush()

    def append_block(self, time_s, height, uncertainty, flags) -> None:
        """Add n frames stored in another HDF5 file, copying their compressed chunks as they are.

        The frames' compression was done where they were computed (a run's
        workers, in parallel), so the one writer only moves bytes: chunks are
        read and written with HDF5's direct chunk I/O, which gives the same
        stored bytes, hence the same values, as decompressing and appending
        them frame by frame. A source whose layout differs from
        :func:`frame_dataset_options` is decompressed and appended instead.

        Parameters
        ----------
        time_s : (n,) s since the time origin.
        height, uncertainty : h5py datasets (n, Ny, Nx) float32, mm (datum frame; 1-sigma).
        flags : (n,) bit fields of :data:`FLAG_VALUES`.
        """
        t = np.asarray(time_s, np.float64).reshape(-1)
        fl = np.asarray(flags).reshape(-1)
        n = t.size
        ny, nx = self.shape
        if fl.size != n or height.shape != (n, ny, nx) or uncertainty.shape != (n, ny, nx):
            raise ValueError(f"block of {n} frames has height {height.shape}, uncertainty {uncertainty.shape} and "
                             f"{fl.size} flags, expected ({n}, {ny}, {nx}) each")
        if not (same_frame_layout(height, ny, nx) and same_frame_layout(uncertainty, ny, nx)):
            for i in range(n):
                self.append(t[i], height[i], uncertainty[i], int(fl[i]))
            return
        f = self.f
        i0 = self.n
        rows = frame_dataset_options(ny, nx)["chunks"][1]
        for name, src in (("height", height), ("height_uncertainty", uncertainty)):
            dst = f[name]
            dst.resize(i0 + n, axis=0)
            for i in range(n):
                for r in range(0, ny, rows):
                    mask, data = src.id.read_direct_chunk((i, r, 0))
                    dst.id.write_direct_chunk((i0 + i, r, 0), data, mask)
        for name, arr in (("time", t), ("frame_flags", fl.astype(np.uint8))):
            ds = f[name]
            ds.resize(i0 + n, axis=0)
            ds[i0:i0 + n] = arr
        self.n += n
        f.flush()

    def close(self, extra_attrs: dict | None = None) -> Path:
        """Add ``extra_attrs`` to the root, finish the file and rename it into place.

        Returns
        -------
        Path of the published file.
        """
        try:
            for k, val in (extra_attrs or {}).items():
                _set_attr(self.f, k, val)
            self.f.attrs["n_frames"] = np.int32(self.n)
            self.f.close()
            with open(self.tmp, "rb") as fh:
                os.fsync(fh.fileno())
            os.replace(self.tmp, self.path)
        except BaseException:
            self.abort()
            raise
        self._closed = True
        return self.path

    def abort(self) -> None:
        """Remove the partial file (after an error or an interrupt)."""
        try:
            self.f.close()
        except Exception:  # the file may be broken or never opened: removing it is all that matters
            pass
        self.tmp.unlink(missing_ok=True)

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self.abort()
        elif not self._closed:
            self.close()


def write_heights(path, x, y, time, height, uncertainty, flags, attrs: dict, *, time_origin_iso: str | None = None,
                  footprint=None) -> Path:
    """Write whole arrays as heights.h5 (a convenience over :class:`HeightsWriter`).

    Parameters
    ----------
    path : output file (replaced if it exists: the caller decides about --force).
    x (Nx,), y (Ny,) : node coordinates, datum frame, mm.
    time : (T,) s since ``time_origin_iso``.
    height, uncertainty : (T, Ny, Nx) mm.
    flags : (T,) int, or None for all zero.
    attrs : root attributes (must hold ``world_to_left_camera``).
    time_origin_iso, footprint : see :class:`HeightsWriter`.

    Returns
    -------
    Path
    """
    time = np.atleast_1d(np.asarray(time, np.float64))
    height = np.asarray(height)
    uncertainty = np.asarray(uncertainty)
    flags = np.zeros(time.size, np.uint8) if flags is None else np.asarray(flags)
    if height.shape[0] != time.size or uncertainty.shape != height.shape or flags.shape != time.shape:
        raise ValueError("time (T), height and uncertainty (T, Ny, Nx) and flags (T) do not agree in shape")
    w = HeightsWriter(path, x, y, attrs=attrs, time_origin_iso=time_origin_iso, n_frames=time.size,
                      footprint=footprint)
    try:
        for i in range(time.size):
            w.append(time[i], height[i], uncertainty[i], int(flags[i]))
    except BaseException:
        w.abort()
        raise
    return w.close()


def read_heights(path, frames=slice(None)) -> dict:
    """Read heights.h5 (validated).

    Parameters
    ----------
    path : str or Path
    frames : slice, int or index array
        Which frames of ``height`` and ``height_uncertainty`` to load
        (``time`` and ``frame_flags`` are always whole).

    Returns
    -------
    dict
        ``x`` (Nx) mm, ``y`` (Ny) mm (datum frame); ``time`` (T) s since the
        origin in ``time_units``; ``height`` and ``height_uncertainty``
        (T', Ny, Nx) float32 mm, NaN where not measured; ``frame_flags`` (T)
        uint8; ``footprint`` (Ny, Nx) bool (all True in files without it);
        ``attrs`` (root attributes: text as str, numbers as Python or numpy
        values; ``world_to_left_camera`` as a (4, 4) float64 array);
        ``time_units`` (str, CF); ``n_frames`` (T).

    Raises
    ------
    InputError
        If the file is not a readable heights file of this version, or its
        shapes disagree.
    """
    p = Path(path)
    with open_checked(p, FORMAT, VERSION, "heights") as f:
        for key in ("time", "y", "x", "height", "height_uncertainty", "frame_flags"):
            if key not in f or not isinstance(f[key], h5py.Dataset):
                raise InputError(f"{p}: missing variable '{key}'")
        nt, ny, nx = f["height"].shape
        if (f["x"].shape != (nx,) or f["y"].shape != (ny,) or f["time"].shape != (nt,)
                or f["height_uncertainty"].shape != (nt, ny, nx) or f["frame_flags"].shape != (nt,)):
            raise InputError(f"{p}: inconsistent shapes of 'time', 'y', 'x', 'height', 'height_uncertainty' "
                             "and 'frame_flags'")
        attrs = {k: _plain(v) for k, v in f.attrs.items()}
        m = np.asarray(f.attrs.get("world_to_left_camera", []), np.float64).reshape(-1)
        if m.size != 16:
            raise InputError(f"{p}: 'world_to_left_camera' must hold 16 values, found {m.size}")
        attrs["world_to_left_camera"] = m.reshape(4, 4)
        out = {"x": f["x"][()], "y": f["y"][()], "time": f["time"][()], "frame_flags": f["frame_flags"][()],
               "time_units": _plain(f["time"].attrs.get("units", "s")), "attrs": attrs, "n_frames": nt}
        out["height"] = f["height"][frames]
        out["height_uncertainty"] = f["height_uncertainty"][frames]
        out["footprint"] = (f["footprint"][()] != 0) if "footprint" in f else np.ones((ny, nx), bool)
    return out


# --- attributes ---------------------------------------------------------------------------------------

def _set_attrs(obj, attrs: dict):
    for k, v in attrs.items():
        _set_attr(obj, k, v)


def _set_attr(obj, key: str, value):
    if value is None:
        return
    if isinstance(value, (bool, np.bool_)):
        obj.attrs[key] = np.int8(value)  # netCDF has no boolean type
    elif isinstance(value, str):
        _set_text(obj, key, value)
    elif isinstance(value, (int, np.integer)):
        v = int(value)
        obj.attrs[key] = np.int32(v) if -2**31 <= v < 2**31 else np.int64(v)
    elif isinstance(value, (float, np.floating)):
        obj.attrs[key] = np.float64(value)
    elif isinstance(value, dict):
        _set_text(obj, key, json.dumps(value, default=_json_default))
    elif isinstance(value, (list, tuple, np.ndarray)):
        a = np.asarray(value) if not isinstance(value, np.ndarray) else value
        if a.dtype != object and a.ndim == 1 and a.dtype.kind in "biuf" and 0 < a.size <= MAX_ATTR_VALUES:
            obj.attrs[key] = a.astype(np.float64) if a.dtype.kind == "f" else a.astype(np.int64)
        elif a.dtype.kind in "biuf" and a.size > MAX_ATTR_VALUES:
            raise ValueError(f"attribute {key!r}: {a.size} values are too many for a netCDF attribute "
                             f"(at most {MAX_ATTR_VALUES}); store it as a variable")
        else:  # strings, empty or nested sequences: JSON keeps their structure
            _set_text(obj, key, json.dumps(a.tolist() if isinstance(a, np.ndarray) else value,
                                           default=_json_default))
    else:
        raise TypeError(f"attribute {key!r}: {type(value).__name__} cannot be stored as a netCDF attribute")


def _set_text(obj, key: str, text: str):
    b = text.encode("utf-8")
    if not b:
        obj.attrs[key] = text  # HDF5 has no zero-length fixed strings; netCDF reads this as an empty string
        return
    obj.attrs.create(key, np.array(b, dtype=f"S{len(b)}"), dtype=h5py.string_dtype("utf-8", len(b)))


def _json_default(v):
    if isinstance(v, np.generic):
        return v.item()
    if isinstance(v, np.ndarray):
        return v.tolist()
    return str(v)


def _plain(v):
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray) and v.dtype.kind in "SO":
        return [_plain(x) for x in v.tolist()]
    if isinstance(v, np.generic):
        return v.item()
    return v


def _axis(a, name):
    a = np.asarray(a, np.float64).reshape(-1)
    if a.size < 1 or not np.all(np.isfinite(a)) or (a.size > 1 and not np.all(np.diff(a) > 0)):
        raise ValueError(f"{name} must be finite and strictly increasing (mm)")
    return a
