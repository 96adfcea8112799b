"""The correlation matcher against outside references.

- ZNCC scores equal scikit-image's match_template (normalised cross-correlation,
  Lewis 1995) on the same windows.
- Sub-pixel shifts made exactly with the Fourier shift theorem
  (scipy.ndimage.fourier_shift) are recovered to better than 0.01 px over a sweep
  of fractional shifts (pixel locking); scikit-image's phase_cross_correlation
  with upsampling (Guizar-Sicairos, Thurman & Fienup, Opt. Lett. 33 (2008) 156)
  is run side by side as a reference estimator.
- The random error over many noise realisations is within 1.5x the theoretical
  floor sigma_d = sqrt(2) sigma_noise / sqrt(sum of squared gradients)
  (Pan et al., Opt. Express 16 (2008) 7037; Wang et al., Exp. Mech. 47 (2007) 701),
  and the matcher's own sigma estimate agrees with the observed scatter.
"""

import numpy as np
import pytest
from scipy import ndimage
from skimage.feature import match_template
from skimage.registration import phase_cross_correlation

from surfrec.match.correlate import integer_search, match_points, refine, row_spline_coefficients
from surfrec.synth.render import speckle_pattern


def _speckle(h, w, seed=0, grain=4.0, blur=0.6):
    pat = speckle_pattern((w, h), grain, np.random.default_rng(seed)).astype(np.float64)
    return ndimage.gaussian_filter(pat, blur)


def _shifted(img, shift):
    # Right image such that R(u - d) = L(u): a pure shift of d px to the left (Fourier shift theorem).
    return np.real(np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(img), (0.0, -shift))))


def test_zncc_equals_skimage_match_template():
    left = _speckle(80, 120, seed=1)
    right = _speckle(80, 120, seed=2) * 0.3 + _shifted(left, 5.0) * 0.7
    us, vs = np.array([40, 60, 80]), np.array([30, 40, 50])
    hw, band = 7, 3
    _, _, scores = integer_search(left, right, us, vs, np.array([5, 4, 6]), band, 2 * hw + 1)
    for p, (u, v) in enumerate(zip(us, vs)):
        tpl = left[v - hw:v + hw + 1, u - hw:u + hw + 1]
        for k, d in enumerate(range([5, 4, 6][p] - band, [5, 4, 6][p] + band + 1)):
            win = right[v - hw:v + hw + 1, u - d - hw:u - d + hw + 1]
            ref = match_template(win.astype(np.float64), tpl.astype(np.float64))[0, 0]
            assert scores[p, k] == pytest.approx(ref, abs=1e-5)
    # Points in any order (the search groups them by row internally), two of them in one row.
    us2, vs2, c2 = np.array([80, 40, 60, 70]), np.array([50, 30, 40, 30]), np.array([6, 5, 4, 5])
    _, _, scores2 = integer_search(left, right, us2, vs2, c2, band, 2 * hw + 1)
    np.testing.assert_allclose(scores2[:3], scores[[2, 0, 1]], atol=1e-9)
    tpl = left[30 - hw:30 + hw + 1, 70 - hw:70 + hw + 1]
    win = right[30 - hw:30 + hw + 1, 70 - 5 - hw:70 - 5 + hw + 1]
    assert scores2[3, band] == pytest.approx(match_template(win, tpl)[0, 0], abs=1e-5)


@pytest.mark.parametrize("order", [3, 5])
def test_fourier_shift_sweep_pixel_locking_below_0p01(order):
    left = _speckle(120, 300, seed=3)
    us, vs = np.meshgrid(np.arange(60, 240, 6), np.arange(20, 100, 6))
    us, vs = us.ravel(), vs.ravel()
    errors, pcc_errors = [], []
    for frac in np.linspace(0.0, 0.9, 10):
        shift = 6.0 + frac
        right = _shifted(left, shift)
        m = match_points(left, right, us, vs, np.full(us.size, 6), 3, 15, order=order)
        errors.append(np.nanmean(m.disparity) - shift)
        assert np.isfinite(m.disparity).all()
        # Reference estimator on one interior window (whole-window translation).
        u, v = 150, 60
        ref, _, _ = phase_cross_correlation(left[v - 16:v + 16, u - 16:u + 16],
                                            right[v - 16:v + 16, u - 16 - 6:u + 16 - 6], upsample_factor=100)
        pcc_errors.append(abs(-ref[1] + 6 - shift))
    errors = np.abs(errors)
    assert errors.max() < 0.01
    # Side by side: IC-GN with a B-spline is at least as good as the upsampled phase correlation.
    assert errors.mean() <= max(np.mean(pcc_errors), 0.002)


def test_random_error_against_theoretical_floor():
    rng = np.random.default_rng(5)
    left0 = _speckle(100, 220, seed=4)
    shift = 4.37
    right0 = _shifted(left0, shift)
    sigma_n = 0.01  # image noise, in units of the pattern's 0..1 range
    us, vs = np.meshgrid(np.arange(50, 170, 10), np.arange(20, 80, 10))
    us, vs = us.ravel(), vs.ravel()
    window = 15
    hw = window // 2
    runs, est = [], []
    for _ in range(40):
        left = left0 + rng.normal(0, sigma_n, left0.shape)
        right = right0 + rng.normal(0, sigma_n, right0.shape)
        m = match_points(left, right, us, vs, np.full(us.size, 4), 3, window)
        runs.append(m.disparity)
        est.append(m.sigma)
    runs = np.array(runs)
    observed = runs.std(axis=0, ddof=1)
    gx = ndimage.sobel(left0, axis=1) / 8.0
    floor = np.array([np.sqrt(2) * sigma_n / np.sqrt(np.sum(gx[v - hw:v + hw + 1, u - hw:u + hw + 1] ** 2))
                      for u, v in zip(us, vs)])
    ratio = np.median(observed / floor)
    assert ratio < 1.5
    assert ratio > 0.7  # the floor is a bound for an efficient estimator; far below it means a wrong test
    assert np.median(np.nanmean(est, axis=0) / observed) == pytest.approx(1.0, abs=0.25)
    assert abs(np.nanmean(runs) - shift) < 0.005


def test_first_order_shape_recovers_a_disparity_gradient():
    # A right image stretched horizontally: d(u) = d0 + g (u - uc), a linear disparity field.
    left = _speckle(100, 300, seed=6)
    d0, g, uc = 5.0, 0.02, 150.0
    vv, uu = np.mgrid[0:100, 0:300].astype(float)
    # R(x) = L(u) where x = u - d(u); invert x -> u exactly for the linear map.
    u_of_x = (uu + d0 - g * uc) / (1.0 - g)
    right = ndimage.map_coordinates(ndimage.spline_filter(left, order=5), [vv, u_of_x], order=5, prefilter=False)
    us, vs = np.arange(100, 200, 10), np.full(10, 50)
    d_true = d0 + g * (us - uc)
    coef = row_spline_coefficients(right, 5)
    d, params, *_ = refine(left, coef, us, vs, np.round(d_true), 21)
    np.testing.assert_allclose(d, d_true, atol=0.005)
    np.testing.assert_allclose(params[:, 1], g, atol=2e-3)


def test_spatiotemporal_stack_with_linear_motion():
    # Each frame a fresh pattern, disparity moving linearly in time (spacetime stereo model).
    frames = 5
    lefts, rights = [], []
    d_mid, rate = 6.2, 0.05  # px, px per frame
    taus = np.arange(frames) - frames // 2
    for k, tau in enumerate(taus):
        img = _speckle(90, 200, seed=20 + k)
        lefts.append(img)
        rights.append(_shifted(img, d_mid + rate * tau))
    us, vs = np.arange(60, 140, 8), np.full(10, 45)
    coef = row_spline_coefficients(np.array(rights), 5)
    d, params, sigma, score, it = refine(np.array(lefts), coef, us, vs, np.full(10, 6.0), 9, taus=taus,
                                         temporal=True)
    np.testing.assert_allclose(d, d_mid, atol=0.005)
    np.testing.assert_allclose(params[:, 3], rate, atol=0.003)


def test_second_order_shape_follows_a_curved_disparity_field():
    # A right image whose disparity is curved along rows: d(u) = d0 + c (u - uc)^2. Least squares
    # of a first-order shape against it leaves a bias of about c * <dx^2> (the window's
    # gradient-weighted mean of dx^2: the affine fit of a parabola), the second-order shape
    # (Lu & Cary, Exp. Mech. 40 (2000) 393) none.
    left = _speckle(100, 300, seed=7)
    d0, c, uc = 5.0, 4e-4, 150.0
    vv, uu = np.mgrid[0:100, 0:300].astype(float)
    # R(x) = L(u) with x = u - d(u): solve for u by Newton's method (d is smooth, |d'| << 1).
    u_of_x = uu + d0
    for _ in range(20):
        resid = u_of_x - (d0 + c * (u_of_x - uc) ** 2) - uu
        u_of_x -= resid / (1.0 - 2.0 * c * (u_of_x - uc))
    right = ndimage.map_coordinates(ndimage.spline_filter(left, order=5), [vv, u_of_x], order=5, prefilter=False)
    us, vs = np.arange(110, 190, 8), np.full(10, 50)
    d_true = d0 + c * (us - uc) ** 2
    coef = row_spline_coefficients(right, 5)
    hw = 10
    d1, p1, *_ = refine(left, coef, us, vs, np.round(d_true), 2 * hw + 1)
    d2, p2, *_ = refine(left, coef, us, vs, np.round(d_true), 2 * hw + 1, shape_order=2)
    np.testing.assert_allclose(d2, d_true, atol=0.004)
    np.testing.assert_allclose(p2[:, 1], 2 * c * (us - uc), atol=2e-3)  # the slope d'(u)
    gx = ndimage.convolve1d(left, np.array([-1, 8, 0, -8, 1]) / 12.0, axis=1)
    dx2 = np.arange(-hw, hw + 1) ** 2.0
    predicted = [c * np.sum(gx[v - hw:v + hw + 1, u - hw:u + hw + 1] ** 2 * dx2)
                 / np.sum(gx[v - hw:v + hw + 1, u - hw:u + hw + 1] ** 2) for u, v in zip(us, vs)]
    np.testing.assert_allclose(d1 - d_true, predicted, rtol=0.3)
    assert np.max(np.abs(d2 - d_true)) < 0.2 * np.min(np.abs(d1 - d_true))
