"""Cylindrical-wave modes of a time-harmonic height field: incoming and outgoing amplitudes per angular order.

Pure computations on numpy arrays (no file I/O); ``surfrec modes`` drives them.

Conventions (docs/conventions.md): the physical elevation is Re[A(x, y) exp(-i omega t)];
in polar coordinates (r, theta) about a centre, theta counter-clockwise from
+x,

    A(r, theta) = sum_m [ a_m H2_m(k r) + b_m H1_m(k r) ] exp(i m theta),

H1 (first kind) outgoing and H2 (second kind) incoming for exp(-i omega t)
(DLMF 10.2.5-10.2.6 asymptotics, cited from memory). The reflection
coefficient of order m is R_m = b_m / a_m. A regular (source-free) field such
as an incident plane wave has b_m = a_m, since J_m = (H1_m + H2_m) / 2 (DLMF
10.4.4); a lossless scatterer changes only the phase of b_m (|R_m| = 1,
MacCamy & Fuchs 1954). Amplitudes a_m, b_m are in mm: a plane wave of
amplitude A has |a_m| = |b_m| = A / 2 for every m (Jacobi-Anger expansion,
DLMF 10.12).

Steps (each a public function):

1. :class:`HarmonicFit` -- the complex amplitude at frequency F at every node
   by least squares, h(t) = c0 + Re[A exp(-i omega t)], over whole periods of
   the record (:func:`whole_periods`); the normal equations are kept per
   block of frames for the time bootstrap.
2. :func:`resample_polar` -- onto a polar grid about the centre with local
   6-point Lagrange interpolation (no global prefilter, so a NaN node spoils
   only the polar points whose 6 x 6 stencil holds it).
3. :func:`azimuthal_coefficients` -- FFT over theta on complete rings, least
   squares over the valid points on rings with gaps.
4. :func:`hankel_fit` -- per order m, least squares of a_m, b_m over the
   radial range; :func:`fit_wavenumber` optionally fits k.
5. :func:`estimate_centre` -- the centre by least squares of the
   mirror-symmetric scatterer model (b_m / a_m = b_-m / a_-m, as about the
   axis of a body of revolution; :func:`symmetry_misfit`). It is sharp
   across the incident wave and undetermined along it for a single plane
   wave (the whole set-up stays mirror-symmetric about the incidence line
   wherever on it the centre sits); that component comes from the hole the
   post leaves in the data.
6. :func:`analyse_modes` -- the whole analysis with block-bootstrap
   uncertainties: (a) over time, resampling blocks of frames with
   replacement (whole frames, so spatial correlation is kept; blocks at
   least as long as the matcher's time window, so temporal correlation is
   kept), and (b) over azimuth, a circular block bootstrap of the residual
   of the fit on the polar grid in wedges of 1/16 of the circle. The quoted
   1-sigma is the larger of the two for each quantity. A plain
   least-squares covariance would treat the oversampled polar grid and the
   overlapping correlation windows of neighbouring nodes as independent and
   understate the error several-fold.

Units: mm, s, Hz, rad/mm, degrees where named ``*_deg``.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from surfrec.errors import InputError

__all__ = ["HarmonicFit", "MIN_PERIODS", "analyse_modes", "azimuthal_coefficients", "estimate_centre",
           "fit_wavenumber", "hankel_fit", "hole_centre", "line_search_centre", "polar_grid", "resample_polar",
           "symmetry_misfit", "whole_periods"]

#: Fewest whole wave periods the record must cover.
MIN_PERIODS = 2.0
#: Lagrange interpolation stencil, nodes per axis.
STENCIL = 6
#: Rings missing more than this share of their points are left out of the fit.
MAX_RING_MISSING = 0.25
#: Azimuthal wedges of the azimuthal block bootstrap.
N_SECTORS = 16


# ------------------------------------------------------------------ 1. complex amplitude


def whole_periods(n_frames: int, dt: float, frequency: float):
    """Frames that cover the largest whole number of periods.

    Parameters
    ----------
    n_frames : int
        Evenly sampled frames available.
    dt : float
        Frame step, s.
    frequency : float
        Hz, > 0 and below the Nyquist frequency 1 / (2 dt).

    Returns
    -------
    n_use : int
        Frames to use (from the first).
    periods : float
        Periods they cover, n_use * dt * frequency (an integer up to the
        rounding of the frame grid).

    Raises
    ------
    InputError
        Frequency not below Nyquist, or fewer than :data:`MIN_PERIODS` periods.
    """
    f = float(frequency)
    nyq = 0.5 / dt
    if not (math.isfinite(f) and f > 0):
        raise InputError(f"frequency must be > 0 Hz, got {frequency!r}")
    if f >= nyq:
        raise InputError(f"frequency {f:g} Hz is not below the Nyquist frequency {nyq:g} Hz of the record "
                         f"({1 / dt:g} frames/s)")
    span = n_frames * dt * f
    # 1% slack: an estimated frequency a hair above a whole number of periods still counts.
    if span < MIN_PERIODS * 0.99:
        raise InputError(f"the record covers {span:.3g} periods of {f:g} Hz ({n_frames} frames at {1 / dt:g} "
                         f"frames/s); the analysis needs at least {MIN_PERIODS:g} whole periods")
    p = math.floor(span * 1.01)
    n_use = min(n_frames, int(round(p / (f * dt))))
    return n_use, n_use * dt * f


class HarmonicFit:
    """Least-squares complex amplitude at one frequency at every node, kept per block of frames.

    Model at each node: h(t) = c0 + a cos(omega t) + b sin(omega t) =
    c0 + Re[A exp(-i omega t)] with A = a + i b (t the file's time, so the
    phase refers to its time 0). Missing samples (NaN) are left out of that
    node's sums, never zero-filled.

    Parameters
    ----------
    n_nodes : int
        Nodes per frame (frames are given flattened, or as (n, Ny, Nx)).
    frequency : float
        Hz.
    n_frames : int
        Frames that will be added.
    block_frames : int
        Frames per bootstrap block (the last block takes the remainder).
    """

    def __init__(self, n_nodes: int, frequency: float, n_frames: int, block_frames: int):
        self.omega = 2 * np.pi * float(frequency)
        self.n_frames = int(n_frames)
        self.block_frames = max(1, int(block_frames))
        self.n_blocks = max(1, self.n_frames // self.block_frames)
        self.G = np.zeros((self.n_blocks, n_nodes, 3, 3))
        self.r = np.zeros((self.n_blocks, n_nodes, 3))
        self.count = np.zeros((self.n_blocks, n_nodes))
        self._seen = 0

    def add(self, times, block) -> None:
        """Add consecutive frames.

        Parameters
        ----------
        times : (n,) s.
        block : (n, Ny, Nx) or (n, N) heights, mm.
        """
        t = np.asarray(times, np.float64)
        h = np.asarray(block, np.float64).reshape(t.size, -1)
        basis = np.stack([np.ones_like(t), np.cos(self.omega * t), np.sin(self.omega * t)], axis=1)
        ok = np.isfinite(h)
        hv = np.where(ok, h, 0.0)
        idx = np.minimum((self._seen + np.arange(t.size)) // self.block_frames, self.n_blocks - 1)
        for b in np.unique(idx):
            sel = idx == b
            m = ok[sel].astype(np.float64)
            bs = basis[sel]
            self.G[b] += np.einsum("tn,ti,tj->nij", m, bs, bs, optimize=True)
            self.r[b] += np.einsum("tn,ti->ni", hv[sel], bs, optimize=True)
            self.count[b] += m.sum(axis=0)
        self._seen += t.size

    def amplitude(self, weights=None, *, min_valid: float = 0.8):
        """Complex amplitude A per node, mm.

        Parameters
        ----------
        weights : (n_blocks,) array_like, optional
            Multiplicity of each block (a bootstrap draw); default all 1.
        min_valid : float
            Nodes valid in less than this share of the frames are NaN.

        Returns
        -------
        (N,) complex, mm, NaN where not determined.
        """
        w = np.ones(self.n_blocks) if weights is None else np.asarray(weights, np.float64)
        G = np.einsum("b,bnij->nij", w, self.G)
        r = np.einsum("b,bni->ni", w, self.r)
        cnt = np.einsum("b,bn->n", w, self.count)
        good = cnt >= min_valid * float(np.sum(w * self._block_sizes()))
        # A tiny ridge keeps singular systems (nodes never valid) solvable; they are set to NaN below.
        G = G + np.eye(3) * (1e-12 * np.maximum(cnt, 1.0))[:, None, None]
        sol = np.linalg.solve(G, r[..., None])[..., 0]
        a = sol[:, 1] + 1j * sol[:, 2]
        a[~good] = np.nan
        return a

    def _block_sizes(self):
        sizes = np.full(self.n_blocks, self.block_frames, np.float64)
        sizes[-1] = self.n_frames - self.block_frames * (self.n_blocks - 1)
        return sizes


# ------------------------------------------------------------------ 2-3. polar grid and azimuthal orders


def polar_grid(r1: float, r2: float, step: float, k_max_order: float):
    """Radii and angles of the polar grid.

    Parameters
    ----------
    r1, r2 : float
        Radial range, mm.
    step : float
        Radial step, mm (the Cartesian grid step: finer adds no information).
    k_max_order : float
        Highest angular order present (about k r2); the angular sampling is
        a power of two of at least 4 (k_max_order + 16) points, so no order
        up to it aliases.

    Returns
    -------
    radii (Nr,) mm, theta (Ntheta,) rad.
    """
    nr = max(2, int(round((r2 - r1) / step)) + 1)
    radii = np.linspace(r1, r2, nr)
    nth = 1 << int(math.ceil(math.log2(max(64.0, 4.0 * (k_max_order + 16.0)))))
    return radii, 2 * np.pi * np.arange(nth) / nth


def _lagrange_weights(t, p):
    """Weights (..., p) of p-point Lagrange interpolation at offsets t in [p/2-1, p/2) of nodes 0..p-1."""
    w = np.ones(t.shape + (p,))
    for i in range(p):
        for j in range(p):
            if i != j:
                w[..., i] *= (t - j) / (i - j)
    return w


def resample_polar(field, x, y, centre, radii, theta):
    """Sample a field on a regular grid at polar points, by local 6-point Lagrange interpolation.

    Parameters
    ----------
    field : (Ny, Nx) complex or real, NaN where missing.
    x (Nx,), y (Ny,) : evenly spaced grid coordinates, mm.
    centre : (cx, cy) mm.
    radii (Nr,) mm, theta (Ntheta,) rad.

    Returns
    -------
    (Nr, Ntheta) values; NaN where the 6 x 6 stencil leaves the grid or holds
    a NaN node. The interpolation error for a wave of wavenumber k on grid
    step h is about (k h)^6 / 720 relative (Lagrange remainder).
    """
    f = np.asarray(field)
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    dx, dy = x[1] - x[0], y[1] - y[0]
    xq = centre[0] + radii[:, None] * np.cos(theta)[None, :]
    yq = centre[1] + radii[:, None] * np.sin(theta)[None, :]
    u = (xq - x[0]) / dx
    v = (yq - y[0]) / dy
    p = STENCIL
    i0 = np.floor(u).astype(int) - (p // 2 - 1)
    j0 = np.floor(v).astype(int) - (p // 2 - 1)
    inside = (i0 >= 0) & (i0 + p <= x.size) & (j0 >= 0) & (j0 + p <= y.size)
    i0c = np.clip(i0, 0, x.size - p)
    j0c = np.clip(j0, 0, y.size - p)
    wx = _lagrange_weights(u - i0c, p)
    wy = _lagrange_weights(v - j0c, p)
    ii = i0c[..., None] + np.arange(p)
    jj = j0c[..., None] + np.arange(p)
    patch = f[jj[..., :, None], ii[..., None, :]]          # (Nr, Nth, p, p)
    out = np.einsum("...j,...ji,...i->...", wy, patch, wx)
    out = np.where(inside, out, np.nan)
    return out


def azimuthal_coefficients(polar, theta, m_max: int, radii=None, k: float | None = None):
    """Coefficients c_m(r) of A(r, theta) = sum_m c_m(r) exp(i m theta), |m| <= m_max.

    Complete rings: discrete Fourier transform over theta (exact for orders
    below half the angular sampling). Rings with missing points (up to
    :data:`MAX_RING_MISSING`): least squares over the valid points with
    orders up to ceil(k r) + 8 (the field holds no higher orders there:
    J_m(kr) and the outgoing waves of a compact source decay fast beyond
    m = kr), which needs ``radii`` and ``k``. Rings missing more are NaN.

    Parameters
    ----------
    polar : (Nr, Ntheta) complex.
    theta : (Ntheta,) rad, evenly spaced over the circle.
    m_max : int
        Highest |m| returned.
    radii (Nr,) mm, k rad/mm : for rings with gaps.

    Returns
    -------
    m : (2 m_max + 1,) int, from -m_max to m_max.
    c : (Nr, 2 m_max + 1) complex, mm; NaN rows for unusable rings.
    missing : (Nr,) share of missing points per ring.
    """
    p = np.asarray(polar, np.complex128)
    nr, nth = p.shape
    m = np.arange(-m_max, m_max + 1)
    bad = ~np.isfinite(p)
    missing = bad.mean(axis=1)
    c = np.full((nr, m.size), np.nan + 0j)
    full = missing == 0
    if full.any():
        spec = np.fft.fft(p[full], axis=1) / nth
        c[full] = spec[:, m % nth]
    for j in np.nonzero((missing > 0) & (missing <= MAX_RING_MISSING))[0]:
        if radii is None or k is None:
            continue
        mm = int(math.ceil(k * radii[j])) + 8
        mm = max(mm, m_max)
        orders = np.arange(-mm, mm + 1)
        ok = ~bad[j]
        E = np.exp(1j * np.outer(theta[ok], orders))
        sol, *_ = np.linalg.lstsq(E, p[j, ok], rcond=None)
        c[j] = sol[mm - m_max: mm + m_max + 1]
    return m, c, missing


# ------------------------------------------------------------------ 4. Hankel fit


def _hankels(m, k, radii):
    kr = k * np.asarray(radii, np.float64)
    return special.hankel2(m[None, :], kr[:, None]), special.hankel1(m[None, :], kr[:, None])


def hankel_fit(coefficients, radii, m, k: float):
    """Incoming and outgoing amplitudes of each order by least squares over radius.

    c_m(r) = a_m H2_m(k r) + b_m H1_m(k r), fitted over the rings where
    c_m is finite.

    Parameters
    ----------
    coefficients : (Nr, M) complex, mm (from :func:`azimuthal_coefficients`).
    radii : (Nr,) mm.
    m : (M,) int orders.
    k : float, rad/mm.

    Returns
    -------
    a_in, b_out : (M,) complex, mm.
    residual : (M,) sum of squared residuals, mm^2.
    """
    c = np.asarray(coefficients, np.complex128)
    h2, h1 = _hankels(np.asarray(m), k, radii)
    ok = np.all(np.isfinite(c), axis=1)
    if ok.sum() < 3:
        raise InputError("fewer than 3 usable rings between the radii: widen --radii or move them off the "
                         "missing data")
    c, h1, h2 = c[ok], h1[ok], h2[ok]
    a = np.full(c.shape[1], np.nan + 0j)
    b = np.full(c.shape[1], np.nan + 0j)
    res = np.full(c.shape[1], np.nan)
    with np.errstate(all="ignore"):
        for i in range(c.shape[1]):
            # Columns scaled to unit norm: at high orders H1 and H2 reach 1e12 and more near kr ~ 1, where
            # normal equations would lose everything to cancellation.
            n2, n1 = np.linalg.norm(h2[:, i]), np.linalg.norm(h1[:, i])
            if not (np.isfinite(n1) and np.isfinite(n2) and n1 > 0 and n2 > 0):
                continue
            mat = np.stack([h2[:, i] / n2, h1[:, i] / n1], axis=1)
            sol, *_ = np.linalg.lstsq(mat, c[:, i], rcond=None)
            a[i], b[i] = sol[0] / n2, sol[1] / n1
            res[i] = float(np.sum(np.abs(c[:, i] - mat @ sol) ** 2))
    return a, b, res


def fit_wavenumber(coefficients, radii, m, k_guess: float, *, span: float = 0.25):
    """Wavenumber that best fits the incoming + outgoing model over all given orders.

    A grid search over k_guess (1 +/- span) and a bounded Brent refinement of
    the total relative residual sum_m res_m / sum_r |c_m|^2.

    Returns
    -------
    k : float, rad/mm.
    """
    from scipy.optimize import minimize_scalar

    c = np.asarray(coefficients, np.complex128)
    ok = np.all(np.isfinite(c), axis=1)
    norm = np.sum(np.abs(c[ok]) ** 2, 0)
    norm = np.where(norm > 0, norm, 1.0)

    def cost(kk):
        return float(np.sum(hankel_fit(c, radii, m, kk)[2] / norm))

    grid = k_guess * np.linspace(1 - span, 1 + span, 81)
    vals = [cost(g) for g in grid]
    i = int(np.argmin(vals))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = minimize_scalar(cost, bounds=(lo, hi), method="bounded", options={"xatol": 1e-9 * k_guess})
    return float(res.x)


# ------------------------------------------------------------------ 5. centre


def symmetry_misfit(field, x, y, centre, radii, theta, k: float, m_max: int) -> float:
    """Misfit of the mirror-symmetric scatterer model about a trial centre, mm^2.

    A scatterer that is a body of revolution about a vertical axis through
    ``centre`` (a post, a cylinder, a cone: mirror-symmetric about every
    vertical plane through the axis) scatters each order on its own and
    alike for m and -m: b_m = R_|m| a_m (the scattering operator is diagonal
    in the cylindrical basis about its axis, and the mirror maps m to -m).
    For each pair (m, -m), 1 <= m <= ``m_max``, this function fits
    c_{+-m}(r) = a_{+-m} H2_m(k r) + b_{+-m} H1_m(k r) with the shared ratio
    b_m / a_m = b_-m / a_-m, and returns the summed least-squares residual
    that the shared ratio adds to the free fit. Given the free solution P (2 x 2:
    rows m and -m, columns a, b) and the Gram matrix G of the two radial
    functions (the same for m and -m, since H_-m = (-1)^m H_m, DLMF 10.4.2),
    the constrained optimum is the best rank-1 approximation of P G^(1/2),
    and the added residual is the square of its smaller singular value
    (Eckart-Young theorem).

    Parameters
    ----------
    field : (Ny, Nx) complex amplitude, mm, NaN where missing.
    x (Nx,), y (Ny,) : grid, mm.
    centre : (cx, cy) mm.
    radii (Nr,) mm, theta (Ntheta,) rad : the polar grid.
    k : rad/mm.
    m_max : int
        Highest order pair used.

    Returns
    -------
    float, mm^2 (inf when fewer than 3 usable rings).
    """
    polar = resample_polar(field, x, y, centre, radii, theta)
    mdec = int(math.ceil(k * radii[-1])) + 8
    m, c, _ = azimuthal_coefficients(polar, theta, mdec, radii, k)
    ok = np.all(np.isfinite(c), axis=1)
    if ok.sum() < 3:
        return math.inf
    kr = k * np.asarray(radii, np.float64)[ok]
    total = 0.0
    for mm in range(1, m_max + 1):
        d = np.stack([special.hankel2(mm, kr), special.hankel1(mm, kr)], axis=1)
        scale = np.linalg.norm(d, axis=0)
        if not np.all(np.isfinite(scale)) or np.any(scale == 0):
            continue
        d = d / scale
        gram = d.conj().T @ d
        sign = (-1) ** mm
        rhs = np.stack([c[ok, mdec + mm], sign * c[ok, mdec - mm]], axis=1)
        p = np.linalg.solve(gram, d.conj().T @ rhs).T        # rows m, -m; columns a, b (scaled)
        w, v = np.linalg.eigh(gram)
        root = v @ np.diag(np.sqrt(np.maximum(w, 0.0))) @ v.conj().T
        total += float(np.linalg.svd(p @ root.T, compute_uv=False)[-1] ** 2)
    return total


def hole_centre(field):
    """Centroid (row, col) of the largest region of missing nodes that does not touch the grid's edge, or None."""
    from scipy import ndimage

    bad = ~np.isfinite(field)
    lab, n = ndimage.label(bad)
    if n == 0:
        return None
    edge = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
    sizes = ndimage.sum(bad, lab, index=np.arange(1, n + 1))
    for e in edge:
        if e > 0:
            sizes[e - 1] = 0
    if sizes.max() <= 0:
        return None
    return ndimage.center_of_mass(bad, lab, int(np.argmax(sizes)) + 1)


#: Curvature ratio (weak / strong) of the symmetry misfit below which the weak direction counts as undetermined.
WEAK_RATIO = 0.1
#: Half-width of the line search across the incident direction, mm.
LINE_HALF_WIDTH_MM = 10.0


def _hessian_2d(cost, c, h):
    """Central-difference Hessian (2 x 2) of cost at c with step h."""
    e = np.eye(2) * h
    f0 = cost(c)
    hes = np.zeros((2, 2))
    for i in range(2):
        hes[i, i] = (cost(c + e[i]) - 2 * f0 + cost(c - e[i])) / h ** 2
    hes[0, 1] = hes[1, 0] = (cost(c + e[0] + e[1]) - cost(c + e[0] - e[1]) - cost(c - e[0] + e[1])
                             + cost(c - e[0] - e[1])) / (4 * h ** 2)
    return hes


def line_search_centre(cost, start, direction, *, half_width: float = LINE_HALF_WIDTH_MM, xtol: float = 1e-3):
    """Minimum of cost on the line start + t direction, |t| <= half_width (bounded Brent), as (cx, cy) mm."""
    from scipy.optimize import minimize_scalar

    start = np.asarray(start, np.float64)
    u = np.asarray(direction, np.float64)
    res = minimize_scalar(lambda t: cost(start + t * u), bounds=(-half_width, half_width), method="bounded",
                          options={"xatol": xtol})
    c = start + res.x * u
    return float(c[0]), float(c[1])


def estimate_centre(field, x, y, k: float, radii, *, guess=None):
    """Centre of a mirror-symmetric scatterer from the complex amplitude field, by least squares.

    The centre minimises :func:`symmetry_misfit`: the residual of the
    incoming + outgoing Hankel model when each pair of orders m, -m shares
    one reflection coefficient, as it does about the axis of a body of
    revolution (a post, a cylinder; not a rotating or asymmetric body, for
    which this estimate does not apply -- give ``--centre``). A wrong centre
    mixes orders m and m +- 1 by about k delta / 2 (Graf's addition theorem,
    DLMF 10.23.7, from memory) and breaks the m / -m symmetry at first
    order in the shift, so the minimum is sharp across the incident wave.

    Along the incident wave it is not: a single plane wave and a symmetric
    scatterer are together mirror-symmetric about the incidence line through
    the scatterer, and any centre on that line keeps that symmetry, so the
    field leaves the centre's component along the incident direction
    undetermined (up to the weak compactness of the scattered orders, which
    noise at 1e-3 of the wave amplitude already hides). The estimate
    therefore works in the directions the field determines:

    1. start from ``guess``, else the centroid of the largest interior hole
       of missing data (an opaque post leaves one; the occlusion behind its
       top biases it along the camera baseline, by about a millimetre in the
       synthetic sessions), else the grid centre;
    2. the Hessian of the misfit there (central differences, one grid step)
       gives the well-determined direction (largest curvature) and the
       curvature ratio;
    3. if the ratio exceeds :data:`WEAK_RATIO` (an incident field with more
       than one direction, such as tank-wall reflections), Nelder-Mead in 2-D;
       otherwise a bounded line search along the well-determined direction
       through the start (repeated once from the new point), and the
       component along the incident direction stays that of the start.

    Parameters
    ----------
    field : (Ny, Nx) complex amplitude, mm.
    x, y : grid, mm.
    k : rad/mm.
    radii : (Nr,) mm, the radial range of the analysis.
    guess : (cx, cy) mm, optional.

    Returns
    -------
    centre : (cx, cy) mm.
    info : dict
        ``start`` ("given", "hole", "grid centre"), ``start_mm``, ``mode``
        ("line" or "2-D"), ``direction`` (unit vector of the well-determined
        direction), ``direction_deg``, ``curvature_ratio``, ``misfit``, and
        ``cost`` (the misfit as a function of a centre, for re-estimation).
    """
    from scipy.optimize import minimize

    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    source = "given"
    if guess is None:
        hc = hole_centre(field)
        if hc is not None:
            guess = (float(np.interp(hc[1], np.arange(x.size), x)), float(np.interp(hc[0], np.arange(y.size), y)))
            source = "hole"
        else:
            guess = (0.5 * (x[0] + x[-1]), 0.5 * (y[0] + y[-1]))
            source = "grid centre"
    step = float(x[1] - x[0])
    _, theta = polar_grid(radii[0], radii[-1], radii[1] - radii[0], k * radii[-1])
    m_max = int(math.ceil(k * radii[-1]))

    def cost(c):
        return symmetry_misfit(field, x, y, c, radii, theta, k, m_max)

    c = np.asarray(guess, np.float64)
    hes = _hessian_2d(cost, c, step)
    w, v = np.linalg.eigh(hes)
    ratio = float(w[0] / w[1]) if w[1] > 0 else 0.0
    if not np.all(np.isfinite(hes)):
        raise InputError("the centre cannot be estimated: the rings about the start point leave the data; give "
                         "--centre")
    if ratio > WEAK_RATIO:
        res = minimize(cost, c, method="Nelder-Mead",
                       options={"xatol": 1e-3, "fatol": 1e-15, "maxiter": 300,
                                "initial_simplex": [c, c + (step, 0.0), c + (0.0, step)]})
        centre, mode = (float(res.x[0]), float(res.x[1])), "2-D"
    else:
        u = v[:, 1]
        centre = line_search_centre(cost, c, u)
        hes = _hessian_2d(cost, np.asarray(centre), step)
        w, v = np.linalg.eigh(hes)
        u = v[:, 1]
        # The second pass moves only across the incident direction, through the first result.
        centre = line_search_centre(cost, centre, u, half_width=3 * step)
        ratio = float(w[0] / w[1]) if w[1] > 0 else 0.0
        mode = "line"
    u = v[:, 1] * (1 if v[0, 1] >= 0 else -1)
    return centre, {"start": source, "start_mm": (float(guess[0]), float(guess[1])), "mode": mode,
                    "direction": (float(u[0]), float(u[1])),
                    "direction_deg": float(np.degrees(np.arctan2(u[1], u[0]))), "curvature_ratio": ratio,
                    "misfit": float(cost(np.asarray(centre))), "m_max": m_max}


# ------------------------------------------------------------------ 6. the analysis with uncertainties


def _circular_std_deg(z):
    """Standard deviation of the phases of complex numbers about their mean direction, degrees."""
    z = z[np.isfinite(z)]
    if z.size < 2:
        return float("nan")
    ref = np.angle(np.mean(z / np.abs(z)))
    d = np.angle(z * np.exp(-1j * ref))
    return float(np.degrees(np.std(d, ddof=1)))


def analyse_modes(fit: HarmonicFit, x, y, *, centre, radii, k: float, orders: int, fit_k: bool = False,
                  n_boot: int = 200, seed: int = 0, centre_direction=None, centre_m_max: int | None = None):
    """Incoming/outgoing amplitudes, R_m and block-bootstrap 1-sigma for |m| <= orders.

    Parameters
    ----------
    fit : HarmonicFit over the grid's nodes (flattened row-major, Ny x Nx).
    x (Nx,), y (Ny,) : grid, mm, evenly spaced.
    centre : (cx, cy) mm.
    radii : (r1, r2) mm.
    k : float
        Wavenumber, rad/mm (the starting value when ``fit_k``).
    orders : int
        Highest |m| reported.
    fit_k : bool
        Fit k to the data (see :func:`fit_wavenumber`) instead of using ``k``;
        refitted in every time-bootstrap replicate.
    n_boot : int
        Replicates of each bootstrap.
    seed : int
        Seed of the bootstrap draws.
    centre_direction : (2,) unit vector, optional
        When the centre was estimated (:func:`estimate_centre`): its
        well-determined direction. Each time-bootstrap replicate then
        re-estimates the centre along it (a line search of
        :func:`symmetry_misfit` through ``centre``, within three grid steps),
        so the centre's error enters the time 1-sigma; the component along
        the incident direction stays fixed. Default: the centre is held
        fixed.
    centre_m_max : int, optional
        Highest order pair of that misfit (default ceil(k r2)).

    Returns
    -------
    dict with ``k``, ``m`` (orders), ``a_in``, ``b_out`` (complex mm),
    ``R`` (complex), ``sigma`` (dict of per-order arrays: ``R_abs_time``,
    ``R_abs_azimuth``, ``R_phase_deg_time``, ``R_phase_deg_azimuth``,
    ``R_abs``, ``R_phase_deg``, ``in_abs``, ``out_abs``), ``k_sigma`` (with
    fit_k), ``radii_used``, ``ring_missing`` (share per ring),
    ``time_blocks``, ``n_boot``, ``residual_rel`` (the model's relative
    misfit per order), ``centre_samples`` ((n, 2) mm, the re-estimated
    centres of the time replicates, or None) and ``centre_sigma_mm`` (their
    1-sigma along ``centre_direction``, or None).
    """
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    shape = (y.size, x.size)
    step = float(min(x[1] - x[0], y[1] - y[0]))
    r1, r2 = (float(v) for v in radii)
    radii_g, theta = polar_grid(r1, r2, step, k * r2 * 1.3 if fit_k else k * r2)
    m_dec = int(math.ceil((1.3 if fit_k else 1.0) * k * r2)) + 8
    rng = np.random.default_rng(seed)

    def solve(field, kk=None, polar=None, at=None):
        if polar is None:
            polar = resample_polar(field.reshape(shape), x, y, centre if at is None else at, radii_g, theta)
        mm, c, miss = azimuthal_coefficients(polar, theta, m_dec, radii_g, k)
        if kk is None:
            kk = fit_wavenumber(c[:, m_dec - orders:m_dec + orders + 1], radii_g,
                                mm[m_dec - orders:m_dec + orders + 1], k) if fit_k else k
        a, b, res = hankel_fit(c, radii_g, mm, kk)
        return kk, mm, a, b, res, c, polar, miss

    amp = fit.amplitude()
    kk, mm, a, b, res, c, polar, miss = solve(amp)
    sel = slice(m_dec - orders, m_dec + orders + 1)
    R = b / a
    ok_rings = np.all(np.isfinite(c), axis=1)
    norm = np.sum(np.abs(c[ok_rings]) ** 2, 0)

    # (a) Time: blocks of frames drawn with replacement.
    # With an estimated centre, each replicate re-estimates it across the incident direction.
    rt, kt, ct = [], [], []
    if centre_direction is not None:
        m_sym = int(math.ceil(k * r2)) if centre_m_max is None else int(centre_m_max)
        _, theta_c = polar_grid(r1, r2, step, k * r2)
    for _ in range(n_boot if fit.n_blocks >= 2 else 0):
        w = rng.multinomial(fit.n_blocks, np.full(fit.n_blocks, 1.0 / fit.n_blocks))
        amp_b = fit.amplitude(w)
        c_b = None
        if centre_direction is not None:
            field_b = amp_b.reshape(shape)
            c_b = line_search_centre(lambda c: symmetry_misfit(field_b, x, y, c, radii_g, theta_c, k, m_sym),
                                     centre, centre_direction, half_width=3 * step, xtol=2e-3)
            ct.append(c_b)
        k_b, _, ab, bb, *_ = solve(amp_b, at=c_b)
        rt.append((bb / ab)[sel])
        kt.append(k_b)
    rt = np.array(rt).reshape(-1, 2 * orders + 1)

    # (b) Azimuth: circular block bootstrap of the residual on the polar grid, in wedges.
    h2, h1 = _hankels(mm, kk, radii_g)
    with np.errstate(all="ignore"):
        model_c = a * h2 + b * h1                              # (Nr, M)
    # Orders whose Hankel functions overflow on these rings keep their measured coefficients.
    model_c = np.where(np.isfinite(model_c), model_c, c)
    model = model_c @ np.exp(1j * np.outer(mm, theta))         # (Nr, Ntheta)
    resid = np.where(np.isfinite(polar), polar - np.nan_to_num(model), np.nan)
    model = np.nan_to_num(model)
    nth = theta.size
    block = max(1, nth // N_SECTORS)
    # Degrees of freedom taken by the fit (2 of Nr per order) shrink the residual; undo that on average.
    inflate = math.sqrt(ok_rings.sum() / max(ok_rings.sum() - 2, 1))
    ra = []
    for _ in range(n_boot):
        starts = rng.integers(0, nth, size=int(math.ceil(nth / block)))
        idx = ((starts[:, None] + np.arange(block)[None, :]) % nth).ravel()[:nth]
        p_b = model + inflate * resid[:, idx]
        # Rings left out of the fit stay out, and gaps stay where the data had them (the model is no data there).
        p_b[~ok_rings] = np.nan
        p_b[~np.isfinite(polar)] = np.nan
        _, _, ab, bb, *_ = solve(None, kk, polar=p_b)
        ra.append((bb / ab)[sel])
    ra = np.array(ra).reshape(-1, 2 * orders + 1)

    def spread(samples, ref):
        if samples.shape[0] < 2:
            return np.full(ref.size, np.nan), np.full(ref.size, np.nan)
        s_abs = np.std(np.abs(samples), axis=0, ddof=1)
        s_ph = np.array([_circular_std_deg(samples[:, i] / ref[i]) for i in range(ref.size)])
        return s_abs, s_ph

    R_sel = R[sel]
    st_abs, st_ph = spread(rt, R_sel)
    sa_abs, sa_ph = spread(ra, R_sel)
    sig = {"R_abs_time": st_abs, "R_abs_azimuth": sa_abs, "R_phase_deg_time": st_ph, "R_phase_deg_azimuth": sa_ph,
           "R_abs": np.fmax(st_abs, sa_abs), "R_phase_deg": np.fmax(st_ph, sa_ph)}
    return {"k": kk, "m": mm[sel], "a_in": a[sel], "b_out": b[sel], "R": R_sel, "sigma": sig,
            "k_sigma": float(np.std(kt, ddof=1)) if fit_k and len(kt) > 1 else None,
            "radii_used": radii_g, "ring_missing": miss, "time_blocks": fit.n_blocks,
            "time_block_frames": fit.block_frames, "n_boot": n_boot, "azimuth_sectors": N_SECTORS,
            "residual_rel": (res / np.where(norm > 0, norm, 1.0))[sel], "polar": polar, "theta": theta,
            "m_decomposition": m_dec, "centre_samples": np.array(ct) if ct else None,
            "centre_sigma_mm": (float(np.std(np.array(ct) @ np.asarray(centre_direction), ddof=1))
                                if len(ct) > 1 else None)}
