"""Water-surface shapes for the synthetic renderer.

Every shape is a small class with

* ``kind`` -- a short string naming the shape;
* ``height(x, y, t)`` -- surface elevation, mm, in the world (tank) frame:
  x, y in mm, z up, still water at z = 0; x and y broadcast together, t is
  a scalar time in seconds; the result is a new float64 array;
* ``gradient(x, y, t)`` -- the slopes (dh/dx, dh/dy), dimensionless;
* ``to_dict()`` -- JSON-serialisable parameters including ``"kind"``, enough
  to rebuild the shape exactly with :func:`surface_from_dict`. An infinite
  depth is written as the string ``"inf"`` (strict JSON has no infinity);
  the constructors read it back through ``float()``.

Wave shapes take their wavenumber from the linear capillary-gravity
dispersion relation (:mod:`surfrec.waves.dispersion`) at the given
frequency and still-water depth; ``gravity`` (m/s^2), ``surface_tension``
(N/m) and ``density`` (kg/m^3) default to clean water at 20 C.
Time-harmonic fields are Re[eta_c exp(-i omega t)].
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage, special

from surfrec.errors import InputError
from surfrec.waves import dispersion
from surfrec.waves.scattering import maccamy_fuchs_amplitude, reflection_coefficients
from surfrec.waves.water import DENSITY, STANDARD_GRAVITY, SURFACE_TENSION

__all__ = [
    "StillWater",
    "PlaneWave",
    "CircularRipples",
    "Depression",
    "ScatteredWave",
    "Superposition",
    "surface_from_dict",
]


# --------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------


def _xy(x, y):
    """float64 arrays of x and y and their broadcast shape."""
    xa = np.asarray(x, dtype=np.float64)
    ya = np.asarray(y, dtype=np.float64)
    return xa, ya, np.broadcast_shapes(xa.shape, ya.shape)


def _flat(a, shape):
    """``a`` broadcast to ``shape`` and flattened (a copy only if needed)."""
    return np.broadcast_to(a, shape).ravel()


def _finite(name, value, *, positive=False, nonneg=False):
    v = float(value)
    if not math.isfinite(v) or (positive and v <= 0.0) or (nonneg and v < 0.0):
        need = " and > 0" if positive else (" and >= 0" if nonneg else "")
        raise InputError(f"{name} must be finite{need}, got {value!r}")
    return v


def _depth(value):
    v = float(value)  # accepts the string "inf" written by to_dict
    if not v > 0.0:
        raise InputError(f"depth_mm must be > 0 mm (or inf), got {value!r}")
    return v


def _json_float(v: float):
    return "inf" if math.isinf(v) else float(v)


def _point(name, value):
    try:
        px, py = (float(c) for c in value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a pair (x, y) in mm, got {value!r}") from None
    if not (math.isfinite(px) and math.isfinite(py)):
        raise InputError(f"{name} must be finite, got {value!r}")
    return (px, py)


def _time(t) -> float:
    t = float(t)
    if not math.isfinite(t):
        raise InputError(f"t must be a finite time in s, got {t!r}")
    return t


class _Fluid:
    """Dispersion-relation parameters shared by the wave shapes."""

    def _set_fluid(self, gravity, surface_tension, density):
        self.gravity = float(gravity)
        self.surface_tension = float(surface_tension)
        self.density = float(density)

    def _fluid_kw(self):
        return {"gravity": self.gravity, "surface_tension": self.surface_tension, "density": self.density}


def _scalar_safe(method):
    """Let height/gradient take 0-d inputs (the in-place numpy work needs arrays)."""
    import functools

    @functools.wraps(method)
    def wrapper(self, x, y, t, *args, **kwargs):
        if np.ndim(x) == 0 and np.ndim(y) == 0:
            out = method(self, np.atleast_1d(np.asarray(x, float)), np.atleast_1d(np.asarray(y, float)), t,
                         *args, **kwargs)
            if isinstance(out, tuple):
                return tuple(float(o[0]) for o in out)
            return float(out[0])
        return method(self, x, y, t, *args, **kwargs)

    return wrapper


class _Surface:
    kind = "surface"

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        for name in ("height", "gradient", "height_exact"):
            if name in cls.__dict__:
                setattr(cls, name, _scalar_safe(cls.__dict__[name]))

    def to_dict(self) -> dict:  # pragma: no cover - every subclass overrides
        raise NotImplementedError

    def __repr__(self):
        params = ", ".join(f"{k}={v!r}" for k, v in self.to_dict().items() if k != "kind")
        return f"{type(self).__name__}({params})"


# --------------------------------------------------------------------------
# shapes
# --------------------------------------------------------------------------


class StillWater(_Surface):
    """Flat water at a constant level.

    Parameters
    ----------
    level_mm : float, optional
        Height of the surface, mm (0 = still-water reference).
    """

    kind = "still_water"

    def __init__(self, level_mm: float = 0.0):
        self.level_mm = _finite("level_mm", level_mm)

    def height(self, x, y, t):
        """Surface height, mm: ``level_mm`` everywhere (x, y in mm, t in s)."""
        _time(t)
        _, _, shape = _xy(x, y)
        return np.full(shape, self.level_mm)

    def gradient(self, x, y, t):
        """Slopes (dh/dx, dh/dy), dimensionless: zero."""
        _time(t)
        _, _, shape = _xy(x, y)
        return np.zeros(shape), np.zeros(shape)

    def to_dict(self):
        return {"kind": self.kind, "level_mm": self.level_mm}


class PlaneWave(_Fluid, _Surface):
    """Linear plane wave eta = A(t) cos(k . x - omega t + phase).

    k has magnitude from the capillary-gravity dispersion relation (Lamb,
    *Hydrodynamics*, Art. 267) and points along ``direction_deg``; the phase
    is referred to the world origin. The amplitude is ``amplitude_mm`` for
    t < ``step_time_s`` and ``amplitude_mm * step_factor`` from then on: a
    whole-field step used to test that an amplitude change is recovered (it
    is not a physical wave-group front).

    Parameters
    ----------
    amplitude_mm : float
        Amplitude A, mm.
    frequency_hz : float
        Frequency, Hz, > 0.
    depth_mm : float
        Still-water depth, mm (``inf`` for deep water).
    direction_deg : float, optional
        Propagation direction, degrees counter-clockwise from +x.
    phase_deg : float, optional
        Phase at x = y = 0, t = 0, degrees.
    gravity, surface_tension, density : float, optional
        m/s^2, N/m, kg/m^3.
    step_time_s : float or None, optional
        Time of the amplitude step, s (None: no step).
    step_factor : float, optional
        Amplitude multiplier from ``step_time_s`` on.

    Attributes
    ----------
    wavenumber : float
        |k|, rad/mm.
    omega : float
        Angular frequency, rad/s.
    """

    kind = "plane_wave"

    def __init__(self, amplitude_mm, frequency_hz, depth_mm, direction_deg=0.0, phase_deg=0.0,
                 gravity=STANDARD_GRAVITY, surface_tension=SURFACE_TENSION, density=DENSITY,
                 step_time_s=None, step_factor=1.0):
        self.amplitude_mm = _finite("amplitude_mm", amplitude_mm)
        self.frequency_hz = _finite("frequency_hz", frequency_hz, positive=True)
        self.depth_mm = _depth(depth_mm)
        self.direction_deg = _finite("direction_deg", direction_deg)
        self.phase_deg = _finite("phase_deg", phase_deg)
        self._set_fluid(gravity, surface_tension, density)
        self.step_time_s = None if step_time_s is None else _finite("step_time_s", step_time_s)
        self.step_factor = _finite("step_factor", step_factor)
        self.wavenumber = float(dispersion.wavenumber(self.frequency_hz, self.depth_mm, **self._fluid_kw()))
        self.omega = 2.0 * math.pi * self.frequency_hz
        phi = math.radians(self.direction_deg)
        self._kx = self.wavenumber * math.cos(phi)
        self._ky = self.wavenumber * math.sin(phi)
        self._phase = math.radians(self.phase_deg)

    def amplitude_at(self, t) -> float:
        """Amplitude A(t), mm, at time t (s)."""
        t = _time(t)
        if self.step_time_s is not None and t >= self.step_time_s:
            return self.amplitude_mm * self.step_factor
        return self.amplitude_mm

    def _phase_field(self, x, y, t):
        xa, ya, shape = _xy(x, y)
        ph = np.empty(shape)
        np.multiply(xa, self._kx, out=ph)
        ph += ya * self._ky
        ph += self._phase - self.omega * _time(t)
        return ph

    def height(self, x, y, t):
        """Surface height, mm, at x, y (mm) and time t (s)."""
        ph = self._phase_field(x, y, t)
        np.cos(ph, out=ph)
        ph *= self.amplitude_at(t)
        return ph

    def gradient(self, x, y, t):
        """Slopes (dh/dx, dh/dy), dimensionless, analytic: -A k_{x,y} sin(phase)."""
        s = self._phase_field(x, y, t)
        np.sin(s, out=s)
        s *= -self.amplitude_at(t)
        return s * self._kx, np.multiply(s, self._ky, out=s)

    def to_dict(self):
        return {"kind": self.kind, "amplitude_mm": self.amplitude_mm, "frequency_hz": self.frequency_hz,
                "depth_mm": _json_float(self.depth_mm), "direction_deg": self.direction_deg,
                "phase_deg": self.phase_deg, **self._fluid_kw(),
                "step_time_s": self.step_time_s, "step_factor": self.step_factor}


class CircularRipples(_Fluid, _Surface):
    """Outgoing circular ripples spreading from a point source (kinematic model).

    eta = C T_core(r) T_front(r, t) Re[H1_0(k r) exp(-i omega t)]
        = C T_core T_front [J_0(kr) cos(omega t) + Y_0(kr) sin(omega t)],

    the outgoing cylindrical wave of linear theory (outgoing for
    exp(-i omega t) because H1_0(kr) ~ sqrt(2/(pi k r)) exp(i(kr - pi/4)),
    DLMF 10.17.5, number from memory) multiplied by two smooth tapers:

    * T_core = 1 - exp(-(r / r_core)^4) removes the logarithmic singularity of
      Y_0 at the source (T_core Y_0 -> 0 like r^4 ln r);
    * T_front = (1 - tanh((r - R_f(t)) / w)) / 2 with R_f = c_g (t - t_0):
      the disturbance reaches only as far as a front moving at the group
      speed c_g of the ripple frequency, with tanh width w.

    C is set so that the oscillation amplitude at ``reference_radius_mm`` is
    ``amplitude_mm`` once the front has passed: C = A / (|H1_0(k r_ref)|
    T_core(r_ref)). This is a kinematic model of spreading ripples for
    rendering tests -- not a solution of the Cauchy-Poisson initial-value
    problem (no dispersion of the front, a single frequency).

    Parameters
    ----------
    centre_mm : (float, float)
        Source position, mm.
    amplitude_mm : float
        Amplitude at the reference radius, mm.
    frequency_hz : float
        Ripple frequency, Hz, > 0.
    depth_mm : float
        Still-water depth, mm (``inf`` for deep water).
    reference_radius_mm : float, optional
        Radius where the amplitude is ``amplitude_mm``, mm.
    core_radius_mm : float or None, optional
        Core taper radius, mm; default a quarter wavelength.
    start_time_s : float, optional
        Time the front leaves the source, s.
    front_width_mm : float, optional
        Width w of the tanh front taper, mm.
    gravity, surface_tension, density : float, optional
        m/s^2, N/m, kg/m^3.
    """

    kind = "circular_ripples"

    def __init__(self, centre_mm, amplitude_mm, frequency_hz, depth_mm, reference_radius_mm=20.0,
                 core_radius_mm=None, start_time_s=0.0, front_width_mm=10.0,
                 gravity=STANDARD_GRAVITY, surface_tension=SURFACE_TENSION, density=DENSITY):
        self.centre_mm = _point("centre_mm", centre_mm)
        self.amplitude_mm = _finite("amplitude_mm", amplitude_mm)
        self.frequency_hz = _finite("frequency_hz", frequency_hz, positive=True)
        self.depth_mm = _depth(depth_mm)
        self.reference_radius_mm = _finite("reference_radius_mm", reference_radius_mm, positive=True)
        self.start_time_s = _finite("start_time_s", start_time_s)
        self.front_width_mm = _finite("front_width_mm", front_width_mm, positive=True)
        self._set_fluid(gravity, surface_tension, density)
        kw = self._fluid_kw()
        self.wavenumber = float(dispersion.wavenumber(self.frequency_hz, self.depth_mm, **kw))
        self.omega = 2.0 * math.pi * self.frequency_hz
        self.group_speed_mm_s = float(dispersion.group_speed(self.wavenumber, self.depth_mm, **kw))
        self._core_given = core_radius_mm
        self.core_radius_mm = (0.25 * 2.0 * math.pi / self.wavenumber if core_radius_mm is None
                               else _finite("core_radius_mm", core_radius_mm, positive=True))
        kr = self.wavenumber * self.reference_radius_mm
        core_ref = -math.expm1(-((self.reference_radius_mm / self.core_radius_mm) ** 4))
        self._c = self.amplitude_mm / (math.hypot(special.j0(kr), special.y0(kr)) * core_ref)

    def front_radius_mm(self, t) -> float:
        """Radius of the front (centre of the tanh taper), mm, at time t (s)."""
        return self.group_speed_mm_s * (_time(t) - self.start_time_s)

    def _pieces(self, x, y, t, *, need_derivative):
        xa, ya, shape = _xy(x, y)
        u = np.broadcast_to(xa - self.centre_mm[0], shape)
        v = np.broadcast_to(ya - self.centre_mm[1], shape)
        r = np.hypot(u, v)
        # Y_0, Y_1 are singular at r = 0 where the core taper is exactly 0; a
        # tiny positive floor keeps them finite so 0 * Y stays 0.
        kr = np.maximum(self.wavenumber * r, 1e-300)
        wt = self.omega * t
        cw, sw = math.cos(wt), math.sin(wt)
        wave = special.j0(kr)
        wave *= cw
        wave += sw * special.y0(kr)
        q = r / self.core_radius_mm
        q *= q
        q *= q
        core = -np.expm1(-q)
        z = (r - self.front_radius_mm(t)) * (-2.0 / self.front_width_mm)
        front = special.expit(z)  # (1 - tanh(s))/2 = expit(-2 s), stable for any s
        if not need_derivative:
            return wave, core, front, None
        dwave = special.j1(kr)
        dwave *= cw
        dwave += sw * special.y1(kr)
        dwave *= -self.wavenumber  # d/dr J_0 = -k J_1, d/dr Y_0 = -k Y_1 (DLMF 10.6.3)
        dcore = 4.0 * q / np.maximum(r, 1e-300) * np.exp(-q)
        dfront = front * (1.0 - front) * (-2.0 / self.front_width_mm)
        # d eta/dr, then its x and y components
        d = dwave * core * front
        d += wave * dcore * front
        d += wave * core * dfront
        d *= self._c
        rs = np.maximum(r, 1e-300)
        return d * (u / rs), d * (v / rs)

    def height(self, x, y, t):
        """Surface height, mm, at x, y (mm) and time t (s)."""
        t = _time(t)
        wave, core, front, _ = self._pieces(x, y, t, need_derivative=False)
        wave *= core
        wave *= front
        wave *= self._c
        return wave

    def gradient(self, x, y, t):
        """Slopes (dh/dx, dh/dy), dimensionless, analytic (product rule on the tapers)."""
        t = _time(t)
        return self._pieces(x, y, t, need_derivative=True)

    def to_dict(self):
        return {"kind": self.kind, "centre_mm": list(self.centre_mm), "amplitude_mm": self.amplitude_mm,
                "frequency_hz": self.frequency_hz, "depth_mm": _json_float(self.depth_mm),
                "reference_radius_mm": self.reference_radius_mm,
                "core_radius_mm": None if self._core_given is None else self.core_radius_mm,
                "start_time_s": self.start_time_s, "front_width_mm": self.front_width_mm, **self._fluid_kw()}


class Depression(_Surface):
    """Stationary Gaussian dip h = -depth exp(-r^2 / (2 radius^2)).

    Parameters
    ----------
    centre_mm : (float, float)
        Centre of the dip, mm.
    depth_mm : float
        Depth of the dip at its centre, mm (positive = downwards). Not the
        water depth.
    radius_mm : float
        Gaussian standard deviation, mm, > 0.
    """

    kind = "depression"

    def __init__(self, centre_mm, depth_mm, radius_mm):
        self.centre_mm = _point("centre_mm", centre_mm)
        self.depth_mm = _finite("depth_mm", depth_mm)
        self.radius_mm = _finite("radius_mm", radius_mm, positive=True)
        self._inv2s2 = 0.5 / self.radius_mm**2

    def _parts(self, x, y):
        xa, ya, shape = _xy(x, y)
        u = np.broadcast_to(xa - self.centre_mm[0], shape)
        v = np.broadcast_to(ya - self.centre_mm[1], shape)
        g = u * u
        g += v * v
        g *= -self._inv2s2
        np.exp(g, out=g)
        g *= -self.depth_mm
        return u, v, g

    def height(self, x, y, t):
        """Surface height, mm, at x, y (mm); independent of t (s)."""
        _time(t)
        return self._parts(x, y)[2]

    def gradient(self, x, y, t):
        """Slopes (dh/dx, dh/dy), dimensionless, analytic: -h (x - xc) / radius^2, ..."""
        _time(t)
        u, v, g = self._parts(x, y)
        g *= -2.0 * self._inv2s2
        return g * u, g * v

    def to_dict(self):
        return {"kind": self.kind, "centre_mm": list(self.centre_mm), "depth_mm": self.depth_mm,
                "radius_mm": self.radius_mm}


class ScatteredWave(_Fluid, _Surface):
    """Plane wave diffracted by a vertical surface-piercing post (MacCamy & Fuchs 1954).

    eta = Re[A exp(i phase) eta_c(x, y) exp(-i omega t)] with eta_c the
    MacCamy-Fuchs complex amplitude per unit incident amplitude
    (:func:`surfrec.waves.scattering.maccamy_fuchs_amplitude`): incident
    wave exp(i k d.(x - c)) along ``direction_deg`` with zero phase at the
    post axis c, plus the scattered field that makes d eta_c / dr = 0 at the
    wall. Free contact line: no meniscus at the wall.

    Evaluation. The incident part is evaluated in closed form. The scattered
    part S is tabulated once as the envelope E = S exp(-i k r) (r from the
    post axis) on a regular grid over ``extent_mm`` plus a margin of 16 grid
    steps, and interpolated with cubic B-splines (scipy.ndimage.spline_filter
    and map_coordinates, order 3, mode "nearest", real and imaginary parts).
    Removing the exp(i k r) phase makes the table smooth on the scale of the
    post and of the angular pattern rather than of the wavelength, so the
    spline error far from the post drops by orders of magnitude compared with
    tabulating eta_c itself (measured at grid step 0.25 mm, k = 2 rad/mm: from
    2.4e-4 to 2e-6 of A).

    Inside the post the table holds the analytic continuation of the series
    for r_c <= r < a, and below r_c the envelope at r_c along the same ray.
    r_c = a/2 for ka <= 3; for larger posts r_c = a - (a/2)(3/ka)^(2/3),
    closer to the wall, because the continued outgoing field grows like
    exp(ka (2(a - r)/a)^(3/2) / 3) inward and would spoil the spline.

    Near the wall the field varies on the scale of the post radius, and the
    spline error grows like (grid step / a)^4. After building the table the
    constructor compares spline and series at the cell centres (all of them
    within a + max(10 mm, 40 steps) of the axis, every few cells beyond) and
    evaluates every point closer to the axis than the farthest cell centre
    that missed ``tolerance_mm / 2`` (plus two grid steps) from the series
    directly instead (``exact_radius_mm``; 0 when the spline meets the
    tolerance everywhere). Over the next four grid steps outward the two are
    blended with a quintic smoothstep, so the height stays continuous (C2)
    and a ray-surface fixed-point iteration cannot hang on a jump. Points
    outside ``extent_mm`` use the series (there the switch is a jump of at
    most the spline error at the extent edge). The direct evaluation costs
    about 1 microsecond per point.

    ``height`` is finite inside the post (the table's continuation), so that
    ray intersection does not break there; it is not physical water. Use
    ``height_exact`` for NaN inside the post.

    Parameters
    ----------
    amplitude_mm : float
        Incident amplitude A, mm.
    frequency_hz : float
        Frequency, Hz, > 0.
    depth_mm : float
        Still-water depth, mm (``inf`` for deep water).
    post_centre_mm : (float, float)
        Post axis, mm.
    post_radius_mm : float
        Post radius a, mm, > 0.
    extent_mm : (xmin, xmax, ymin, ymax)
        Region tabulated, mm.
    grid_step_mm : float, optional
        Table spacing, mm.
    direction_deg : float, optional
        Incident propagation direction, degrees counter-clockwise from +x.
    phase_deg : float, optional
        Incident phase at the post axis at t = 0, degrees.
    gravity, surface_tension, density : float, optional
        m/s^2, N/m, kg/m^3.
    tolerance_mm : float or None, optional
        Target accuracy of ``height`` against the series, mm; default
        1e-7 * |amplitude_mm|.

    Attributes
    ----------
    wavenumber : float
        rad/mm.
    omega : float
        rad/s.
    post_centre_mm, post_radius_mm : tuple, float
        Post geometry, mm.
    exact_radius_mm : float
        Points with r below this use the series directly, mm.
    spline_error_mm : float
        Largest spline error found at the check points outside
        ``exact_radius_mm``, mm.
    """

    kind = "scattered_wave"
    time_harmonic = True  # eta = Re[C(x, y) exp(-i omega t)]: renderers may tabulate C once
    _MARGIN_STEPS = 16  # prefilter boundary effects decay like 0.268^n: 7e-10 at 16 steps
    _BLEND_STEPS = 4  # series-to-spline blend annulus; the spline already meets the tolerance there

    def __init__(self, amplitude_mm, frequency_hz, depth_mm, post_centre_mm, post_radius_mm, extent_mm,
                 grid_step_mm=0.25, direction_deg=0.0, phase_deg=0.0,
                 gravity=STANDARD_GRAVITY, surface_tension=SURFACE_TENSION, density=DENSITY,
                 tolerance_mm=None):
        self.amplitude_mm = _finite("amplitude_mm", amplitude_mm)
        self.frequency_hz = _finite("frequency_hz", frequency_hz, positive=True)
        self.depth_mm = _depth(depth_mm)
        self.post_centre_mm = _point("post_centre_mm", post_centre_mm)
        self.post_radius_mm = _finite("post_radius_mm", post_radius_mm, positive=True)
        try:
            ext = tuple(float(e) for e in extent_mm)
        except (TypeError, ValueError):
            raise InputError(f"extent_mm must be (xmin, xmax, ymin, ymax) in mm, got {extent_mm!r}") from None
        if len(ext) != 4 or not all(math.isfinite(e) for e in ext) or ext[1] <= ext[0] or ext[3] <= ext[2]:
            raise InputError(f"extent_mm must be finite (xmin, xmax, ymin, ymax) with xmin < xmax, "
                             f"ymin < ymax, got {extent_mm!r}")
        self.extent_mm = ext
        self.grid_step_mm = _finite("grid_step_mm", grid_step_mm, positive=True)
        self.direction_deg = _finite("direction_deg", direction_deg)
        self.phase_deg = _finite("phase_deg", phase_deg)
        self._set_fluid(gravity, surface_tension, density)
        self.tolerance_mm = None if tolerance_mm is None else _finite("tolerance_mm", tolerance_mm, positive=True)
        self.wavenumber = float(dispersion.wavenumber(self.frequency_hz, self.depth_mm, **self._fluid_kw()))
        self.omega = 2.0 * math.pi * self.frequency_hz
        phi = math.radians(self.direction_deg)
        self._d = (math.cos(phi), math.sin(phi))
        self._phase = math.radians(self.phase_deg)
        ka = self.wavenumber * self.post_radius_mm
        a = self.post_radius_mm
        self._r_fill = a - min(0.5 * a, 0.5 * a * (3.0 / ka) ** (2.0 / 3.0))
        # a hair above a/2 so rounding never puts a point below the
        # continuation's domain in maccamy_fuchs_amplitude
        self._r_fill = max(self._r_fill, 0.5 * a * (1.0 + 1e-12))
        self._build_table()
        self._check_table()

    # -- exact pieces ------------------------------------------------------

    def _series_kw(self):
        return {"k": self.wavenumber, "radius": self.post_radius_mm, "centre": self.post_centre_mm,
                "direction_deg": self.direction_deg}

    def _envelope_exact(self, x, y):
        """Scattered envelope E = S exp(-i k r) per unit amplitude (1-D x, y),
        with the inside-post fill described in the class docstring."""
        cx, cy = self.post_centre_mm
        u = x - cx
        v = y - cy
        r = np.hypot(u, v)
        rc = np.maximum(r, self._r_fill)
        scale = rc / np.where(r > 0, r, 1.0)
        # the axis itself: take the ray along the incident direction
        uc = np.where(r > 0, u * scale, rc * self._d[0])
        vc = np.where(r > 0, v * scale, rc * self._d[1])
        total = maccamy_fuchs_amplitude(uc + cx, vc + cy, inside="continue", method="fast", **self._series_kw())
        k = self.wavenumber
        incident = np.exp(1j * k * (uc * self._d[0] + vc * self._d[1]))
        return (total - incident) * np.exp(-1j * k * rc)

    def _build_table(self):
        h = self.grid_step_mm
        m = self._MARGIN_STEPS * h
        xmin, xmax, ymin, ymax = self.extent_mm
        self._x0 = xmin - m
        self._y0 = ymin - m
        nx = int(math.ceil((xmax - xmin + 2 * m) / h)) + 1
        ny = int(math.ceil((ymax - ymin + 2 * m) / h)) + 1
        if nx * ny > 2e7:  # ~1 GB with the two coefficient arrays
            raise InputError(f"ScatteredWave table of {nx} x {ny} nodes is too large; "
                             "use a smaller extent_mm or a larger grid_step_mm")
        xs = self._x0 + h * np.arange(nx)
        ys = self._y0 + h * np.arange(ny)
        table = np.empty((nx, ny), dtype=np.complex128)
        rows = max(1, 400_000 // ny)  # bounded temporaries
        for i in range(0, nx, rows):
            xx, yy = np.meshgrid(xs[i:i + rows], ys, indexing="ij")
            table[i:i + rows] = self._envelope_exact(xx.ravel(), yy.ravel()).reshape(xx.shape)
        self._coef_re = ndimage.spline_filter(table.real, order=3, mode="nearest")
        self._coef_im = ndimage.spline_filter(table.imag, order=3, mode="nearest")

    def _envelope_spline(self, x, y):
        c = np.empty((2, x.size))
        inv = 1.0 / self.grid_step_mm
        np.subtract(x, self._x0, out=c[0])
        c[0] *= inv
        np.subtract(y, self._y0, out=c[1])
        c[1] *= inv
        er = ndimage.map_coordinates(self._coef_re, c, order=3, mode="nearest", prefilter=False)
        ei = ndimage.map_coordinates(self._coef_im, c, order=3, mode="nearest", prefilter=False)
        return er, ei

    def _check_table(self):
        h = self.grid_step_mm
        xmin, xmax, ymin, ymax = self.extent_mm
        cx, cy = self.post_centre_mm
        a = self.post_radius_mm
        xs = np.arange(math.floor((xmin - self._x0) / h), math.ceil((xmax - self._x0) / h)) * h + self._x0 + 0.5 * h
        ys = np.arange(math.floor((ymin - self._y0) / h), math.ceil((ymax - self._y0) / h)) * h + self._y0 + 0.5 * h
        xs = xs[(xs >= xmin) & (xs <= xmax)]
        ys = ys[(ys >= ymin) & (ys <= ymax)]
        stride = max(1, int(math.ceil(math.sqrt(xs.size * ys.size / 1.5e5))))
        near = a + max(10.0, 40.0 * h)
        # every cell near the post, a sub-lattice elsewhere
        xx, yy = np.meshgrid(xs, ys, indexing="ij")
        r = np.hypot(xx - cx, yy - cy)
        keep = (r >= a) & (r < near)
        sub = np.zeros(xx.shape, dtype=bool)
        sub[::stride, ::stride] = True
        keep |= sub & (r >= a)
        px, py, pr = xx[keep], yy[keep], r[keep]
        self.exact_radius_mm = 0.0
        self._blend_outer_mm = 0.0
        self.spline_error_mm = 0.0
        if px.size == 0:
            return
        er, ei = self._envelope_spline(px, py)
        err = np.abs(er + 1j * ei - self._envelope_exact(px, py)) * abs(self.amplitude_mm)
        tol = self.tolerance_mm if self.tolerance_mm is not None else 1e-7 * abs(self.amplitude_mm)
        bad = err > 0.5 * tol
        if np.any(bad):
            self.exact_radius_mm = float(pr[bad].max()) + 2.0 * h
            self._blend_outer_mm = self.exact_radius_mm + self._BLEND_STEPS * h
        outside = pr >= self.exact_radius_mm
        self.spline_error_mm = float(err[outside].max()) if np.any(outside) else 0.0

    # -- evaluation --------------------------------------------------------

    # evaluation paths per point
    _SPLINE, _EXACT, _BLEND = 0, 1, 2

    def _paths(self, x, y):
        """Path per point: series outside the extent and inside the exact
        radius, spline elsewhere, and both blended over an annulus of
        ``_BLEND_STEPS`` grid steps just outside the exact radius."""
        xmin, xmax, ymin, ymax = self.extent_mm
        inside = (x >= xmin) & (x <= xmax) & (y >= ymin) & (y <= ymax)
        mode = np.where(inside, self._SPLINE, self._EXACT).astype(np.int8)
        if self.exact_radius_mm > 0.0:
            u = x - self.post_centre_mm[0]
            v = y - self.post_centre_mm[1]
            r2 = u * u + v * v
            mode[r2 < self.exact_radius_mm**2] = self._EXACT
            mode[inside & (r2 >= self.exact_radius_mm**2) & (r2 < self._blend_outer_mm**2)] = self._BLEND
        return mode

    def _spline_weight(self, x, y):
        """Share of the spline in the blend annulus: quintic smoothstep
        q^3 (10 - 15 q + 6 q^2), so height stays C2 across the switch."""
        r = np.hypot(x - self.post_centre_mm[0], y - self.post_centre_mm[1])
        q = np.clip((r - self.exact_radius_mm) / (self._blend_outer_mm - self.exact_radius_mm), 0.0, 1.0)
        return q * q * q * (10.0 + q * (-15.0 + 6.0 * q))

    def _eta_exact(self, x, y, t):
        """Height at 1-D points from the series (with the inside-post fill)."""
        k = self.wavenumber
        u = x - self.post_centre_mm[0]
        v = y - self.post_centre_mm[1]
        p = self.amplitude_mm * np.exp(1j * (self._phase - self.omega * t))  # A e^{i(phase - wt)}
        full = np.exp(1j * k * (u * self._d[0] + v * self._d[1]))
        full += self._envelope_exact(x, y) * np.exp(1j * k * np.hypot(u, v))
        return (p * full).real

    def _eta_spline(self, x, y, t):
        """Height at 1-D points from the table: incident in closed form plus
        the interpolated scattered envelope."""
        k = self.wavenumber
        p = self.amplitude_mm * np.exp(1j * (self._phase - self.omega * t))
        er, ei = self._envelope_spline(x, y)
        u = x - self.post_centre_mm[0]
        v = y - self.post_centre_mm[1]
        # incident: A cos(k d.(x - c) + phase - wt)
        inc = u * (k * self._d[0])
        inc += v * (k * self._d[1])
        inc += self._phase - self.omega * t
        np.cos(inc, out=inc)
        inc *= self.amplitude_mm
        # scattered: Re[p E e^{ikr}] = |p| (Er cos psi - Ei sin psi), psi = kr + arg p
        psi = np.hypot(u, v)
        psi *= k
        psi += math.atan2(p.imag, p.real)
        er *= np.cos(psi)
        np.sin(psi, out=psi)
        ei *= psi
        er -= ei
        er *= abs(p)
        inc += er
        return inc

    def _eta(self, x, y, t, mode):
        """Height at 1-D points x, y (mm) along the given paths."""
        if not np.any(mode):
            return self._eta_spline(x, y, t)
        out = np.empty(x.size)
        ne = mode != self._SPLINE
        ns = mode != self._EXACT
        if np.any(ne):
            out[ne] = self._eta_exact(x[ne], y[ne], t)
        if np.any(ns):
            sv = self._eta_spline(x[ns], y[ns], t)
            bl = mode[ns] == self._BLEND
            if np.any(bl):
                idx = np.nonzero(ns)[0][bl]
                w = self._spline_weight(x[idx], y[idx])
                sv[bl] = (1.0 - w) * out[idx] + w * sv[bl]
            out[ns] = sv
        return out

    def height(self, x, y, t):
        """Surface height, mm, at x, y (mm) and time t (s): spline table, series
        near the post and outside ``extent_mm`` (see the class docstring)."""
        t = _time(t)
        xa, ya, shape = _xy(x, y)
        xf, yf = _flat(xa, shape), _flat(ya, shape)
        return self._eta(xf, yf, t, self._paths(xf, yf)).reshape(shape)

    def gradient(self, x, y, t, *, step_mm=1e-3):
        """Slopes (dh/dx, dh/dy), dimensionless, by central differences of ``height``.

        Not the spline's own derivative: a central difference with step
        ``step_mm`` (default 1e-3 mm). Each point's four samples use the same
        evaluation (spline or series) as the point itself, so a difference
        never straddles the two.

        Error: truncation step^2 |d^3 eta/dx^3| / 6, i.e. 1.7e-7 k^3 A for
        the wave part (k in rad/mm) and more within about a radius of a thin
        post; rounding ~1e-16 A / step = 1e-13; plus the derivative of the
        spline's error. Measured against the series derivative (scipy jvp,
        h1vp), A = 1 mm, default 0.25 mm grid: 1e-7 (5 Hz, 20 mm post),
        3e-7 (20 Hz, 5 mm post), 1.2e-6 next to the wall of a 1 mm post at
        50 Hz (2.5e-7 with step_mm=3e-4).

        Parameters
        ----------
        x, y : array_like
            Points, mm (broadcast together).
        t : float
            Time, s.
        step_mm : float, optional
            Difference step, mm.

        Returns
        -------
        dh_dx, dh_dy : ndarray
            Slopes, dimensionless, broadcast shape of x and y.
        """
        t = _time(t)
        xa, ya, shape = _xy(x, y)
        xf, yf = _flat(xa, shape), _flat(ya, shape)
        ex = self._paths(xf, yf)
        hs = float(step_mm)
        gx = self._eta(xf + hs, yf, t, ex)
        gx -= self._eta(xf - hs, yf, t, ex)
        gx *= 0.5 / hs
        gy = self._eta(xf, yf + hs, t, ex)
        gy -= self._eta(xf, yf - hs, t, ex)
        gy *= 0.5 / hs
        return gx.reshape(shape), gy.reshape(shape)

    def height_exact(self, x, y, t, *, method="fast"):
        """Height, mm, from the MacCamy-Fuchs series itself; NaN inside the post.

        ``method`` is passed to :func:`maccamy_fuchs_amplitude` ("fast": closed
        incident sum + scattered series; "series": every term from
        scipy.special).
        """
        t = _time(t)
        amp = maccamy_fuchs_amplitude(x, y, inside="nan", method=method, **self._series_kw())
        p = self.amplitude_mm * np.exp(1j * (self._phase - self.omega * t))
        return np.asarray(p * amp).real

    def reflection_coefficients(self, m_max):
        """R_m = -H2_m'(ka)/H1_m'(ka) for m = 0..m_max (dimensionless, |R_m| = 1)."""
        return reflection_coefficients(self.wavenumber, self.post_radius_mm, np.arange(int(m_max) + 1))

    def to_dict(self):
        return {"kind": self.kind, "amplitude_mm": self.amplitude_mm, "frequency_hz": self.frequency_hz,
                "depth_mm": _json_float(self.depth_mm), "post_centre_mm": list(self.post_centre_mm),
                "post_radius_mm": self.post_radius_mm, "extent_mm": list(self.extent_mm),
                "grid_step_mm": self.grid_step_mm, "direction_deg": self.direction_deg,
                "phase_deg": self.phase_deg, **self._fluid_kw(), "tolerance_mm": self.tolerance_mm}


class Superposition(_Surface):
    """Sum of surfaces (linear superposition of heights and slopes).

    Parameters
    ----------
    *surfaces : surface objects
        The parts; an empty superposition is still water at z = 0.
    """

    kind = "superposition"

    def __init__(self, *surfaces):
        for s in surfaces:
            if not (hasattr(s, "height") and hasattr(s, "gradient") and hasattr(s, "to_dict")):
                raise InputError(f"Superposition parts must be surfaces, got {s!r}")
        self.parts = tuple(surfaces)

    def height(self, x, y, t):
        """Sum of the parts' heights, mm, at x, y (mm) and time t (s)."""
        _, _, shape = _xy(x, y)
        out = np.zeros(shape)
        for s in self.parts:
            out += s.height(x, y, t)
        return out

    def gradient(self, x, y, t):
        """Sum of the parts' slopes (dh/dx, dh/dy), dimensionless."""
        _, _, shape = _xy(x, y)
        gx = np.zeros(shape)
        gy = np.zeros(shape)
        for s in self.parts:
            px, py = s.gradient(x, y, t)
            gx += px
            gy += py
        return gx, gy

    def to_dict(self):
        return {"kind": self.kind, "parts": [s.to_dict() for s in self.parts]}

    def __repr__(self):
        return f"Superposition({', '.join(repr(s) for s in self.parts)})"


_KINDS = {cls.kind: cls for cls in (StillWater, PlaneWave, CircularRipples, Depression, ScatteredWave)}


def surface_from_dict(d: dict):
    """Rebuild a surface from its ``to_dict()`` output.

    Parameters
    ----------
    d : dict
        Mapping with ``"kind"`` and the constructor parameters (mm, s, Hz,
        degrees, SI fluid constants); nested ``"parts"`` for a superposition.

    Returns
    -------
    surface
        A new surface object equal in every height to the original.

    Raises
    ------
    InputError
        Unknown kind or parameters that the constructor does not take.
    """
    if not isinstance(d, dict) or "kind" not in d:
        raise InputError(f"a surface description must be a dict with 'kind', got {d!r}")
    kind = d["kind"]
    params = {k: v for k, v in d.items() if k != "kind"}
    if kind == Superposition.kind:
        return Superposition(*(surface_from_dict(p) for p in params.get("parts", [])))
    cls = _KINDS.get(kind)
    if cls is None:
        raise InputError(f"unknown surface kind {kind!r}; known: {sorted([*_KINDS, Superposition.kind])}")
    try:
        return cls(**params)
    except TypeError as exc:
        raise InputError(f"bad parameters for surface kind {kind!r}: {exc}") from None
