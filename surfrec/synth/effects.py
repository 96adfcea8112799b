"""Camera effects of the synthetic renderer: what real lenses, lamps and sensors add.

Every effect is switched on by name in :attr:`CameraEffects.enabled` and has
its own small settings class with its physical parameters:

``vignetting``
    Lens (mechanical and optical) fall-off on top of the natural cos^4 of
    :class:`surfrec.synth.render.RayBundle`: V = 1 - a rho^2 - b rho^4, rho
    the distance from the principal point over the image half-diagonal (px/px).
``illumination``
    The projector's hotspot, a spherical-Gaussian beam profile in the off-axis
    angle, H = exp((cos(theta) - 1) / sigma^2) ~ exp(-theta^2 / (2 sigma^2)), applied to the speckle irradiance of the
    surface point (the same light for both cameras); and a room lamp (a bare
    bulb, E ∝ cos(incidence) / r^2) that lights the board, the water under it
    and the ambient part of the speckle frames unevenly.
``defocus``
    Thin-lens blur circle c = A f |s - s_f| / (s (s_f - f)), aperture A = f/N,
    s the depth along the optical axis, s_f the focus distance; the disc of
    diameter c is replaced by the Gaussian of equal second moment, sigma = c/4.
``dust``
    Soft dark shadows of dust on the sensor window, fixed per camera.
``defects``
    Hot pixels (stuck near full scale, or with a large dark-current offset)
    and dead pixels (always 0), fixed per camera.
``glints``
    Rough-specular reflection of the projector and of the room lamp on the
    water: a Beckmann lobe exp(-tan^2(alpha) / m^2) of the angle alpha
    between the surface normal and the half-vector of the light and camera
    directions; the projector's glint carries its pattern (the light the
    projector sends toward the surface point).
``noise``
    A high-speed-camera operating point: a shorter exposure (bright speckle at
    about 65 % of full scale), 20 e- read noise, a black level of 64 DN (of
    12 bits) and a 16,000 e- full well; shot noise as before.
``bitdepth``
    12-bit data in 16-bit containers.
``motion``
    Motion blur over the exposure (1 ms at 500 frames/s): the S rows of each
    pixel's S x S supersamples are taken at S instants spread evenly over the
    exposure, so the pixel's average integrates over time as well as area
    (stratified distributed ray tracing; Cook, Porter & Carpenter 1984). The
    projector pattern is the same through one exposure.

The truth surface does not depend on any of them. Nothing here opens files;
the per-camera fixed parts (vignetting, dust and defect maps) come from
:func:`camera_fixed` with the scenario's seed.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import cv2
import numpy as np
from numba import njit

EFFECTS = ("vignetting", "illumination", "defocus", "dust", "defects", "glints", "noise", "bitdepth", "motion")
SIDES = ("left", "right")


def parse_effects(text) -> frozenset:
    """Effect names from a comma list ("all", "none" or names of :data:`EFFECTS`).

    Parameters
    ----------
    text : str or iterable of str

    Returns
    -------
    frozenset of effect names.

    Raises
    ------
    ValueError
        For a name that is not an effect (the message lists the valid ones).
    """
    if isinstance(text, str):
        names = [n.strip().lower() for n in text.split(",") if n.strip()]
    else:
        names = [str(n).strip().lower() for n in text]
    out = set()
    for n in names:
        if n == "all":
            out.update(EFFECTS)
        elif n == "none":
            continue
        elif n in EFFECTS:
            out.add(n)
        else:
            raise ValueError(f"unknown camera effect {n!r}; choose 'all', 'none' or a comma list of "
                             + ", ".join(EFFECTS))
    return frozenset(out)


# ----------------------------------------------------------------- settings

@dataclass
class Vignetting:
    """Lens fall-off V = 1 - a rho^2 - b rho^4 (rho: radius / image half-diagonal), per camera.

    The defaults make the corners 30 % (left) and 34 % (right) darker from the
    lens alone; with the natural cos^4 (0.88 at the corners of this lens) the
    corners are about 38 % and 42 % darker than the centre.
    """

    left: tuple = (0.18, 0.12)
    right: tuple = (0.22, 0.12)


@dataclass
class Illumination:
    """The projector's hotspot and the uneven room light.

    hotspot_sigma_deg : sigma of the beam profile exp((cos(theta) - 1) / sigma^2), degrees
        (16 degrees: about 35 % less light at the far edge of the field, 15 degrees out).
    hotspot_axis_deg : the beam axis, tilted from the projector's optical axis by these angles
        about its y and x axes (degrees): a real lamp is never exactly centred.
    """

    hotspot_sigma_deg: float = 16.0
    hotspot_axis_deg: tuple = (1.5, -1.0)


@dataclass
class Defocus:
    """Thin-lens defocus, per camera.

    pixel_pitch_mm : sensor pixel pitch of the full-size 1280 px camera (12 um); a
        smaller image (``--quick``) has proportionally larger pixels on the same sensor.
    f_number : N = f / A, per camera (wide open, as high-speed work needs the light).
    focus_mm : focus distance s_f along the optical axis, per camera: a little in front
        of the near side of the verged view, so the far side is soft.
    """

    pixel_pitch_mm: float = 0.012
    f_number: dict = field(default_factory=lambda: {"left": 1.4, "right": 1.4})
    focus_mm: dict = field(default_factory=lambda: {"left": 875.0, "right": 880.0})


@dataclass
class Dust:
    """Dust shadows on the sensor window: count per camera, radius (px, full size), centre transmission."""

    count: int = 8
    radius_px: tuple = (3.0, 15.0)
    transmission: tuple = (0.6, 0.9)


@dataclass
class Defects:
    """Hot and dead pixels, fractions of all pixels.

    A hot pixel is either stuck (reads ``stuck_level`` of full scale whatever the light)
    or carries a dark-current offset of ``dark_offset`` of full scale on top of the signal.
    """

    hot_fraction: float = 3e-4
    dead_fraction: float = 1.5e-4
    stuck_share: float = 0.5
    stuck_level: tuple = (0.85, 0.98)
    dark_offset: tuple = (0.05, 0.35)


@dataclass
class Glints:
    """Beckmann lobes of the projector's and the room lamp's reflections on the water.

    *_peak : radiance at the lobe's centre, multiple of full scale (for pattern value 1
        in the projector's case); *_roughness : Beckmann RMS slope m (rad), standing for the
        water's micro-roughness and the source's angular size together.
    """

    projector_peak: float = 6.0
    projector_roughness: float = 0.012
    lamp_peak: float = 4.0
    lamp_roughness: float = 0.012


@dataclass
class Noise:
    """The high-speed-camera operating point (replaces the clean sensor's values)."""

    full_well_e: float = 16000.0
    read_noise_e: float = 20.0
    black_level_dn12: float = 64.0  # in DN of 12 bits; kept as a fraction of full scale at other depths
    exposure_scale: float = 0.83    # all lighting levels: bright speckle at about 65 % of full scale


@dataclass
class BitDepth:
    bits: int = 12
    container_bits: int = 16


@dataclass
class Motion:
    """Exposure time (s) centred on the frame time; sub-times = the supersample rows (3)."""

    exposure_s: float = 1e-3


@dataclass
class CameraEffects:
    """Which camera effects are on, and the parameters of each.

    room_lamp_mm : world position (mm) of the room lamp (a bare bulb above the tank, off to
        one side): it lights the board and the ambient part, and makes glints.
    """

    enabled: frozenset = frozenset()
    room_lamp_mm: tuple = (380.0, 260.0, 1350.0)
    vignetting: Vignetting = field(default_factory=Vignetting)
    illumination: Illumination = field(default_factory=Illumination)
    defocus: Defocus = field(default_factory=Defocus)
    dust: Dust = field(default_factory=Dust)
    defects: Defects = field(default_factory=Defects)
    glints: Glints = field(default_factory=Glints)
    noise: Noise = field(default_factory=Noise)
    bitdepth: BitDepth = field(default_factory=BitDepth)
    motion: Motion = field(default_factory=Motion)

    def __post_init__(self):
        self.enabled = parse_effects(self.enabled)

    def on(self, name: str) -> bool:
        """True when the effect ``name`` is enabled."""
        return name in self.enabled

    @property
    def any(self) -> bool:
        return bool(self.enabled)

    def to_dict(self) -> dict:
        """Every parameter, JSON-ready (the enabled set as a sorted list in EFFECTS order)."""
        d = dataclasses.asdict(self)
        d["enabled"] = [n for n in EFFECTS if n in self.enabled]
        return d

    def sensor_and_lighting(self, sensor, lighting):
        """The sensor and lighting actually used: the clean ones with noise/bitdepth applied.

        Parameters
        ----------
        sensor : SensorModel; lighting : Lighting (fractions of full scale).

        Returns
        -------
        (sensor, lighting), new objects (the inputs are left alone).
        """
        if self.on("noise"):
            n = self.noise
            sensor = dataclasses.replace(sensor, full_well_e=n.full_well_e, read_noise_e=n.read_noise_e,
                                         black_level=n.black_level_dn12 / 4095.0)
            lighting = dataclasses.replace(lighting, **{k: v * n.exposure_scale for k, v in lighting.to_dict().items()})
        if self.on("bitdepth"):
            sensor = dataclasses.replace(sensor, bits=self.bitdepth.bits, container_bits=self.bitdepth.container_bits)
        return sensor, lighting


# ------------------------------------------------------------ fixed per camera

@dataclass
class CameraFixed:
    """The parts of the effects that are the same in every frame of one camera.

    vignette : (H, W) float32 lens fall-off (1 at the centre) or None.
    dust : (H, W) float32 transmission of the dust shadows or None.
    hot_index : flat pixel indices of hot pixels; hot_stuck : bool per hot pixel;
    hot_level : fraction of full scale (the stuck reading, or the dark offset).
    dead_index : flat pixel indices of dead pixels.
    """

    shape: tuple
    vignette: np.ndarray | None = None
    dust: np.ndarray | None = None
    dust_spots: np.ndarray | None = None   # (N, 4): column px, row px, radius px, centre transmission
    hot_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    hot_stuck: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    hot_level: np.ndarray = field(default_factory=lambda: np.zeros(0))
    dead_index: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))


def lens_vignetting(camera, a: float, b: float) -> np.ndarray:
    """Lens fall-off V = 1 - a rho^2 - b rho^4 at every pixel centre.

    Parameters
    ----------
    camera : Camera (its principal point and image size, px).
    a, b : coefficients (dimensionless).

    Returns
    -------
    (H, W) float32; rho is the distance from the principal point over the
    image half-diagonal (px / px), so V = 1 - a - b at about the corners.
    """
    w, h = camera.image_size
    cx, cy = camera.matrix[0, 2], camera.matrix[1, 2]
    half_diag = 0.5 * np.hypot(w, h)
    u = (np.arange(w) - cx) / half_diag
    v = (np.arange(h) - cy) / half_diag
    rho2 = v[:, None] ** 2 + u[None, :] ** 2
    return (1.0 - a * rho2 - b * rho2 * rho2).astype(np.float32)


def dust_map(shape, settings: Dust, scale: float, rng: np.random.Generator):
    """Transmission map of soft dust shadows.

    Each spot has transmission T(r) = 1 - (1 - T0) exp(-2 (r / R)^2): T0 at the
    centre, 0.86 + 0.14 T0 at the nominal radius R (the shadow of a particle on
    the sensor window is soft at the lens's wide aperture).

    Parameters
    ----------
    shape : (H, W) px; settings : Dust; scale : image width / 1280 (radii scale with it).
    rng : Generator (from the scenario seed).

    Returns
    -------
    transmission (H, W) float32, spots (N, 4): column px, row px, R px, T0.
    """
    h, w = shape
    n = int(settings.count)
    r = rng.uniform(*settings.radius_px, n) * scale
    r = np.maximum(r, 1.5)
    cu = rng.uniform(0, w - 1, n)
    cv = rng.uniform(0, h - 1, n)
    t0 = rng.uniform(*settings.transmission, n)
    out = np.ones(shape, np.float64)
    yy, xx = np.mgrid[0:h, 0:w]
    for i in range(n):
        # Only a box around the spot: beyond 3 R the shadow is below 1e-7.
        x0, x1 = int(max(cu[i] - 3 * r[i], 0)), int(min(cu[i] + 3 * r[i] + 1, w))
        y0, y1 = int(max(cv[i] - 3 * r[i], 0)), int(min(cv[i] + 3 * r[i] + 1, h))
        d2 = (xx[y0:y1, x0:x1] - cu[i]) ** 2 + (yy[y0:y1, x0:x1] - cv[i]) ** 2
        out[y0:y1, x0:x1] *= 1.0 - (1.0 - t0[i]) * np.exp(-2.0 * d2 / r[i] ** 2)
    return out.astype(np.float32), np.stack([cu, cv, r, t0], -1)


def pixel_defects(shape, settings: Defects, rng: np.random.Generator) -> dict:
    """Positions and kinds of hot and dead pixels.

    Parameters
    ----------
    shape : (H, W) px; settings : Defects; rng : Generator.

    Returns
    -------
    dict with hot_index, hot_stuck, hot_level (fraction of full scale), dead_index
    (flat indices into the (H, W) image; hot and dead never coincide).
    """
    npx = int(shape[0] * shape[1])
    n_hot = int(round(settings.hot_fraction * npx))
    n_dead = int(round(settings.dead_fraction * npx))
    idx = rng.choice(npx, n_hot + n_dead, replace=False)
    hot, dead = np.sort(idx[:n_hot]), np.sort(idx[n_hot:])
    stuck = rng.random(n_hot) < settings.stuck_share
    level = np.where(stuck, rng.uniform(*settings.stuck_level, n_hot), rng.uniform(*settings.dark_offset, n_hot))
    return {"hot_index": hot.astype(np.int64), "hot_stuck": stuck, "hot_level": level,
            "dead_index": dead.astype(np.int64)}


def camera_fixed(effects: CameraEffects, camera, side: str, seed: int) -> CameraFixed:
    """The fixed per-camera maps (vignetting, dust, defects) of one camera.

    Parameters
    ----------
    effects : CameraEffects; camera : Camera; side : "left" or "right";
    seed : the scenario's seed (the maps come from default_rng([seed, 23, 1 or 2])).

    Returns
    -------
    CameraFixed (maps None / empty for effects that are off).
    """
    w, h = camera.image_size
    shape = (h, w)
    fixed = CameraFixed(shape)
    k = SIDES.index(side)
    if effects.on("vignetting"):
        a, b = getattr(effects.vignetting, side)
        fixed.vignette = lens_vignetting(camera, a, b)
    # Separate streams, so switching one effect does not move another's spots.
    if effects.on("dust"):
        fixed.dust, fixed.dust_spots = dust_map(shape, effects.dust, w / 1280.0,
                                                np.random.default_rng([seed, 23, k + 1, 1]))
    if effects.on("defects"):
        d = pixel_defects(shape, effects.defects, np.random.default_rng([seed, 23, k + 1, 2]))
        fixed.hot_index, fixed.hot_stuck, fixed.hot_level = d["hot_index"], d["hot_stuck"], d["hot_level"]
        fixed.dead_index = d["dead_index"]
    return fixed


# ------------------------------------------------------------------- defocus

def blur_circle_mm(s_mm, focal_mm: float, f_number: float, focus_mm: float):
    """Thin-lens blur circle diameter on the sensor.

    c = A f |s - s_f| / (s (s_f - f)), A = f / N (textbook thin-lens optics).

    Parameters
    ----------
    s_mm : object distance(s) along the optical axis, mm.
    focal_mm : focal length f, mm; f_number : N; focus_mm : focus distance s_f, mm.

    Returns
    -------
    c, mm (same shape as s_mm).
    """
    s = np.asarray(s_mm, float)
    aperture = focal_mm / f_number
    return aperture * focal_mm * np.abs(s - focus_mm) / (s * (focus_mm - focal_mm))


def defocus_sigma_px(depth_mm, camera, side: str, settings: Defocus):
    """Gaussian sigma (px) of the defocus blur at object depth ``depth_mm`` for one camera.

    The uniform blur disc of diameter c has a second moment of c^2/16 per axis,
    so the Gaussian of equal second moment has sigma = c / 4.

    Parameters
    ----------
    depth_mm : depth along the camera's optical axis (camera-frame Z), mm.
    camera : Camera (its focal length in px and image width set the focal length in mm).

    Returns
    -------
    sigma, px (same shape as depth_mm).
    """
    pitch = pixel_pitch_mm(camera, settings)
    focal_mm = camera.matrix[0, 0] * pitch
    c = blur_circle_mm(depth_mm, focal_mm, settings.f_number[side], settings.focus_mm[side])
    return c / pitch / 4.0


def pixel_pitch_mm(camera, settings: Defocus) -> float:
    """Pixel pitch (mm) of ``camera``: the same sensor read at ``image width`` px."""
    return settings.pixel_pitch_mm * 1280.0 / camera.image_size[0]


def pixel_centre_slopes(bundle):
    """Mean ray slopes (dx/dz, dy/dz) over each pixel's supersamples, (H, W) each; cached on the bundle."""
    key = ("pixel-centre-slopes",)
    if key not in bundle.tables:
        s = bundle.supersample
        h, w = bundle.shape[0] // s, bundle.shape[1] // s
        bundle.tables[key] = (bundle.sx.reshape(h, s, w, s).mean(axis=(1, 3)),
                              bundle.sy.reshape(h, s, w, s).mean(axis=(1, 3)))
    return bundle.tables[key]


def still_water_depth(bundle) -> np.ndarray:
    """Camera-frame depth Z (mm) of the still water z = 0 seen by each pixel, (H, W).

    A ray point is c + w (sx, sy, 1); on z = 0, w = -c_z; its depth is
    w * (R[2] . (sx, sy, 1)).
    """
    sx, sy = pixel_centre_slopes(bundle)
    axis = bundle.camera.rotation[2]
    w = -bundle.centre[2]
    return w * (axis[0] * sx + axis[1] * sy + axis[2])


# Defocus levels (px) between which the blur is blended; the first non-zero one is
# 0.75 px because a sampled Gaussian of smaller sigma no longer has variance sigma^2.
DEFOCUS_LEVELS = (0.0, 0.75, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0)


def blur_and_integrate(radiance, supersample: int, psf_sigma_px: float, defocus_px=None):
    """Optical blur (lens PSF, and a spatially varying defocus) then pixel box integration.

    The lens PSF and the box are exactly the clean renderer's. The defocus
    follows on the pixel image (blurs commute; the pixel image is already smooth
    at the PSF's scale, so blurring after sampling changes little): Gaussians of
    the levels l of :data:`DEFOCUS_LEVELS` up to the largest local sigma, and per
    pixel the two levels around the local sigma mixed with weights that give the
    mixture exactly the local second moment sigma^2 (second moments add under
    convolution, so the total is psf^2 + 1/12 (box) + sigma^2 per axis).

    Parameters
    ----------
    radiance : (H*S, W*S) float32, fraction of full scale.
    supersample : S; psf_sigma_px : lens PSF, px.
    defocus_px : (H, W) defocus sigma per pixel, px, or None.

    Returns
    -------
    (H, W) float64 pixel values, fraction of full scale.
    """
    s = supersample
    if psf_sigma_px > 0:
        radiance = cv2.GaussianBlur(radiance, (0, 0), psf_sigma_px * s, borderType=cv2.BORDER_REFLECT)
    h, w = radiance.shape[0] // s, radiance.shape[1] // s
    pixel = radiance.reshape(h, s, w, s).mean(axis=(1, 3), dtype=np.float64)
    if defocus_px is None:
        return pixel
    sig = np.asarray(defocus_px, float)
    levels = list(DEFOCUS_LEVELS)
    top = float(np.max(sig))
    if top > levels[-1]:
        levels.append(top)
    n_used = int(np.searchsorted(levels, top, side="left")) + 1
    levels = levels[:max(n_used, 2)]
    stack = np.stack([pixel if lv == 0 else cv2.GaussianBlur(pixel, (0, 0), lv, borderType=cv2.BORDER_REFLECT)
                      for lv in levels])
    lv = np.asarray(levels)
    idx = np.clip(np.searchsorted(lv, sig, side="right") - 1, 0, len(lv) - 2)
    v0, v1 = lv[idx] ** 2, lv[idx + 1] ** 2
    wgt = np.clip((sig ** 2 - v0) / (v1 - v0), 0.0, 1.0)
    lo = np.take_along_axis(stack, idx[None], 0)[0]
    hi = np.take_along_axis(stack, idx[None] + 1, 0)[0]
    return lo + wgt * (hi - lo)


# ---------------------------------------------------------- sensor with effects

def expose_with_effects(radiance, sensor, rng: np.random.Generator, fixed: CameraFixed | None = None, *,
                        defocus_px=None, glint=None):
    """The clean renderer's :func:`~surfrec.synth.render.expose`, with the camera effects.

    Order (light to number): lens PSF and defocus, pixel box, lens vignetting,
    dust shadows, electrons (+ dark-current offset of hot pixels), shot and read
    noise, black level and quantisation, then stuck and dead pixels. With no
    maps, no defocus and no glints it gives exactly what ``expose`` gives.

    Parameters
    ----------
    radiance : (H*S, W*S) float32, fraction of full scale.
    sensor : SensorModel.
    rng : Generator of this frame's noise.
    fixed : CameraFixed or None.
    defocus_px : (H, W) defocus sigma, px, or None.
    glint : (H*S, W*S) glint part of ``radiance`` (fraction of full scale) or None.

    Returns
    -------
    image : uint8/uint16 (H, W); glint_mask : (H, W) bool of pixels saturated where a
        glint contributes at least a tenth of full scale, or None without ``glint``.
    """
    pixel = blur_and_integrate(radiance, sensor.supersample, sensor.psf_sigma_px, defocus_px)
    if fixed is not None and fixed.vignette is not None:
        pixel = pixel * fixed.vignette
    if fixed is not None and fixed.dust is not None:
        pixel = pixel * fixed.dust
    electrons = np.clip(pixel, 0.0, None) * sensor.full_well_e
    if fixed is not None and fixed.hot_index.size:
        warm = fixed.hot_index[~fixed.hot_stuck]
        electrons.ravel()[warm] += fixed.hot_level[~fixed.hot_stuck] * sensor.full_well_e
    noisy = electrons + np.sqrt(electrons + sensor.read_noise_e ** 2) * rng.standard_normal(electrons.shape)
    full = 2 ** sensor.bits - 1
    dn = np.rint((noisy / sensor.full_well_e + sensor.black_level) * full)
    dn = np.clip(dn, 0, full)
    if fixed is not None and fixed.hot_index.size:
        stuck = fixed.hot_index[fixed.hot_stuck]
        dn.ravel()[stuck] = np.rint(fixed.hot_level[fixed.hot_stuck] * full)
    if fixed is not None and fixed.dead_index.size:
        dn.ravel()[fixed.dead_index] = 0
    mask = None
    if glint is not None:
        s = sensor.supersample
        h, w = dn.shape
        g = cv2.resize(glint, (w, h), interpolation=cv2.INTER_AREA)  # the box mean, for whole factors
        mask = (dn >= full) & (g >= 0.1)
        if fixed is not None and fixed.dead_index.size:
            mask.ravel()[fixed.dead_index] = False
    return dn.astype(np.uint8 if sensor.container_bits == 8 else np.uint16), mask


# ------------------------------------------------------------ speckle lighting

@dataclass
class SpeckleLight:
    """What the speckle renderer needs of the effects for one camera.

    hotspot_axis : unit world direction of the projector's beam axis, or None (off).
    hotspot_sigma : beam 1-sigma, rad.
    lamp : world mm of the room lamp (for its glints and its light), or None.
    lamp_ambient : the lamp is the ambient light (uneven), else the ambient is uniform.
    lamp_ref : the lamp's irradiance cos/r^2 on still water at the world origin (1/mm^2).
    glints : Glints or None. sub_times : time offsets (s) per supersample row, or None.
    """

    hotspot_axis: np.ndarray | None = None
    hotspot_sigma: float = 0.0
    lamp: np.ndarray | None = None
    lamp_ambient: bool = False
    lamp_ref: float = 1.0
    glints: Glints | None = None
    sub_times: tuple | None = None


def lamp_reference(lamp) -> float:
    """cos(incidence)/r^2 (1/mm^2) of a point lamp on the still water at the world origin."""
    lamp = np.asarray(lamp, float)
    r = np.linalg.norm(lamp)
    return float(lamp[2] / r ** 3)


def board_lamp_reference(lamp, top_mm: float = 160.0) -> float:
    """1/r^2 (1/mm^2) of the lamp on a board held at the top of its range (``top_mm`` above
    the origin) and facing it: the board's lighting levels are those of its brightest pose,
    as an exposure is set so that the white squares never clip (common practice)."""
    lamp = np.asarray(lamp, float)
    return float(1.0 / np.sum((lamp - [0.0, 0.0, top_mm]) ** 2))


def board_light_and_depth(bundle, pixel_rows, normal, origin, lamp=None, lamp_ref: float = 1.0):
    """Lamp light and camera depth at pixel centres on a board's plane and on the still water.

    Parameters
    ----------
    bundle : RayBundle; pixel_rows : slice of pixel rows.
    normal : (3,) unit board normal (world); origin : (3,) a point of the board plane, world mm.
    lamp : (3,) world mm or None; lamp_ref : 1/mm^2 where the relative light is 1.

    Returns
    -------
    fb, fw : relative lamp irradiance on the board plane / on the water (ones without a lamp);
    db, dw : camera-frame depth (mm) of the board plane / of the water; each (rows, W).
    """
    sx, sy = pixel_centre_slopes(bundle)
    sx, sy = sx[pixel_rows], sy[pixel_rows]
    c = bundle.centre
    axis = bundle.camera.rotation[2]
    n = np.asarray(normal, float)
    along = axis[0] * sx + axis[1] * sy + axis[2]
    with np.errstate(divide="ignore", invalid="ignore"):
        wb = (n @ (np.asarray(origin, float) - c)) / (n[0] * sx + n[1] * sy + n[2])
    ww = -c[2]
    db, dw = wb * along, ww * along
    if lamp is None:
        ones = np.ones(sx.shape)
        return ones, ones, db, dw
    fb = lamp_factor(c[0] + wb * sx, c[1] + wb * sy, c[2] + wb, n[0], n[1], n[2], lamp, lamp_ref)
    fw = lamp_factor(c[0] + ww * sx, c[1] + ww * sy, 0.0, 0.0, 0.0, 1.0, lamp, lamp_ref)
    return fb, fw, db, dw


def lamp_factor(x, y, z, nx, ny, nz, lamp, ref: float):
    """Relative irradiance of a point lamp on surface points (world mm) with unit normals n.

    E / E_ref = (max(cos i, 0) / r^2) / ref (inverse-square and Lambert's cosine laws).
    Normals facing away from the lamp are flipped (a board lit from its back face is
    seen from its front only when it faces the lamp side up; this keeps it lit).
    """
    lx, ly, lz = lamp[0] - x, lamp[1] - y, lamp[2] - z
    r2 = lx * lx + ly * ly + lz * lz
    cos_i = np.abs(nx * lx + ny * ly + nz * lz) / np.sqrt(r2)
    return cos_i / r2 / ref


def hotspot_axis(projector, tilt_deg) -> np.ndarray:
    """Unit world direction of the projector's beam, tilted by (about y, about x) degrees."""
    ay, ax = np.deg2rad(tilt_deg[0]), np.deg2rad(tilt_deg[1])
    d = np.array([np.sin(ay), -np.sin(ax) * np.cos(ay), np.cos(ax) * np.cos(ay)])
    return projector.rotation.T @ d


def beckmann_lobe(cos_h, roughness: float):
    """Beckmann distribution shape exp(-tan^2(alpha) / m^2), alpha = angle of the normal to the half-vector.

    Parameters
    ----------
    cos_h : cos(alpha) (dimensionless); roughness : m, RMS slope (rad).

    Returns
    -------
    lobe in [0, 1], 1 on the mirror direction (Beckmann & Spizzichino 1963).
    """
    c2 = np.clip(cos_h, 1e-6, 1.0) ** 2
    return np.exp(-(1.0 - c2) / (c2 * roughness * roughness))


def speckle_light(effects: CameraEffects, projector, supersample: int) -> SpeckleLight | None:
    """The speckle-frame lighting of the effects (None when none of them touch it).

    Parameters
    ----------
    effects : CameraEffects; projector : Projector; supersample : S (rows per pixel).
    """
    light = SpeckleLight()
    used = False
    if effects.on("illumination"):
        light.hotspot_axis = hotspot_axis(projector, effects.illumination.hotspot_axis_deg)
        light.hotspot_sigma = float(np.deg2rad(effects.illumination.hotspot_sigma_deg))
        used = True
    if effects.on("illumination") or effects.on("glints"):
        light.lamp = np.asarray(effects.room_lamp_mm, float)
        light.lamp_ambient = effects.on("illumination")
        light.lamp_ref = lamp_reference(light.lamp)
        used = True
    if effects.on("glints"):
        light.glints = effects.glints
        used = True
    if effects.on("motion") and supersample > 1:
        s = int(supersample)
        light.sub_times = tuple(((j + 0.5) / s - 0.5) * effects.motion.exposure_s for j in range(s))
        used = True
    return light if used else None


def hotspot(lx, ly, lz, r, axis, sigma):
    """The projector's beam profile H = exp((cos(theta) - 1) / sigma^2).

    A spherical Gaussian (the von Mises–Fisher lobe): for small angles
    1 - cos(theta) = theta^2 / 2, so H = exp(-theta^2 / (2 sigma^2)) to within
    theta^2 / 12 in the exponent (1 % at 20 degrees); it avoids an arccos per ray.

    Parameters
    ----------
    lx, ly, lz : world mm from the surface point to the projector; r : their length, mm.
    axis : unit world beam direction; sigma : rad.

    Returns
    -------
    H in (0, 1], 1 on the beam axis.
    """
    cos_t = -(axis[0] * lx + axis[1] * ly + axis[2] * lz) / r
    return np.exp((cos_t - 1.0) / (sigma * sigma))


def glint_radiance(x, y, z, hx, hy, cam_centre, light_pos, roughness, r_light=None):
    """Beckmann lobe of a point source's mirror reflection toward the camera.

    Parameters
    ----------
    x, y, z : surface points, world mm; hx, hy : surface slopes dz/dx, dz/dy.
    cam_centre, light_pos : world mm.

    Returns
    -------
    lobe value in [0, 1] per point (1 where the normal is on the half-vector).
    """
    lx, ly, lz = light_pos[0] - x, light_pos[1] - y, light_pos[2] - z
    rl = np.sqrt(lx * lx + ly * ly + lz * lz) if r_light is None else r_light
    vx, vy, vz = cam_centre[0] - x, cam_centre[1] - y, cam_centre[2] - z
    rv = np.sqrt(vx * vx + vy * vy + vz * vz)
    hx_, hy_, hz_ = lx / rl + vx / rv, ly / rl + vy / rv, lz / rl + vz / rv
    # n . H with n = (-hx, -hy, 1) / |.|, H = (L + V) / |L + V|.
    cos_h = (-hx * hx_ - hy * hy_ + hz_) / np.sqrt((1.0 + hx * hx + hy * hy) * (hx_ * hx_ + hy_ * hy_ + hz_ * hz_))
    return beckmann_lobe(cos_h, roughness)


def speckle_light_tile(light: SpeckleLight, lighting, x, y, z, hx, hy, value, projector, cam_centre,
                       shaded=None, lamp_shaded=None, hidden=None):
    """Radiance and glint part (fraction of full scale) of speckle-lit water points with the effects.

    The same radiometry as the clean renderer (Lambertian screen lit by a pinhole
    projector, plus ambient), times the projector's hotspot, with the room lamp
    as the ambient light (only with "illumination") and the Beckmann glints of
    the projector (carrying its pattern) and of the lamp added (what :func:`hotspot`,
    :func:`lamp_factor` and :func:`glint_radiance` compute on whole arrays). One compiled
    loop, because the dozens of whole-array steps it replaces cost as much as
    the ray casting itself.

    Parameters
    ----------
    light : SpeckleLight; lighting : Lighting.
    x, y, z : surface points, world mm (2-D); hx, hy : slopes; value : pattern value there.
    projector : Projector; cam_centre : world mm.
    shaded, lamp_shaded, hidden : bool arrays (post's shadow from the projector / the lamp,
        pixels that see the post) or None.

    Returns
    -------
    rad, glint : float64 arrays like x, fraction of full scale (without the camera's vignetting).
    """
    none = np.zeros((1, 1), np.bool_)
    gl = light.glints
    beam = np.zeros(3) if light.hotspot_axis is None else np.asarray(light.hotspot_axis, float)
    lamp = np.zeros(3) if light.lamp is None else np.asarray(light.lamp, float)
    rad = np.empty(x.shape)
    glint = np.empty(x.shape)
    _light_kernel(x, y, z, hx, hy, value,
                  none if shaded is None else shaded, none if lamp_shaded is None else lamp_shaded,
                  none if hidden is None else hidden, shaded is not None, hidden is not None,
                  np.asarray(projector.centre, float), float(projector.centre[2]),
                  np.asarray(projector.rotation[2], float), light.hotspot_axis is not None, beam,
                  float(light.hotspot_sigma or 1.0), light.lamp is not None and light.lamp_ambient, lamp,
                  float(light.lamp_ref), np.asarray(cam_centre, float), gl is not None,
                  0.0 if gl is None else gl.projector_peak, 1.0 if gl is None else gl.projector_roughness ** 2,
                  0.0 if gl is None else gl.lamp_peak, 1.0 if gl is None else gl.lamp_roughness ** 2,
                  float(lighting.exposure), float(lighting.ambient), float(lighting.post_radiance), rad, glint)
    return rad, glint


_FAST = {"nsz", "arcp", "contract", "afn", "reassoc"}  # no nnan/ninf: NaN tests keep working


@njit(cache=True, fastmath=_FAST)
def _lobe(nx, ny, nn, ax, ay, az, m2):
    # Beckmann shape exp(-tan^2 / m^2) of the angle between N = (nx, ny, 1) (|N|^2 = nn)
    # and the unnormalised half-vector a: tan^2 = (|N|^2 |a|^2 - (N.a)^2) / (N.a)^2.
    d = nx * ax + ny * ay + az
    if d <= 0.0:
        return 0.0
    d2 = d * d
    q = nn * (ax * ax + ay * ay + az * az) - d2
    if q > 60.0 * m2 * d2:  # lobe below e^-60: skip the exponential
        return 0.0
    return np.exp(-q / (d2 * m2))


@njit(cache=True, fastmath=_FAST)
def _light_kernel(x, y, z, hx, hy, value, shaded, lamp_shaded, hidden, has_shade, has_post, pc, z0, axp,
                  use_beam, beam, sigma, lamp_ambient, lamp, lamp_ref, cam, use_glint, gp_peak, gp_m2, gl_peak,
                  gl_m2, exposure, ambient, post_rad, rad_out, glint_out):
    n0, n1 = x.shape
    inv_s2 = 1.0 / (sigma * sigma)
    z02 = z0 * z0
    amb_k = ambient / lamp_ref
    for i in range(n0):
        for j in range(n1):
            px, py, pz = x[i, j], y[i, j], z[i, j]
            nx, ny = -hx[i, j], -hy[i, j]
            nn = 1.0 + nx * nx + ny * ny
            inv_n = 1.0 / np.sqrt(nn)
            lx, ly, lz = pc[0] - px, pc[1] - py, pc[2] - pz
            r2 = lx * lx + ly * ly + lz * lz
            inv_r = 1.0 / np.sqrt(r2)
            lx, ly, lz = lx * inv_r, ly * inv_r, lz * inv_r  # unit, toward the projector
            cos_i = (nx * lx + ny * ly + lz) * inv_n
            cos_p = -(axp[0] * lx + axp[1] * ly + axp[2] * lz)
            send = value[i, j] * z02 * inv_r * inv_r / (cos_p * cos_p * cos_p)
            if use_beam:
                ct = -(beam[0] * lx + beam[1] * ly + beam[2] * lz)
                send *= np.exp((ct - 1.0) * inv_s2)
            lit = not (has_shade and shaded[i, j])
            irr = send * max(cos_i, 0.0) if lit else 0.0
            amb = ambient
            mx, my, mz = lamp[0] - px, lamp[1] - py, lamp[2] - pz
            rl2 = mx * mx + my * my + mz * mz
            inv_rl = 1.0 / np.sqrt(rl2)
            mx, my, mz = mx * inv_rl, my * inv_rl, mz * inv_rl  # unit, toward the lamp
            if lamp_ambient:
                amb = amb_k * abs(nx * mx + ny * my + mz) * inv_n * inv_rl * inv_rl
            g = 0.0
            if use_glint:
                vx, vy, vz = cam[0] - px, cam[1] - py, cam[2] - pz
                inv_v = 1.0 / np.sqrt(vx * vx + vy * vy + vz * vz)
                vx, vy, vz = vx * inv_v, vy * inv_v, vz * inv_v
                if lit:
                    g += gp_peak * send * _lobe(nx, ny, nn, lx + vx, ly + vy, lz + vz, gp_m2)
                if not (has_shade and lamp_shaded[i, j]):
                    g += gl_peak * _lobe(nx, ny, nn, mx + vx, my + vy, mz + vz, gl_m2)
            rad = exposure * irr + amb + g
            if has_post and hidden[i, j]:
                rad = post_rad
                g = 0.0
            rad_out[i, j] = rad
            glint_out[i, j] = g
