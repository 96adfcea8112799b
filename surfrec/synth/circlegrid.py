"""Rendered views of a circle-grid calibration target (symmetric or asymmetric).

The synthetic sessions show chessboards only; this module renders dark
circles on a white board through a distorted :class:`~surfrec.synth.cameras.Camera`
the way :func:`surfrec.synth.render.render_radiance_board` renders the
chessboard: each supersampled ray (a :class:`~surfrec.synth.render.RayBundle`)
is intersected with the board plane, the board point is classified, and
:func:`~surfrec.synth.render.expose` blurs, integrates over the pixel, adds
noise and quantises. It exists so that circle-grid detection can be tested
against exact truth.

Board frame: x along a row of circles, y down the rows, z the board normal
(mm); the origin is the first circle's centre. The layouts are OpenCV's (see
:mod:`surfrec.calib.targets`): symmetric circle (i, j) at (i s, j s);
asymmetric circle (i, j) at ((2 i + j mod 2) s, j s).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from surfrec.synth import render as rd
from surfrec.synth.cameras import Camera, rotation_about_axis


@dataclass(frozen=True)
class CircleGrid:
    """A printed circle grid.

    Attributes
    ----------
    cols, rows : circles per row, number of rows.
    spacing_mm : centre spacing (symmetric) or OpenCV's grid unit (asymmetric), mm.
    radius_mm : circle radius, mm; below spacing / 2 (symmetric) or
        spacing / sqrt(2) / 2 (asymmetric) so circles never touch.
    asymmetric : OpenCV's asymmetric layout.
    margin_mm : white border around the outermost circles' edges, mm.
    """

    cols: int
    rows: int
    spacing_mm: float
    radius_mm: float
    asymmetric: bool = False
    margin_mm: float = 15.0

    def __post_init__(self):
        gap = self.spacing_mm * (np.sqrt(2.0) if self.asymmetric else 1.0)
        if not 0 < self.radius_mm < gap / 2:
            raise ValueError(f"circle radius {self.radius_mm} mm must be below half the neighbour distance "
                             f"({gap / 2:.3g} mm)")

    def centres(self) -> np.ndarray:
        """Circle centres in the board frame, (cols * rows, 3) mm, row by row."""
        j, i = np.mgrid[0:self.rows, 0:self.cols]
        i = i.ravel().astype(float)
        j = j.ravel().astype(float)
        x = (2.0 * i + j % 2) * self.spacing_mm if self.asymmetric else i * self.spacing_mm
        return np.stack([x, j * self.spacing_mm, np.zeros_like(x)], axis=-1)

    def extent(self):
        """(x0, x1, y0, y1) of the board, mm, board frame."""
        c = self.centres()
        pad = self.radius_mm + self.margin_mm
        return c[:, 0].min() - pad, c[:, 0].max() + pad, c[:, 1].min() - pad, c[:, 1].max() + pad

    def in_circle(self, bx, by):
        """True where board-frame points (mm) lie inside a circle."""
        s, r = self.spacing_mm, self.radius_mm
        inside = np.zeros(np.shape(bx), bool)
        # Only the nearest grid rows can hold the circle a point lies in.
        j0 = np.floor(by / s)
        for dj in (0.0, 1.0):
            j = j0 + dj
            shift = (j % 2) * s if self.asymmetric else 0.0
            pitch = 2.0 * s if self.asymmetric else s
            i = np.rint((bx - shift) / pitch)
            ok = (j >= 0) & (j < self.rows) & (i >= 0) & (i < self.cols)
            dx = bx - (i * pitch + shift)
            dy = by - j * s
            inside |= ok & (dx * dx + dy * dy < r * r)
        return inside


def render_radiance_circles(bundle: rd.RayBundle, board_rotation, board_origin, grid: CircleGrid,
                            lighting: rd.Lighting, tile_rows: int = 256) -> np.ndarray:
    """Supersampled radiance of a circle grid (fraction of full scale).

    Parameters
    ----------
    bundle : the camera's sample rays.
    board_rotation : (3, 3) board -> world rotation.
    board_origin : (3,) world mm of the first circle's centre.
    grid : CircleGrid
    lighting : radiometry (board white, circle = board black, background).

    Returns
    -------
    radiance : float32 (height * S, width * S)
    """
    rb = np.asarray(board_rotation, float)
    ob = np.asarray(board_origin, float)
    n = rb[:, 2]
    x0, x1, y0, y1 = grid.extent()
    c = bundle.centre
    out = np.empty(bundle.shape, np.float32)
    for r0 in range(0, bundle.shape[0], tile_rows):
        rows = slice(r0, min(r0 + tile_rows, bundle.shape[0]))
        dx, dy = bundle.sx[rows], bundle.sy[rows]
        # Ray points c + w (sx, sy, 1) on the plane n . (p - ob) = 0.
        w = (n @ (ob - c)) / (n[0] * dx + n[1] * dy + n[2])
        px = c[0] + w * dx - ob[0]
        py = c[1] + w * dy - ob[1]
        pz = c[2] + w - ob[2]
        bx = rb[0, 0] * px + rb[1, 0] * py + rb[2, 0] * pz
        by = rb[0, 1] * px + rb[1, 1] * py + rb[2, 1] * pz
        on_board = (bx > x0) & (bx < x1) & (by > y0) & (by < y1) & (c[2] + w > 0)
        dark = grid.in_circle(bx, by) & on_board
        rad = np.where(on_board, np.where(dark, lighting.board_black, lighting.board_white), lighting.board_background)
        out[rows] = rad * bundle.vignette[rows]
    return out


def facing_pose(camera: Camera, grid: CircleGrid, distance_mm: float, *, tilt_deg=(0.0, 0.0), yaw_deg=0.0,
                offset_px=(0.0, 0.0)):
    """A board pose that faces the camera, centred on an image point.

    Parameters
    ----------
    camera : the viewing camera.
    distance_mm : distance of the board centre from the camera centre along the ray, mm.
    tilt_deg : rotations of the board about its x and y axes, degrees.
    yaw_deg : rotation about the board normal, degrees.
    offset_px : image position of the board centre relative to the principal point, px.

    Returns
    -------
    rotation : (3, 3) board -> world; origin : (3,) world mm of the first circle.
    """
    u = camera.matrix[0, 2] + offset_px[0]
    v = camera.matrix[1, 2] + offset_px[1]
    ray = camera.pixel_rays(np.array([u]), np.array([v]))[0]
    centre = camera.centre + distance_mm * ray
    # Board axes along the camera's x and y axes (so it reads upright), then tilted.
    cam_to_world = camera.rotation.T
    r = (cam_to_world @ rotation_about_axis([0, 0, 1], yaw_deg) @ rotation_about_axis([1, 0, 0], tilt_deg[0])
         @ rotation_about_axis([0, 1, 0], tilt_deg[1]))
    c = grid.centres()
    mid = 0.5 * (c.min(axis=0) + c.max(axis=0))
    return r, centre - r @ mid


def render_circle_grid_view(camera: Camera, board_rotation, board_origin, grid: CircleGrid, rng, *,
                            lighting: rd.Lighting | None = None, sensor: rd.SensorModel | None = None,
                            supersample: int = 4, bundle: rd.RayBundle | None = None):
    """Render one camera image of a circle grid and the true centre projections.

    Parameters
    ----------
    camera : Camera
    board_rotation, board_origin : board -> world pose (see :func:`render_radiance_circles`).
    grid : CircleGrid
    rng : numpy Generator for the sensor noise.
    lighting, sensor : radiometry and sensor (the synthetic sessions' defaults when None).
    supersample : samples per pixel along each axis.
    bundle : reuse a RayBundle of this camera (built when None).

    Returns
    -------
    image : uint8 or uint16 (height, width)
    centres_px : (cols * rows, 2) px, the true projections of the circle centres
        (board frame order, row by row).
    """
    lighting = lighting or rd.Lighting()
    sensor = sensor or rd.SensorModel(supersample=supersample)
    if sensor.supersample != supersample:
        sensor = dataclasses.replace(sensor, supersample=supersample)
    bundle = bundle or rd.RayBundle(camera, supersample)
    rad = render_radiance_circles(bundle, board_rotation, board_origin, grid, lighting)
    image = rd.expose(rad, sensor, rng)
    world = grid.centres() @ np.asarray(board_rotation, float).T + np.asarray(board_origin, float)
    return image, camera.project(world)
