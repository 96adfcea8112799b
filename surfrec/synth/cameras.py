"""Pinhole cameras with Brown–Conrady distortion, and a pinhole projector.

Frames: the world (tank) frame has x along the tank, y across it, z up, and
the still-water plane at z = 0 (mm). A camera maps world points to its own
frame by ``X_cam = R @ X_world + t`` (x right, y down, z along the optical
axis), then to pixels with the camera matrix and the distortion
``[k1, k2, p1, p2, k3]`` in OpenCV's order and convention (the pixel origin is
the centre of the top-left pixel). The forward model is written out here
rather than calling ``cv2.projectPoints`` so that it runs on millions of
points in float64 without reshaping; the tests check it against
``cv2.projectPoints``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np


def look_at(centre, target, up=(0.0, 1.0, 0.0)) -> np.ndarray:
    """Rotation (world -> camera) of a camera at ``centre`` looking at ``target``.

    Parameters
    ----------
    centre, target : array_like, shape (3,)
        Camera centre and the point on its optical axis, world mm.
    up : array_like, shape (3,)
        A world direction that should appear *up* in the image (negative
        camera y). It must not be parallel to the viewing direction.

    Returns
    -------
    R : ndarray, shape (3, 3)
        Rows are the camera's x, y, z axes in world coordinates.
    """
    centre = np.asarray(centre, float)
    z = np.asarray(target, float) - centre
    z /= np.linalg.norm(z)
    y = -np.asarray(up, float)
    y = y - z * (y @ z)
    norm = np.linalg.norm(y)
    if norm < 1e-9:
        raise ValueError("up direction is parallel to the viewing direction")
    y /= norm
    x = np.cross(y, z)
    return np.vstack([x, y, z])


def rotation_about_axis(axis, angle_deg: float) -> np.ndarray:
    """Rotation matrix of ``angle_deg`` degrees about ``axis`` (right-handed)."""
    axis = np.asarray(axis, float)
    rvec = axis / np.linalg.norm(axis) * np.deg2rad(angle_deg)
    return cv2.Rodrigues(rvec)[0]


@dataclass
class Camera:
    """A calibrated camera: intrinsics, distortion and pose.

    Attributes
    ----------
    matrix : ndarray (3, 3)
        Camera matrix [[fx, 0, cx], [0, fy, cy], [0, 0, 1]] in px.
    distortion : ndarray (5,)
        Brown–Conrady coefficients [k1, k2, p1, p2, k3] (OpenCV order).
    rotation : ndarray (3, 3)
        World -> camera rotation.
    translation : ndarray (3,)
        World -> camera translation, mm.
    image_size : tuple (width, height)
        px.
    """

    matrix: np.ndarray
    distortion: np.ndarray
    rotation: np.ndarray
    translation: np.ndarray
    image_size: tuple[int, int]
    name: str = "camera"

    def __post_init__(self):
        self.matrix = np.asarray(self.matrix, float).reshape(3, 3)
        self.distortion = np.asarray(self.distortion, float).reshape(5)
        self.rotation = np.asarray(self.rotation, float).reshape(3, 3)
        self.translation = np.asarray(self.translation, float).reshape(3)
        self.image_size = (int(self.image_size[0]), int(self.image_size[1]))

    @classmethod
    def from_pose(cls, matrix, distortion, centre, rotation, image_size, name="camera"):
        """Build a camera from its centre (world mm) and world -> camera rotation."""
        rotation = np.asarray(rotation, float)
        t = -rotation @ np.asarray(centre, float)
        return cls(matrix, distortion, rotation, t, image_size, name)

    @property
    def centre(self) -> np.ndarray:
        """Camera centre in world mm."""
        return -self.rotation.T @ self.translation

    def to_camera(self, points):
        """World points (..., 3) mm -> camera-frame points (..., 3) mm."""
        return np.asarray(points, float) @ self.rotation.T + self.translation

    def project(self, points) -> np.ndarray:
        """Project world points to distorted pixel coordinates.

        Parameters
        ----------
        points : array_like, shape (..., 3)
            World mm. Points behind the camera give NaN.

        Returns
        -------
        uv : ndarray, shape (..., 2)
            px, origin at the centre of the top-left pixel.
        """
        pc = self.to_camera(points)
        with np.errstate(divide="ignore", invalid="ignore"):
            xn = pc[..., 0] / pc[..., 2]
            yn = pc[..., 1] / pc[..., 2]
        behind = pc[..., 2] <= 0
        u, v = distort_normalised(xn, yn, self.distortion)
        fx, fy, cx, cy, skew = self.matrix[0, 0], self.matrix[1, 1], self.matrix[0, 2], self.matrix[1, 2], self.matrix[0, 1]
        uv = np.stack([fx * u + skew * v + cx, fy * v + cy], axis=-1)
        uv[behind] = np.nan
        return uv

    def pixel_rays(self, u, v) -> np.ndarray:
        """Unit world directions of the rays through distorted pixels (u, v).

        The inverse of the distortion has no closed form; OpenCV's
        ``undistortPoints`` iterates it, here with a tight stopping rule so the
        round trip is exact to ~1e-9 px over the whole image, corners included.

        Parameters
        ----------
        u, v : array_like
            px, any matching shapes.

        Returns
        -------
        d : ndarray, shape u.shape + (3,)
            Unit directions in the world frame.
        """
        xn, yn = self.undistort_normalised(u, v)
        d = np.stack([xn, yn, np.ones_like(xn)], axis=-1)
        d /= np.linalg.norm(d, axis=-1, keepdims=True)
        return d @ self.rotation  # camera -> world is R^T; row vectors multiply by R

    def undistort_normalised(self, u, v):
        """Distorted pixels -> ideal normalised image coordinates (x/z, y/z)."""
        u = np.asarray(u, float)
        v = np.asarray(v, float)
        # Newton's method on the forward model, started from the distorted
        # coordinates: a few steps reach machine precision for lens
        # distortions of a few per cent, and it is several times faster on
        # millions of rays than OpenCV's fixed-point loop (cv2.undistortPoints
        # is the reference in the tests).
        fx, fy, cx, cy, skew = self.matrix[0, 0], self.matrix[1, 1], self.matrix[0, 2], self.matrix[1, 2], self.matrix[0, 1]
        yn = (v - cy) / fy
        xn = (u - cx - skew * yn) / fx
        return _newton_undistort(xn, yn, u, v, self.matrix, self.distortion, iterations=8)

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "image_size": list(self.image_size),
            "matrix": self.matrix.tolist(),
            "distortion": self.distortion.tolist(),
            "rotation": self.rotation.tolist(),
            "translation": self.translation.tolist(),
        }

    @classmethod
    def from_dict(cls, d: dict) -> "Camera":
        return cls(d["matrix"], d["distortion"], d["rotation"], d["translation"], d["image_size"], d.get("name", "camera"))


def distort_normalised(xn, yn, dist):
    """Brown–Conrady distortion of ideal normalised coordinates (OpenCV's model).

    x' = x (1 + k1 r^2 + k2 r^4 + k3 r^6) + 2 p1 x y + p2 (r^2 + 2 x^2), and
    y' likewise with p1, p2 swapped (Brown 1966; Conrady 1919; OpenCV docs).
    """
    k1, k2, p1, p2, k3 = dist
    r2 = xn * xn + yn * yn
    radial = 1.0 + r2 * (k1 + r2 * (k2 + r2 * k3))
    xd = xn * radial + 2.0 * p1 * xn * yn + p2 * (r2 + 2.0 * xn * xn)
    yd = yn * radial + p1 * (r2 + 2.0 * yn * yn) + 2.0 * p2 * xn * yn
    return xd, yd


def _newton_undistort(xn, yn, u, v, K, dist, iterations=8, tol=1e-14):
    """Solve distort_normalised(x, y) = target for (x, y) by Newton's method.

    Works on blocks of a few hundred thousand points: the temporaries then
    stay in cache, which is several times faster than whole-image arrays.
    """
    fx, fy, cx, cy, skew = K[0, 0], K[1, 1], K[0, 2], K[1, 2], K[0, 1]
    shape = np.shape(xn)
    xn = np.array(xn, float).ravel()
    yn = np.array(yn, float).ravel()
    uu = np.broadcast_to(u, shape).ravel()
    vv = np.broadcast_to(v, shape).ravel()
    block = 1 << 16
    for i in range(0, xn.size, block):
        sl = slice(i, i + block)
        yd_t = (vv[sl] - cy) / fy
        xd_t = (uu[sl] - cx - skew * yd_t) / fx
        xn[sl], yn[sl] = _newton_block(xn[sl], yn[sl], xd_t, yd_t, dist, iterations, tol)
    return xn.reshape(shape), yn.reshape(shape)


def _newton_block(x, y, xd_t, yd_t, dist, iterations, tol):
    k1, k2, p1, p2, k3 = dist
    for _ in range(iterations):
        r2 = x * x + y * y
        radial = 1.0 + r2 * (k1 + r2 * (k2 + r2 * k3))
        drad = k1 + r2 * (2.0 * k2 + 3.0 * k3 * r2)  # d(radial)/d(r2)
        xy = x * y
        ex = x * radial + 2.0 * p1 * xy + p2 * (r2 + 2.0 * x * x) - xd_t
        ey = y * radial + p1 * (r2 + 2.0 * y * y) + 2.0 * p2 * xy - yd_t
        a = radial + 2.0 * x * x * drad + 2.0 * p1 * y + 6.0 * p2 * x
        b = 2.0 * xy * drad + 2.0 * p1 * x + 2.0 * p2 * y
        d = radial + 2.0 * y * y * drad + 6.0 * p1 * y + 2.0 * p2 * x
        det = a * d - b * b
        dx = (d * ex - b * ey) / det
        dy = (a * ey - b * ex) / det
        x = x - dx
        y = y - dy
        if max(np.abs(dx).max(), np.abs(dy).max()) < tol:
            break
    return x, y


@dataclass
class Projector:
    """A pinhole projector (no distortion) casting a pattern onto the water.

    Attributes
    ----------
    matrix : (3, 3) px; rotation (3, 3) world -> projector; translation (3,) mm;
    resolution : (width, height) projector px.
    """

    matrix: np.ndarray
    rotation: np.ndarray
    translation: np.ndarray
    resolution: tuple[int, int]
    extra: dict = field(default_factory=dict)

    def __post_init__(self):
        self.matrix = np.asarray(self.matrix, float).reshape(3, 3)
        self.rotation = np.asarray(self.rotation, float).reshape(3, 3)
        self.translation = np.asarray(self.translation, float).reshape(3)
        self.resolution = (int(self.resolution[0]), int(self.resolution[1]))

    @property
    def centre(self) -> np.ndarray:
        return -self.rotation.T @ self.translation

    def project_xyz(self, x, y, z):
        """World points given as separate coordinate arrays -> projector px (u, v)."""
        R, t, K = self.rotation, self.translation, self.matrix
        xc = R[0, 0] * x + R[0, 1] * y + R[0, 2] * z + t[0]
        yc = R[1, 0] * x + R[1, 1] * y + R[1, 2] * z + t[1]
        zc = R[2, 0] * x + R[2, 1] * y + R[2, 2] * z + t[2]
        return K[0, 0] * xc / zc + K[0, 2], K[1, 1] * yc / zc + K[1, 2]

    def to_dict(self) -> dict:
        return {
            "matrix": self.matrix.tolist(),
            "rotation": self.rotation.tolist(),
            "translation": self.translation.tolist(),
            "resolution": list(self.resolution),
            **self.extra,
        }


def stereo_from_cameras(left: Camera, right: Camera):
    """Stereo pose of two cameras: X_right = R X_left + t (rig-frame convention of docs/conventions.md).

    Returns
    -------
    R : (3, 3), t : (3,) mm
    """
    r = right.rotation @ left.rotation.T
    t = right.translation - r @ left.translation
    return r, t
