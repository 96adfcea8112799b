"""surfrec.calib.drift: sub-pixel 2-D matching, the check views, and the drift and sync verdicts.

Outside references: the Fourier shift theorem (scipy.ndimage.fourier_shift
makes exact sub-pixel shifts of a periodic image); scikit-image's
phase_cross_correlation (Guizar-Sicairos, Thurman and Fienup, Opt. Lett. 33
(2008) 156); the noise floor of correlation matching (Pan et al., Opt.
Express 16 (2008) 7037, quoted in docs/conventions.md); the pinhole camera model with
OpenCV's cv2.projectPoints / cv2.undistortPointsIter.
"""

import cv2
import numpy as np
import pytest
from scipy import ndimage

from surfrec.calib.drift import (HOLDS, MOVED, assess_drift, check_rig, coarse_disparity, match_points,
                                 rectified_views, refine_shift)


def speckle(n=256, grain_sigma=1.2, seed=1):
    """A periodic speckle image (grain about 4 px), mean 0.5, contrast 0.2."""
    rng = np.random.default_rng(seed)
    img = np.real(np.fft.ifft2(ndimage.fourier_gaussian(np.fft.fft2(rng.standard_normal((n, n))), grain_sigma)))
    return 0.5 + 0.2 * img / img.std()


def shifted(img, du, dv):
    """img moved by (du, dv) px exactly (Fourier shift theorem): out(p + s) = img(p)."""
    return np.real(np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(img), (dv, du))))


GRID = np.stack(np.meshgrid(np.arange(24, 232, 16), np.arange(24, 232, 16)), -1).reshape(-1, 2)


# ----------------------------------------------------------------- the 2-D shift estimator


def test_refine_shift_against_fourier_shift_and_phase_correlation():
    # Reference: exact shifts by the Fourier shift theorem; scikit-image's
    # upsampled phase correlation measured side by side on the same pairs.
    from skimage.registration import phase_cross_correlation

    img = speckle()
    rng = np.random.default_rng(7)
    ours, theirs = [], []
    for _ in range(8):
        s = rng.uniform(-3, 3, 2)
        moved = shifted(img, *s)
        got, score = match_points(img, moved, GRID, np.tile(np.round(s), (len(GRID), 1)), window=21)
        assert np.all(np.isfinite(got)) and np.all(score > 0.999)
        ours.append(np.abs(got - s).max())
        # phase_cross_correlation returns the shift that registers moving onto reference: -s, as (row, col).
        pcc = phase_cross_correlation(img, moved, upsample_factor=100)[0]
        theirs.append(np.abs(-pcc[::-1] - s).max())
    # Ours on 21-px windows; phase correlation on the whole periodic image, to its 0.01 px grid.
    print(f"max error: refine_shift {max(ours):.4f} px (21 px windows), "
          f"phase_cross_correlation {max(theirs):.4f} px (whole 256 px image)")
    assert max(ours) < 0.02
    assert max(theirs) <= 0.006


def test_refine_shift_noise_floor_matches_pan_formula():
    # Pan et al. 2008: sigma_u = sqrt(2) sigma_noise / sqrt(sum over the window of f_x^2).
    img = speckle(seed=2)
    rng = np.random.default_rng(3)
    noise = 0.01
    errors = []
    for _ in range(6):
        s = rng.uniform(-2, 2, 2)
        a = img + noise * rng.standard_normal(img.shape)
        b = shifted(img, *s) + noise * rng.standard_normal(img.shape)
        got, _ = match_points(a, b, GRID, np.tile(np.round(s), (len(GRID), 1)), window=21)
        errors.append(got - s)
    errors = np.concatenate(errors)
    freq = 2j * np.pi * np.fft.fftfreq(img.shape[0])
    spectrum = np.fft.fft2(img)
    box = np.ones((21, 21))
    for axis, f in ((0, freq[None, :]), (1, freq[:, None])):
        grad = np.real(np.fft.ifft2(spectrum * f))
        energy = ndimage.convolve(grad**2, box, mode="wrap")[GRID[:, 1], GRID[:, 0]]
        predicted = np.sqrt(np.mean(2 * noise**2 / energy))
        measured = errors[:, axis].std()
        print(f"axis {'uv'[axis]}: measured {measured:.4f} px, Pan et al. {predicted:.4f} px")
        assert 0.8 < measured / predicted < 1.25
        assert abs(errors[:, axis].mean()) < 0.3 * predicted  # unbiased


def test_refine_shift_drops_blank_windows_and_validates():
    img = speckle()
    blank = np.zeros_like(img)
    got, score = refine_shift(img, blank, GRID[:3], np.zeros((3, 2)))
    assert np.all(np.isnan(got)) and np.all(np.isnan(score))
    with pytest.raises(ValueError, match="inside the reference"):
        refine_shift(img, img, [[2, 2]], [[0, 0]])
    with pytest.raises(ValueError, match="odd"):
        refine_shift(img, img, GRID[:1], [[0, 0]], window=20)


def test_coarse_disparity_finds_a_large_shift_along_the_rows():
    # A disparity of 151.3 px and a vertical offset of 2.4 px (reference:
    # the Fourier shift theorem); the whole-row search needs no guess.
    big = speckle(n=768, seed=4)
    # Crops of one scene, so that nothing wraps round as in a periodic image:
    # left point u is at u - 151.3 in the right view (seen there when u > 151.3).
    left = big[100:484, 100:612]
    right = shifted(big, -151.3, -2.4)[100:484, 100:612]
    c = coarse_disparity(left, right)
    assert c.n_good >= 6 and c.score > 0.6
    assert c.disparity(256, 192) == pytest.approx(151.3, abs=0.2)
    assert c.plane[1:] == pytest.approx([0, 0], abs=1e-3)
    assert c.vertical == pytest.approx(2.4, abs=0.2)
    other = coarse_disparity(left, speckle(n=512, seed=5)[:384])
    assert other.n_good == 0 and other.score < 0.4


# ----------------------------------------------------------------- the verdict


def test_assess_drift_recovers_an_exact_roll_pattern():
    # Pinhole model: turning the right image content by theta about the
    # principal point moves v by sin(theta) (u - cx): dv = -tan(theta) (u - cx) to first order.
    theta = np.radians(0.2)
    u, v = np.meshgrid(np.linspace(10, 500, 25), np.linspace(10, 370, 18))
    u, v = u.ravel(), v.ravel()
    dv = -np.tan(theta) * (u - 256.0) + 0.05
    dv[::50] = 30.0  # mismatches are left out of the fit
    r = assess_drift(u, v, dv, tolerance=0.3)
    assert r.roll_deg == pytest.approx(0.2, abs=1e-9)
    assert r.trend["slope_u_px_per_1000px"] == pytest.approx(-1000 * np.tan(theta), rel=1e-9)
    assert r.trend["slope_v_px_per_1000px"] == pytest.approx(0.0, abs=1e-9)
    good = dv != 30.0
    assert r.n_points == good.sum()
    assert r.p95_abs_px == pytest.approx(np.percentile(np.abs(dv[good]), 95))  # numpy's percentile
    assert r.moved
    assert not assess_drift(u, v, 0.01 * np.sin(u), tolerance=0.3).moved
    assert assess_drift([1.0], [2.0], [0.0]).n_points == 1


# ----------------------------------------------------------------- on synthetic sessions


@pytest.fixture(scope="module")
def waves(quick_session, make_true_rig):
    from surfrec.io.images import open_frames

    out = quick_session("waves")
    rig = make_true_rig(out / "truth.h5", "rig")
    left = open_frames(str(out / "waves" / "left"))
    right = open_frames(str(out / "waves" / "right"))
    return rig, [left[i] for i in range(len(left))], [right[i] for i in range(len(right))]


@pytest.fixture(scope="module")
def moved(quick_session, make_true_rig):
    from surfrec.io.images import open_frames

    out = quick_session("moved")
    left = open_frames(str(out / "waves" / "left"))
    right = open_frames(str(out / "waves" / "right"))
    return (out, make_true_rig(out / "truth.h5", "rig"), make_true_rig(out / "truth.h5", "moved"),
            [left[i] for i in range(len(left))], [right[i] for i in range(len(right))])


def views_of(rig):
    return rectified_views(rig.left_matrix, rig.left_distortion, rig.right_matrix, rig.right_distortion,
                           rig.rectification, rig.image_size)


def _undistort(uv, matrix, dist, r, p):
    # Iterated to convergence: the default 5 iterations leave ~1e-3 px in the corners.
    crit = (cv2.TERM_CRITERIA_COUNT | cv2.TERM_CRITERIA_EPS, 100, 1e-12)
    src = np.asarray(uv, float).reshape(-1, 1, 2)
    if hasattr(cv2, "undistortPointsIter"):  # OpenCV 4
        return cv2.undistortPointsIter(src, matrix, dist, r, p, crit).reshape(-1, 2)
    return cv2.undistortPoints(src, matrix, dist, R=r, P=p, criteria=crit).reshape(-1, 2)  # OpenCV 5


def test_check_views_keep_the_rig_rows(waves):
    # Reference: OpenCV's point rectification (cv2.undistortPointsIter) with
    # the rig's R1, P1 / R2, P2 against the check views' matrices.
    rig, _, _ = waves
    views = views_of(rig)
    rect = rig.rectification
    rng = np.random.default_rng(0)
    w, h = rig.image_size
    left = rng.uniform([0, 0], [w - 1, h - 1], (50, 2))
    right = rng.uniform([0, 0], [w - 1, h - 1], (50, 2))
    kl, kr = views.matrices
    cl = _undistort(left, rig.left_matrix, rig.left_distortion, rect["R1"], kl)
    cr = _undistort(right, rig.right_matrix, rig.right_distortion, rect["R2"], kr)
    ul, vl, dv = views.to_rig(cl[:, 0], cl[:, 1], cl[:, 1] - cr[:, 1])
    rl = _undistort(left, rig.left_matrix, rig.left_distortion, rect["R1"], rect["P1"])
    rr = _undistort(right, rig.right_matrix, rig.right_distortion, rect["R2"], rect["P2"])
    np.testing.assert_allclose(ul, rl[:, 0], atol=1e-6)
    np.testing.assert_allclose(vl, rl[:, 1], atol=1e-6)
    np.testing.assert_allclose(dv, rl[:, 1] - rr[:, 1], atol=1e-6)
    # The check views are framed on the cameras: most of each view holds image data.
    assert views.valid[0].mean() > 0.9 and views.valid[1].mean() > 0.9


def test_true_rig_holds_on_its_own_speckle_frames(waves):
    # Reference: the exact cameras of the session; a true rig has zero
    # vertical disparity everywhere (pinhole model), so what is measured is
    # the method's error. Measured (quick session, 5 frames): median 0.0000
    # px, p95 of |dv| 0.018 px, per-frame per-point scatter 0.015 px.
    # Bounds are in px of the cameras' own scale (rig px / px_scale), so that
    # they do not depend on how far the rig's rectification zooms.
    rig, left, right = waves
    views = views_of(rig)
    r = check_rig(left[:5], right[:7], views, tolerance=0.3)
    scale = r.px_scale
    per_frame = np.stack([m.vertical for m in r.points])
    print(f"median {r.drift.median_px:.4f} px, p95 {r.drift.p95_abs_px:.4f} px (rig px; {scale:.3f} per camera "
          f"px), per-frame scatter {np.nanstd(per_frame):.4f} px, roll {r.drift.roll_deg:.5f} deg")
    assert r.holds and r.messages == [HOLDS]
    assert r.sync.offset == 0 and r.sync.determined
    assert r.drift.n_points > 300
    assert abs(r.drift.median_px) / scale < 0.005
    assert r.drift.p95_abs_px / scale < 0.04
    assert abs(r.drift.roll_deg) < 0.003
    # The brief's precision target: about 0.02 px per point (camera scale, one frame).
    assert np.nanstd(per_frame) < 0.02


def test_moved_rig_is_flagged_and_its_trend_follows_the_geometry(moved):
    # Reference: the pinhole model with OpenCV. Each matched point's ray from
    # the left camera meets the still-water plane (world z = 0; the waves'
    # 1 mm changes dv by under 0.005 px), is projected into the turned right
    # camera with cv2.projectPoints and rectified with the pre-move rig:
    # that is the vertical disparity the move must produce.
    from surfrec.io.truthfile import read_truth
    from surfrec.synth.cameras import Camera

    out, pre, _, left, right = moved
    r = check_rig(left[:5], right[:7], views_of(pre), tolerance=0.3)
    assert not r.holds and r.messages == [MOVED]
    t = read_truth(out / "truth.h5")
    cam_l = Camera.from_dict(t["rigs"]["moved"]["left"])
    cam_r = Camera.from_dict(t["rigs"]["moved"]["right"])
    rect = pre.rectification
    uv = r.point_uv
    ray = np.c_[(uv[:, 0] - rect["P1"][0, 2]) / rect["P1"][0, 0], (uv[:, 1] - rect["P1"][1, 2]) / rect["P1"][1, 1],
                np.ones(len(uv))] @ rect["R1"]  # rows: R1^T ray
    d = ray @ cam_l.rotation  # world directions, rows: R^T ray
    world = cam_l.centre - d * (cam_l.centre[2] / d[:, 2])[:, None]
    img_r, _ = cv2.projectPoints(world, cv2.Rodrigues(cam_r.rotation)[0], cam_r.translation, cam_r.matrix,
                                 cam_r.distortion)
    rr = _undistort(img_r, pre.right_matrix, pre.right_distortion, rect["R2"], rect["P2"])
    expected = uv[:, 1] - rr[:, 1]
    ok = np.isfinite(r.point_dv)
    diff = r.point_dv[ok] - expected[ok]
    exp = assess_drift(uv[ok, 0], uv[ok, 1], expected[ok])
    print(f"measured slope {r.drift.trend['slope_u_px_per_1000px']:.3f}, expected "
          f"{exp.trend['slope_u_px_per_1000px']:.3f} px per 1000 px; roll {r.drift.roll_deg:.4f} vs "
          f"{exp.roll_deg:.4f} deg; per-point RMS difference {np.sqrt(np.mean(diff**2)):.3f} px; "
          f"p95 {r.drift.p95_abs_px:.3f} vs {exp.p95_abs_px:.3f} px")
    assert np.sqrt(np.mean(diff**2)) / r.px_scale < 0.02
    assert r.drift.trend["slope_u_px_per_1000px"] == pytest.approx(exp.trend["slope_u_px_per_1000px"], rel=0.02)
    assert r.drift.trend["slope_v_px_per_1000px"] == pytest.approx(exp.trend["slope_v_px_per_1000px"], abs=0.05)
    assert r.drift.roll_deg == pytest.approx(exp.roll_deg, abs=0.005)
    assert r.drift.p95_abs_px == pytest.approx(exp.p95_abs_px, rel=0.03)
    # The move itself: 0.2 degrees about the right camera's optical axis
    # (scenario truth), seen as a roll of the rectified rows.
    assert r.drift.roll_deg == pytest.approx(0.2, abs=0.01)
    assert abs(r.drift.median_px) < 0.3 * r.drift.p95_abs_px  # a roll: median near zero, large tails


def test_post_move_rig_holds(moved):
    _, _, post, left, right = moved
    r = check_rig(left[:5], right[:7], views_of(post), tolerance=0.3)
    assert r.holds and r.drift.p95_abs_px / r.px_scale < 0.04 and abs(r.drift.roll_deg) < 0.003


def test_frames_one_apart_are_found_out_of_step(waves):
    # Common practice: a new random pattern every frame makes only the true
    # pairing correlate. Left frames 0-4 against right frames 1-5.
    rig, left, right = waves
    r = check_rig(left[:5], right[1:6], views_of(rig), tolerance=0.3, max_offset=2)
    assert not r.holds
    assert r.sync.determined and r.sync.offset == -1
    assert r.messages == ["cameras out of step by 1 frames (left frame t matches right frame t-1)"]
    assert r.sync.scores[-1] > 0.8
    assert max(s for k, s in r.sync.scores.items() if k != -1) < 0.4
    # The drift is measured on the re-paired frames and still holds.
    assert r.drift.p95_abs_px / r.px_scale < 0.04
