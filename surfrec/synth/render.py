"""Physically based rendering of the synthetic camera images.

Per camera pixel the renderer supersamples the pixel area, and for each
sample ray:

1. intersects the ray with the water surface z = h(x, y, t) by fixed-point
   iteration from the still-water plane (the map contracts because the
   surface slope times the ray's obliquity is far below one);
2. tests whether the ray meets the opaque post first (a vertical cylinder),
   and whether the post shades the surface point from the projector;
3. projects the surface point into the projector and samples the speckle
   pattern (cubic spline, so the pattern is a smooth continuous function of
   position, the same for both cameras);
4. forms the radiance of a Lambertian screen lit by a pinhole projector:
   E ∝ pattern · cos(incidence) · (Z0 / r)^2 / cos^3(projector off-axis angle)
   (a pinhole projector lights a parallel plane uniformly), plus ambient light;
5. multiplies by the camera's natural vignetting cos^4 (off-axis angle).

The supersampled radiance is blurred by a Gaussian lens PSF, averaged over
each pixel's area (box integration), turned into electrons with shot and
read noise, and quantised. The steps are written by hand because no library
renders a height field through a distorted camera; each uses numpy/OpenCV
primitives for the heavy work.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from scipy import ndimage

from surfrec.synth.cameras import Camera, Projector


@dataclass
class Post:
    """An opaque vertical cylinder standing in the water (world mm)."""

    centre: tuple[float, float]
    radius: float
    top: float  # height of its top above still water, mm

    def contains(self, x, y):
        """True for world points (mm) inside the post's footprint."""
        return (x - self.centre[0]) ** 2 + (y - self.centre[1]) ** 2 < self.radius ** 2

    def to_dict(self):
        return {"centre_mm": list(map(float, self.centre)), "radius_mm": float(self.radius), "top_mm": float(self.top)}


@dataclass
class SensorModel:
    """Camera optics and sensor: PSF, noise and quantisation.

    Attributes
    ----------
    psf_sigma_px : Gaussian lens PSF, 1-sigma in px.
    full_well_e : electrons at full scale.
    read_noise_e : read noise, electrons RMS.
    black_level : offset as a fraction of full scale.
    bits : effective bit depth of the data (8, 10, 12, 16).
    container_bits : stored bit depth (8 or 16).
    supersample : samples per pixel along each axis.
    """

    psf_sigma_px: float = 0.6
    full_well_e: float = 10000.0
    read_noise_e: float = 12.0
    black_level: float = 0.02
    bits: int = 8
    container_bits: int = 8
    supersample: int = 3

    def to_dict(self):
        return dict(self.__dict__)


@dataclass
class Lighting:
    """Radiometry of the scene, as fractions of the sensor's full scale."""

    exposure: float = 0.75        # pattern value 1 on a plane facing the projector
    ambient: float = 0.06         # room light on the water
    post_radiance: float = 0.05   # matte dark post: uniform, no speckle on it
    board_white: float = 0.85
    board_black: float = 0.07
    board_background: float = 0.22

    def to_dict(self):
        return dict(self.__dict__)


class RayBundle:
    """The sample rays of one camera, computed once and reused for every frame.

    Rays are stored as world slopes (dx/dz, dy/dz) from the camera centre,
    which makes the point at any height one multiply-add away.
    """

    def __init__(self, camera: Camera, supersample: int):
        w, h = camera.image_size
        s = int(supersample)
        offsets = (np.arange(s) + 0.5) / s - 0.5
        u = (np.arange(w)[:, None] + offsets[None, :]).ravel()
        v = (np.arange(h)[:, None] + offsets[None, :]).ravel()
        uu, vv = np.meshgrid(u, v)
        d = camera.pixel_rays(uu, vv)
        if np.any(d[..., 2] >= 0):
            raise ValueError("every camera ray must point down toward the water")
        self.camera = camera
        self.supersample = s
        self.centre = camera.centre
        self.sx = d[..., 0] / d[..., 2]
        self.sy = d[..., 1] / d[..., 2]
        axis = camera.rotation[2]
        self.vignette = ((d @ axis) ** 4).astype(np.float32)
        self.shape = self.sx.shape
        self.tables = {}  # per-surface along-ray tables (time-harmonic surfaces)

    def points_at(self, z, rows=slice(None)):
        """World x, y of the rays of ``rows`` at heights ``z`` (mm)."""
        w = z - self.centre[2]
        return self.centre[0] + w * self.sx[rows], self.centre[1] + w * self.sy[rows]


def intersect_surface(bundle: RayBundle, surface, t: float, rows=slice(None), *, tol_mm=1e-8, max_iter=60,
                      exempt=None):
    """Intersect the bundle's rays with the surface z = h(x, y, t).

    Parameters
    ----------
    exempt : callable(x, y) -> bool array, optional
        Where non-convergence is acceptable (inside an opaque post, whose
        pixels never show the water).

    Returns
    -------
    x, y, z : ndarrays, world mm, of the first intersection of each ray.
    """
    z = np.zeros(bundle.sx[rows].shape)
    for _ in range(max_iter):
        x, y = bundle.points_at(z, rows)
        z_new = surface.height(x, y, t)
        change = np.abs(z_new - z)
        z = z_new
        if float(np.max(change)) < tol_mm:
            break
    else:
        x, y = bundle.points_at(z, rows)
        bad = change >= tol_mm
        if exempt is None or not np.all(exempt(x[bad], y[bad])):
            raise RuntimeError("ray-surface intersection did not converge: surface too steep")
    x, y = bundle.points_at(z, rows)
    return x, y, z


class _HarmonicAlongRays:
    """Along-ray tables of a time-harmonic surface, eta = Re[C(x, y) exp(-i omega t)].

    For such a surface the complex amplitude C along each ray is the same in
    every frame, so it is tabulated once per camera as a cubic polynomial in
    the height z over the surface's range (and the complex slope as a linear
    one); each frame then intersects with a few multiply-adds per ray instead
    of evaluating the field again. C is recovered from two heights a quarter
    period apart: C = eta(t=0) + i eta(t=T/4). The interpolation error in z is
    of order (k delta)^4 / 200 of the amplitude, delta being the ray's
    sideways travel over the height range (< 1 mm here): below 1e-6 mm.
    """

    def __init__(self, bundle: RayBundle, surface, tile_rows: int = 256):
        self.omega = float(surface.omega)
        quarter = 0.5 * np.pi / self.omega
        shape = bundle.shape
        c0 = np.empty(shape, np.complex128)
        for r0 in range(0, shape[0], tile_rows):
            rows = slice(r0, min(r0 + tile_rows, shape[0]))
            x, y = bundle.points_at(np.zeros(bundle.sx[rows].shape), rows)
            c0[rows] = surface.height(x, y, 0.0) + 1j * surface.height(x, y, quarter)
        # Height range: the local amplitude, with room for the sideways travel.
        self.zr = float(1.25 * np.abs(c0).max() + 0.05)
        nodes = self.zr * np.cos(np.pi * (np.arange(4) + 0.5) / 4)  # Chebyshev nodes
        vander = np.vander(nodes / self.zr, 4, increasing=True)
        inv = np.linalg.inv(vander)
        self.coef = np.empty((4,) + shape, np.complex128)
        self.gcoef = np.empty((2, 2) + shape, np.complex128)  # [d/dx, d/dy][const, slope]
        gnodes = np.array([-0.5, 0.5]) * self.zr
        for r0 in range(0, shape[0], tile_rows):
            rows = slice(r0, min(r0 + tile_rows, shape[0]))
            vals = []
            for z in nodes:
                x, y = bundle.points_at(np.full(bundle.sx[rows].shape, z), rows)
                vals.append(surface.height(x, y, 0.0) + 1j * surface.height(x, y, quarter))
            vals = np.stack(vals)
            self.coef[:, rows] = np.tensordot(inv, vals, axes=1)
            g = []
            for z in gnodes:
                x, y = bundle.points_at(np.full(bundle.sx[rows].shape, z), rows)
                g0 = surface.gradient(x, y, 0.0)
                g1 = surface.gradient(x, y, quarter)
                g.append((g0[0] + 1j * g1[0], g0[1] + 1j * g1[1]))
            for k in range(2):
                lo, hi = g[0][k], g[1][k]
                self.gcoef[k, 0, rows] = 0.5 * (lo + hi)
                self.gcoef[k, 1, rows] = (hi - lo) / (gnodes[1] - gnodes[0])

    def intersect(self, bundle, t, rows, tol_mm=1e-8, max_iter=60, exempt=None):
        phase = np.exp(-1j * self.omega * t)
        c = self.coef[:, rows]
        z = np.zeros(c.shape[1:])
        for _ in range(max_iter):
            s = z / self.zr
            val = ((c[3] * s + c[2]) * s + c[1]) * s + c[0]
            z_new = (val * phase).real
            change = np.abs(z_new - z)
            z = z_new
            if float(np.max(change)) < tol_mm:
                break
        else:
            x, y = bundle.points_at(z, rows)
            bad = change >= tol_mm
            if exempt is None or not np.all(exempt(x[bad], y[bad])):
                raise RuntimeError("ray-surface intersection did not converge: surface too steep")
        g = self.gcoef[:, :, rows]
        hx = ((g[0, 0] + g[0, 1] * z) * phase).real
        hy = ((g[1, 0] + g[1, 1] * z) * phase).real
        x, y = bundle.points_at(z, rows)
        return x, y, z, hx, hy


def _circle_crossings(ax, ay, bx, by, radius):
    """Parameters s where the line (ax, ay) + s (bx, by) meets a circle about the origin.

    Returns hit (the line crosses it) and the two roots s_lo <= s_hi of
    |a + s b|^2 = radius^2 (meaningless where not hit).
    """
    qa = bx * bx + by * by
    qb = 2.0 * (ax * bx + ay * by)
    qc = ax * ax + ay * ay - radius ** 2
    disc = qb * qb - 4.0 * qa * qc
    hit = disc > 0
    sq = np.sqrt(np.where(hit, disc, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        return hit, (-qb - sq) / (2.0 * qa), (-qb + sq) / (2.0 * qa)


def _post_hides(bundle: RayBundle, post: Post, z_water, rows):
    """True where the ray meets the post above the water it would otherwise see."""
    hit, w_lo, w_hi = _circle_crossings(bundle.centre[0] - post.centre[0], bundle.centre[1] - post.centre[1],
                                        bundle.sx[rows], bundle.sy[rows], post.radius)
    z_hi = bundle.centre[2] + w_hi
    z_lo = bundle.centre[2] + w_lo
    z_hit = np.minimum(z_hi, post.top)
    return hit & (z_hit > z_lo) & (z_hit > z_water)


def _post_shades(x, y, z, projector_centre, post: Post):
    """True where the segment from the surface point to the projector crosses the post."""
    dx = projector_centre[0] - x
    dy = projector_centre[1] - y
    dz = projector_centre[2] - z
    hit, s_lo, s_hi = _circle_crossings(x - post.centre[0], y - post.centre[1], dx, dy, post.radius)
    s_enter = np.maximum(s_lo, 0.0)
    return hit & (s_hi > 0) & (s_enter < 1) & (z + s_enter * dz <= post.top)


def speckle_pattern(resolution, grain_px: float, rng: np.random.Generator) -> np.ndarray:
    """A random speckle pattern for the projector, values in [0, 1].

    Gaussian-filtered white noise (correlation FWHM ``grain_px`` projector px)
    pushed through a soft threshold for high contrast while staying smooth.

    Parameters
    ----------
    resolution : (width, height) projector px
    grain_px : speckle size (autocorrelation FWHM) in projector px.
    rng : numpy Generator

    Returns
    -------
    pattern : float32 array (height, width)
    """
    w, h = resolution
    noise = rng.standard_normal((h, w)).astype(np.float32)
    # White noise filtered by a Gaussian of sigma s has an autocorrelation of
    # sigma s*sqrt(2), so FWHM = 2.355 * sqrt(2) * s.
    sigma = grain_px / (2.3548 * np.sqrt(2.0))
    g = cv2.GaussianBlur(noise, (0, 0), sigma, borderType=cv2.BORDER_REFLECT)
    g /= g.std()
    return (0.5 * (1.0 + np.tanh(1.2 * g))).astype(np.float32)


def _sample_pattern(coeffs, up, vp):
    # coeffs holds the cubic B-spline coefficients of the pattern (prefiltered once per frame).
    return ndimage.map_coordinates(coeffs, [vp.ravel(), up.ravel()], order=3, mode="constant",
                                   cval=0.0, prefilter=False).reshape(up.shape)


def render_radiance_speckle(bundle: RayBundle, surface, t: float, projector: Projector, pattern,
                            lighting: Lighting, post: Post | None = None, tile_rows: int = 192, *,
                            light=None, glint_out=None):
    """Supersampled radiance image of the speckle-lit water (fraction of full scale).

    Parameters
    ----------
    t : frame time, s (the middle of the exposure).
    light : surfrec.synth.effects.SpeckleLight or None
        Camera effects on the speckle light (projector hotspot, room lamp,
        glints, sub-times of the exposure); None renders the clean image.
    glint_out : (height*S, width*S) float32 array or None
        Receives the glint part of the radiance (fraction of full scale).

    Returns
    -------
    radiance : float32 array (height*S, width*S)
    """
    coeffs = ndimage.spline_filter(pattern.astype(np.float64), order=3, mode="mirror")
    pc = projector.centre
    axis_p = projector.rotation[2]
    z0 = pc[2]  # projector height above still water: normalises irradiance to 1 on the plane
    out = np.empty(bundle.shape, np.float32)
    table = None
    if getattr(surface, "time_harmonic", False):
        key = ("harmonic", id(surface))
        table = bundle.tables.get(key)
        if table is None:
            table = bundle.tables[key] = _HarmonicAlongRays(bundle, surface)
    # Motion blur: each supersample row of a pixel is taken at its own instant of the exposure,
    # so tiles must hold whole pixels (a multiple of S rows).
    sub_times = None if light is None else light.sub_times
    s = bundle.supersample
    step = tile_rows if sub_times is None else max(s, tile_rows // s * s)
    for r0 in range(0, bundle.shape[0], step):
        r1 = min(r0 + step, bundle.shape[0])
        for j, dt in enumerate((0.0,) if sub_times is None else sub_times):
            rows = slice(r0, r1) if sub_times is None else slice(r0 + j, r1, s)
            tj = t if sub_times is None else t + dt
            if table is not None:
                x, y, z, hx, hy = table.intersect(bundle, tj, rows, exempt=None if post is None else post.contains)
            else:
                x, y, z = intersect_surface(bundle, surface, tj, rows,
                                            exempt=None if post is None else post.contains)
                hx, hy = surface.gradient(x, y, tj)
            if light is not None:
                value = _sample_pattern(coeffs, *projector.project_xyz(x, y, z))
                rad, glint = _effects_radiance(bundle, light, lighting, post, rows, x, y, z, hx, hy, value, projector)
                out[rows] = rad * bundle.vignette[rows]
                if glint_out is not None:
                    glint_out[rows] = glint * bundle.vignette[rows]
                continue
            lx, ly, lz = pc[0] - x, pc[1] - y, pc[2] - z
            r = np.sqrt(lx * lx + ly * ly + lz * lz)
            cos_i = (-hx * lx - hy * ly + lz) / (r * np.sqrt(1.0 + hx * hx + hy * hy))
            cos_p = -(axis_p[0] * lx + axis_p[1] * ly + axis_p[2] * lz) / r
            up, vp = projector.project_xyz(x, y, z)
            value = _sample_pattern(coeffs, up, vp)
            irr = value * np.clip(cos_i, 0.0, None) * (z0 / r) ** 2 / cos_p ** 3
            if post is not None:
                irr = np.where(_post_shades(x, y, z, pc, post), 0.0, irr)
            rad = lighting.exposure * irr + lighting.ambient
            if post is not None:
                rad = np.where(_post_hides(bundle, post, z, rows), lighting.post_radiance, rad)
            out[rows] = rad * bundle.vignette[rows]
    return out


def _effects_radiance(bundle, light, lighting, post, rows, x, y, z, hx, hy, value, projector):
    """Speckle radiance with the camera effects on the light (see surfrec.synth.effects)."""
    from surfrec.synth import effects as fx

    shaded = lamp_shaded = hidden = None
    if post is not None:
        shaded = _post_shades(x, y, z, projector.centre, post)
        if light.glints is not None:
            lamp_shaded = _post_shades(x, y, z, light.lamp, post)
        hidden = _post_hides(bundle, post, z, rows)
    return fx.speckle_light_tile(light, lighting, x, y, z, hx, hy, value, projector, bundle.centre,
                                 shaded, lamp_shaded, hidden)


def render_radiance_board(bundle: RayBundle, board_rotation, board_origin, board, lighting: Lighting,
                          tile_rows: int = 256, *, lamp=None, lamp_ref: float = 1.0, depth_out=None):
    """Supersampled radiance of a chessboard target held over unlit water.

    Parameters
    ----------
    board_rotation : (3, 3) board -> world rotation (board x, y in its plane).
    board_origin : (3,) world mm of the board's first inner corner.
    board : dict with cols, rows (inner corners), square_mm, margin_mm.
    lamp : (3,) world mm of a room lamp or None
        With a lamp the board and the water below are lit by it, relative
        irradiance cos(incidence) / r^2 / lamp_ref (camera effect
        "illumination"); None lights everything uniformly.
    lamp_ref : the lamp's cos/r^2 (1/mm^2) where the relative irradiance is 1.
    depth_out : (height, width) float array or None
        Receives the camera-frame depth (mm) of what each pixel sees (the
        mean over its sample rays of the board's and the water's depth).
    """
    Rb = np.asarray(board_rotation, float)
    ob = np.asarray(board_origin, float)
    n = Rb[:, 2]
    sq = board["square_mm"]
    cols, rows_ = board["cols"], board["rows"]
    margin = board["margin_mm"]
    c = bundle.centre
    out = np.empty(bundle.shape, np.float32)
    s = bundle.supersample
    if lamp is not None or depth_out is not None:
        tile_rows = max(s, tile_rows // s * s)  # whole pixels per tile
    for r0 in range(0, bundle.shape[0], tile_rows):
        r1 = min(r0 + tile_rows, bundle.shape[0])
        rows = slice(r0, r1)
        dx, dy = bundle.sx[rows], bundle.sy[rows]
        # Ray points c + w * (sx, sy, 1); plane n . (p - ob) = 0.
        denom = n[0] * dx + n[1] * dy + n[2]
        w = (n @ (ob - c)) / denom
        px = c[0] + w * dx - ob[0]
        py = c[1] + w * dy - ob[1]
        pz = c[2] + w - ob[2]
        bx = Rb[0, 0] * px + Rb[1, 0] * py + Rb[2, 0] * pz
        by = Rb[0, 1] * px + Rb[1, 1] * py + Rb[2, 1] * pz
        on_board = (bx > -sq - margin) & (bx < cols * sq + margin) & (by > -sq - margin) & (by < rows_ * sq + margin)
        in_squares = (bx > -sq) & (bx < cols * sq) & (by > -sq) & (by < rows_ * sq)
        black = ((np.floor(bx / sq) + np.floor(by / sq)) % 2 == 0) & in_squares
        seen_board = on_board & (c[2] + w > 0)
        rad = np.where(seen_board, np.where(black, lighting.board_black, lighting.board_white),
                       lighting.board_background)
        if lamp is not None or depth_out is not None:
            from surfrec.synth.effects import board_light_and_depth

            # Lamp light and depth vary smoothly over each plane: evaluated at pixel centres on the
            # board's plane and on the water, each sample ray taking the value of the plane it sees.
            fb, fw, db, dw = board_light_and_depth(bundle, slice(r0 // s, r1 // s), n, ob, lamp, lamp_ref)
            if lamp is not None:
                up = np.where(seen_board, np.repeat(np.repeat(fb, s, 0), s, 1), np.repeat(np.repeat(fw, s, 0), s, 1))
                rad = rad * up
            if depth_out is not None:
                h1, w1 = fb.shape
                frac = seen_board.reshape(h1, s, w1, s).mean(axis=(1, 3))
                depth_out[r0 // s:r1 // s] = frac * db + (1.0 - frac) * dw
        out[rows] = rad * bundle.vignette[rows]
    return out


def expose(radiance, sensor: SensorModel, rng: np.random.Generator) -> np.ndarray:
    """Blur, integrate over pixels, add sensor noise and quantise.

    Parameters
    ----------
    radiance : float32 (H*S, W*S), fraction of full scale.

    Returns
    -------
    image : uint8 or uint16 (H, W); 10- and 12-bit data are stored in 16 bits
        without shifting (values up to 2**bits - 1).
    """
    s = sensor.supersample
    if sensor.psf_sigma_px > 0:
        radiance = cv2.GaussianBlur(radiance, (0, 0), sensor.psf_sigma_px * s, borderType=cv2.BORDER_REFLECT)
    h, w = radiance.shape[0] // s, radiance.shape[1] // s
    pixel = radiance.reshape(h, s, w, s).mean(axis=(1, 3), dtype=np.float64)
    electrons = np.clip(pixel, 0.0, None) * sensor.full_well_e
    noisy = electrons + np.sqrt(electrons + sensor.read_noise_e ** 2) * rng.standard_normal(electrons.shape)
    full = 2 ** sensor.bits - 1
    dn = np.rint((noisy / sensor.full_well_e + sensor.black_level) * full)
    dn = np.clip(dn, 0, full)
    return dn.astype(np.uint8 if sensor.container_bits == 8 else np.uint16)
