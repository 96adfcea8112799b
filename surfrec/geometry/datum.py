"""The still-water datum: the plane, the datum (world) frame, the still-water residual and the noise floor.

Datum frame (docs/conventions.md): origin where the left camera's optical axis meets
the still-water plane; z = the plane's unit normal, pointing up toward the
cameras; x = the left camera's x axis projected onto the plane, normalised;
y = z × x. Seen from the cameras, x runs to the right of the left image and
y up it. A user may move the origin and turn the axes in the plane to get
tank coordinates (``--origin X,Y --rotate DEG``): the new origin is the point
(X, Y) of the frame above, and the new x axis is the old one turned by DEG
counter-clockwise about z (seen from above, i.e. from the cameras). The
datum then holds only the final frame.

Still-water residual. Calibration errors (above all in the distortion terms)
bend a flat surface into a smooth shape, the same on every later frame. The
shape is estimated as a polynomial of total degree ``degree`` (default 6) in
the datum-frame x, y, fitted by least squares to the per-point height
residuals from the fitted plane, averaged over the still frames. Why a
global polynomial and not a smoothing spline: the bends that lens
distortion errors give are themselves low-order polynomials of the image
coordinates (radial terms r^2, r^4, r^6 and the tangential terms, mapped
smoothly to the plane), so a degree-6 polynomial holds them with 28
coefficients and no smoothing parameter to tune, it cannot follow the
matching noise (tens of thousands of points per coefficient set), and it
cannot follow a local feature either, which is what we want: a local
feature on still water is not a calibration error. It is stored sampled on
a regular datum-frame grid, NaN more than a few grid steps outside the
measured footprint (a polynomial is not to be trusted far from its data).

Noise floor: the per-point scatter (standard deviation, ddof = 1) across the
still frames of the height above the plane, mm. Each frame has a fresh
speckle pattern, so it is the rig's random height error on one frame.

All functions are pure functions on arrays; positions in the left camera
frame (x right, y down, z along the optical axis, mm) unless a docstring
says datum frame.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage
from scipy.interpolate import RegularGridInterpolator
from scipy.spatial import cKDTree

from surfrec.geometry.plane import (DEFAULT_THRESHOLD, PolynomialSurface, fit_plane, fit_polynomial_surface,
                                    polynomial_terms, robust_plane)
from surfrec.geometry.triangulate import height_sensitivity, project_rectified, triangulate

DEFAULT_DEGREE = 6
DEFAULT_STEP_MM = 2.0
# Fewer valid points than this cannot pin a plane and a smooth shape reliably.
MIN_POINTS = 200

# Warning thresholds (design choices, stated in docs/file-formats.md):
# - the part of the still-water residual that the smooth shape does not hold
#   (ripples, a seiche, floating dirt) beyond this many times what the
#   noise floor explains, averaged over the frames;
ROUGH_FACTOR = 3.0
#   and beyond this much in mm: a very quiet rig should not warn about
#   micrometre structure (the rectification's interpolation error is of this order);
ROUGH_MIN_MM = 0.005
# - frame-to-frame scatter beyond this many times the matcher's own noise
#   estimate: the surface moved between frames;
SCATTER_FACTOR = 2.5
# - a smooth bend with an RMS above this, mm: heights stay correctable, but a
#   calibration this far off deserves a look (a tenth of a millimetre is the
#   resolution labs ask for, common practice);
SHAPE_WARN_MM = 0.1
# - a plane-fit RMS above this, mm, with no other explanation.
FIT_WARN_MM = 0.2


@dataclass
class Datum:
    """A still-water datum (what datum.h5 holds).

    Attributes
    ----------
    world_to_left_camera : (4, 4) float64, datum-frame mm -> left-camera mm
        (X_cam = M [X_datum, 1]).
    plane_normal : (3,) unit normal of the still water, left camera frame,
        pointing toward the cameras.
    plane_offset : float, mm: n·X = plane_offset on the plane (negative:
        minus the camera's distance from the plane).
    u (Nu,), v (Nv,) : rectified left px of the matching grid.
    disparity : (Nv, Nu) reference disparity, px, NaN where invalid.
    valid : (Nv, Nu) bool.
    residual_x (Mx,), residual_y (My,) : datum-frame mm of the residual grid.
    still_residual : (My, Mx) mm, the smooth departure of the still water
        from the plane (height above it), NaN outside the measured footprint.
    noise_floor : (Nv, Nu) mm, per-point height scatter across frames (NaN
        where fewer than 2 valid frames).
    fit_rms_mm : RMS of the plane-fit residuals (all inlier points of all frames), mm.
    n_frames : still frames used.
    rig_sha256 : SHA-256 of the rig.json the datum was made with.
    attrs : parameters and provenance (software, created, window, spacing, ...).
    point_residual : (Nv, Nu) mm or None, the per-point height above the
        plane averaged over frames (the data the smooth shape was fitted to).
    defects_left, defects_right : (H, W) bool or None, each camera's fixed
        defects (hot and dead pixels, original image px), applied by ``match``.
    """

    world_to_left_camera: np.ndarray
    plane_normal: np.ndarray
    plane_offset: float
    u: np.ndarray
    v: np.ndarray
    disparity: np.ndarray
    valid: np.ndarray
    residual_x: np.ndarray
    residual_y: np.ndarray
    still_residual: np.ndarray
    noise_floor: np.ndarray
    fit_rms_mm: float
    n_frames: int
    rig_sha256: str
    attrs: dict = field(default_factory=dict)
    point_residual: np.ndarray | None = None
    defects_left: np.ndarray | None = None
    defects_right: np.ndarray | None = None

    @property
    def left_camera_to_world(self) -> np.ndarray:
        """(4, 4) left-camera mm -> datum-frame mm."""
        return rigid_inverse(self.world_to_left_camera)

    def to_datum_frame(self, points) -> np.ndarray:
        """Left-camera points (..., 3) mm -> datum-frame points (..., 3) mm (z = height)."""
        m = self.left_camera_to_world
        return np.asarray(points, np.float64) @ m[:3, :3].T + m[:3, 3]

    def to_left_camera(self, points) -> np.ndarray:
        """Datum-frame points (..., 3) mm -> left-camera points (..., 3) mm."""
        m = self.world_to_left_camera
        return np.asarray(points, np.float64) @ m[:3, :3].T + m[:3, 3]

    def still_residual_at(self, x, y) -> np.ndarray:
        """The still-water residual at datum-frame (x, y) mm, bilinear; NaN outside its grid or footprint."""
        return still_residual_at(self.residual_x, self.residual_y, self.still_residual, x, y)


@dataclass
class StillWaterFit:
    """Everything :func:`fit_still_water` finds (the datum, plus diagnostics).

    Attributes
    ----------
    datum : Datum (``rig_sha256`` empty and ``attrs`` holding the fit's
        parameters; the caller adds provenance).
    heights : (F, Nv, Nu) mm, each frame's height above the plane (NaN where not an inlier).
    inliers : (F, Nv, Nu) bool, the measurements used.
    shape : PolynomialSurface of the still residual, datum-frame mm.
    stats : dict of the figures to report (mm unless named otherwise).
    warnings : list of str, plain-language warnings.
    """

    datum: Datum
    heights: np.ndarray
    inliers: np.ndarray
    shape: PolynomialSurface
    stats: dict
    warnings: list


def datum_frame(normal, offset: float, *, origin=(0.0, 0.0), rotate_deg: float = 0.0) -> np.ndarray:
    """The datum frame of a still-water plane, as the matrix world_to_left_camera.

    Parameters
    ----------
    normal : (3,) normal of the plane, left camera frame (either sign; it is
        turned to point toward the camera).
    offset : mm, n·X = offset on the plane (for the given ``normal``).
    origin : (X, Y) mm, the tank origin given in the convention frame (see
        the module docstring); (0, 0) keeps the convention's origin.
    rotate_deg : the tank x axis, degrees counter-clockwise from the
        convention's x axis about z (seen from the cameras).

    Returns
    -------
    (4, 4) float64: X_cam = M[:3, :3] X_datum + M[:3, 3], mm.

    Raises
    ------
    ValueError
        The left optical axis does not meet the plane in front of the camera,
        or the camera's x axis is perpendicular to the plane.
    """
    n = np.asarray(normal, np.float64)
    norm = np.linalg.norm(n)
    if not np.isfinite(norm) or norm == 0:
        raise ValueError("the plane normal is zero or not finite")
    n, off = n / norm, float(offset) / norm
    if off > 0:  # the camera centre (the origin) must lie on the side n points to: n·0 - off > 0
        n, off = -n, -off
    if abs(n[2]) < 1e-9 or off / n[2] <= 0:
        raise ValueError("the left camera's optical axis does not meet the still-water plane in front of it")
    o = np.array([0.0, 0.0, off / n[2]])
    ex = np.array([1.0, 0.0, 0.0]) - n[0] * n
    if np.linalg.norm(ex) < 1e-9:
        raise ValueError("the left camera's x axis is perpendicular to the still-water plane")
    ex /= np.linalg.norm(ex)
    ey = np.cross(n, ex)
    base = np.column_stack([ex, ey, n])
    a = math.radians(float(rotate_deg))
    rz = np.array([[math.cos(a), -math.sin(a), 0.0], [math.sin(a), math.cos(a), 0.0], [0.0, 0.0, 1.0]])
    m = np.eye(4)
    m[:3, :3] = base @ rz
    m[:3, 3] = base @ np.array([float(origin[0]), float(origin[1]), 0.0]) + o
    return m


def plane_of_frame(world_to_left_camera):
    """Still-water plane of a datum frame: normal (3,) and offset (mm), left camera frame.

    The frame's z axis is the normal and its origin lies on the plane.
    """
    m = np.asarray(world_to_left_camera, np.float64)
    n = m[:3, 2]
    return n, float(n @ m[:3, 3])


def rigid_inverse(m) -> np.ndarray:
    """Inverse of a 4x4 rigid transform [R t; 0 1] -> [R^T, -R^T t; 0 1]."""
    m = np.asarray(m, np.float64)
    out = np.eye(4)
    out[:3, :3] = m[:3, :3].T
    out[:3, 3] = -m[:3, :3].T @ m[:3, 3]
    return out


def plane_disparity(normal, offset: float, u, v, r1, p1, p2) -> np.ndarray:
    """Disparity (px) that the plane n·X = offset (left camera frame, mm) has at rectified left px (u, v).

    The left camera's ray through each rectified pixel meets the plane; the
    point is projected into both rectified views (R1, P1, P2 as in rig.json).
    For a plane the result is an affine function of (u, v). NaN where the
    ray misses the plane in front of the camera.
    """
    u = np.asarray(u, np.float64)
    v = np.asarray(v, np.float64)
    p1 = np.asarray(p1, np.float64)
    rays = np.stack([(u - p1[0, 2]) / p1[0, 0], (v - p1[1, 2]) / p1[1, 1], np.ones_like(u)], axis=-1)
    rays = rays @ np.asarray(r1, np.float64)  # R1^T for row vectors: rectified -> left camera frame
    n = np.asarray(normal, np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = float(offset) / (rays @ n)
    s = np.where(s > 0, s, np.nan)
    return project_rectified(rays * s[..., None], r1, p1, p2)[2]


def still_residual_at(residual_x, residual_y, still_residual, x, y) -> np.ndarray:
    """Bilinear interpolation of a still-residual grid at datum-frame (x, y) mm; NaN outside."""
    interp = RegularGridInterpolator((np.asarray(residual_y, np.float64), np.asarray(residual_x, np.float64)),
                                     np.asarray(still_residual, np.float64), method="linear",
                                     bounds_error=False, fill_value=np.nan)
    x, y = np.broadcast_arrays(np.asarray(x, np.float64), np.asarray(y, np.float64))
    return interp(np.stack([y.ravel(), x.ravel()], axis=1)).reshape(x.shape)


def fit_still_water(disparities, u, v, q, r1, *, sigma=None, attempted=None, fill=None, window: int | None = None,
                    origin=(0.0, 0.0), rotate_deg: float = 0.0, degree: int = DEFAULT_DEGREE,
                    step_mm: float = DEFAULT_STEP_MM, threshold: float = DEFAULT_THRESHOLD) -> StillWaterFit:
    """The still-water datum from disparities of a few still frames.

    Steps: triangulate every frame; fit the plane robustly to all points of
    all frames (outliers beyond ``threshold`` robust sigmas rejected against
    plane + smooth bend, then least squares on the inliers); with a window
    size, also drop the points next to an occluder (see below) and refit;
    build the datum frame; average the inliers per grid point; fit the
    smooth still residual; measure the noise floor.

    Occluders: grid points that were matched but failed in at least half the
    frames (``attempted`` and not inliers), in clusters of 3 or more, mark an
    occluder, a shadow or glare. Points whose window reaches one of them
    (within window // 2 px) are dropped too: their windows partly see the
    occluder, and their disparities are pulled toward it by amounts that can
    hide in the noise.

    Parameters
    ----------
    disparities : (F, Nv, Nu) px (d = u_left - u_right), NaN where invalid.
    u (Nu,), v (Nv,) : rectified left px of the grid.
    q : (4, 4) reprojection matrix; r1 : (3, 3) left rectifying rotation.
    sigma : (F, Nv, Nu) px or None, the matcher's 1-sigma per point (for
        the predicted noise and the "water moved" test).
    attempted : (Nv, Nu) or (F, Nv, Nu) bool or None, points inside both views that were matched.
    fill : (Nv, Nu) bool or None, points both cameras see but the frames could not
        measure (a glint of the still water): where not valid, their reference
        disparity comes from a smooth fit of the valid ones (degree ``degree`` in
        u, v), they are marked valid (a reference is there) and the still
        residual's footprint reaches over them (``stats["n_filled"]``).
    window : matching window side, px, or None to skip the occluder test.
    origin, rotate_deg : tank frame (see :func:`datum_frame`).
    degree : total degree of the still-residual polynomial.
    step_mm : grid step of the stored still residual, datum-frame mm.
    threshold : outlier threshold, robust sigmas.

    Returns
    -------
    StillWaterFit

    Raises
    ------
    ValueError
        Too few valid points, or no plane they agree on.
    """
    d = np.asarray(disparities, np.float64)
    if d.ndim == 2:
        d = d[None]
    n_frames, nv, nu = d.shape
    u = np.asarray(u, np.float64)
    v = np.asarray(v, np.float64)
    if (nv, nu) != (v.size, u.size):
        raise ValueError(f"disparities of shape {d.shape[1:]} do not fit the grid ({v.size}, {u.size})")
    n_terms = len(polynomial_terms(degree))
    min_points = max(MIN_POINTS, 5 * n_terms)
    vv, uu = np.meshgrid(v, u, indexing="ij")
    pts = triangulate(uu[None], vv[None], d, q, r1)  # (F, Nv, Nu, 3)
    finite = np.all(np.isfinite(pts), axis=-1)
    if finite.sum() < min_points:
        raise ValueError(f"only {int(finite.sum())} valid points in {n_frames} still frames; "
                         f"at least {min_points} are needed")

    flat = pts.reshape(-1, 3)
    # The bend is modelled in grid (u, v) during rejection: the same smooth
    # shape on every frame, cheap to fit on per-point means.
    def bend(r, inl):
        return np.broadcast_to(_smooth_bend(r.reshape(d.shape), inl.reshape(d.shape), uu, vv, degree),
                               d.shape).ravel()

    try:
        fit = robust_plane(flat, threshold=threshold, detrend=bend)
    except ValueError as exc:
        raise ValueError(f"no still-water plane found: {exc}") from None
    inliers = fit.inliers.reshape(d.shape)
    normal, offset = fit.normal, fit.offset
    occluded = np.zeros((nv, nu), bool)
    if window is not None and attempted is not None:
        att = np.asarray(attempted, bool)
        att = att.any(axis=0) if att.ndim == 3 else att
        occluded = _occluder_halo(att, inliers, uu, vv, window)
        if occluded.any():
            inliers &= ~occluded[None]
            normal, offset = fit_plane(flat[inliers.ravel()])
    if inliers.sum() < min_points:
        raise ValueError(f"only {int(inliers.sum())} points agree on the still-water plane; "
                         f"at least {min_points} are needed")
    m = datum_frame(normal, offset, origin=origin, rotate_deg=rotate_deg)
    normal, offset = plane_of_frame(m)

    heights = np.where(inliers, pts @ normal - offset, np.nan)
    fit_rms = float(np.sqrt(np.nanmean(heights ** 2)))
    count = inliers.sum(axis=0)
    valid = count >= max(1, math.ceil(n_frames / 2))
    with np.errstate(invalid="ignore", divide="ignore"):
        point_residual = np.where(valid, np.nansum(np.where(inliers, heights, 0.0), axis=0) / count, np.nan)
        ref = np.where(valid, np.nansum(np.where(inliers, d, 0.0), axis=0) / count, np.nan)
        dev = np.where(inliers, heights - point_residual[None], 0.0)
        noise = np.where(valid & (count >= 2), np.sqrt(np.sum(dev ** 2, axis=0) / np.maximum(count - 1, 1)), np.nan)
        mean_pts = np.nansum(np.where(inliers[..., None], pts, 0.0), axis=0) / count[..., None]
    if valid.sum() < min_points:
        raise ValueError(f"only {int(valid.sum())} grid points are valid in at least half the frames; "
                         f"at least {min_points} are needed")

    # The smooth still residual, in the final datum frame.
    dpts = (mean_pts[valid] - m[:3, 3]) @ m[:3, :3]
    xs, ys = dpts[:, 0], dpts[:, 1]
    shape = fit_polynomial_surface(xs, ys, point_residual[valid], degree)
    filled = np.zeros((nv, nu), bool)
    reach_x, reach_y = xs, ys
    if fill is not None:
        # Points the frames could not measure though both cameras see them (a still glint): their
        # reference disparity from a smooth fit of the measured ones (the still water's disparity is
        # affine in rectified u, v for a plane, plus the small smooth residual), and they count for
        # the footprint of the still residual.
        filled = np.asarray(fill, bool) & ~valid
        if filled.any():
            dfit = fit_polynomial_surface(uu[valid], vv[valid], ref[valid], degree)
            ref = ref.copy()
            ref[filled] = dfit(uu[filled], vv[filled])
            fpts = triangulate(uu[filled], vv[filled], ref[filled], q, r1)
            fd = (fpts - m[:3, 3]) @ m[:3, :3]
            reach_x, reach_y = np.concatenate([xs, fd[:, 0]]), np.concatenate([ys, fd[:, 1]])
    gx = _grid_axis(xs.min(), xs.max(), step_mm)
    gy = _grid_axis(ys.min(), ys.max(), step_mm)
    gxx, gyy = np.meshgrid(gx, gy)
    residual = shape(gxx, gyy)
    residual[~_footprint(reach_x, reach_y, gxx, gyy, step_mm)] = np.nan
    rough = point_residual[valid] - shape(xs, ys)

    stats = {
        "fit_rms_mm": fit_rms,
        "residual_rms_mm": float(np.sqrt(np.nanmean(residual ** 2))),
        "residual_peak_to_valley_mm": float(np.nanmax(residual) - np.nanmin(residual)),
        "rough_rms_mm": float(np.sqrt(np.mean(rough ** 2))),
        "noise_floor_median_mm": float(np.nanmedian(noise)) if np.isfinite(noise).any() else float("nan"),
        "n_points": int(finite.sum()),
        "n_inliers": int(inliers.sum()),
        "n_valid": int(valid.sum()),
        "n_grid": int(nv * nu),
        "n_occluded": int(occluded.sum()),
        "n_filled": int(filled.sum()),
        "camera_height_mm": float(-offset),
        "predicted_noise_mm": float("nan"),
    }
    if sigma is not None:
        s = np.asarray(sigma, np.float64).reshape(d.shape)
        gain = np.abs(height_sensitivity(uu, vv, np.where(valid, ref, np.nan), q, r1, normal))
        pred = np.where(inliers, s * gain[None], np.nan)
        if np.isfinite(pred).any():
            stats["predicted_noise_mm"] = float(np.nanmedian(pred))
    warnings = _warnings(stats, n_frames)
    attrs = {"residual_degree": int(degree), "residual_step_mm": float(step_mm),
             "outlier_threshold_sigma": float(threshold), "origin_mm": [float(origin[0]), float(origin[1])],
             "rotate_deg": float(rotate_deg), "residual_coefficients": shape.coefficients.tolist(),
             "residual_centre_mm": list(shape.centre), "residual_scale_mm": list(shape.scale),
             **{k: v for k, v in stats.items() if k != "fit_rms_mm"}}
    datum = Datum(world_to_left_camera=m, plane_normal=normal, plane_offset=offset, u=u, v=v, disparity=ref,
                  valid=valid | filled, residual_x=gx, residual_y=gy, still_residual=residual, noise_floor=noise,
                  fit_rms_mm=fit_rms, n_frames=n_frames, rig_sha256="", attrs=attrs,
                  point_residual=point_residual)
    return StillWaterFit(datum=datum, heights=heights, inliers=inliers, shape=shape, stats=stats,
                         warnings=warnings)


def _smooth_bend(r, inl, uu, vv, degree):
    # Per-point mean residual of the current inliers, and a polynomial in (u, v) through it.
    cnt = inl.sum(axis=0)
    has = cnt > 0
    if has.sum() < 2 * len(polynomial_terms(degree)):
        return np.zeros(uu.shape)
    mean = np.where(inl, r, 0.0).sum(axis=0)[has] / cnt[has]
    surf = fit_polynomial_surface(uu[has], vv[has], mean, degree)
    return surf(uu, vv)


def _occluder_halo(attempted, inliers, uu, vv, window):
    # Grid points matched but failing in at least half the frames, in clusters of >= 3, mark an occluder.
    n_frames = inliers.shape[0]
    failed = attempted & (inliers.sum(axis=0) < max(1, math.ceil(n_frames / 2)))
    labels, n = ndimage.label(failed, structure=np.ones((3, 3)))
    if n == 0:
        return np.zeros(failed.shape, bool)
    sizes = ndimage.sum(np.ones_like(labels), labels, index=np.arange(1, n + 1))
    marks = np.isin(labels, np.nonzero(sizes >= 3)[0] + 1)
    if not marks.any():
        return np.zeros(failed.shape, bool)
    tree = cKDTree(np.column_stack([uu[marks], vv[marks]]))
    near = np.zeros(failed.shape, bool)
    cand = ~marks
    dist, _ = tree.query(np.column_stack([uu[cand], vv[cand]]), distance_upper_bound=window // 2 + 1e-9)
    near[cand] = np.isfinite(dist)
    return near


def _grid_axis(lo, hi, step):
    # Nodes on whole multiples of the step, covering [lo, hi].
    return step * np.arange(math.floor(lo / step), math.ceil(hi / step) + 1, dtype=np.float64)


def _footprint(xs, ys, gxx, gyy, step):
    # Nodes within reach of the data: two grid steps, or twice the typical point spacing if coarser.
    tree = cKDTree(np.column_stack([xs, ys]))
    sample = np.column_stack([xs, ys])[:: max(1, xs.size // 2000)]
    nn = tree.query(sample, k=2)[0][:, 1]
    reach = max(2.0 * step, 2.0 * float(np.median(nn)))
    dist, _ = tree.query(np.column_stack([gxx.ravel(), gyy.ravel()]), distance_upper_bound=reach)
    return np.isfinite(dist).reshape(gxx.shape)


def _warnings(stats, n_frames):
    out = []
    noise = stats["noise_floor_median_mm"]
    pred = stats["predicted_noise_mm"]
    rough = stats["rough_rms_mm"]
    shape_rms = stats["residual_rms_mm"]
    moved = np.isfinite(noise) and np.isfinite(pred) and noise > SCATTER_FACTOR * pred
    rippled = (np.isfinite(noise) and rough > ROUGH_FACTOR * noise / math.sqrt(max(n_frames, 1))
               and rough > ROUGH_MIN_MM)
    if moved:
        out.append(f"the still frames differ by {noise:.3f} mm per point, {noise / pred:.1f} times the matching "
                   "noise: the water moved between frames; wait for it to settle and record the still frames again")
    if rippled:
        out.append(f"the still water departs from a smooth surface by {rough:.3f} mm RMS (the noise floor explains "
                   f"{noise / math.sqrt(n_frames):.3f} mm): was the water still (ripples, a seiche, dirt on the "
                   "surface)?")
    if shape_rms > SHAPE_WARN_MM:
        if moved or rippled:
            # A moving surface has a smooth part too: it cannot be told from a calibration error.
            out.append(f"the smooth part of the residual ({shape_rms:.3f} mm RMS) cannot be told from a "
                       "calibration error until the water is still")
        else:
            out.append(f"the still water is bent by {shape_rms:.3f} mm RMS "
                       f"({stats['residual_peak_to_valley_mm']:.3f} mm peak to valley): the calibration is "
                       "probably off (heights subtract the bend, but check the calibration's corner coverage)")
    if not out and stats["fit_rms_mm"] > FIT_WARN_MM:
        out.append(f"the plane-fit RMS is {stats['fit_rms_mm']:.3f} mm: the water may not have been still, or "
                   "the calibration is off")
    if n_frames < 2:
        out.append("one still frame: the noise floor cannot be measured, nor whether the water moved; "
                   "give two or more")
    return out
