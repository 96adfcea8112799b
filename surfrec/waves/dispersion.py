"""Linear dispersion relation of capillary-gravity waves on water of finite depth.

For small-amplitude waves on an inviscid, irrotational layer of still depth
``H`` with a clean free surface,

    omega^2 = (g k + (sigma / rho) k^3) tanh(k H)

(Lamb, *Hydrodynamics*, 6th ed. 1932, Art. 267; Lighthill, *Waves in Fluids*,
1978, ch. 3). Everything here follows from that one formula. Article and
section numbers of these books are cited from memory.

Units: wavenumbers in rad/mm, depths in mm, frequencies in Hz, angular
frequencies in rad/s, speeds in mm/s. Gravity (m/s^2), surface tension (N/m)
and density (kg/m^3) stay in SI as handbooks quote them; the conversion to
millimetres is done once, inside. ``depth_mm=np.inf`` means deep water.
Viscous damping and any surfactant film are ignored.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq

from surfrec.errors import InputError, ProcessingError
from surfrec.waves.water import DENSITY, STANDARD_GRAVITY, SURFACE_TENSION

__all__ = [
    "angular_frequency",
    "wavenumber",
    "phase_speed",
    "group_speed",
    "minimum_phase_speed",
]

_MM_PER_M = 1000.0


# --------------------------------------------------------------------------
# input checks and numerically safe pieces
# --------------------------------------------------------------------------


def _fluid(gravity, surface_tension, density):
    """Check the fluid constants and return (g [m/s^2], sigma/rho [m^3/s^2])."""
    g = float(gravity)
    sigma = float(surface_tension)
    rho = float(density)
    if not (math.isfinite(g) and g >= 0.0):
        raise InputError(f"gravity must be finite and >= 0 m/s^2, got {gravity!r}")
    if not (math.isfinite(sigma) and sigma >= 0.0):
        raise InputError(
            f"surface_tension must be finite and >= 0 N/m, got {surface_tension!r}"
        )
    if not (math.isfinite(rho) and rho > 0.0):
        raise InputError(f"density must be finite and > 0 kg/m^3, got {density!r}")
    if g == 0.0 and sigma == 0.0:
        raise InputError("gravity and surface_tension cannot both be zero (no restoring force)")
    return g, sigma / rho


def _wavenumbers(k_rad_per_mm):
    k = np.asarray(k_rad_per_mm, dtype=np.float64)
    if not np.all(np.isfinite(k)) or np.any(k < 0.0):
        raise InputError("wavenumbers must be finite and >= 0 rad/mm")
    return k


def _depths(depth_mm):
    h = np.asarray(depth_mm, dtype=np.float64)
    # NaN fails the comparison and is rejected with the non-positive depths.
    if not np.all(h > 0.0):
        raise InputError("depth_mm must be > 0 mm (np.inf for deep water)")
    return h


def _tanh_over_x(x):
    """tanh(x)/x for x >= 0 (finite), equal to 1 at x = 0 (no 0/0)."""
    out = np.ones_like(x)
    small = x < 1e-4
    # Taylor series tanh(x)/x = 1 - x^2/3 + O(x^4): the O(x^4) term is < 1e-16.
    xs = x[small]
    out[small] = 1.0 - xs * xs / 3.0
    xl = x[~small]
    out[~small] = np.tanh(xl) / xl
    return out


def _x_over_sinh(x):
    """x/sinh(x) for x >= 0 (finite), without overflow of sinh for large x."""
    out = np.ones_like(x)
    small = x < 1e-4
    xs = x[small]
    # Taylor series x/sinh(x) = 1 - x^2/6 + O(x^4).
    out[small] = 1.0 - xs * xs / 6.0
    xl = x[~small]
    # x/sinh x = 2 x e^{-x} / (1 - e^{-2x}); e^{-x} underflows harmlessly to 0.
    out[~small] = 2.0 * xl * np.exp(-xl) / (-np.expm1(-2.0 * xl))
    return out


def _depth_terms(k_mm, h_mm):
    """Return (tanh(kH), 2kH/sinh(2kH)) broadcast, exact limits for deep water."""
    k_mm, h_mm = np.broadcast_arrays(k_mm, h_mm)
    deep = np.isinf(h_mm)
    # Substitute a harmless finite depth where it is infinite so that k=0 with
    # H=inf does not produce 0*inf; the deep limits are put back below.
    x = k_mm * np.where(deep, 1.0, h_mm)
    t = np.where(deep, 1.0, np.tanh(x))
    q = np.where(deep, 0.0, _x_over_sinh(2.0 * x))
    return t, q


def _scalar(a):
    """Return numpy 0-d results as numpy scalars, arrays unchanged."""
    return a[()] if isinstance(a, np.ndarray) and a.ndim == 0 else a


# --------------------------------------------------------------------------
# public functions
# --------------------------------------------------------------------------


def angular_frequency(
    k_rad_per_mm,
    depth_mm,
    *,
    gravity: float = STANDARD_GRAVITY,
    surface_tension: float = SURFACE_TENSION,
    density: float = DENSITY,
):
    """Angular frequency of linear capillary-gravity waves.

    omega^2 = (g k + (sigma/rho) k^3) tanh(k H)  (Lamb 1932, Art. 267;
    Lighthill 1978, ch. 3).

    Parameters
    ----------
    k_rad_per_mm : array_like
        Wavenumber magnitude, rad/mm, >= 0.
    depth_mm : array_like
        Still-water depth H, mm, > 0; ``np.inf`` for deep water. Broadcast
        against ``k_rad_per_mm``.
    gravity : float, optional
        Gravitational acceleration g, m/s^2 (default standard gravity).
    surface_tension : float, optional
        Surface tension sigma, N/m (default clean water at 20 C).
    density : float, optional
        Density rho, kg/m^3 (default water at 20 C).

    Returns
    -------
    omega : ndarray or float
        Angular frequency, rad/s (>= 0), broadcast shape of the inputs.

    Raises
    ------
    InputError
        Negative or non-finite wavenumber, non-positive depth, bad constants.
    """
    g, s = _fluid(gravity, surface_tension, density)
    k = _wavenumbers(k_rad_per_mm)
    h = _depths(depth_mm)
    t, _ = _depth_terms(k, h)
    km = k * _MM_PER_M  # rad/m, so that g k and (sigma/rho) k^3 are in s^-2
    return _scalar(np.sqrt(km * (g + s * km * km) * t))


def phase_speed(
    k_rad_per_mm,
    depth_mm,
    *,
    gravity: float = STANDARD_GRAVITY,
    surface_tension: float = SURFACE_TENSION,
    density: float = DENSITY,
):
    """Phase speed c = omega/k of linear capillary-gravity waves.

    c^2 = (g/k + (sigma/rho) k) tanh(kH), from the dispersion relation of
    Lamb (1932, Art. 267). At k = 0 the long-wave limit sqrt(g H) is returned
    (infinite for deep water with g > 0).

    Parameters
    ----------
    k_rad_per_mm : array_like
        Wavenumber, rad/mm, >= 0.
    depth_mm : array_like
        Still-water depth, mm, > 0 or ``np.inf``.
    gravity, surface_tension, density : float, optional
        g in m/s^2, sigma in N/m, rho in kg/m^3.

    Returns
    -------
    c : ndarray or float
        Phase speed, mm/s.
    """
    g, s = _fluid(gravity, surface_tension, density)
    k = _wavenumbers(k_rad_per_mm)
    h = _depths(depth_mm)
    k, h = np.broadcast_arrays(k, h)
    km = k * _MM_PER_M
    deep = np.isinf(h)
    fin = ~deep
    c2 = np.empty_like(km)
    # Finite depth: tanh(kH)/k = H * tanh(kH)/(kH) stays finite as k -> 0.
    kf = km[fin]
    hf = h[fin] / _MM_PER_M
    c2[fin] = (g + s * kf * kf) * hf * _tanh_over_x(kf * hf)
    # Deep water: c^2 = g/k + s k, whose k -> 0 limit is inf (or 0 if g = 0).
    kd = km[deep]
    g_over_k = np.divide(g, kd, out=np.full_like(kd, np.inf if g > 0 else 0.0), where=kd > 0)
    c2[deep] = g_over_k + s * kd
    return _scalar(np.sqrt(c2) * _MM_PER_M)


def group_speed(
    k_rad_per_mm,
    depth_mm,
    *,
    gravity: float = STANDARD_GRAVITY,
    surface_tension: float = SURFACE_TENSION,
    density: float = DENSITY,
):
    """Group speed d omega / d k of linear capillary-gravity waves (analytic).

    Differentiating the dispersion relation (Lighthill 1978, ch. 3):

        c_g = (c / 2) [ (g + 3 (sigma/rho) k^2) / (g + (sigma/rho) k^2)
                        + 2 k H / sinh(2 k H) ]

    which gives c/2 for deep-water gravity waves and 3c/2 for pure
    capillary waves.

    Parameters
    ----------
    k_rad_per_mm : array_like
        Wavenumber, rad/mm, >= 0.
    depth_mm : array_like
        Still-water depth, mm, > 0 or ``np.inf``.
    gravity, surface_tension, density : float, optional
        g in m/s^2, sigma in N/m, rho in kg/m^3.

    Returns
    -------
    c_g : ndarray or float
        Group speed, mm/s.
    """
    g, s = _fluid(gravity, surface_tension, density)
    c = np.asarray(
        phase_speed(k_rad_per_mm, depth_mm, gravity=gravity,
                    surface_tension=surface_tension, density=density)
    )
    k = _wavenumbers(k_rad_per_mm)
    h = _depths(depth_mm)
    _, q = _depth_terms(k, h)
    km = np.broadcast_to(k, q.shape) * _MM_PER_M
    num = g + 3.0 * s * km * km
    den = g + s * km * km
    # den = 0 only for g = 0 and k = 0, where the pure-capillary ratio is 3.
    ratio = np.divide(num, den, out=np.full_like(num, 3.0), where=den > 0)
    return _scalar(0.5 * c * (ratio + q))


def _log_omega2_and_slope(u, g, s, h_mm):
    """ln(omega^2) and its derivative with respect to u = ln(k [rad/m]).

    The slope 1 + 2 s k^2/(g + s k^2) + 2kH/sinh(2kH) lies in [1, 4], which is
    what makes the bracketed Newton iteration in :func:`wavenumber` safe.
    """
    km = np.exp(u)
    k_mm = km / _MM_PER_M
    t, q = _depth_terms(k_mm, h_mm)
    sk2 = s * km * km
    f = np.log(g + sk2) + u + np.log(t)
    slope = 1.0 + 2.0 * sk2 / (g + sk2) + q
    return f, slope


def wavenumber(
    frequency_hz,
    depth_mm,
    *,
    gravity: float = STANDARD_GRAVITY,
    surface_tension: float = SURFACE_TENSION,
    density: float = DENSITY,
):
    """Wavenumber of linear capillary-gravity waves of a given frequency.

    Inverts omega^2 = (g k + (sigma/rho) k^3) tanh(kH) (Lamb 1932, Art. 267),
    whose right side increases strictly with k, so the root is unique.

    The root is found by a vectorised, bracketed Newton iteration on
    ln(omega^2) as a function of ln k. That function's slope lies between 1
    and 4 (see ``_log_omega2_and_slope``), so an exact bracket comes from the
    starting residual alone and bisection is the fallback when a Newton step
    would leave it. Converged to about 1e-15 relative (the tolerance on the
    Newton step in ln k is 5e-14).

    Parameters
    ----------
    frequency_hz : array_like
        Frequency f = omega / (2 pi), Hz, > 0.
    depth_mm : array_like
        Still-water depth, mm, > 0 or ``np.inf``; broadcast against
        ``frequency_hz``.
    gravity, surface_tension, density : float, optional
        g in m/s^2, sigma in N/m, rho in kg/m^3.

    Returns
    -------
    k : ndarray or float
        Wavenumber, rad/mm.

    Raises
    ------
    InputError
        Non-positive or non-finite frequency, non-positive depth.
    ProcessingError
        The iteration did not converge (not expected to happen).
    """
    g, s = _fluid(gravity, surface_tension, density)
    f_hz = np.asarray(frequency_hz, dtype=np.float64)
    if not np.all(np.isfinite(f_hz)) or np.any(f_hz <= 0.0):
        raise InputError("frequency_hz must be finite and > 0 Hz")
    h = _depths(depth_mm)
    f_hz, h = np.broadcast_arrays(f_hz, h)
    f_hz = f_hz.ravel()
    h = h.ravel()
    shape = np.broadcast_shapes(np.shape(frequency_hz), np.shape(depth_mm))

    w2 = (2.0 * np.pi * f_hz) ** 2
    target = np.log(w2)
    # Starting guess from deep water: each term of g k + s k^3 alone is below
    # omega^2, so k is at most min(omega^2/g, (omega^2/s)^(1/3)).
    with np.errstate(divide="ignore"):
        k_grav = w2 / g if g > 0 else np.full_like(w2, np.inf)
        k_cap = np.cbrt(w2 / s) if s > 0 else np.full_like(w2, np.inf)
    u = np.log(np.minimum(k_grav, k_cap))

    f, slope = _log_omega2_and_slope(u, g, s, h)
    res = f - target
    lo = np.where(res < 0, u - res / 4.0, u - res)
    hi = np.where(res < 0, u - res, u - res / 4.0)
    for _ in range(200):
        step = -res / slope
        u_new = u + step
        outside = (u_new <= lo) | (u_new >= hi)
        bisect = 0.5 * (lo + hi)
        u_new = np.where(outside & (hi > lo), bisect, u_new)
        done = np.abs(u_new - u) <= 5e-14 * np.maximum(1.0, np.abs(u))
        u = u_new
        f, slope = _log_omega2_and_slope(u, g, s, h)
        res = f - target
        lo = np.where(res < 0, np.maximum(lo, u), lo)
        hi = np.where(res > 0, np.minimum(hi, u), hi)
        if np.all(done):
            break
    else:  # pragma: no cover - the bracket guarantees convergence
        raise ProcessingError("wavenumber(): Newton iteration did not converge")
    # One last Newton step puts the result at rounding level.
    u = u - res / slope
    k_mm = np.exp(u) / _MM_PER_M
    return _scalar(k_mm.reshape(shape))


def _one_minus_x_over_sinh(x: float) -> float:
    """1 - x/sinh(x) without cancellation, for a scalar x >= 0 (finite)."""
    if x < 1.0:
        # sinh x - x = sum_{n>=1} x^(2n+1)/(2n+1)!; 12 terms reach 1e-20 at x=1.
        term = x**3 / 6.0
        acc = term
        for n in range(2, 14):
            term *= x * x / ((2 * n) * (2 * n + 1))
            acc += term
        return acc / math.sinh(x)
    if x > 700.0:
        return 1.0
    return 1.0 - x / math.sinh(x)


def minimum_phase_speed(
    depth_mm: float = np.inf,
    *,
    gravity: float = STANDARD_GRAVITY,
    surface_tension: float = SURFACE_TENSION,
    density: float = DENSITY,
):
    """Minimum phase speed of capillary-gravity waves and its wavelength.

    The minimum is where c_g = c, i.e. where

        2 (sigma/rho) k^2 / (g + (sigma/rho) k^2) = 1 - 2kH / sinh(2kH),

    found here with :func:`scipy.optimize.brentq` in ln k. In deep water it is
    c_min = (4 g sigma / rho)^(1/4) at lambda = 2 pi sqrt(sigma / (rho g))
    (Lamb 1932, Art. 268; Lighthill 1978, ch. 3) -- about 231 mm/s at
    17.1 mm for clean water. Over a layer shallow enough that
    H^2 <= 3 sigma / (rho g) (H <= 4.7 mm for water) the phase speed rises
    monotonically from k = 0 and the minimum is the long-wave limit sqrt(gH)
    at infinite wavelength.

    Parameters
    ----------
    depth_mm : float, optional
        Still-water depth, mm, > 0; default ``np.inf`` (deep water).
    gravity, surface_tension, density : float, optional
        g in m/s^2 (> 0), sigma in N/m (> 0), rho in kg/m^3.

    Returns
    -------
    c_min : float
        Minimum phase speed, mm/s.
    wavelength : float
        Wavelength at the minimum, mm (``inf`` in the very shallow case).
    """
    g, s = _fluid(gravity, surface_tension, density)
    if g <= 0.0 or s <= 0.0:
        raise InputError("a phase-speed minimum needs both gravity > 0 and surface_tension > 0")
    h_mm = float(_depths(depth_mm))
    h_m = h_mm / _MM_PER_M
    if math.isfinite(h_m) and h_m * h_m <= 3.0 * s / g:
        return float(math.sqrt(g * h_m) * _MM_PER_M), math.inf

    k_c = math.sqrt(g / s)  # rad/m: the deep-water minimum, used as scale only

    def excess(v: float) -> float:
        # dc/dk has the sign of this function of v = ln(k / k_c).
        km = k_c * math.exp(v)
        sk2 = s * km * km
        lhs = 2.0 * sk2 / (g + sk2)
        rhs = 1.0 if not math.isfinite(h_m) else _one_minus_x_over_sinh(2.0 * km * h_m)
        return lhs - rhs

    # The depth term only lowers the right side, so the root is at v <= 0 and
    # excess(1) > 0; walk down for a negative value.
    hi = 1.0
    lo = -1.0
    while excess(lo) >= 0.0:
        lo -= 1.0
        if lo < -60.0:  # pragma: no cover - excluded by the H^2 <= 3 s/g test
            raise ProcessingError("minimum_phase_speed(): could not bracket the minimum")
    v = brentq(excess, lo, hi, xtol=1e-15, rtol=4.0 * np.finfo(float).eps, maxiter=500)
    k_mm = k_c * math.exp(v) / _MM_PER_M
    c = float(phase_speed(k_mm, h_mm, gravity=gravity, surface_tension=surface_tension, density=density))
    return c, 2.0 * math.pi / k_mm
