"""datum.h5: the still-water datum ("format": "surfrec.datum", "version": 1).

Layout
------
root attributes
    format, version;
    world_to_left_camera : 16 float64, the 4x4 matrix row-major, datum-frame
        mm -> left-camera mm (X_cam = M [X_datum, 1]);
    plane : 4 float64 [nx, ny, nz, d], unit normal toward the cameras and
        offset, n·X = d in the left camera frame (mm; d < 0);
    fit_rms_mm, n_frames, rig_sha256;
    and every parameter and figure of the run (software, created, history,
    window_px, spacing_px, origin_mm, rotate_deg, residual_degree, ...):
    scalars, strings and short 1-D arrays only, so that heights.h5 can copy
    them into netCDF attributes.
datasets
    u (Nu) float64 px, v (Nv) float64 px: rectified left-image grid;
    disparity (Nv, Nu) float64 px, NaN where invalid; valid (Nv, Nu) uint8
    (1 = valid); noise_floor (Nv, Nu) float64 mm, NaN where unknown;
    point_residual (Nv, Nu) float64 mm (height above the plane per grid point,
    averaged over frames); residual_x (Mx), residual_y (My) float64 datum-frame
    mm; still_residual (My, Mx) float64 mm, NaN outside the measured footprint;
    optional defects_left, defects_right (H, W) uint8, 1 at each camera's
    fixed defects (hot and dead pixels, original image px), which ``match``
    leaves out of every correlation window.

Writing is atomic (a temporary file beside the target, renamed when
complete); reading validates format, version, shapes and finiteness and
names the offending key.
"""

from __future__ import annotations

import re
from pathlib import Path

import h5py
import numpy as np

from surfrec.errors import InputError
from surfrec.io.hdf5file import open_checked
from surfrec.geometry.datum import Datum
from surfrec.io.outputs import atomic_file

FORMAT = "surfrec.datum"
VERSION = 1

__all__ = ["Datum", "FORMAT", "VERSION", "read_datum", "write_datum"]

_CORE_ATTRS = ("format", "version", "world_to_left_camera", "plane", "fit_rms_mm", "n_frames", "rig_sha256")

_DATASETS = {
    "u": ("px", "rectified left-image column of the matching grid"),
    "v": ("px", "rectified left-image row of the matching grid"),
    "disparity": ("px", "reference (still-water) disparity d = u_left - u_right, NaN where invalid"),
    "valid": ("1", "1 where the reference disparity is valid"),
    "noise_floor": ("mm", "per-point standard deviation across the still frames of the height above the plane"),
    "point_residual": ("mm", "per-point height above the fitted plane, averaged over the still frames"),
    "residual_x": ("mm", "datum-frame x of the still-residual grid"),
    "residual_y": ("mm", "datum-frame y of the still-residual grid"),
    "still_residual": ("mm", "smooth departure of the still water from the plane (height), NaN outside the "
                             "measured footprint; subtracted by the heights stage"),
    "defects_left": ("1", "1 at the left camera's fixed defects (hot, dead pixels), original image px"),
    "defects_right": ("1", "1 at the right camera's fixed defects (hot, dead pixels), original image px"),
}

# Tolerances of the geometric consistency checks: far above float64 rounding
# of numbers of order 1000 mm, far below anything that could matter.
_ORTHO_TOL = 1e-6
# A defect map marking more of the sensor than this is not one (a real sensor has well below 1%).
MAX_DEFECT_FRACTION = 0.05
_OFFSET_TOL_MM = 1e-6


def write_datum(path, datum: Datum) -> None:
    """Write datum.h5 atomically (the caller checks --force first).

    Parameters
    ----------
    path : output file.
    datum : Datum; ``datum.attrs`` values must be scalars, strings or short
        1-D sequences of numbers or strings.
    """
    p = Path(path)
    with atomic_file(p) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = FORMAT
            f.attrs["version"] = VERSION
            f.attrs["world_to_left_camera"] = np.asarray(datum.world_to_left_camera, np.float64).reshape(16)
            f.attrs["plane"] = np.concatenate([np.asarray(datum.plane_normal, np.float64).reshape(3),
                                               [float(datum.plane_offset)]])
            f.attrs["fit_rms_mm"] = float(datum.fit_rms_mm)
            f.attrs["n_frames"] = int(datum.n_frames)
            f.attrs["rig_sha256"] = str(datum.rig_sha256)
            for key, value in datum.attrs.items():
                if key in _CORE_ATTRS:
                    continue
                f.attrs[key] = _attr_value(key, value)
            arrays = {"u": datum.u, "v": datum.v, "disparity": datum.disparity,
                      "valid": np.asarray(datum.valid, bool).astype(np.uint8), "noise_floor": datum.noise_floor,
                      "residual_x": datum.residual_x, "residual_y": datum.residual_y,
                      "still_residual": datum.still_residual}
            if datum.point_residual is not None:
                arrays["point_residual"] = datum.point_residual
            for side in ("left", "right"):
                m = getattr(datum, f"defects_{side}")
                if m is not None:
                    arrays[f"defects_{side}"] = np.asarray(m, bool).astype(np.uint8)
            for key, value in arrays.items():
                a = np.asarray(value)
                a = a if a.dtype == np.uint8 else a.astype(np.float64)
                opts = {"compression": "gzip", "shuffle": True} if a.ndim == 2 else {}
                ds = f.create_dataset(key, data=a, **opts)
                ds.attrs["units"], ds.attrs["long_name"] = _DATASETS[key]


def read_datum(path) -> Datum:
    """Load and validate datum.h5.

    Returns
    -------
    Datum

    Raises
    ------
    InputError
        Naming the file and the offending key: missing or unreadable file,
        another format or version, missing or misshapen attributes and
        datasets, non-finite values where values are required, a frame that
        is not rigid or disagrees with the plane.
    """
    p = Path(path)
    src = f"datum file {p}"
    with open_checked(p, FORMAT, VERSION, "datum") as f:
        m = _attr_array(f, "world_to_left_camera", 16, src).reshape(4, 4)
        rot = m[:3, :3]
        if (not np.allclose(m[3], [0, 0, 0, 1], atol=0) or not np.allclose(rot @ rot.T, np.eye(3), atol=_ORTHO_TOL)
                or abs(np.linalg.det(rot) - 1) > _ORTHO_TOL):
            raise InputError(f"{src}: 'world_to_left_camera' is not a rigid transform (rotation and translation)")
        plane = _attr_array(f, "plane", 4, src)
        normal, offset = plane[:3], float(plane[3])
        if abs(np.linalg.norm(normal) - 1) > _ORTHO_TOL:
            raise InputError(f"{src}: 'plane' normal is not a unit vector")
        if (not np.allclose(rot[:, 2], normal, atol=_ORTHO_TOL)
                or abs(normal @ m[:3, 3] - offset) > _OFFSET_TOL_MM * (1 + abs(offset))):
            raise InputError(f"{src}: 'plane' disagrees with 'world_to_left_camera' (its z axis must be the "
                             "plane normal and its origin on the plane)")
        fit_rms = _attr_scalar(f, "fit_rms_mm", src)
        if fit_rms < 0:
            raise InputError(f"{src}: 'fit_rms_mm' is negative")
        n_frames = _attr_scalar(f, "n_frames", src)
        if n_frames < 1 or n_frames != int(n_frames):
            raise InputError(f"{src}: 'n_frames' must be a whole number >= 1, got {n_frames!r}")
        sha = _text(f.attrs.get("rig_sha256"))
        if sha is None or not re.fullmatch(r"[0-9a-f]{64}", sha):
            raise InputError(f"{src}: 'rig_sha256' must be 64 hexadecimal digits")

        u = _axis(f, "u", src)
        v = _axis(f, "v", src)
        grid = (v.size, u.size)
        disparity = _dataset(f, "disparity", grid, src)
        valid = _dataset(f, "valid", grid, src, dtype=None) != 0
        if not np.all(np.isfinite(disparity[valid])):
            raise InputError(f"{src}: 'disparity' is not finite at points marked valid")
        if np.any(np.isfinite(disparity[~valid])):
            raise InputError(f"{src}: 'disparity' holds values at points marked invalid (expected NaN)")
        if not valid.any():
            raise InputError(f"{src}: 'valid' marks no point valid")
        noise = _dataset(f, "noise_floor", grid, src)
        if np.any(np.isinf(noise)) or np.any(noise[np.isfinite(noise)] < 0):
            raise InputError(f"{src}: 'noise_floor' holds negative or infinite values")
        point_residual = None
        if "point_residual" in f:
            point_residual = _dataset(f, "point_residual", grid, src)
        rx = _axis(f, "residual_x", src)
        ry = _axis(f, "residual_y", src)
        residual = _dataset(f, "still_residual", (ry.size, rx.size), src)
        if np.any(np.isinf(residual)) or not np.isfinite(residual).any():
            raise InputError(f"{src}: 'still_residual' must be finite inside the footprint (NaN outside)")
        defects = {}
        for side in ("left", "right"):
            key = f"defects_{side}"
            if key in f:
                ds = f[key]
                if not isinstance(ds, h5py.Dataset) or ds.ndim != 2 or ds.shape[0] < 1 or ds.shape[1] < 1:
                    raise InputError(f"{src}: {key!r} must be a 2-D image-sized dataset")
                a = ds[()]
                if not np.all((a == 0) | (a == 1)):
                    raise InputError(f"{src}: {key!r} must hold 0 and 1 only")
                if a.mean() > MAX_DEFECT_FRACTION:
                    raise InputError(f"{src}: {key!r} marks {100 * a.mean():.1f}% of the pixels defective "
                                     f"(more than {100 * MAX_DEFECT_FRACTION:g}%: not a defect map)")
                defects[key] = a.astype(bool)
        attrs = {k: _plain(f.attrs[k]) for k in f.attrs if k not in _CORE_ATTRS}
    return Datum(world_to_left_camera=m, plane_normal=normal, plane_offset=offset, u=u, v=v, disparity=disparity,
                 valid=valid, residual_x=rx, residual_y=ry, still_residual=residual, noise_floor=noise,
                 fit_rms_mm=float(fit_rms), n_frames=int(n_frames), rig_sha256=sha, attrs=attrs,
                 point_residual=point_residual, **defects)


def _attr_value(key, value):
    if isinstance(value, (bool, np.bool_)):
        return np.int8(value)  # HDF5 has no boolean attribute type readable everywhere
    if isinstance(value, str):
        return value
    if isinstance(value, (int, float, np.integer, np.floating)):
        return value
    if isinstance(value, (list, tuple, np.ndarray)):
        a = np.asarray(value)
        if a.ndim == 1 and a.dtype.kind in "U":
            return a.astype(object)
        if a.ndim == 1 and a.dtype.kind in "biuf":
            return a
    raise TypeError(f"datum attribute {key!r}: {type(value).__name__} is not a scalar, string or 1-D array")


def _text(v):
    if v is None:
        return None
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    return str(v)


def _plain(v):
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    if isinstance(v, np.ndarray):
        return [_plain(x) for x in v.tolist()]
    if isinstance(v, np.generic):
        return v.item()
    return v


def _attr_array(f, key, size, src):
    if key not in f.attrs:
        raise InputError(f"{src}: missing attribute '{key}'")
    try:
        a = np.asarray(f.attrs[key], dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"{src}: '{key}' must be {size} numbers") from None
    if a.size != size:
        raise InputError(f"{src}: '{key}' holds {a.size} values, expected {size}")
    if not np.all(np.isfinite(a)):
        raise InputError(f"{src}: '{key}' holds NaN or infinite values")
    return a


def _attr_scalar(f, key, src):
    a = _attr_array(f, key, 1, src)
    return float(a[0])


def _dataset(f, key, shape, src, dtype=np.float64):
    if key not in f or not isinstance(f[key], h5py.Dataset):
        raise InputError(f"{src}: missing dataset '{key}'")
    ds = f[key]
    if ds.shape != tuple(shape):
        raise InputError(f"{src}: '{key}' has shape {ds.shape}, expected {tuple(shape)}")
    a = ds[()]
    if dtype is not None:
        try:
            a = np.asarray(a, dtype=dtype)
        except (TypeError, ValueError):
            raise InputError(f"{src}: '{key}' must hold numbers") from None
    return a


def _axis(f, key, src):
    if key not in f or not isinstance(f[key], h5py.Dataset):
        raise InputError(f"{src}: missing dataset '{key}'")
    if f[key].ndim != 1 or f[key].shape[0] < 2:
        raise InputError(f"{src}: '{key}' must be a 1-D axis of at least 2 values, got shape {f[key].shape}")
    a = _dataset(f, key, f[key].shape, src)
    if not np.all(np.isfinite(a)) or not np.all(np.diff(a) > 0):
        raise InputError(f"{src}: '{key}' must be finite and strictly increasing")
    return a
