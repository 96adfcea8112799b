"""Bad pixels left out of the correlation windows (surfrec.match.defects, the masked IC-GN).

References:
- sub-pixel shifts made exactly with scipy.ndimage.fourier_shift (the
  reference of scikit-image's registration tests);
- the normalised convolution fill against its definition (Knutsson & Westin,
  CVPR 1993) computed with scipy.ndimage.gaussian_filter;
- defect maps against the pixels that were made defective (known truth);
- masked ZNCC against the ZNCC of the good pixels computed with numpy
  (Pearson correlation, numpy.corrcoef).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from surfrec.match.correlate import refine, row_spline_coefficients
from surfrec.match.defects import (bad_pixel_mask, estimate_fixed_defects, fill_bad_pixels, rectify_mask)


def _speckle(shape, grain, rng):
    # The renderer's speckle pattern (tests/test_render.py checks it) seen through its lens PSF
    # (Gaussian, sigma 0.6 px): what a camera pixel records of the projected speckle.
    import cv2

    from surfrec.synth.render import speckle_pattern

    p = speckle_pattern(shape[::-1], grain, rng)
    return cv2.GaussianBlur(p, (0, 0), 0.6, borderType=cv2.BORDER_REFLECT).astype(np.float64)


def _shifted(img, dx):
    # Exact sub-pixel shift of a band-limited image along rows (Fourier shift theorem).
    return np.real(np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(img), (0.0, dx)))).astype(np.float32)


@pytest.fixture(scope="module")
def pair():
    rng = np.random.default_rng(3)
    left = (0.1 + 0.75 * _speckle((96, 160), 4.0, rng)).astype(np.float32)
    d_true = 3.37
    right = _shifted(left, -d_true)  # right(x) = left(x + d): u_right = u_left - d
    return left, right, d_true


def test_masked_refinement_ignores_a_saturated_glint(pair):
    # A glint saturates a blob of the right image inside the window: unmasked, it drags the
    # estimate; left out of the sums, the estimate equals the exact shift (fourier_shift).
    left, right, d_true = pair
    glint = right.copy()
    yy, xx = np.mgrid[0:96, 0:160]
    blob = (yy - 48) ** 2 + (xx - 76) ** 2 <= 3 ** 2
    glint[blob] = 1.0
    us, vs, d0 = np.array([80]), np.array([48]), np.array([3.0])
    coef = row_spline_coefficients(glint[None], 3)
    d_plain = refine(left[None], coef, us, vs, d0, 21, order=3)[0][0]
    bad = bad_pixel_mask(glint, saturation=0.98, halo_px=2)
    filled = fill_bad_pixels(glint, bad)
    coef_f = row_spline_coefficients(filled[None], 3)
    d_masked = refine(left[None], coef_f, us, vs, d0, 21, order=3, bad_right=bad.astype(np.uint8)[None])[0][0]
    clean = refine(left[None], row_spline_coefficients(right[None], 3), us, vs, d0, 21, order=3)[0][0]
    assert abs(clean - d_true) < 0.01  # exact shift (fourier_shift), the interpolation's bias only
    assert abs(d_plain - d_true) > 3 * abs(d_masked - d_true)
    assert abs(d_masked - d_true) < 0.02


def test_masked_score_is_the_zncc_of_the_good_pixels(pair):
    # The ZNCC reported for a masked window equals Pearson's r over its good pixels (numpy.corrcoef)
    # at the solution; with a pure shift that is the correlation of the window with the shifted window.
    left, right, d_true = pair
    bad = np.zeros(left.shape, np.uint8)
    bad[40:44, 70:90] = 1
    us, vs = np.array([80]), np.array([48])
    d, p, sigma, score, it = refine(left[None], row_spline_coefficients(right[None], 3), us, vs,
                                    np.array([d_true]), 21, order=3, bad_left=bad[None])
    win = (slice(38, 59), slice(70, 91))
    good = bad[win] == 0
    back = _shifted(right, d[0])[win]  # right sampled at u - d, by the Fourier shift
    r = np.corrcoef(left[win][good], back[good])[0, 1]
    assert it[0] > 0
    assert score[0] == pytest.approx(r, abs=2e-3)


def test_windows_with_too_few_good_pixels_are_rejected(pair):
    left, right, d_true = pair
    bad = np.zeros(left.shape, np.uint8)
    bad[30:66, 60:100] = 1  # the whole window
    out = refine(left[None], row_spline_coefficients(right[None], 3), np.array([80]), np.array([48]),
                 np.array([3.0]), 21, order=3, bad_left=bad[None])
    assert out[4][0] == -2 and np.isnan(out[0][0])


def test_without_bad_pixels_the_mask_changes_nothing(pair):
    # An all-good mask gives the unmasked result to the last bits (same sums, weights of one).
    left, right, _ = pair
    coef = row_spline_coefficients(right[None], 3)
    us = np.arange(20, 140, 7)
    vs = np.full(us.size, 48)
    d0 = np.full(us.size, 3.0)
    a = refine(left[None], coef, us, vs, d0, 15, order=3)
    b = refine(left[None], coef, us, vs, d0, 15, order=3, bad_left=np.zeros((1,) + left.shape, np.uint8))
    np.testing.assert_allclose(a[0], b[0], rtol=0, atol=1e-12)
    np.testing.assert_allclose(a[2], b[2], rtol=0, atol=1e-12)


def test_fill_is_the_normalised_convolution():
    # G*(I m) / G*(m) at the bad pixels (Knutsson & Westin 1993), computed here with scipy's Gaussian.
    rng = np.random.default_rng(5)
    img = rng.random((64, 64)).astype(np.float32)
    bad = np.zeros(img.shape, bool)
    bad[30:33, 20:23] = True
    out = fill_bad_pixels(img, bad, sigma_px=2.0)
    good = (~bad).astype(np.float64)
    ref = ndimage.gaussian_filter(img * good, 2.0, mode="reflect", truncate=4.0) / \
        ndimage.gaussian_filter(good, 2.0, mode="reflect", truncate=4.0)
    np.testing.assert_allclose(out[bad], ref[bad], atol=2e-3)
    np.testing.assert_array_equal(out[~bad], img[~bad])


def test_saturation_mask_and_halo():
    img = np.full((40, 40), 0.5, np.float32)
    img[20, 20] = 1.0
    m = bad_pixel_mask(img, saturation=0.98, halo_px=2)
    # An elliptical 5x5 structuring element (OpenCV's MORPH_ELLIPSE) around the one saturated pixel.
    import cv2
    ref = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (5, 5)).astype(bool)
    np.testing.assert_array_equal(m[18:23, 18:23], ref)
    assert m.sum() == ref.sum()
    assert not bad_pixel_mask(img, saturation=None, halo_px=2).any()


def test_rectified_mask_covers_the_bilinear_footprint():
    bad = np.zeros((32, 32), bool)
    bad[10, 10] = True
    yy, xx = np.mgrid[0:32, 0:32].astype(np.float32)
    r = rectify_mask(bad, xx + 0.5, yy)  # half a pixel to the right: two rectified pixels read it
    assert r[10, 9] == 1 and r[10, 10] == 1 and r.sum() == 2


def test_defect_map_from_changing_speckle():
    # Hot, dead and offset pixels put at known places in frames with a new pattern each: all found,
    # nothing else (the truth is the list of pixels made defective).
    rng = np.random.default_rng(11)
    frames = np.stack([0.06 + 0.7 * _speckle((200, 240), 4.0, rng) for _ in range(4)]).astype(np.float32)
    frames += rng.normal(0, 0.004, frames.shape).astype(np.float32)
    assert estimate_fixed_defects(frames).sum() == 0
    flat = frames.reshape(4, -1)
    idx = rng.choice(flat.shape[1], 90, replace=False)
    flat[:, idx[:30]] = 1.0            # stuck hot
    flat[:, idx[30:60]] = 0.0          # dead
    flat[:, idx[60:]] += 0.3           # hot with a dark-current offset
    found = estimate_fixed_defects(frames)
    truth = np.zeros(flat.shape[1], bool)
    truth[idx] = True
    truth = truth.reshape(200, 240)
    assert (found & truth).sum() >= 0.95 * truth.sum()
    assert (found & ~truth).sum() <= 2


def test_a_fixed_bright_blob_is_not_a_defect():
    # A saturated blob that stays put over the still frames (a glint of the still water) is not a
    # sensor defect: only groups of up to max_area_px pixels count.
    rng = np.random.default_rng(12)
    frames = np.stack([0.06 + 0.7 * _speckle((120, 120), 4.0, rng) for _ in range(3)]).astype(np.float32)
    frames += rng.normal(0, 0.004, frames.shape).astype(np.float32)
    assert estimate_fixed_defects(frames).sum() == 0
    frames[:, 50:56, 50:56] = 1.0
    assert estimate_fixed_defects(frames).sum() == 0


def test_masked_estimate_agrees_with_a_huber_m_estimator(pair):
    # The same glint-contaminated window solved by scipy.optimize.least_squares with Huber's loss
    # (Huber, Ann. Math. Statist. 35 (1964) 73; scipy's loss="huber") for a shift, gain and offset
    # of the right window: the masked IC-GN lands where the M-estimator does, within 0.01 px, and
    # both near the exact shift; plain least squares (loss="linear") is dragged by the glint.
    from scipy.interpolate import CubicSpline
    from scipy.optimize import least_squares

    left, right, d_true = pair
    glint = right.copy()
    yy, xx = np.mgrid[0:96, 0:160]
    glint[(yy - 50) ** 2 + (xx - 74) ** 2 <= 9] = 1.0
    u, v, hw = 80, 48, 10
    rows = range(v - hw, v + hw + 1)
    cols = np.arange(u - hw, u + hw + 1)
    splines = [CubicSpline(np.arange(160), glint[r]) for r in rows]
    f = np.concatenate([left[r, cols] for r in rows])

    def resid(p):
        d, a, b = p
        g = np.concatenate([s(cols - d) for s in splines])
        return f - (a + b * g)

    start = [3.0, 0.0, 1.0]
    huber = least_squares(resid, start, loss="huber", f_scale=0.01).x[0]
    plain = least_squares(resid, start, loss="linear").x[0]
    bad = bad_pixel_mask(glint, saturation=0.98, halo_px=2)
    coef = row_spline_coefficients(fill_bad_pixels(glint, bad)[None], 3)
    ours = refine(left[None], coef, np.array([u]), np.array([v]), np.array([3.0]), 2 * hw + 1, order=3,
                  bad_right=bad.astype(np.uint8)[None])[0][0]
    assert abs(huber - d_true) < 0.02
    assert abs(ours - huber) < 0.01
    assert abs(plain - d_true) > 2 * abs(ours - d_true)


def test_shoulders_and_robust_pass_remove_a_glints_unsaturated_light(pair):
    # Glints of random place, size and brightness (Gaussian lobes of added light, saturating at the
    # core) in the right window. Masking the saturated core alone leaves the unsaturated shoulder to
    # drag the estimate; with the shoulders grown (glint_shoulders) and the window solved again
    # without the pixels whose residual exceeds 2.5 robust spreads (a skipped M-estimator; Hampel et
    # al., Robust Statistics, 1986), the RMS error against the exact shift (fourier_shift) is less
    # than half. Points rejected (too few good pixels) count for neither.
    left, right, d_true = pair
    rng = np.random.default_rng(9)
    yy, xx = np.mgrid[0:96, 0:160]
    us, vs, d0 = np.array([76]), np.array([48]), np.array([3.0])
    plain, robust = [], []
    for _ in range(24):
        amp, sg, cx, cy = rng.uniform(0.8, 1.5), rng.uniform(2.5, 5), rng.uniform(62, 86), rng.uniform(40, 56)
        g = right + (amp * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * sg ** 2))).astype(np.float32)
        core = bad_pixel_mask(g, saturation=0.98, halo_px=2, envelope_px=None)
        coef = row_spline_coefficients(fill_bad_pixels(g, core)[None], 3)
        plain.append(refine(left[None], coef, us, vs, d0, 21, order=3, bad_right=core.astype(np.uint8)[None])[0][0])
        grown = bad_pixel_mask(g, saturation=0.98, halo_px=2)
        coef = row_spline_coefficients(fill_bad_pixels(g, grown)[None], 3)
        robust.append(refine(left[None], coef, us, vs, d0, 21, order=3, bad_right=grown.astype(np.uint8)[None],
                             robust=np.array([True]))[0][0])
    rms = lambda a: float(np.sqrt(np.nanmean((np.asarray(a) - d_true) ** 2)))
    assert np.isfinite(robust).sum() >= 12
    assert rms(robust) < 0.5 * rms(plain)
    assert rms(robust) < 0.03


def test_robust_pass_leaves_a_clean_window_alone(pair):
    # On a window without outliers the robust pass changes the estimate by far less than its noise.
    left, right, d_true = pair
    coef = row_spline_coefficients(right[None], 3)
    us, vs, d0 = np.arange(30, 130, 9), np.full(12, 48), np.full(12, 3.0)
    a = refine(left[None], coef, us, vs, d0, 21, order=3)
    b = refine(left[None], coef, us, vs, d0, 21, order=3, robust=np.ones(12, bool))
    assert np.max(np.abs(a[0] - b[0])) < 0.003
    assert np.max(np.abs(b[0] - d_true)) < 0.01


def test_glint_shoulders_follow_the_added_light():
    # Speckle with a glint lobe added (saturating at its core) and, apart, a bright patch of the
    # scene that does not saturate. The grown mask covers the lobe where its light exceeds a quarter
    # of the speckle contrast (the rule of glint_shoulders, checked against the known lobe), and
    # leaves the patch alone.
    from surfrec.match.defects import glint_shoulders

    rng = np.random.default_rng(8)
    img = (0.05 + 0.6 * _speckle((200, 260), 4.0, rng)).astype(np.float32)
    yy, xx = np.mgrid[0:200, 0:260]
    lobe = 2.0 * np.exp(-((yy - 100) ** 2 + (xx - 80) ** 2) / (2 * 6.0 ** 2))
    img = np.clip(img + lobe, 0, 1).astype(np.float32)
    img[80:120, 190:230] += 0.3  # a bright patch, not saturated
    sat = img >= 0.98
    grown = glint_shoulders(img, sat)
    assert grown[sat].all() and grown.sum() > 1.5 * sat.sum()
    strong = lobe > 0.5  # far above a quarter of the 0.6 contrast
    assert grown[strong].mean() > 0.9
    assert not grown[lobe < 0.02].any()
    assert not grown[80:120, 190:230].any()


def test_coded_masks_tell_glints_from_defects():
    from surfrec.match.defects import DEFECT, GLINT, DefectSettings

    img = np.full((40, 40), 0.4, np.float32)
    img[10, 10] = 1.0
    fixed = np.zeros((40, 40), bool)
    fixed[30, 30] = True
    code = DefectSettings(0.98, 1, fixed, None).coded_mask(img, "left")
    assert code[10, 10] == GLINT and code[30, 30] == DEFECT
    assert DefectSettings(0.98, 1, fixed, None).coded_mask(img, "right")[30, 30] == 0
