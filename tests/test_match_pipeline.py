"""The matching pipeline on a rendered session against its exact truth disparities.

The renderer is checked against OpenCV and published formulas (tests/test_render.py), so its
images with known surfaces may carry accuracy tests. Truth disparities come from
surfrec.synth.truthdisparity (ray casting through the true cameras and cv2.stereoRectify's R1/P1/P2).
"""

import subprocess
import sys

import numpy as np
import pytest

from surfrec.io.images import open_frames
from surfrec.io.timestamps import read_timestamps
from surfrec.io.truthfile import read_truth
from surfrec.match.pipeline import (MatchParams, band_halfwidth_px, match_frame, matching_grid,
                                    reference_on_grid, time_window_indices)
from surfrec.match.rectification import FrameRectifier
from surfrec.match.speckle import default_window, speckle_size_px
from surfrec.match.validity import normalised_median_test
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import StillWater, surface_from_dict
from surfrec.synth.truthdisparity import true_disparity
from surfrec.synth.truthrig import true_rig_from_truth


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    out = tmp_path_factory.mktemp("match") / "s"
    subprocess.run([sys.executable, "-m", "surfrec.cli.main", "synth", str(out), "--quick", "-q"], check=True)
    tr = read_truth(out / "truth.h5")
    rig = true_rig_from_truth(tr)
    left = Camera.from_dict(tr["rigs"]["rig"]["left"])
    right = Camera.from_dict(tr["rigs"]["rig"]["right"])
    return out, tr, rig, left, right


def test_wave_frames_match_truth(session):
    out, tr, rig, left, right = session
    p = MatchParams()
    gu, gv = matching_grid(rig.image_size, p.spacing, p.window)
    uu, vv = np.meshgrid(gu, gv)
    ref, _ = true_disparity(left, right, rig.rectification, StillWater(), 0.0, uu, vv)
    c = rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2]
    band = band_halfwidth_px(ref, abs(left.centre[2]), c, p.max_excursion_mm)
    fr = FrameRectifier(rig, p.rectify_method)
    lf, rf = open_frames(str(out / "waves" / "left")), open_frames(str(out / "waves" / "right"))
    g = tr["groups"]["waves"]
    surf = surface_from_dict(g["surface"])
    for i in (0, 5):
        res = match_frame(fr.left(lf[i])[None], fr.right(rf[i])[None], np.zeros(1), gu, gv, ref, band, p)
        truth, _ = true_disparity(left, right, rig.rectification, surf, float(g["time"][i]), uu, vv)
        err = res["disparity"] - truth
        ok = np.isfinite(err)
        assert ok.mean() > 0.97
        assert np.sqrt(np.mean(err[ok] ** 2)) < 0.02  # px; the target scale is 0.01 px (issue 4)
        assert abs(np.mean(err[ok])) < 0.002
        # The estimated 1-sigma is the right size: within a factor 2.5 of the observed error
        # (the rest is the first-order shape function meeting the wave's curvature).
        ratio = np.sqrt(np.mean(err[ok] ** 2)) / np.nanmedian(res["disparity_sigma"])
        assert 0.8 < ratio < 2.5


def test_second_order_shape_on_curved_waves(session):
    # Reference: the exact disparities of the rendered surface (surfrec.synth.truthdisparity). The
    # quick session's wave is curved on the scale of a 21 px window: the first-order shape function
    # leaves a systematic misfit its 1-sigma does not include; the second-order one removes it and
    # its 1-sigma matches the observed error.
    out, tr, rig, left, right = session
    fr = FrameRectifier(rig, "bspline3")
    lf, rf = open_frames(str(out / "waves" / "left")), open_frames(str(out / "waves" / "right"))
    g = tr["groups"]["waves"]
    surf = surface_from_dict(g["surface"])
    rms, honesty = {}, {}
    for order in (1, 2):
        p = MatchParams(window=21, shape_order=order)
        gu, gv = matching_grid(rig.image_size, p.spacing, p.window)
        uu, vv = np.meshgrid(gu, gv)
        ref, _ = true_disparity(left, right, rig.rectification, StillWater(), 0.0, uu, vv)
        c = rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2]
        band = band_halfwidth_px(ref, abs(left.centre[2]), c, p.max_excursion_mm)
        res = match_frame(fr.left(lf[2])[None], fr.right(rf[2])[None], np.zeros(1), gu, gv, ref, band, p)
        truth, _ = true_disparity(left, right, rig.rectification, surf, float(g["time"][2]), uu, vv)
        err = res["disparity"] - truth
        ok = np.isfinite(err)
        assert ok.mean() > 0.97
        rms[order] = np.sqrt(np.mean(err[ok] ** 2))
        honesty[order] = np.nanmedian(res["disparity_sigma"]) / rms[order]
    assert rms[2] < 0.7 * rms[1]
    assert 0.6 < honesty[2] < 1.4
    assert honesty[1] < 0.5 * honesty[2]


def test_band_covers_the_requested_excursion(session):
    # Geometry reference: disparities of the plane moved by +-5 mm, from exact ray casting.
    _, tr, rig, left, right = session
    gu, gv = matching_grid(rig.image_size, 16, 15)
    uu, vv = np.meshgrid(gu, gv)
    ref, _ = true_disparity(left, right, rig.rectification, StillWater(), 0.0, uu, vv)
    c = rig.rectification["P1"][0, 2] - rig.rectification["P2"][0, 2]
    band = band_halfwidth_px(ref, abs(left.centre[2]), c, 5.0)
    for level in (-5.0, 5.0):
        d, _ = true_disparity(left, right, rig.rectification, StillWater(level), 0.0, uu, vv)
        assert np.nanmax(np.abs(d - ref)) < band - 1


def test_speckle_size_and_window(session):
    out = session[0]
    img = open_frames(str(out / "still" / "left"))[0]
    size = speckle_size_px(img)
    # The renderer's grains are ~4 camera px (autocorrelation FWHM), blurred by the PSF.
    assert 3.5 < size < 6.0
    assert default_window(size) in range(13, 22, 2)


def test_normalised_median_test_flags_an_outlier():
    # Westerweel & Scarano (2005): a smooth field with one spike; only the spike is flagged.
    yy, xx = np.mgrid[0:20, 0:30]
    f = 3.0 + 0.01 * xx + 0.005 * yy
    f[10, 10] += 1.0
    out = normalised_median_test(f)
    assert out[10, 10] and out.sum() == 1


def test_reference_on_grid_interpolates_bilinearly():
    u0, v0 = np.arange(0, 100, 10.0), np.arange(0, 50, 10.0)
    ref = 2.0 + 0.03 * u0[None, :] + 0.05 * v0[:, None]  # a plane: bilinear interpolation is exact
    u, v = np.arange(5, 90, 7), np.arange(3, 40, 6)
    out = reference_on_grid(u0, v0, ref, u, v)
    np.testing.assert_allclose(out, 2.0 + 0.03 * u[None, :] + 0.05 * v[:, None], atol=1e-12)


def test_time_windows_depend_only_on_neighbours():
    assert time_window_indices(0, 10, 5) == [0, 1, 2]
    assert time_window_indices(5, 10, 5) == [3, 4, 5, 6, 7]
    assert time_window_indices(9, 10, 3) == [8, 9]


def test_timestamps_errors(tmp_path):
    from surfrec.errors import InputError

    p = tmp_path / "t.csv"
    p.write_text("frame,left_s,right_s\n0,0.000,0.000\n1,0.002,0.002\n2,0.004,0.004\n")
    np.testing.assert_allclose(read_timestamps(p, 3), [0, 0.002, 0.004])
    with pytest.raises(InputError, match="has 3 rows but there are 4 frame pairs"):
        read_timestamps(p, 4)
    p.write_text("frame,left_s,right_s\n0,0.000,0.000\n1,0.002,0.002\n2,0.001,0.001\n")
    with pytest.raises(InputError, match="line 4: left_s does not increase"):
        read_timestamps(p, 3)
    p.write_text("frame,left,right\n")
    with pytest.raises(InputError, match="header"):
        read_timestamps(p)
    p.write_text("frame,left_s,right_s\n0,0.000,0.000\n1,0.002,0.0031\n")
    with pytest.raises(InputError, match="not synchronised"):
        read_timestamps(p, 2)


def test_rejected_points_tell_no_texture_from_a_mismatch():
    # One band of the pair is flat (no speckle: only noise), another shows unrelated speckle in the
    # right view (a mismatch). The noise floor sigma_d = sqrt(2) sigma_n / sqrt(sum gx^2) (Pan et al.,
    # Opt. Express 16 (2008) 7037) puts the flat band's points under low_texture and not the others.
    import cv2

    from surfrec.synth.render import speckle_pattern

    rng = np.random.default_rng(21)
    w, h = 240, 120

    def speckle():
        p = speckle_pattern((w, h), 4.0, rng)
        return cv2.GaussianBlur(p, (0, 0), 0.6).astype(np.float32)

    left = 0.1 + 0.7 * speckle()
    M = np.float32([[1, 0, -3.0], [0, 1, 0]])  # right(x) = left(x + 3): disparity 3 px
    right = cv2.warpAffine(left, M, (w, h), flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_REFLECT)
    left[:, 40:100] = 0.3
    right[:, 37:97] = 0.3
    right[:, 150:210] = (0.1 + 0.7 * speckle())[:, 150:210]
    left += rng.normal(0, 0.003, left.shape).astype(np.float32)
    right += rng.normal(0, 0.003, right.shape).astype(np.float32)
    gu, gv = matching_grid((w, h), 4, 15)
    centre = np.full((gv.size, gu.size), 3.0)
    params = MatchParams(window=15, spacing=4, band_px=3)
    res = match_frame(left[None], right[None], np.zeros(1), gu, gv, centre, 3, params)
    r = res["reasons"]
    flat_cols = np.sum((gu - 7 >= 40) & (gu + 7 < 97)) * gv.size
    assert r["low_texture"] >= 0.9 * flat_cols
    mismatch = np.isnan(res["disparity"][:, (gu - 7 > 150) & (gu + 7 < 207)])
    assert mismatch.mean() > 0.9
    assert r["low_texture"] <= flat_cols + 2 * gv.size  # the mismatches are not called textureless
