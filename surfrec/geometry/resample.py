"""Heights on a regular datum-frame grid from disparities on the rectified matching grid.

Frames: matches come on a regular grid of the rectified LEFT image (u, v)
px with disparity d px (docs/conventions.md); points are triangulated into the left
camera frame (mm) and carried into the datum frame (x, y in the still-water
plane, z = height up toward the cameras, mm) by the inverse of the datum's
``world_to_left_camera``. Heights come out on a regular (x, y) grid, mm.

Why the resampling is not a scattered-data interpolation
--------------------------------------------------------
The measured points move sideways as the surface moves (a point's (x, y)
depends on its height: parallax), so they form a different scattered set
every frame, and a Delaunay triangulation per frame would be the textbook
answer. But each triangulated point lies on the left camera's ray through
its grid pixel, and those rays are fixed. A surface point (X, Y, h) is
therefore seen at the rectified pixel pi(X, Y, h), a fixed projective map of
the datum frame (:func:`datum_to_rectified`), and the height field of the
node (X, Y) solves the one-dimensional equation

    h = H(pi(X, Y, h)),

where H(u, v) is the measured height interpolated on the regular matching
grid. The 2-D inversion of the deformed grid map (u, v) -> (x, y) collapses
into this scalar fixed point, started from the still-water map (h = 0),
which is fixed. Its contraction rate is the surface slope times the
parallax, |grad H . d pi / dh|, a few hundredths for millimetre waves seen
from a metre away, so 3 to 5 iterations reach 1e-6 mm. Where it does not
converge the camera's ray grazes the surface (a fold) and the node is NaN.
An iterate that lands in a cell beside an invalid match restarts once from
the mean of the valid neighbours, so a hole costs only the nodes whose own
position lies in its cells.

Interpolation in (u, v) is third-order accurate: cubic convolution (R. Keys,
IEEE Trans. ASSP 29 (1981) 1153, a = -1/2, i.e. Catmull–Rom, 4x4 neighbours) where all 16 neighbours are
valid, and a quadratic Lagrange stencil on the open side (3 points, the same
order) in a direction where the grid's edge or an invalid point cuts the 4x4
block; bilinear only where neither fits. A node whose enclosing cell holds an
invalid point, or that falls outside the matching grid, is NaN: nothing is
extrapolated. The random 1-sigma is interpolated bilinearly from the
per-point sigma_h = |dh/dd| sigma_d (neighbouring matches share most of
their correlation windows, so their errors are taken as fully correlated,
the conservative choice).

All functions are pure functions on arrays.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numba import njit, prange

from surfrec.geometry.triangulate import triangulate

# Refuse grids with more nodes than this per frame (two float32 fields of
# this size are already 400 MB per frame).
MAX_NODES = 50_000_000
DEFAULT_TOL_MM = 1e-6
DEFAULT_MAX_ITER = 20

# Result codes per node, for the statistics.
_OUTSIDE, _CUBIC, _BILINEAR, _INVALID, _NO_CONVERGENCE = 0, 1, 2, 3, 4

__all__ = ["MAX_NODES", "GridPlan", "HeightResampler", "ResampleStats", "datum_to_rectified", "default_grid_step",
           "exclusion_mask", "footprint_mask", "grid_axes", "grid_size", "height_gain", "heights_on_matching_grid",
           "nice_step", "plan_grid", "point_in_polygon", "still_water_points"]


def datum_to_rectified(world_to_left_camera, r1, p1) -> np.ndarray:
    """Projective map from the datum frame to the rectified left image.

    Parameters
    ----------
    world_to_left_camera : (4, 4) datum-frame mm -> left-camera mm.
    r1 : (3, 3) left rectifying rotation (left camera frame -> left rectified frame).
    p1 : (3, 4) rectified left projection (acts on the left rectified frame).

    Returns
    -------
    (3, 4) float64 A: [u w, v w, w]^T = A [x, y, z, 1]^T for datum-frame
    points (mm) and rectified left px (u, v).
    """
    rect = np.eye(4)
    rect[:3, :3] = np.asarray(r1, np.float64)
    return np.asarray(p1, np.float64) @ rect @ np.asarray(world_to_left_camera, np.float64)


def heights_on_matching_grid(u, v, d, q, r1, world_to_left_camera):
    """Datum-frame positions of the matches of one frame and their height gain.

    Parameters
    ----------
    u : (Nu,) px, v : (Nv,) px
        Rectified left-image grid.
    d : (Nv, Nu) px
        Disparity d = u_left - u_right, NaN where invalid.
    q : (4, 4) OpenCV reprojection matrix; r1 : (3, 3) left rectifying rotation.
    world_to_left_camera : (4, 4) datum-frame mm -> left-camera mm.

    Returns
    -------
    points : (Nv, Nu, 3) float64
        x, y, height in the datum frame, mm; NaN where d is NaN.
    gain : (Nv, Nu) float64
        dh/dd, mm per px of disparity along the left camera's ray (see
        :func:`height_gain`).
    """
    uu, vv = np.meshgrid(np.asarray(u, np.float64), np.asarray(v, np.float64))
    d = np.asarray(d, np.float64)
    cam = triangulate(uu, vv, d, q, r1)
    m = np.asarray(world_to_left_camera, np.float64)
    # Datum-frame point: R^T (X_cam - t), written for row vectors.
    pts = (cam - m[:3, 3]) @ m[:3, :3]
    return pts, height_gain(uu, vv, d, q, r1, m)


def height_gain(u, v, d, q, r1, world_to_left_camera) -> np.ndarray:
    """dh/dd: change of the datum-frame height per px of disparity at a fixed rectified left pixel, mm/px.

    Analytic: the rectified point is N(d) / W(d) with N_i = Q_i . [u, v, d, 1]
    and W = Q_3 . [u, v, d, 1] (OpenCV's Q), so dX_i/dd = (Q_i2 W - N_i Q_32) / W^2;
    the height is the datum z axis (the plane normal) dotted with R1^T X_rect.

    Parameters
    ----------
    u, v : rectified left px; d : disparity px (broadcast together).
    q, r1 : see :func:`heights_on_matching_grid`.
    world_to_left_camera : (4, 4).

    Returns
    -------
    ndarray of the broadcast shape, mm/px (negative: a larger disparity is a
    nearer, higher point); NaN where d is NaN.
    """
    u, v, d = np.broadcast_arrays(np.asarray(u, np.float64), np.asarray(v, np.float64), np.asarray(d, np.float64))
    q = np.asarray(q, np.float64)
    normal_rect = np.asarray(r1, np.float64) @ np.asarray(world_to_left_camera, np.float64)[:3, 2]
    n = [q[i, 0] * u + q[i, 1] * v + q[i, 2] * d + q[i, 3] for i in range(4)]
    with np.errstate(divide="ignore", invalid="ignore"):
        w2 = n[3] * n[3]
        out = sum(normal_rect[i] * (q[i, 2] * n[3] - n[i] * q[3, 2]) for i in range(3)) / w2
    return np.where(w2 > 0, out, np.nan)


def still_water_points(u, v, world_to_left_camera, r1, p1):
    """Datum-frame (x, y) where each rectified left pixel's ray meets the still water (z = 0).

    Parameters
    ----------
    u (Nu,), v (Nv,) : rectified left px.
    world_to_left_camera, r1, p1 : see :func:`datum_to_rectified`.

    Returns
    -------
    (Nv, Nu, 2) float64 mm, NaN where the ray misses the plane in front of the camera.
    """
    a = datum_to_rectified(world_to_left_camera, r1, p1)
    # For z = 0 the map is the homography of columns 0, 1, 3 of A.
    hom = a[:, [0, 1, 3]]
    inv = np.linalg.inv(hom)
    uu, vv = np.meshgrid(np.asarray(u, np.float64), np.asarray(v, np.float64))
    p = np.stack([uu, vv, np.ones_like(uu)], axis=-1) @ inv.T
    with np.errstate(divide="ignore", invalid="ignore"):
        xy = p[..., :2] / p[..., 2:3]
    # A point in front of the camera has a positive projective depth w.
    w = np.stack([xy[..., 0], xy[..., 1], np.ones_like(uu)], -1) @ hom[2]
    return np.where((w > 0)[..., None], xy, np.nan)


def nice_step(spacing_mm: float) -> float:
    """The largest of 1, 1.2, 1.5, 2, 2.5, 3, 4, 5 x 10^k mm not above ``spacing_mm``.

    Grid steps from this series give round node coordinates (a user's
    common-practice choice), never coarser than the data.
    """
    if not (spacing_mm > 0 and math.isfinite(spacing_mm)):
        raise ValueError(f"point spacing must be positive and finite, got {spacing_mm!r} mm")
    k = math.floor(math.log10(spacing_mm))
    for mant in (5, 4, 3, 2.5, 2, 1.5, 1.2, 1):
        s = mant * 10.0 ** k
        if s <= spacing_mm * (1 + 1e-9):
            return float(round(s, 12))
    return float(10.0 ** k)


def default_grid_step(still_xy, spacing: float | None = None) -> float:
    """Default output grid step from the spacing of the matches on the still water, mm.

    Parameters
    ----------
    still_xy : (Nv, Nu, 2) datum-frame mm of the matching grid on the still
        water (:func:`still_water_points`), NaN outside the usable area.

    Returns
    -------
    mm: :func:`nice_step` of the median spacing of neighbouring points along
    the coarser grid direction (one node per match: finer grids add no
    information, coarser ones throw it away). ``spacing``: that median, if already at hand.
    """
    spacing = _median_spacing(still_xy) if spacing is None else spacing
    if not np.isfinite(spacing):
        raise ValueError("no two neighbouring matching points on the still water")
    return nice_step(spacing)


def grid_size(extent, step: float) -> tuple[int, int]:
    """Nodes (Ny, Nx) of the grid :func:`grid_axes` makes for ``extent`` (mm) and ``step`` (mm)."""
    xmin, xmax, ymin, ymax = map(float, extent)
    nx = int(math.floor((xmax - xmin) / step * (1 + 1e-12) + 1e-9)) + 1
    ny = int(math.floor((ymax - ymin) / step * (1 + 1e-12) + 1e-9)) + 1
    return ny, nx


def grid_axes(extent, step: float, *, snap: bool = False):
    """Node coordinates of a regular datum-frame grid.

    Parameters
    ----------
    extent : (xmin, xmax, ymin, ymax) mm, datum frame.
    step : node spacing, mm.
    snap : widen the extent outward to whole multiples of ``step`` (so that
        grids of different runs share nodes); otherwise the first node is at
        (xmin, ymin) and the last at or below (xmax, ymax).

    Returns
    -------
    x (Nx,), y (Ny,) float64 mm.

    Raises
    ------
    ValueError
        For a non-positive step, an empty extent, or more than
        :data:`MAX_NODES` nodes.
    """
    xmin, xmax, ymin, ymax = map(float, extent)
    if not (step > 0 and math.isfinite(step)):
        raise ValueError(f"grid step must be positive, got {step!r} mm")
    if not (xmax > xmin and ymax > ymin):
        raise ValueError(f"extent {xmin:g},{xmax:g},{ymin:g},{ymax:g} is empty (need XMIN < XMAX and YMIN < YMAX)")
    if snap:
        xmin, ymin = math.floor(xmin / step) * step, math.floor(ymin / step) * step
        xmax, ymax = math.ceil(xmax / step) * step, math.ceil(ymax / step) * step
    ny, nx = grid_size((xmin, xmax, ymin, ymax), step)
    if nx * ny > MAX_NODES:
        raise ValueError(f"a {step:g} mm grid over x {xmin:g}..{xmax:g} mm, y {ymin:g}..{ymax:g} mm has "
                         f"{nx} x {ny} = {nx * ny:,} nodes per frame, above the limit of {MAX_NODES:,}")
    # Multiples of the step (not cumulative sums) keep node coordinates round.
    return xmin + step * np.arange(nx), ymin + step * np.arange(ny)


def point_in_polygon(x, y, vertices) -> np.ndarray:
    """Even-odd test of points against a simple polygon.

    Written here (a few lines of numpy) rather than taken from a plotting
    library, so that geometry/ needs no graphics import.

    Parameters
    ----------
    x, y : array_like (broadcast together), mm.
    vertices : (N, 2) polygon vertices, mm (N >= 3; closing edge implied).

    Returns
    -------
    bool ndarray of the broadcast shape (points on an edge may fall either side).
    """
    x, y = np.broadcast_arrays(np.asarray(x, np.float64), np.asarray(y, np.float64))
    p = np.asarray(vertices, np.float64)
    if p.ndim != 2 or p.shape[1] != 2 or p.shape[0] < 3:
        raise ValueError("a polygon needs at least 3 vertices (x, y)")
    inside = np.zeros(x.shape, bool)
    xj, yj = p[-1]
    for xi, yi in p:
        # Edges that straddle the horizontal line through the point, crossed to its right.
        straddle = (yi > y) != (yj > y)
        with np.errstate(divide="ignore", invalid="ignore"):
            cross = x < (xj - xi) * (y - yi) / (yj - yi) + xi
        inside ^= straddle & cross
        xj, yj = xi, yi
    return inside


def exclusion_mask(x, y, *, circles=(), polygons=()) -> np.ndarray:
    """Nodes to blank (posts, drains, walls).

    Parameters
    ----------
    x (Nx,), y (Ny,) : grid, datum frame mm.
    circles : sequence of (xc, yc, r) mm.
    polygons : sequence of (N, 2) vertex arrays, mm.

    Returns
    -------
    (Ny, Nx) bool, True = excluded.
    """
    xx, yy = np.meshgrid(np.asarray(x, np.float64), np.asarray(y, np.float64))
    out = np.zeros(xx.shape, bool)
    for xc, yc, r in circles:
        out |= (xx - xc) ** 2 + (yy - yc) ** 2 <= r * r
    for poly in polygons:
        out |= point_in_polygon(xx, yy, poly)
    return out


def footprint_mask(x, y, grid_u, grid_v, world_to_left_camera, r1, p1, *, ref_u=None, ref_v=None,
                   ref_valid=None) -> np.ndarray:
    """Nodes inside the area both cameras see: the measurable footprint of a grid.

    A node (x, y) belongs to it when its still-water image pi(x, y, 0) lies
    inside the matching grid and, given the datum's reference grid and
    validity, inside a cell whose four reference points are all valid (the
    datum found still water seen by both cameras there).

    Parameters
    ----------
    x (Nx,), y (Ny,) : datum-frame grid, mm.
    grid_u (Nu,), grid_v (Nv,) : rectified left px of the matching grid.
    world_to_left_camera, r1, p1 : see :func:`datum_to_rectified`.
    ref_u, ref_v, ref_valid : the datum's grid (px) and its (Nv', Nu') validity, optional.

    Returns
    -------
    (Ny, Nx) bool.
    """
    uu, vv = _project_nodes(x, y, 0.0, datum_to_rectified(world_to_left_camera, r1, p1))
    gu = np.asarray(grid_u, np.float64)
    gv = np.asarray(grid_v, np.float64)
    inside = (uu >= gu[0]) & (uu <= gu[-1]) & (vv >= gv[0]) & (vv <= gv[-1])
    if ref_valid is not None:
        ru, rv = np.asarray(ref_u, np.float64), np.asarray(ref_v, np.float64)
        valid = np.asarray(ref_valid, bool)
        # A cell counts as seen when all four of its corners are valid.
        cell = valid[:-1, :-1] & valid[1:, :-1] & valid[:-1, 1:] & valid[1:, 1:]
        iu = np.searchsorted(ru, uu, side="right") - 1
        iv = np.searchsorted(rv, vv, side="right") - 1
        ok = inside & (iu >= 0) & (iu < ru.size - 1) & (iv >= 0) & (iv < rv.size - 1)
        seen = np.zeros(uu.shape, bool)
        seen[ok] = cell[iv[ok], iu[ok]]
        inside &= seen
    return inside


def _project_nodes(x, y, z, a):
    xx, yy = np.meshgrid(np.asarray(x, np.float64), np.asarray(y, np.float64))
    with np.errstate(divide="ignore", invalid="ignore"):
        w = a[2, 0] * xx + a[2, 1] * yy + a[2, 2] * z + a[2, 3]
        w = np.where(w > 0, w, np.nan)
        uu = (a[0, 0] * xx + a[0, 1] * yy + a[0, 2] * z + a[0, 3]) / w
        vv = (a[1, 0] * xx + a[1, 1] * yy + a[1, 2] * z + a[1, 3]) / w
    return uu, vv


@dataclass
class ResampleStats:
    """Counts of one frame's nodes by how they were resampled.

    cubic, bilinear : nodes interpolated to third order (cubic convolution, or
    a quadratic stencil at an edge) / bilinearly (where no third-order stencil
    of valid points fits); invalid : the enclosing
    cell holds an invalid point (or lies outside the grid); unconverged : the
    fixed point did not converge (a fold); outside : nodes outside the mask;
    max_iterations : the most fixed-point iterations any node needed.
    """

    cubic: int = 0
    bilinear: int = 0
    invalid: int = 0
    unconverged: int = 0
    outside: int = 0
    max_iterations: int = 0

    def add(self, other: "ResampleStats") -> None:
        """Accumulate another frame's counts."""
        for k in ("cubic", "bilinear", "invalid", "unconverged", "outside"):
            setattr(self, k, getattr(self, k) + getattr(other, k))
        self.max_iterations = max(self.max_iterations, other.max_iterations)


@dataclass
class HeightResampler:
    """Resample one frame's disparities onto a fixed datum-frame grid (see the module docstring).

    Parameters
    ----------
    u (Nu,), v (Nv,) : rectified left px of the matching grid (regular).
    q : (4, 4) reprojection matrix; r1 : (3, 3); p1 : (3, 4) (rig.json rectification).
    world_to_left_camera : (4, 4) datum-frame mm -> left-camera mm.
    x (Nx,), y (Ny,) : output grid, datum frame mm.
    mask : (Ny, Nx) bool or None, nodes to compute (the footprint minus
        exclusions); others are NaN.
    still : (Ny, Nx) mm or None, the still-water residual at the nodes,
        subtracted from the heights (the still-water correction).
    tol_mm : convergence tolerance of the fixed point, mm.
    max_iter : iteration cap per node.
    method : "cubic" (cubic convolution with a bilinear fallback) or "linear".
    """

    u: np.ndarray
    v: np.ndarray
    q: np.ndarray
    r1: np.ndarray
    p1: np.ndarray
    world_to_left_camera: np.ndarray
    x: np.ndarray
    y: np.ndarray
    mask: np.ndarray | None = None
    still: np.ndarray | None = None
    tol_mm: float = DEFAULT_TOL_MM
    max_iter: int = DEFAULT_MAX_ITER
    method: str = "cubic"
    _a: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        self.u = np.asarray(self.u, np.float64)
        self.v = np.asarray(self.v, np.float64)
        self.x = np.asarray(self.x, np.float64)
        self.y = np.asarray(self.y, np.float64)
        self._uu, self._vv = np.meshgrid(self.u, self.v)  # the fixed matching grid, for every frame
        for name, g in (("u", self.u), ("v", self.v)):
            step = np.diff(g)
            if g.size < 2 or not np.all(step > 0) or np.ptp(step) > 1e-9 * abs(step[0]):
                raise ValueError(f"matching grid {name} must be regular and increasing")
        if self.method not in ("cubic", "linear"):
            raise ValueError(f"method must be 'cubic' or 'linear', got {self.method!r}")
        shape = (self.y.size, self.x.size)
        self.mask = np.ones(shape, bool) if self.mask is None else np.asarray(self.mask, bool)
        if self.mask.shape != shape:
            raise ValueError(f"mask has shape {self.mask.shape}, expected {shape}")
        if self.still is not None:
            self.still = np.asarray(self.still, np.float64)
            if self.still.shape != shape:
                raise ValueError(f"still residual has shape {self.still.shape}, expected {shape}")
        self.world_to_left_camera = np.asarray(self.world_to_left_camera, np.float64)
        self._a = datum_to_rectified(self.world_to_left_camera, self.r1, self.p1)

    def __call__(self, disparity, disparity_sigma=None):
        """Heights and their random 1-sigma on the output grid for one frame.

        Parameters
        ----------
        disparity : (Nv, Nu) px, NaN where invalid.
        disparity_sigma : (Nv, Nu) px 1-sigma, or None (then the uncertainty is NaN).

        Returns
        -------
        height : (Ny, Nx) float64 mm, datum frame, still-water corrected if
            ``still`` was given; NaN where not measured.
        sigma : (Ny, Nx) float64 mm, the random 1-sigma |dh/dd| sigma_d.
        stats : ResampleStats
        """
        d = np.asarray(disparity, np.float64)
        if d.shape != (self.v.size, self.u.size):
            raise ValueError(f"disparity has shape {d.shape}, expected {(self.v.size, self.u.size)} (Nv, Nu)")
        m = np.asarray(self.world_to_left_camera, np.float64)
        # heights_on_matching_grid, with the grid's meshgrid made once (in __post_init__)
        cam = triangulate(self._uu, self._vv, d, self.q, self.r1)
        h_nodes = np.ascontiguousarray(((cam - m[:3, 3]) @ m[:3, :3])[..., 2])
        gain = height_gain(self._uu, self._vv, d, self.q, self.r1, m)
        if disparity_sigma is None:
            s_nodes = np.full(d.shape, np.nan)
        else:
            s_nodes = np.abs(gain) * np.asarray(disparity_sigma, np.float64)
        return self.resample_heights(h_nodes, s_nodes)

    def resample_heights(self, h_nodes, s_nodes):
        """Resample heights already known at the matching-grid points (:meth:`__call__` after triangulation).

        Parameters
        ----------
        h_nodes, s_nodes : (Nv, Nu) mm, datum-frame height of each match and its 1-sigma.

        Returns
        -------
        height, sigma, stats : as :meth:`__call__`.
        """
        shape = (self.y.size, self.x.size)
        out_h = np.empty(shape)
        out_s = np.empty(shape)
        code = np.empty(shape, np.uint8)
        iters = np.zeros(shape, np.uint8)
        _resample_kernel(np.ascontiguousarray(h_nodes, np.float64), np.ascontiguousarray(s_nodes, np.float64),
                         self.u[0], self.u[1] - self.u[0], self.v[0], self.v[1] - self.v[0], self._a,
                         self.x, self.y, self.mask, float(self.tol_mm), int(self.max_iter),
                         self.method == "cubic", out_h, out_s, code, iters)
        if self.still is not None:
            out_h -= self.still
        counts = np.bincount(code.ravel(), minlength=5)
        stats = ResampleStats(cubic=int(counts[_CUBIC]), bilinear=int(counts[_BILINEAR]),
                              invalid=int(counts[_INVALID]), unconverged=int(counts[_NO_CONVERGENCE]),
                              outside=int(counts[_OUTSIDE]), max_iterations=int(iters.max(initial=0)))
        return out_h, out_s, stats


# --- compiled kernel --------------------------------------------------------------------------------
# Hand-written (numba) because no library interpolates a regular grid at points
# found by a per-node fixed point, locally (4x4 neighbours, NaN-aware) and fast.

# Stencils per direction, in order of preference: cubic convolution (4 points),
# quadratic Lagrange one-sided at an edge or beside an invalid point (3
# points, the same third order), linear (2 points).
_STENCILS = ((0, -1, 4), (1, -1, 3), (2, 0, 3), (3, 0, 2))  # (kind, first offset, points)


@njit(cache=True, inline="always")
def _weights(kind, t):
    if kind == 0:  # Catmull-Rom (Keys a = -1/2) on offsets -1, 0, 1, 2
        t2 = t * t
        t3 = t2 * t
        return (0.5 * (-t3 + 2.0 * t2 - t), 0.5 * (3.0 * t3 - 5.0 * t2 + 2.0),
                0.5 * (-3.0 * t3 + 4.0 * t2 + t), 0.5 * (t3 - t2))
    if kind == 1:  # quadratic through offsets -1, 0, 1
        return (0.5 * t * (t - 1.0), 1.0 - t * t, 0.5 * t * (t + 1.0), 0.0)
    if kind == 2:  # quadratic through offsets 0, 1, 2
        return (0.5 * (t - 1.0) * (t - 2.0), -t * (t - 2.0), 0.5 * t * (t - 1.0), 0.0)
    return (1.0 - t, t, 0.0, 0.0)


@njit(cache=True, inline="always")
def _fits(kind, i, n):
    if kind == 0:
        return i >= 1 and i + 2 <= n - 1
    if kind == 1:
        return i >= 1
    if kind == 2:
        return i + 2 <= n - 1
    return True


@njit(cache=True)
def _interp(hh, ss, fu, fv, cubic):
    """(height, sigma, code) at fractional grid indices (fu column, fv row)."""
    nv, nu = hh.shape
    nan = np.nan
    if not (fu >= 0.0 and fu <= nu - 1 and fv >= 0.0 and fv <= nv - 1):
        return nan, nan, _INVALID
    iu = min(int(fu), nu - 2)
    iv = min(int(fv), nv - 2)
    tu = fu - iu
    tv = fv - iv
    h00, h01, h10, h11 = hh[iv, iu], hh[iv, iu + 1], hh[iv + 1, iu], hh[iv + 1, iu + 1]
    if not (np.isfinite(h00) and np.isfinite(h01) and np.isfinite(h10) and np.isfinite(h11)):
        return nan, nan, _INVALID
    s = ((1 - tv) * ((1 - tu) * ss[iv, iu] + tu * ss[iv, iu + 1])
         + tv * ((1 - tu) * ss[iv + 1, iu] + tu * ss[iv + 1, iu + 1]))
    if cubic:
        # The first stencil pair (most accurate first) that fits the grid and holds only valid points.
        for ku, ou, nsu in _STENCILS[:3]:
            if not _fits(ku, iu, nu):
                continue
            wu = _weights(ku, tu)
            for kv, ov, nsv in _STENCILS[:3]:
                if not _fits(kv, iv, nv):
                    continue
                wv = _weights(kv, tv)
                acc = 0.0
                for a in range(nsv):
                    row = 0.0
                    for b in range(nsu):
                        row += wu[b] * hh[iv + ov + a, iu + ou + b]
                    acc += wv[a] * row
                if np.isfinite(acc):
                    return acc, s, _CUBIC
    h = (1 - tv) * ((1 - tu) * h00 + tu * h01) + tv * ((1 - tu) * h10 + tu * h11)
    return h, s, _BILINEAR


@njit(cache=True)
def _neighbour_mean(hh, fu, fv):
    nv, nu = hh.shape
    if not (fu > -1.0 and fu < nu and fv > -1.0 and fv < nv):
        return np.nan
    iu = int(np.floor(fu))
    iv = int(np.floor(fv))
    acc = 0.0
    n = 0
    for a in range(max(iv - 1, 0), min(iv + 3, nv)):
        for b in range(max(iu - 1, 0), min(iu + 3, nu)):
            if np.isfinite(hh[a, b]):
                acc += hh[a, b]
                n += 1
    return acc / n if n else np.nan


@njit(parallel=True, cache=True)
def _resample_kernel(hh, ss, u0, du, v0, dv, a, xs, ys, mask, tol, max_iter, cubic, out_h, out_s, code, iters):
    ny, nx = mask.shape
    for j in prange(ny):
        for i in range(nx):
            out_h[j, i] = np.nan
            out_s[j, i] = np.nan
            if not mask[j, i]:
                code[j, i] = _OUTSIDE
                continue
            x = xs[i]
            y = ys[j]
            # pi(x, y, h) = (a0 + b0 h, a1 + b1 h) / (a2 + b2 h): affine in h before the division.
            a0 = a[0, 0] * x + a[0, 1] * y + a[0, 3]
            a1 = a[1, 0] * x + a[1, 1] * y + a[1, 3]
            a2 = a[2, 0] * x + a[2, 1] * y + a[2, 3]
            b0, b1, b2 = a[0, 2], a[1, 2], a[2, 2]
            h = 0.0
            restarted = False
            result = _NO_CONVERGENCE
            for it in range(max_iter):
                w = a2 + b2 * h
                if not w > 0.0:
                    result = _INVALID
                    break
                fu = ((a0 + b0 * h) / w - u0) / du
                fv = ((a1 + b1 * h) / w - v0) / dv
                hn, sn, kind = _interp(hh, ss, fu, fv, cubic)
                iters[j, i] = it + 1
                if kind == _INVALID:
                    # The still-water start may sit in a cell beside a hole that the node's
                    # true position avoids: restart once from the valid neighbours' mean.
                    h0 = _neighbour_mean(hh, fu, fv) if not restarted else np.nan
                    if np.isfinite(h0):
                        h = h0
                        restarted = True
                        continue
                    result = _INVALID
                    break
                if abs(hn - h) <= tol:
                    out_h[j, i] = hn
                    out_s[j, i] = sn
                    result = kind
                    break
                h = hn
            code[j, i] = result


@dataclass
class GridPlan:
    """The output grid of a run and what is fixed on it (see :func:`plan_grid`).

    Attributes
    ----------
    x (Nx,), y (Ny,) : node coordinates, datum frame mm.
    step : grid step, mm; step_given : whether the user chose it.
    extent : (xmin, xmax, ymin, ymax) mm of the nodes; extent_given : likewise.
    point_spacing_mm : median spacing of the matches on the still water, mm.
    footprint : (Ny, Nx) bool, nodes inside the area both cameras see and not excluded.
    excluded : (Ny, Nx) bool, nodes blanked by the exclusions.
    still : (Ny, Nx) mm or None, the still-water residual at the nodes (0 outside the footprint).
    measured_extent : (xmin, xmax, ymin, ymax) mm of the area both cameras see.
    """

    x: np.ndarray
    y: np.ndarray
    step: float
    step_given: bool
    extent: tuple
    extent_given: bool
    point_spacing_mm: float
    footprint: np.ndarray
    excluded: np.ndarray
    still: np.ndarray | None
    measured_extent: tuple


def plan_grid(grid_u, grid_v, r1, p1, datum, *, step=None, extent=None, circles=(), polygons=(),
              still_correction: bool = True) -> GridPlan:
    """Choose the output grid of a run: step, extent, footprint, exclusions and still-water correction.

    Parameters
    ----------
    grid_u (Nu,), grid_v (Nv,) : rectified left px of the matching grid.
    r1 : (3, 3), p1 : (3, 4) : rectification (rig.json).
    datum : surfrec.geometry.datum.Datum (frame, reference grid and validity, still residual).
    step : grid step, mm, or None for :func:`default_grid_step` of the matches' spacing.
    extent : (xmin, xmax, ymin, ymax) datum-frame mm, or None for the area both
        cameras see (the datum's valid reference area), snapped outward to
        whole steps.
    circles : (xc, yc, r) mm to blank; polygons : (N, 2) vertex arrays, mm, to blank.
    still_correction : look up the still residual at the nodes; nodes where
        it is unknown (outside its footprint) leave the footprint.

    Returns
    -------
    GridPlan

    Raises
    ------
    ValueError
        With a message for the user: a grid above :data:`MAX_NODES` nodes, an
        extent that misses the measured area, no measured area at all.
    """
    m = datum.world_to_left_camera
    still_grid = still_water_points(grid_u, grid_v, m, r1, p1)
    point_spacing = _median_spacing(still_grid)
    spacing = default_grid_step(still_grid, point_spacing)
    ref = still_water_points(datum.u, datum.v, m, r1, p1)[np.asarray(datum.valid, bool)]
    ref = ref[np.all(np.isfinite(ref), axis=1)]
    if ref.size == 0:
        raise ValueError("the datum holds no valid still-water point")
    measured = (float(ref[:, 0].min()), float(ref[:, 0].max()), float(ref[:, 1].min()), float(ref[:, 1].max()))
    step_given = step is not None
    step = float(step) if step_given else spacing
    extent_given = extent is not None
    x, y = grid_axes(extent if extent_given else measured, step, snap=not extent_given)
    footprint = footprint_mask(x, y, grid_u, grid_v, m, r1, p1, ref_u=datum.u, ref_v=datum.v, ref_valid=datum.valid)
    if not footprint.any():
        mx = measured
        raise ValueError(f"extent x {x[0]:g}..{x[-1]:g} mm, y {y[0]:g}..{y[-1]:g} mm lies outside the measured "
                         f"area (x {mx[0]:.1f}..{mx[1]:.1f} mm, y {mx[2]:.1f}..{mx[3]:.1f} mm, datum frame)")
    if not extent_given:
        # Trim the snapped box to the rows and columns that hold measurable nodes.
        rows, cols = np.flatnonzero(footprint.any(axis=1)), np.flatnonzero(footprint.any(axis=0))
        x, y = x[cols[0]:cols[-1] + 1], y[rows[0]:rows[-1] + 1]
        footprint = footprint[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    excluded = exclusion_mask(x, y, circles=circles, polygons=polygons)
    footprint = footprint & ~excluded
    still = None
    if still_correction:
        xx, yy = np.meshgrid(x, y)
        still = datum.still_residual_at(xx, yy)
        footprint &= np.isfinite(still)
        still = np.where(footprint, still, 0.0)
    if not footprint.any():
        raise ValueError("no node of the grid is left to measure: the exclusions cover the whole measured area")
    return GridPlan(x=x, y=y, step=step, step_given=step_given,
                    extent=(float(x[0]), float(x[-1]), float(y[0]), float(y[-1])), extent_given=extent_given,
                    point_spacing_mm=point_spacing, footprint=footprint, excluded=excluded, still=still,
                    measured_extent=measured)


def _median_spacing(still_xy) -> float:
    p = np.asarray(still_xy, np.float64)
    du = np.linalg.norm(np.diff(p, axis=1), axis=-1)
    dv = np.linalg.norm(np.diff(p, axis=0), axis=-1)
    du, dv = du[np.isfinite(du)], dv[np.isfinite(dv)]
    if du.size == 0 or dv.size == 0:
        return float("nan")
    return max(float(np.median(du)), float(np.median(dv)))
