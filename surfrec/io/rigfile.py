"""rig.json: a calibrated stereo rig ("format": "surfrec.rig", "version": 1).

Frames (docs/conventions.md): the rig frame is the LEFT camera's (x right, y down, z
along the optical axis, mm), unrectified; the right camera maps by
X_right = R X_left + t. Rectified coordinates come back to the rig frame
through R1 transposed. Disparity d = u_left - u_right in rectified px.

Loading validates everything and names the offending key: format and
version, presence, shapes and finiteness of every array, camera matrices of
the right form, stereo and rectifying rotations that are orthonormal with
determinant +1, rectified projections of the right form, the residual
summary and the board description; :func:`check_image_size` checks a rig
against the images it is used with. Writing is atomic (temporary file, then
rename).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from surfrec._version import __version__
from surfrec.errors import InputError
from surfrec.io.outputs import atomic_file

FORMAT = "surfrec.rig"
VERSION = 1


@dataclass
class StereoRig:
    """A calibrated stereo rig.

    Attributes
    ----------
    image_size : (width, height) px
    left_matrix, right_matrix : (3, 3) px
    left_distortion, right_distortion : (5,) [k1, k2, p1, p2, k3]
    rotation : (3, 3) left camera frame -> right camera frame
    translation : (3,) mm, same mapping
    rectification : dict of R1, R2 (3, 3), P1, P2 (3, 4), Q (4, 4)
    residuals : dict (rms_px, epipolar_rms_px, views, ...)
    board : dict or None (kind, cols, rows, square_mm)
    extra : other keys of the file, kept as they are
    """

    image_size: tuple[int, int]
    left_matrix: np.ndarray
    left_distortion: np.ndarray
    right_matrix: np.ndarray
    right_distortion: np.ndarray
    rotation: np.ndarray
    translation: np.ndarray
    rectification: dict
    residuals: dict = field(default_factory=dict)
    board: dict | None = None
    created: str | None = None
    software: str | None = None
    extra: dict = field(default_factory=dict)

    @property
    def baseline_mm(self) -> float:
        """Distance between the camera centres, mm."""
        return float(np.linalg.norm(self.translation))

    def to_dict(self) -> dict:
        d = {
            "format": FORMAT,
            "version": VERSION,
            "image_size": [int(self.image_size[0]), int(self.image_size[1])],
            "cameras": {
                "left": {"matrix": _list(self.left_matrix), "distortion": _list(self.left_distortion)},
                "right": {"matrix": _list(self.right_matrix), "distortion": _list(self.right_distortion)},
            },
            "stereo": {"rotation": _list(self.rotation), "translation": _list(self.translation)},
            "rectification": {k: _list(v) for k, v in self.rectification.items()},
            "residuals": _jsonable(self.residuals),
            "board": self.board,
            "created": self.created or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "software": self.software or f"surfrec {__version__}",
        }
        for k, v in self.extra.items():
            d.setdefault(k, _jsonable(v))
        return d


def write_rig(rig: StereoRig, path) -> None:
    """Write rig.json atomically (the caller checks --force first)."""
    text = json.dumps(rig.to_dict(), indent=2)
    with atomic_file(path) as tmp:
        tmp.write_text(text + "\n", encoding="utf-8")


def file_sha256(path) -> str:
    """SHA-256 of a file's bytes, hex."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def read_rig(path) -> StereoRig:
    """Load and validate rig.json.

    Raises
    ------
    InputError
        Naming the file and the offending key: unreadable or not JSON, wrong
        format or version, missing keys, wrong shapes, non-finite numbers, a
        stereo rotation that is not orthonormal.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"rig file {p} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"rig file {p} cannot be read ({exc})") from None
    try:
        d = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"rig file {p} is not valid JSON (line {exc.lineno}: {exc.msg})") from None
    return rig_from_dict(d, source=str(p))


def rig_from_dict(d, source: str = "rig") -> StereoRig:
    """Validate a rig dict (as read from rig.json) and build a StereoRig.

    Parameters
    ----------
    d : dict
        The parsed JSON object (matrices in px, translation in mm).
    source : str
        What to call the rig in messages (the file name).

    Returns
    -------
    StereoRig

    Raises
    ------
    InputError
        One sentence naming ``source`` and the offending key (see the module
        documentation for what is checked).
    """
    if not isinstance(d, dict):
        raise InputError(f"{source}: expected a JSON object")
    if d.get("format") != FORMAT:
        raise InputError(f"{source}: 'format' is {d.get('format')!r}, expected {FORMAT!r}")
    version = d.get("version")
    if type(version) is not int or version != VERSION:  # JSON true would compare equal to 1
        raise InputError(f"{source}: 'version' is {d.get('version')!r}; this surfrec reads version {VERSION}")
    size = _array(d, "image_size", (2,), source)
    if np.any(size < 1) or np.any(size != np.round(size)) or np.any(size > 100000):
        raise InputError(f"{source}: 'image_size' must be two positive whole numbers of px, got {size.tolist()}")
    km = {}
    for side in ("left", "right"):
        km[side + "_matrix"] = _array(d, f"cameras.{side}.matrix", (3, 3), source)
        km[side + "_distortion"] = _array(d, f"cameras.{side}.distortion", (5,), source)
        m = km[side + "_matrix"]
        if m[0, 0] <= 0 or m[1, 1] <= 0 or not np.allclose(m[2], [0, 0, 1]) or m[1, 0] != 0:
            raise InputError(f"{source}: 'cameras.{side}.matrix' is not a camera matrix "
                             "([[fx, s, cx], [0, fy, cy], [0, 0, 1]] with fx, fy > 0)")
    rot = _array(d, "stereo.rotation", (3, 3), source)
    if not _is_rotation(rot):
        raise InputError(f"{source}: 'stereo.rotation' is not a rotation matrix (orthonormal, determinant +1)")
    trans = _array(d, "stereo.translation", (3,), source)
    if np.linalg.norm(trans) <= 0:
        raise InputError(f"{source}: 'stereo.translation' is zero: the cameras must be apart")
    rect = {}
    for key, shape in (("R1", (3, 3)), ("R2", (3, 3)), ("P1", (3, 4)), ("P2", (3, 4)), ("Q", (4, 4))):
        rect[key] = _array(d, f"rectification.{key}", shape, source)
    for key in ("R1", "R2"):
        r = rect[key]
        if not _is_rotation(r):
            raise InputError(f"{source}: 'rectification.{key}' is not a rotation matrix (orthonormal, determinant +1)")
    for key in ("P1", "P2"):
        p = rect[key]
        if p[0, 0] <= 0 or p[1, 1] <= 0 or not np.allclose(p[2], [0, 0, 1, 0]):
            raise InputError(f"{source}: 'rectification.{key}' is not a rectified projection "
                             "([[f, 0, cx, Tx f], [0, f, cy, Ty f], [0, 0, 1, 0]] with f > 0)")
    residuals = d.get("residuals", {})
    if not isinstance(residuals, dict):
        raise InputError(f"{source}: 'residuals' must be an object")
    for key in ("rms_px", "epipolar_rms_px"):
        if key in residuals and residuals[key] is not None:
            v = residuals[key]
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v < 0:
                raise InputError(f"{source}: 'residuals.{key}' must be a non-negative number of px, got {v!r}")
    if "views" in residuals and not isinstance(residuals["views"], list):
        raise InputError(f"{source}: 'residuals.views' must be a list")
    _check_board(d.get("board"), source)
    known = {"format", "version", "image_size", "cameras", "stereo", "rectification", "residuals", "board",
             "created", "software"}
    return StereoRig(image_size=(int(size[0]), int(size[1])), rotation=rot, translation=trans,
                     rectification=rect, residuals=residuals, board=d.get("board"), created=d.get("created"),
                     software=d.get("software"), extra={k: v for k, v in d.items() if k not in known}, **km)


def _is_rotation(r) -> bool:
    """Orthonormal with determinant +1 (to 1e-6)."""
    return bool(np.allclose(r @ r.T, np.eye(3), atol=1e-6) and math.isclose(np.linalg.det(r), 1.0, abs_tol=1e-6))


def _check_board(board, source):
    if board is None:
        return
    if not isinstance(board, dict):
        raise InputError(f"{source}: 'board' must be an object (kind, cols, rows, square_mm) or null")
    kinds = ("chessboard", "circles", "asymmetric-circles")
    if board.get("kind") not in kinds:
        raise InputError(f"{source}: 'board.kind' is {board.get('kind')!r}, expected one of {', '.join(kinds)}")
    for key in ("cols", "rows"):
        v = board.get(key)
        if type(v) is not int or v < 2:
            raise InputError(f"{source}: 'board.{key}' must be a whole number of 2 or more, got {v!r}")
    v = board.get("square_mm")
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
        raise InputError(f"{source}: 'board.square_mm' must be a positive number of mm, got {v!r}")


def check_image_size(rig: StereoRig, size, what: str = "images") -> None:
    """InputError unless ``size`` (width, height) px equals the rig's image size."""
    if tuple(size) != tuple(rig.image_size):
        raise InputError(f"{what} are {size[0]}x{size[1]} px but the rig was calibrated for "
                         f"{rig.image_size[0]}x{rig.image_size[1]} px")


def _array(d, dotted, shape, source):
    node = d
    for part in dotted.split("."):
        if not isinstance(node, dict) or part not in node:
            raise InputError(f"{source}: missing key '{dotted}'")
        node = node[part]
    try:
        a = np.asarray(node, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{source}: '{dotted}' must be numbers of shape {shape}") from None
    if a.shape != shape:
        raise InputError(f"{source}: '{dotted}' has shape {a.shape}, expected {shape}")
    if not np.all(np.isfinite(a)):
        raise InputError(f"{source}: '{dotted}' holds NaN or infinite values")
    return a


def _list(a):
    return np.asarray(a, float).tolist()


def _jsonable(v):
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, np.generic):
        return v.item()
    return v
