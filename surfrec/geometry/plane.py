"""Robust fits of a plane to 3-D points, and of smooth polynomial surfaces z(x, y).

The plane fit minimises perpendicular distances (total least squares: the
normal is the singular vector of the centred points with the smallest
singular value; Golub & Van Loan, Matrix Computations, section on total
least squares) after outliers are rejected. The robust start is the least
median of squares over random triplets of points (Rousseeuw, J. Am. Stat.
Assoc. 79 (1984) 871): it tolerates close to half the points being outliers,
which an ordinary least-squares start does not (an occluder 45 mm above the
water pulls a least-squares plane far off).

Surfaces z(x, y) are polynomials of total degree <= ``degree`` in the
products of Legendre polynomials P_i(x') P_j(y') of coordinates scaled to
[-1, 1] over the data's extent: the scaled Legendre basis keeps the normal
equations well conditioned up to degree 8 or so, where plain monomials of
millimetre coordinates are not.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.polynomial import legendre

# A point is an outlier when its residual exceeds this many robust standard
# deviations (1.4826 x the median absolute deviation, the consistent estimate
# for Gaussian noise). 4 sigma rejects 6e-5 of Gaussian inliers (handbook
# value of the normal distribution).
DEFAULT_THRESHOLD = 4.0
MAD_TO_SIGMA = 1.4826


@dataclass
class PlaneFit:
    """A plane n·X = offset fitted to points.

    Attributes
    ----------
    normal : (3,) unit normal, in the points' frame, oriented toward ``viewpoint``
        (so ``n · viewpoint > offset``).
    offset : float, mm: n·X = offset for points X of the plane.
    inliers : (N,) bool, the points used in the final least-squares fit.
    rms : float, mm, RMS of the inliers' perpendicular distances.
    sigma : float, mm, robust spread (1.4826 MAD) of the inlier residuals.
    iterations : rejection rounds used.
    """

    normal: np.ndarray
    offset: float
    inliers: np.ndarray
    rms: float
    sigma: float
    iterations: int

    def distance(self, points) -> np.ndarray:
        """Signed distance of points (..., 3) from the plane, mm, positive on the ``viewpoint`` side."""
        return np.asarray(points, np.float64) @ self.normal - self.offset


def fit_plane(points, *, viewpoint=(0.0, 0.0, 0.0)):
    """Least-squares plane through points (perpendicular distances).

    Parameters
    ----------
    points : (N, 3) mm, N >= 3, not all on one line.
    viewpoint : (3,) mm; the normal is oriented toward it (for the left
        camera frame the default is the camera centre).

    Returns
    -------
    normal (3,), offset (mm), with n·X = offset on the plane.
    """
    p = np.asarray(points, np.float64)
    centroid = p.mean(axis=0)
    # The right singular vector of the smallest singular value is the normal.
    _, _, vt = np.linalg.svd(p - centroid, full_matrices=False)
    n = vt[-1]
    off = float(n @ centroid)
    if n @ np.asarray(viewpoint, np.float64) < off:
        n, off = -n, -off
    return n, off


def robust_plane(points, *, threshold: float = DEFAULT_THRESHOLD, viewpoint=(0.0, 0.0, 0.0),
                 trials: int = 500, max_iterations: int = 20, sample: int = 20000, seed: int = 0,
                 detrend=None) -> PlaneFit:
    """Plane fitted to points after rejecting outliers; the final fit is least squares on the inliers.

    Parameters
    ----------
    points : (N, 3) mm (any frame; the result is in the same frame).
    threshold : residuals beyond ``threshold`` robust sigmas are outliers.
    viewpoint : (3,) mm, the side the normal points to.
    trials : random triplets tried for the least-median-of-squares start.
    max_iterations : rejection / refit rounds at most.
    sample : points used to score the triplets (a random subset; the median
        is stable long before all points are used).
    seed : seed of the random triplets (the result is deterministic).
    detrend : optional callable ``(distances, inliers) -> smooth``, given the
        (N,) signed distances (mm, NaN for non-finite points) and the current
        (N,) inlier mask, returning a smooth part of the distances (mm, (N,)) to be set aside
        before the outlier test, e.g. the bend that calibration errors give
        a flat surface; the test then sees the noise alone, so the bend is
        not mistaken for outliers. The plane itself is always fitted to the
        points as they are.

    Returns
    -------
    PlaneFit

    Raises
    ------
    ValueError
        Fewer than 3 finite points, or all points on one line.
    """
    p = np.asarray(points, np.float64)
    finite = np.all(np.isfinite(p), axis=1)
    if finite.sum() < 3:
        raise ValueError(f"a plane needs at least 3 points, got {int(finite.sum())}")
    rng = np.random.default_rng(seed)
    idx = np.nonzero(finite)[0]
    probe = p[rng.choice(idx, size=min(sample, idx.size), replace=False)]
    n, off = _least_median_plane(probe, trials, rng, viewpoint)
    # First inliers: close to the least-median plane (no detrending yet: a
    # smooth part fitted to all points would follow the outliers too).
    r = np.where(finite, p @ n - off, np.nan)
    inliers = finite & (np.abs(r) <= threshold * _robust_sigma(r[finite], off))
    sigma = np.inf
    it = 0
    for it in range(1, max_iterations + 1):
        if inliers.sum() < 3:
            raise ValueError("too few points agree on one plane")
        n, off = fit_plane(p[inliers], viewpoint=viewpoint)
        r = np.where(finite, p @ n - off, np.nan)
        e = r if detrend is None else r - detrend(r, inliers)
        med = np.median(e[inliers])
        sigma = _robust_sigma(e[inliers] - med, off)
        new = finite & (np.abs(e - med) <= threshold * sigma)
        if np.array_equal(new, inliers):
            break
        inliers = new
    if inliers.sum() < 3:
        raise ValueError("too few points agree on one plane")
    n, off = fit_plane(p[inliers], viewpoint=viewpoint)
    r = p[inliers] @ n - off
    return PlaneFit(normal=n, offset=off, inliers=inliers, rms=float(np.sqrt(np.mean(r ** 2))),
                    sigma=float(sigma), iterations=it)


def _robust_sigma(r, scale):
    # 1.4826 MAD about zero-median data; never below rounding noise, so exact synthetic data stay whole.
    return max(MAD_TO_SIGMA * float(np.median(np.abs(r - np.median(r)))), 1e-9 * (1.0 + abs(scale)))


def _least_median_plane(p, trials, rng, viewpoint):
    # Planes through random triplets, scored by the median squared distance of all probe points.
    n_pts = p.shape[0]
    best, best_score = None, np.inf
    tri = rng.integers(0, n_pts, size=(trials, 3))
    a, b, c = p[tri[:, 0]], p[tri[:, 1]], p[tri[:, 2]]
    normals = np.cross(b - a, c - a)
    norms = np.linalg.norm(normals, axis=1)
    good = norms > 1e-12 * (1.0 + np.linalg.norm(b - a, axis=1) * np.linalg.norm(c - a, axis=1))
    if not good.any():
        return fit_plane(p, viewpoint=viewpoint)
    for k in np.nonzero(good)[0]:
        n = normals[k] / norms[k]
        score = np.median((p @ n - n @ a[k]) ** 2)
        if score < best_score:
            best, best_score = (n, float(n @ a[k])), score
    n, off = best
    if n @ np.asarray(viewpoint, np.float64) < off:
        n, off = -n, -off
    return n, off


# ---------------------------------------------------------------- smooth surfaces z(x, y)


@dataclass
class PolynomialSurface:
    """z(x, y) = sum c_ij P_i(x') P_j(y'), i + j <= degree, with x' = (x - xc) / xs (likewise y').

    Attributes
    ----------
    degree : total degree.
    coefficients : (K,) in the order of :func:`polynomial_terms`.
    centre : (xc, yc) and scale : (xs, ys), in the units of x and y.
    """

    degree: int
    coefficients: np.ndarray
    centre: tuple[float, float]
    scale: tuple[float, float]

    def __call__(self, x, y) -> np.ndarray:
        """Evaluate at x, y (any matching shapes), in the units of the fitted z."""
        x = np.asarray(x, np.float64)
        y = np.asarray(y, np.float64)
        a = _design(x.ravel(), y.ravel(), self.degree, self.centre, self.scale)
        return (a @ self.coefficients).reshape(np.broadcast(x, y).shape)


def polynomial_terms(degree: int) -> list[tuple[int, int]]:
    """(i, j) Legendre orders of the terms, i + j <= degree, by total degree then i descending."""
    return [(t - j, j) for t in range(degree + 1) for j in range(t + 1)]


def fit_polynomial_surface(x, y, z, degree: int, *, weights=None, extent=None) -> PolynomialSurface:
    """Least-squares polynomial surface z(x, y) of total degree ``degree``.

    Parameters
    ----------
    x, y, z : (N,) finite; any units (mm or px), returned in the same.
    degree : total degree, >= 0; needs at least (degree+1)(degree+2)/2 points.
    weights : (N,) or None, weights of the residuals (1/sigma).
    extent : (xmin, xmax, ymin, ymax) mapped to [-1, 1]; the data's own by default.

    Returns
    -------
    PolynomialSurface
    """
    x, y, z = (np.asarray(a, np.float64).ravel() for a in (x, y, z))
    if extent is None:
        extent = (x.min(), x.max(), y.min(), y.max())
    xc, yc = 0.5 * (extent[0] + extent[1]), 0.5 * (extent[2] + extent[3])
    # A zero extent (all points on one line) would divide by zero; 1 keeps the basis defined.
    xs = 0.5 * (extent[1] - extent[0]) or 1.0
    ys = 0.5 * (extent[3] - extent[2]) or 1.0
    a = _design(x, y, degree, (xc, yc), (xs, ys))
    if a.shape[0] < a.shape[1]:
        raise ValueError(f"a degree-{degree} surface needs {a.shape[1]} points, got {a.shape[0]}")
    if weights is not None:
        w = np.asarray(weights, np.float64).ravel()
        coef = np.linalg.lstsq(a * w[:, None], z * w, rcond=None)[0]
    else:
        coef = np.linalg.lstsq(a, z, rcond=None)[0]
    return PolynomialSurface(degree, coef, (float(xc), float(yc)), (float(xs), float(ys)))


def robust_polynomial_surface(x, y, z, degree: int, *, threshold: float = DEFAULT_THRESHOLD,
                              min_tolerance: float = 0.0, start=None, max_iterations: int = 20):
    """Polynomial surface fitted after rejecting outliers (iterated MAD clipping, then least squares).

    Parameters
    ----------
    x, y, z : (N,) finite.  degree : total degree.
    threshold : residuals beyond ``threshold`` robust sigmas are outliers.
    min_tolerance : the rejection tolerance never falls below this (units of z):
        keeps quantised data (integer disparities) from losing good points.
    start : (N,) bool or None, the initial inliers (e.g. from a robust
        lower-order model); all points by default.

    Returns
    -------
    surface : PolynomialSurface;  inliers : (N,) bool;  sigma : robust spread of the inliers (units of z).
    """
    x, y, z = (np.asarray(a, np.float64).ravel() for a in (x, y, z))
    extent = (x.min(), x.max(), y.min(), y.max())
    inliers = np.ones(x.size, bool) if start is None else np.asarray(start, bool).copy()
    sigma = np.inf
    for _ in range(max_iterations):
        surf = fit_polynomial_surface(x[inliers], y[inliers], z[inliers], degree, extent=extent)
        r = z - surf(x, y)
        sigma = MAD_TO_SIGMA * np.median(np.abs(r[inliers]))
        new = np.abs(r) <= max(threshold * sigma, min_tolerance)
        if new.sum() < len(polynomial_terms(degree)):
            break
        if np.array_equal(new, inliers):
            break
        inliers = new
    surf = fit_polynomial_surface(x[inliers], y[inliers], z[inliers], degree, extent=extent)
    return surf, inliers, float(sigma)


def _design(x, y, degree, centre, scale):
    xs = (x - centre[0]) / scale[0]
    ys = (y - centre[1]) / scale[1]
    px = legendre.legvander(xs, degree)
    py = legendre.legvander(ys, degree)
    return np.stack([px[:, i] * py[:, j] for i, j in polynomial_terms(degree)], axis=1)
