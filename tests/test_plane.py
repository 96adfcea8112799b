"""Robust plane and polynomial-surface fits.

References:
- the total-least-squares plane is the eigenvector of the points' scatter
  matrix with the smallest eigenvalue (Pearson 1901; Golub & Van Loan,
  Matrix Computations, 4th ed., section 6.3): numpy.linalg.eigh computes it
  independently of our SVD;
- NumPy's polynomial module (numpy.polynomial.polynomial.polyval2d) evaluates
  the exact polynomial surfaces the fits must reproduce;
- the 4-sigma rejection rule keeps all but 6e-5 of Gaussian inliers
  (handbook value of the normal distribution).
"""

import numpy as np
import pytest
from numpy.polynomial import polynomial as P

from surfrec.geometry.plane import (fit_plane, fit_polynomial_surface, polynomial_terms, robust_plane,
                                    robust_polynomial_surface)


def _plane_points(n, normal, offset, noise, seed=0):
    rng = np.random.default_rng(seed)
    normal = np.asarray(normal, float) / np.linalg.norm(normal)
    a = np.cross(normal, [1.0, 0, 0])
    a /= np.linalg.norm(a)
    b = np.cross(normal, a)
    s, t = rng.uniform(-150, 150, (2, n))
    pts = offset * normal + s[:, None] * a + t[:, None] * b
    return pts + rng.normal(0, noise, n)[:, None] * normal, normal


def test_fit_plane_is_the_scatter_matrix_eigenvector():
    pts, _ = _plane_points(2000, [0.14, 0.003, -0.99], -900.0, 0.05, seed=1)
    n, off = fit_plane(pts)
    c = pts - pts.mean(axis=0)
    w, vecs = np.linalg.eigh(c.T @ c)
    ref = vecs[:, 0] * np.sign(vecs[:, 0] @ n)
    np.testing.assert_allclose(n, ref, atol=1e-12)
    assert off == pytest.approx(ref @ pts.mean(axis=0), abs=1e-9)
    assert n @ np.zeros(3) > off  # oriented toward the viewpoint (the camera at the origin)


def test_robust_plane_rejects_an_occluder_and_gross_outliers():
    pts, normal = _plane_points(20000, [0.14, 0.003, -0.99], -900.0, 0.02, seed=2)
    rng = np.random.default_rng(3)
    bad = rng.choice(pts.shape[0], 6000, replace=False)  # 30 %: a post 45 mm up, and scattered junk
    pts_bad = pts.copy()
    pts_bad[bad[:3000]] += 45.0 * normal
    pts_bad[bad[3000:]] += rng.normal(0, 20.0, (3000, 3))
    fit = robust_plane(pts_bad)
    good = np.ones(pts.shape[0], bool)
    good[bad] = False
    ref_n, ref_off = fit_plane(pts[good])
    assert np.degrees(np.arccos(min(1.0, fit.normal @ ref_n))) < 1e-4
    assert fit.offset == pytest.approx(ref_off, abs=2e-3)
    assert not fit.inliers[bad[:3000]].any()
    assert fit.inliers[good].mean() > 0.999  # 4 sigma keeps all but 6e-5 of Gaussian inliers
    assert fit.rms == pytest.approx(0.02, rel=0.05)


def test_detrending_keeps_a_smooth_bend_whole():
    # A bend rising 0.5 mm into the corners, on 0.01 mm noise (the shape lens-distortion errors give):
    # without detrending, the corners look like outliers.
    pts, normal = _plane_points(20000, [0.0, 0.0, -1.0], -900.0, 0.01, seed=4)
    x, y = pts[:, 0], pts[:, 1]
    bend = 0.5 * (x / 150) ** 4 * (y / 150) ** 4
    pts = pts + (bend - bend.mean())[:, None] * normal
    plain = robust_plane(pts)
    assert plain.inliers.mean() < 0.95

    def detrend(r, inliers):
        s = fit_polynomial_surface(x[inliers], y[inliers], r[inliers], 8)
        return s(x, y)

    fit = robust_plane(pts, detrend=detrend)
    assert fit.inliers.mean() > 0.999


def test_polynomial_surface_reproduces_exact_polynomials():
    rng = np.random.default_rng(5)
    x, y = rng.uniform(-180, 170, (2, 3000))
    c = np.zeros((5, 5))
    for i, j in polynomial_terms(4):
        c[i, j] = rng.normal() / 100.0 ** (i + j)
    z = P.polyval2d(x, y, c)
    s = fit_polynomial_surface(x, y, z, 4)
    xt, yt = rng.uniform(-180, 170, (2, 100))
    np.testing.assert_allclose(s(xt, yt), P.polyval2d(xt, yt, c), atol=1e-10 * np.abs(z).max())


def test_robust_polynomial_surface_ignores_outliers():
    rng = np.random.default_rng(6)
    u, v = rng.uniform(0, 500, (2, 600))
    d = 3.0 + 0.004 * u - 0.001 * v + 1e-6 * u * v
    noisy = d + rng.normal(0, 0.05, d.size)
    noisy[:100] += rng.uniform(10, 30, 100)  # an occluder well above the plane
    s, inliers, sigma = robust_polynomial_surface(u, v, noisy, 2)
    assert not inliers[:100].any() and inliers[100:].mean() > 0.99
    assert np.abs(s(u, v) - d).max() < 0.03
    assert sigma == pytest.approx(0.05, rel=0.2)


def test_too_few_points():
    with pytest.raises(ValueError, match="at least 3"):
        robust_plane(np.array([[0.0, 0, 1], [1, 0, 1]]))
    with pytest.raises(ValueError, match="needs 6 points"):
        fit_polynomial_surface([0, 1, 2], [0, 1, 0], [1, 2, 3], 2)
