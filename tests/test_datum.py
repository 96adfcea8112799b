"""The still-water datum (surfrec.geometry.datum, surfrec.match.prior) against the synthetic truth.

References:
- the synthetic session's exact truth: the still water is the world plane
  z = 0 seen by the exact cameras (truth.h5), and the exact disparities of
  surfrec.synth.truthdisparity (the renderer is checked against OpenCV in
  tests/test_render.py and tests/test_cameras.py, so accuracy tests may use it);
- the true plane in the left camera frame: the camera maps X_cam = R X_world + t,
  so the world's up axis is n = R [0, 0, 1] and the plane z = 0 through the
  world origin has n·X = n·t;
- the datum-frame convention of docs/conventions.md (the definition is the reference);
- targets of issue 4: plane normal within 0.05 degrees, offset within 0.2 mm with
  the true rig; the still residual with the true rig below the noise.
"""

import dataclasses

import numpy as np
import pytest

from surfrec.geometry.datum import datum_frame, fit_still_water, plane_disparity, plane_of_frame, rigid_inverse
from surfrec.geometry.triangulate import triangulate
from surfrec.io.images import open_frames
from surfrec.io.truthfile import read_truth
from surfrec.match.prior import match_frames_on_grid, matching_grid, valid_region, wide_search
from surfrec.match.rectification import FrameRectifier
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import surface_from_dict
from surfrec.synth.truthdisparity import true_disparity
from surfrec.synth.truthrig import true_rig

WINDOW = 15
SPACING = 4


def true_plane(left: Camera):
    n = left.rotation @ np.array([0.0, 0.0, 1.0])
    return n, float(n @ left.translation)


def run_datum(lefts, rights, rig, **kw):
    """The datum stage on in-memory frames, as `surfrec datum` runs it."""
    fr = FrameRectifier(rig)
    ls = [fr.left(a) for a in lefts]
    rs = [fr.right(b) for b in rights]
    vl = valid_region(*fr.maps["left"], rig.image_size)
    vr = valid_region(*fr.maps["right"], rig.image_size)
    prior = wide_search(np.stack(ls), np.stack(rs), level=2, valid_left=vl, valid_right=vr)
    gu, gv = matching_grid(rig.image_size, SPACING, WINDOW)
    m = match_frames_on_grid(zip(ls, rs), gu, gv, prior, WINDOW, valid_left=vl, valid_right=vr)
    rect = rig.rectification
    fit = fit_still_water(m.disparity, gu, gv, rect["Q"], rect["R1"], sigma=m.sigma, attempted=m.attempted,
                          window=WINDOW, **kw)
    return prior, m, fit


@pytest.fixture(scope="module")
def waves(quick_session):
    out = quick_session("waves")
    t = read_truth(out / "truth.h5")
    left = Camera.from_dict(t["rigs"]["rig"]["left"])
    right = Camera.from_dict(t["rigs"]["rig"]["right"])
    lf = open_frames(str(out / "still" / "left"))
    rf = open_frames(str(out / "still" / "right"))
    frames = ([lf[i] for i in range(len(lf))], [rf[i] for i in range(len(rf))])
    rig = true_rig(left, right)
    return {"out": out, "truth": t, "left": left, "right": right, "frames": frames, "rig": rig,
            "result": run_datum(*frames, rig)}


@pytest.fixture(scope="module")
def scatter():
    # Only the still frames of the quick `scatter` scenario (a 40 mm opaque post standing 45 mm out
    # of the water), rendered in this process: a few seconds instead of the whole session.
    from surfrec.synth import build_scenario, render_session

    sc = build_scenario("scatter", quick=True)
    sc.groups = [sc.group("still")]
    images = {}
    render_session(sc, lambda name, i, l, r: images.__setitem__(i, (l, r)), workers=1)
    # The quick scenario's sensor is 8-bit: scale as surfrec.io.images does.
    lefts = [images[i][0].astype(np.float32) / 255.0 for i in sorted(images)]
    rights = [images[i][1].astype(np.float32) / 255.0 for i in sorted(images)]
    rig_cams = sc.rigs["rig"]
    rig = true_rig(rig_cams.left, rig_cams.right)
    return {"scenario": sc, "rig": rig, "result": run_datum(lefts, rights, rig)}


# ---------------------------------------------------------------- the datum frame (docs/conventions.md convention)


def test_datum_frame_follows_the_convention():
    n = np.array([0.14, 0.003, -0.99])
    n /= np.linalg.norm(n)
    off = -902.0
    m = datum_frame(n, off)
    r, o = m[:3, :3], m[:3, 3]
    np.testing.assert_allclose(r.T @ r, np.eye(3), atol=1e-12)
    assert np.linalg.det(r) == pytest.approx(1.0)
    np.testing.assert_allclose(r[:, 2], n, atol=1e-12)              # z = the normal, toward the camera
    assert n @ np.zeros(3) - off > 0
    assert o[0] == 0 and o[1] == 0 and n @ o == pytest.approx(off)  # origin on the optical axis and the plane
    x = np.array([1.0, 0, 0]) - n[0] * n
    np.testing.assert_allclose(r[:, 0], x / np.linalg.norm(x), atol=1e-12)  # camera x projected
    np.testing.assert_allclose(r[:, 1], np.cross(r[:, 2], r[:, 0]), atol=1e-12)  # y = z x x
    # The opposite sign of the same plane gives the same frame.
    np.testing.assert_allclose(datum_frame(-n, -off), m, atol=1e-12)
    pn, po = plane_of_frame(m)
    np.testing.assert_allclose(pn, n, atol=1e-12)
    assert po == pytest.approx(off)
    np.testing.assert_allclose(rigid_inverse(m) @ m, np.eye(4), atol=1e-12)


def test_tank_origin_and_rotation():
    n = np.array([0.1, -0.05, -0.99])
    base = datum_frame(n, -900.0)
    m = datum_frame(n, -900.0, origin=(120.0, -35.0), rotate_deg=90.0)
    # The tank origin is the point (120, -35) of the convention frame ...
    np.testing.assert_allclose(m[:3, 3], base[:3, :3] @ [120.0, -35.0, 0.0] + base[:3, 3], atol=1e-9)
    # ... and turning by +90 deg (counter-clockwise seen from the cameras) puts tank x along the old y.
    np.testing.assert_allclose(m[:3, 0], base[:3, 1], atol=1e-12)
    np.testing.assert_allclose(m[:3, 1], -base[:3, 0], atol=1e-12)
    np.testing.assert_allclose(m[:3, 2], base[:3, 2], atol=1e-12)


def test_frame_needs_the_axis_to_meet_the_plane():
    with pytest.raises(ValueError, match="does not meet"):
        datum_frame([1.0, 0.0, 0.0], 5.0)


def test_plane_disparity_lies_on_the_plane(waves):
    rect = waves["rig"].rectification
    n, off = true_plane(waves["left"])
    vv, uu = np.mgrid[10:380:37, 10:500:41].astype(float)
    d = plane_disparity(n, off, uu, vv, rect["R1"], rect["P1"], rect["P2"])
    pts = triangulate(uu, vv, d, rect["Q"], rect["R1"])
    np.testing.assert_allclose(pts @ n - off, 0.0, atol=1e-9)
    # The exact synthetic disparities of the still water agree.
    t = waves["truth"]
    surf = surface_from_dict(t["groups"]["still"]["surface"])
    ref, _ = true_disparity(waves["left"], waves["right"], rect, surf, 0.0, uu, vv)
    np.testing.assert_allclose(d, ref, atol=1e-6)


# ---------------------------------------------------------------- on the synthetic still water


def test_wide_search_finds_the_disparity_field_without_a_prior(waves):
    prior, m, _ = waves["result"]
    rect = waves["rig"].rectification
    surf = surface_from_dict(waves["truth"]["groups"]["still"]["surface"])
    gu, gv = matching_grid(waves["rig"].image_size, SPACING, WINDOW)
    vv, uu = np.meshgrid(gv, gu, indexing="ij")
    ref, _ = true_disparity(waves["left"], waves["right"], rect, surf, 0.0, uu, vv)
    assert np.nanmax(np.abs(prior(uu, vv) - ref)) < 0.5  # well inside the band
    assert prior.n_used > 0.95 * prior.n_coarse
    err = m.disparity - ref[None]
    assert np.isfinite(m.disparity).mean() > 0.98
    assert np.sqrt(np.nanmean(err ** 2)) < 0.01  # px; the matcher's own sigma is about 0.006 px


def test_true_rig_datum_meets_the_targets(waves):
    _, _, fit = waves["result"]
    dm = fit.datum
    n, off = true_plane(waves["left"])
    angle = np.degrees(np.arccos(min(1.0, dm.plane_normal @ n)))
    assert angle < 0.05          # issue 4 target; measured about 1e-4 deg
    assert abs(dm.plane_offset - off) < 0.2   # mm, issue 4 target; measured about 1e-3 mm
    s = fit.stats
    # The still residual with the true rig is below the noise (measured: 0.0016 mm RMS vs 0.014 mm).
    assert s["residual_rms_mm"] < 0.5 * s["noise_floor_median_mm"]
    assert s["residual_peak_to_valley_mm"] < 3 * s["noise_floor_median_mm"]
    # The scatter across frames is the matching noise the matcher itself predicts (Pan et al. 2008).
    assert s["noise_floor_median_mm"] == pytest.approx(s["predicted_noise_mm"], rel=0.25)
    assert dm.fit_rms_mm < 2 * s["noise_floor_median_mm"]
    assert fit.warnings == []
    assert dm.valid.mean() > 0.98 and dm.n_frames == 3


def test_reference_disparity_and_heights_against_truth(waves):
    _, _, fit = waves["result"]
    dm = fit.datum
    rect = waves["rig"].rectification
    surf = surface_from_dict(waves["truth"]["groups"]["still"]["surface"])
    vv, uu = np.meshgrid(dm.v, dm.u, indexing="ij")
    ref, _ = true_disparity(waves["left"], waves["right"], rect, surf, 0.0, uu, vv)
    err = (dm.disparity - ref)[dm.valid]
    assert np.sqrt(np.mean(err ** 2)) < 0.006  # mean of 3 frames of ~0.006 px noise each
    # Heights of the true world points are 0; in the datum frame too.
    pts = triangulate(uu, vv, ref, rect["Q"], rect["R1"])
    z = dm.to_datum_frame(pts)[..., 2]
    assert np.nanmax(np.abs(z)) < 0.01
    # The datum origin is where the left optical axis meets the water (truth: the world plane z = 0).
    left = waves["left"]
    axis = left.rotation.T @ np.array([0.0, 0.0, 1.0])
    hit = left.centre + axis * (-left.centre[2] / axis[2])
    np.testing.assert_allclose(left.to_camera(hit), dm.world_to_left_camera[:3, 3], atol=0.05)


def test_the_post_is_rejected_not_smeared(scatter):
    prior, m, fit = scatter["result"]
    sc = scatter["scenario"]
    rig = scatter["rig"]
    dm = fit.datum
    left, right = sc.rigs["rig"].left, sc.rigs["rig"].right
    vv, uu = np.meshgrid(dm.v, dm.u, indexing="ij")
    ref, _ = true_disparity(left, right, rig.rectification, sc.group("still").surface, 0.0, uu, vv, post=sc.post,
                            projector_centre=sc.rigs["rig"].projector.centre)
    hidden = ~np.isfinite(ref)
    assert hidden.sum() > 100                  # the post hides a few hundred grid points
    assert not (dm.valid & hidden).any()       # none of them is valid
    err = np.abs(dm.disparity - ref)[dm.valid]
    # No smear at the post's rim: the worst valid point anywhere stays within the noise tail
    # (measured 0.018 px; windows half on the post were off by up to 3 px before rejection).
    assert err.max() < 0.03
    n, off = true_plane(left)
    assert np.degrees(np.arccos(min(1.0, dm.plane_normal @ n))) < 0.05
    assert abs(dm.plane_offset - off) < 0.2
    assert fit.stats["n_occluded"] > 0


def test_a_bend_from_a_distortion_error_goes_into_the_still_residual(waves):
    # Rectify with a left k1 off by 0.01: the flat water comes out bent, and the smooth still
    # residual must hold the bend: what remains is the noise, as with the true rig.
    left = waves["left"]
    bent = dataclasses.replace(left, distortion=left.distortion + np.array([0.01, 0, 0, 0, 0]))
    rig = true_rig(bent, waves["right"])
    _, _, fit = run_datum(*waves["frames"], rig)
    _, _, exact = waves["result"]
    s, s0 = fit.stats, exact.stats
    assert s["residual_rms_mm"] > 2 * s["noise_floor_median_mm"]           # measured 0.035 vs 0.015 mm
    assert s["rough_rms_mm"] < 1.3 * s0["rough_rms_mm"]                    # measured 0.0112 vs 0.0098 mm
    # What the heights stage will do: interpolate the stored residual at each point and subtract it.
    dm = fit.datum
    rect = rig.rectification
    vv, uu = np.meshgrid(dm.v, dm.u, indexing="ij")
    xyz = dm.to_datum_frame(triangulate(uu, vv, dm.disparity, rect["Q"], rect["R1"]))
    corrected = xyz[..., 2] - dm.still_residual_at(xyz[..., 0], xyz[..., 1])
    ok = dm.valid & np.isfinite(corrected)
    assert ok.sum() > 0.95 * dm.valid.sum()
    assert np.sqrt(np.mean(xyz[..., 2][ok] ** 2)) > 2 * s["noise_floor_median_mm"]   # bent before
    assert np.sqrt(np.mean(corrected[ok] ** 2)) < 1.3 * s0["rough_rms_mm"]          # flat after


def test_moving_water_is_warned_about(waves):
    # The wave run (a 1 mm wave over a 3 mm dip) is no still water: the datum must say so.
    out = waves["out"]
    lf, rf = open_frames(str(out / "waves" / "left")), open_frames(str(out / "waves" / "right"))
    _, _, fit = run_datum([lf[i] for i in range(3)], [rf[i] for i in range(3)], waves["rig"])
    assert any("was the water still" in w for w in fit.warnings), fit.warnings


def test_too_few_points():
    u = np.arange(10.0)
    v = np.arange(8.0)
    q = np.array([[1, 0, 0, -5.0], [0, 1, 0, -4.0], [0, 0, 0, 1000.0], [0, 0, 0.004, 1.5]])
    with pytest.raises(ValueError, match="valid points"):
        fit_still_water(np.full((2, 8, 10), np.nan), u, v, q, np.eye(3))


def test_warning_rules():
    # The documented thresholds (docs/file-formats.md): scatter > 2.5x the matcher's estimate, roughness
    # > 3x what the noise explains, a bend > 0.1 mm RMS, else a fit RMS > 0.2 mm.
    from surfrec.geometry.datum import _warnings

    base = {"noise_floor_median_mm": 0.014, "predicted_noise_mm": 0.014, "rough_rms_mm": 0.010,
            "residual_rms_mm": 0.002, "residual_peak_to_valley_mm": 0.015, "fit_rms_mm": 0.017}
    assert _warnings(base, 3) == []
    bent = _warnings({**base, "residual_rms_mm": 0.15, "fit_rms_mm": 0.16}, 3)
    assert len(bent) == 1 and "calibration is probably off" in bent[0]
    moved = _warnings({**base, "noise_floor_median_mm": 0.05}, 3)
    assert len(moved) == 1 and "moved between frames" in moved[0]
    wavy = _warnings({**base, "rough_rms_mm": 0.5, "residual_rms_mm": 0.3}, 3)
    assert "was the water still" in wavy[0] and "cannot be told from a calibration error" in wavy[1]
    assert "plane-fit RMS is 0.300 mm" in _warnings({**base, "fit_rms_mm": 0.3}, 3)[0]
    assert "one still frame" in _warnings({**base, "noise_floor_median_mm": float("nan")}, 1)[0]


def test_a_still_glint_is_filled_from_the_plane_not_dropped(waves):
    # The still frames' disparities with a hole where a glint sat (marked fill, as `surfrec datum`
    # marks points whose windows held saturated pixels): the hole is valid in the datum, its
    # reference disparity is the plane's (plane_disparity, checked above against triangulation and
    # the exact synthetic disparities) within 0.01 px, and the still residual covers it.
    _, m, _ = waves["result"]
    rect = waves["rig"].rectification
    gu, gv = matching_grid(waves["rig"].image_size, SPACING, WINDOW)
    d = m.disparity.copy()
    vv, uu = np.meshgrid(gv, gu, indexing="ij")
    hole = (uu - 256) ** 2 + (vv - 190) ** 2 < 40 ** 2
    d[:, hole] = np.nan
    fit = fit_still_water(d, gu, gv, rect["Q"], rect["R1"], sigma=m.sigma, attempted=m.attempted & ~hole[None],
                          fill=hole, window=WINDOW)
    datum = fit.datum
    assert datum.valid[hole].all() and fit.stats["n_filled"] == hole.sum()
    n, off = true_plane(waves["left"])
    plane = plane_disparity(n, off, uu[hole], vv[hole], rect["R1"], rect["P1"], rect["P2"])
    assert np.max(np.abs(datum.disparity[hole] - plane)) < 0.01
    centre = triangulate(256.0, 190.0, float(np.mean(datum.disparity[hole])), rect["Q"], rect["R1"])
    xy = (centre - datum.world_to_left_camera[:3, 3]) @ datum.world_to_left_camera[:3, :3]
    assert np.isfinite(datum.still_residual_at(np.array([xy[0]]), np.array([xy[1]]))).all()
    # Without fill the hole stays out of the datum.
    plain = fit_still_water(d, gu, gv, rect["Q"], rect["R1"], sigma=m.sigma, attempted=m.attempted & ~hole[None],
                            window=WINDOW).datum
    assert not plain.valid[hole].any()
