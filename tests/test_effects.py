"""Camera effects of the synthetic renderer (surfrec.synth.effects) against outside references.

- Sensor noise: photon transfer (EMVA 1288, Release 4.0, linear camera model):
  sigma_y^2 = K^2 sigma_d^2 + sigma_q^2 + K (mu_y - mu_y.dark), slope = conversion gain K,
  sigma_q^2 = 1/12 DN^2 (uniform quantisation noise).
- Vignetting: the natural fall-off is cos^4 of the field angle (textbook radiometry; the field
  angle from cv2.undistortPoints), the lens part the documented 1 - a rho^2 - b rho^4.
- Defocus: the thin-lens blur circle c = A f |s - s_f| / (s (s_f - f)), A = f/N (textbook thin-lens
  optics), sigma = c/4 (second moment of a uniform disc, R^2/4 per axis), and second moments of
  convolved kernels add.
- Glints: law of reflection; on a plane mirror a point source's highlight is where the line from
  the camera to the source's mirror image crosses the mirror (textbook optics), projected with
  cv2.projectPoints.
- Motion blur: stratified time sampling over the exposure (Cook, Porter & Carpenter 1984).
- With the effects off the images equal the clean renderer's exactly (the clean renderer is itself
  checked against OpenCV and published formulas in tests/test_render.py).
"""

import dataclasses

import cv2
import numpy as np
import pytest

from cli_run import run, run_here
from surfrec.synth import effects as efx
from surfrec.synth import render as rd
from surfrec.synth import surfaces as sf
from surfrec.synth.scenarios import build_scenario
from surfrec.synth.session import render_side


@pytest.fixture(scope="module")
def quick():
    return build_scenario("waves", quick=True, seed=2)


@pytest.fixture(scope="module")
def fx_session(tmp_path_factory):
    """A quick session rendered by the command line with every effect."""
    out = tmp_path_factory.mktemp("fx") / "session"
    res = run("synth", out, "--quick", "--seed", "4", "--camera-effects", "all", "-q")
    assert res.returncode == 0, res.stderr
    return out


def _flat_sensor(**kw):
    base = dict(supersample=1, psf_sigma_px=0.0)
    base.update(kw)
    return rd.SensorModel(**base)


# ------------------------------------------------------------------- noise

def test_photon_transfer_slope_is_the_conversion_gain():
    fx = efx.CameraEffects(enabled="noise,bitdepth")
    sensor, _ = fx.sensor_and_lighting(_flat_sensor(), rd.Lighting())
    assert sensor.bits == 12 and sensor.container_bits == 16  # 12-bit data in 16-bit files
    k = (2 ** 12 - 1) / sensor.full_well_e  # DN per electron
    levels = [0.0, 0.1, 0.25, 0.45, 0.65]
    means, variances = [], []
    for i, lv in enumerate(levels):
        img, _ = efx.expose_with_effects(np.full((300, 300), lv, np.float32), sensor, np.random.default_rng(i))
        assert img.dtype == np.uint16 and img.max() <= 4095
        means.append(img.mean())
        variances.append(img.astype(float).var())
    means, variances = np.array(means), np.array(variances)
    dark = means[0]
    # Black level: 64 DN of 12 bits (the chosen operating point).
    assert dark == pytest.approx(64.0, abs=0.1)
    slope, intercept = np.polyfit(means - dark, variances, 1)
    # EMVA 1288: slope = K; intercept = K^2 sigma_d^2 + 1/12 DN^2.
    assert slope == pytest.approx(k, rel=0.03)
    assert variances[0] == pytest.approx(k ** 2 * 20.0 ** 2 + 1 / 12, rel=0.05)
    assert intercept == pytest.approx(k ** 2 * 20.0 ** 2 + 1 / 12, rel=0.15)


def test_bright_speckle_sits_at_two_thirds_of_full_scale(quick):
    # The operating point: the brightest speckle (pattern value ~1) on a plane facing the
    # projector at ~60-70 % of full scale (the design target of the "noise" effect).
    fx = efx.CameraEffects(enabled="noise")
    _, lighting = fx.sensor_and_lighting(quick.sensor, quick.lighting)
    assert 0.6 <= lighting.exposure + lighting.ambient <= 0.7


# --------------------------------------------------------------- vignetting

def test_vignetting_natural_cos4_and_lens_formula(quick):
    cam = quick.rigs["rig"].left
    fx = efx.CameraEffects(enabled="vignetting")
    fixed = efx.camera_fixed(fx, cam, "left", quick.seed)
    bundle = rd.RayBundle(cam, 1)
    w, h = cam.image_size
    pts = np.array([[0.0, 0.0], [w - 1.0, h - 1.0], [w / 2, 10.0], np.rint(cam.matrix[:2, 2])])
    und = cv2.undistortPoints(pts.reshape(-1, 1, 2), cam.matrix, cam.distortion).reshape(-1, 2)
    cos_theta = 1.0 / np.sqrt(1.0 + (und ** 2).sum(axis=1))
    a, b = fx.vignetting.left
    rho2 = ((pts[:, 0] - cam.matrix[0, 2]) ** 2 + (pts[:, 1] - cam.matrix[1, 2]) ** 2) / (0.25 * (w * w + h * h))
    lens = 1 - a * rho2 - b * rho2 ** 2
    # A flat white scene through the effects pipeline, noise made negligible (10^12 e- full well).
    sensor = _flat_sensor(bits=16, container_bits=16, full_well_e=1e12, read_noise_e=0.0, black_level=0.0)
    img, _ = efx.expose_with_effects(0.9 * bundle.vignette, sensor, np.random.default_rng(0), fixed)
    img = img.astype(float) / (2 ** 16 - 1) / 0.9
    for (u, v), c, l in zip(pts.astype(int), cos_theta, lens):
        assert bundle.vignette[v, u] == pytest.approx(c ** 4, rel=1e-6)  # natural part: cos^4
        assert fixed.vignette[v, u] == pytest.approx(l, rel=1e-6)      # lens part: the formula
        assert img[v, u] == pytest.approx(c ** 4 * l, abs=2e-5)
    # Corners 35-45 % darker than the centre, natural and lens parts together (design target).
    assert 0.55 <= img[0, 0] / img[int(cam.matrix[1, 2]), int(cam.matrix[0, 2])] <= 0.65
    right = efx.camera_fixed(fx, quick.rigs["rig"].right, "right", quick.seed)
    assert not np.allclose(right.vignette, fixed.vignette, atol=0.01)  # different per camera


# ----------------------------------------------------------------- defocus

def test_defocus_sigma_follows_the_thin_lens_formula(quick):
    fx = efx.CameraEffects(enabled="defocus")
    for side in ("left", "right"):
        cam = getattr(quick.rigs["rig"], side)
        sigma = efx.defocus_sigma_px(efx.still_water_depth(rd.RayBundle(cam, 1)), cam, side, fx.defocus)
        pitch = 0.012 * 1280 / cam.image_size[0]  # mm: the same sensor read at 512 px
        f = cam.matrix[0, 0] * pitch                # focal length, mm
        n_stop, s_f = fx.defocus.f_number[side], fx.defocus.focus_mm[side]
        pts = np.array([[5.0, 7.0], [500.0, 370.0], [256.0, 190.0], [30.0, 300.0]])
        und = cv2.undistortPoints(pts.reshape(-1, 1, 2), cam.matrix, cam.distortion).reshape(-1, 2)
        for (u, v), (xn, yn) in zip(pts.astype(int), und):
            ray = cam.rotation.T @ np.array([xn, yn, 1.0])       # world direction, camera z = 1
            s = -cam.centre[2] / ray[2]                            # depth Z where it meets z = 0
            c = (f / n_stop) * f * abs(s - s_f) / (s * (s_f - f))  # thin lens
            assert sigma[v, u] == pytest.approx(c / 4 / pitch, rel=1e-3)


def test_defocus_is_soft_on_the_far_side_at_full_size():
    # Design target: sigma up to ~1.5-2 px at the far edge of the full-size view, sharp at the near side.
    from surfrec.synth.scenarios import _cameras

    cams = dict(zip(("left", "right"), _cameras(1.0)))
    fx = efx.CameraEffects(enabled="defocus")
    for side, far in (("left", -1), ("right", 0)):
        cam = cams[side]
        # Pixels along the middle row only (one ray each), enough for the edge values.
        w, h = cam.image_size
        d = cam.pixel_rays(np.arange(w, dtype=float), np.full(w, h / 2))
        depth = -cam.centre[2] / d[:, 2] * (d @ cam.rotation[2])
        sigma = efx.defocus_sigma_px(depth, cam, side, fx.defocus)
        assert 1.4 <= sigma[far] <= 2.0
        assert sigma.min() < 0.5


def test_blend_of_blurs_has_the_local_second_moment():
    # A point source through PSF, box and defocus: per-axis variances add,
    # psf^2 + (1 - 1/S^2)/12 (box of S samples) + sigma^2.
    s, psf = 3, 0.6
    h = w = 61
    rad = np.zeros((h * s, w * s), np.float32)
    rad[30 * s + 1, 30 * s + 1] = 1.0
    yy, xx = np.mgrid[0:h, 0:w]
    for sigma in (0.0, 1.2, 1.75, 2.6):
        img = efx.blur_and_integrate(rad, s, psf, np.full((h, w), sigma))
        tot = img.sum()
        var_x = (img * (xx - 30) ** 2).sum() / tot
        var_y = (img * (yy - 30) ** 2).sum() / tot
        want = psf ** 2 + (1 - 1 / s ** 2) / 12 + sigma ** 2
        assert var_x == pytest.approx(want, rel=0.02) and var_y == pytest.approx(want, rel=0.02)


# ------------------------------------------------------ dust, hot and dead pixels

def test_dust_shadow_is_recovered_by_a_flat_field_ratio(quick):
    # Flat-field correction (image / flat without dust; common practice) gives back the map, in any frame.
    cam = quick.rigs["rig"].left
    fixed = efx.camera_fixed(efx.CameraEffects(enabled="dust"), cam, "left", quick.seed)
    sensor = _flat_sensor(bits=16, container_bits=16, full_well_e=1e12, read_noise_e=0.0, black_level=0.0)
    flat = np.full((384, 512), 0.8, np.float32)
    ratios = [efx.expose_with_effects(flat, sensor, np.random.default_rng(i), fixed)[0] / (0.8 * 65535.0)
              for i in range(2)]
    for r in ratios:
        np.testing.assert_allclose(r, fixed.dust, atol=2e-5)
    cu, cv, rad, t0 = fixed.dust_spots.T
    assert len(t0) == 8 and np.all((t0 >= 0.6) & (t0 <= 0.9))
    assert np.all((rad >= 1.5) & (rad <= 15.0 * 512 / 1280 + 1e-9))
    assert fixed.dust.min() < 0.92
    other = efx.camera_fixed(efx.CameraEffects(enabled="dust"), quick.rigs["rig"].right, "right", quick.seed)
    assert not np.allclose(other.dust_spots, fixed.dust_spots)


def test_defects_are_fixed_across_frames_and_differ_between_cameras(fx_session):
    from surfrec.io.images import open_frames
    from surfrec.io.truthfile import read_truth_effects

    e = read_truth_effects(fx_session / "truth.h5")
    pos = {}
    for side in ("left", "right"):
        c = e["cameras"][side]
        hot, dead, stuck, level = c["hot_pixels"], c["dead_pixels"], c["hot_stuck"], c["hot_level"]
        n = 512 * 384
        assert len(hot) == round(3e-4 * n) and len(dead) == round(1.5e-4 * n)
        pos[side] = {tuple(p) for p in hot}
        for group in ("target", "still", "waves"):
            frames = open_frames(str(fx_session / group / side))
            for i in range(len(frames)):
                img = frames.read_raw(i)
                assert np.all(img[dead[:, 0], dead[:, 1]] == 0)  # dead: always 0
                # Stuck: always the same reading, round(level x 4095) of the 12-bit range.
                np.testing.assert_array_equal(img[hot[stuck, 0], hot[stuck, 1]],
                                              np.rint(level[stuck] * 4095).astype(int))
    assert len(pos["left"] & pos["right"]) < 3


# ------------------------------------------------------------------- glints

def test_glint_on_still_water_sits_at_the_mirror_point(quick):
    rig = quick.rigs["rig"]
    proj = rig.projector
    pattern = np.ones((proj.resolution[1], proj.resolution[0]), np.float32)
    light = efx.SpeckleLight(lamp=np.array([380.0, 260.0, 1350.0]), lamp_ref=1.0,
                             glints=efx.Glints(projector_peak=5.0, projector_roughness=0.01, lamp_peak=0.0))
    peaks = []
    for cam in (rig.left, rig.right):
        bundle = rd.RayBundle(cam, 1)
        glint = np.empty(bundle.shape, np.float32)
        rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, proj, pattern, quick.lighting, light=light,
                                   glint_out=glint)
        v, u = np.unravel_index(np.argmax(glint), glint.shape)
        # Mirror image of the projector in z = 0; the highlight is where camera -> image crosses z = 0.
        c, p = cam.centre, proj.centre * [1, 1, -1]
        x = c + (p - c) * c[2] / (c[2] - p[2])
        rvec, _ = cv2.Rodrigues(cam.rotation)
        uv, _ = cv2.projectPoints(x.reshape(1, 3), rvec, cam.translation, cam.matrix, cam.distortion)
        assert np.hypot(u - uv[0, 0, 0], v - uv[0, 0, 1]) < 1.5
        assert glint.max() > 1.0  # saturates: more than full scale at its centre
        peaks.append((u, v))
        # The compiled loop's lobe is the array formula's (the lamp alone, Beckmann shape).
        lamp_only = dataclasses.replace(light, glints=efx.Glints(projector_peak=0.0, lamp_peak=2.0,
                                                                  lamp_roughness=0.05))
        rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, proj, pattern, quick.lighting, light=lamp_only,
                                   glint_out=glint)
        x, y = bundle.points_at(np.zeros(bundle.shape))
        zero = np.zeros_like(x)
        ref = 2.0 * efx.glint_radiance(x, y, zero, zero, zero, cam.centre, light.lamp, 0.05) * bundle.vignette
        np.testing.assert_allclose(glint, ref, rtol=1e-5, atol=1e-7)
    assert np.hypot(*np.subtract(*peaks)) > 20  # the two cameras see it in different places


def test_glints_saturate_differ_between_cameras_and_move(fx_session):
    from surfrec.io.images import open_frames
    from surfrec.io.truthfile import read_truth_effects

    e = read_truth_effects(fx_session / "truth.h5")
    masks = e["glints"]["waves"]
    assert masks["left"].shape == (6, 384, 512)
    frames = open_frames(str(fx_session / "waves" / "left"))
    for i in range(6):
        img = frames.read_raw(i)
        m = masks["left"][i]
        assert m.any() and np.all(img[m] == 4095)  # saturated: the top of the 12-bit range
    cover = np.mean([masks[s].mean() for s in ("left", "right")])
    assert 0.002 <= cover <= 0.02  # design target: roughly 0.2-2 % of the field
    # Different in the two cameras (the half-vector depends on the camera centre) and moving with the waves.
    overlap = (masks["left"] & masks["right"]).sum() / masks["left"].sum()
    assert overlap < 0.2
    moved = (masks["left"][0] & masks["left"][5]).sum() / masks["left"][0].sum()
    assert moved < 0.8


def test_effects_are_recorded_and_the_truth_is_unchanged(fx_session):
    from surfrec.io.truthfile import read_truth, read_truth_surface
    from surfrec.synth.session import truth_surface_grids

    t = read_truth(fx_session / "truth.h5")
    assert t["effects"]["enabled"] == list(efx.EFFECTS)
    assert t["sensor"]["bits"] == 12 and t["sensor"]["read_noise_e"] == 20.0
    x, y, h = read_truth_surface(fx_session / "truth.h5", "waves")
    clean = truth_surface_grids(build_scenario("waves", quick=True, seed=4))["waves"]
    np.testing.assert_array_equal(x, clean["x"])
    np.testing.assert_array_equal(h, clean["height"].astype(np.float32))
    assert "Camera effects" in (fx_session / "SCENARIO.md").read_text()
    res = run_here("inspect", fx_session / "truth.h5")
    assert res.returncode == 0


# -------------------------------------------------- hotspot, motion, effects off

def test_projector_hotspot_follows_its_beam_profile(quick):
    rig = quick.rigs["rig"]
    proj = rig.projector
    bundle = rd.RayBundle(rig.left, 1)
    pattern = np.ones((proj.resolution[1], proj.resolution[0]), np.float32)
    lighting = rd.Lighting(ambient=0.0)
    clean = rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, proj, pattern, lighting)
    # No effect on the light: the compiled path gives the clean radiometry.
    same = rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, proj, pattern, lighting,
                                      light=efx.SpeckleLight())
    np.testing.assert_allclose(same, clean, rtol=1e-6)
    ill = efx.Illumination()
    axis = efx.hotspot_axis(proj, ill.hotspot_axis_deg)
    sigma = np.deg2rad(ill.hotspot_sigma_deg)
    lit = rd.render_radiance_speckle(bundle, sf.StillWater(), 0.0, proj, pattern, lighting,
                                     light=efx.SpeckleLight(hotspot_axis=axis, hotspot_sigma=sigma))
    x, y = bundle.points_at(np.zeros(bundle.shape))
    d = np.stack([x, y, np.zeros_like(x)], -1) - proj.centre
    theta = np.arccos(d @ axis / np.linalg.norm(d, axis=-1))
    # Gaussian beam exp(-theta^2 / (2 sigma^2)), to the documented theta^2/12 in the exponent.
    gauss = np.exp(-0.5 * (theta / sigma) ** 2)
    ratio = lit / clean
    np.testing.assert_allclose(ratio, efx.hotspot(*(proj.centre[:, None, None] - np.stack([x, y, np.zeros_like(x)])),
                                                  np.linalg.norm(d, axis=-1), axis, sigma), rtol=1e-5)
    assert np.abs(np.log(ratio) - np.log(gauss)).max() <= (theta ** 2 / 12 * theta ** 2 / (2 * sigma ** 2)).max() + 1e-6
    # About a third less light at the edges of the field (design target 30-40 %).
    assert 0.55 <= ratio.min() <= 0.7


def test_motion_blur_takes_each_supersample_row_at_its_instant(quick):
    rig = quick.rigs["rig"]
    bundle = rd.RayBundle(rig.left, 3)
    g = quick.group("waves")
    pattern = rd.speckle_pattern(rig.projector.resolution, quick.projector_grain_px, np.random.default_rng(1))
    light = efx.speckle_light(efx.CameraEffects(enabled="motion"), rig.projector, 3)
    np.testing.assert_allclose(light.sub_times, [-1 / 3000, 0.0, 1 / 3000])  # 1 ms exposure, 3 instants
    t = 0.004
    blurred = rd.render_radiance_speckle(bundle, g.surface, t, rig.projector, pattern, quick.lighting, light=light)
    for j, dt in enumerate(light.sub_times):
        at = rd.render_radiance_speckle(bundle, g.surface, t + dt, rig.projector, pattern, quick.lighting)
        np.testing.assert_allclose(blurred[j::3], at[j::3], rtol=1e-5, atol=1e-6)


def test_effects_off_render_exactly_the_clean_images(quick):
    sc = dataclasses.replace(quick, groups=[dataclasses.replace(quick.group("target"), views=quick.group("target").views[:1]),
                                            dataclasses.replace(quick.group("waves"), times=quick.group("waves").times[:1])])
    clean = list(render_side(sc, "right"))
    off = list(render_side(dataclasses.replace(sc, effects=efx.CameraEffects(enabled=[])), "right"))
    assert len(clean) == len(off) == 2
    for (n1, i1, a, _), (n2, i2, b, _) in zip(clean, off):
        assert (n1, i1) == (n2, i2)
        np.testing.assert_array_equal(a, b)
    assert build_scenario("waves", quick=True, seed=2, effects="none").effects is None
    # The effects sensor stage with nothing on is the clean exposure, noise draw for noise draw.
    rad = np.random.default_rng(0).random((96, 120), dtype=np.float32)
    sensor = rd.SensorModel(supersample=3)
    np.testing.assert_array_equal(efx.expose_with_effects(rad, sensor, np.random.default_rng(7))[0],
                                  rd.expose(rad, sensor, np.random.default_rng(7)))


# ------------------------------------------------------------------ the option

def test_effect_names_parse_and_bad_names_are_refused():
    assert efx.parse_effects("all") == frozenset(efx.EFFECTS)
    assert efx.parse_effects(" Vignetting, glints ") == {"vignetting", "glints"}
    assert efx.parse_effects("none") == frozenset()
    with pytest.raises(ValueError, match="unknown camera effect 'sparkle'"):
        efx.parse_effects("glints,sparkle")
    res = run_here("synth", "/nonexistent/never-written", "--quick", "--camera-effects", "glints,sparkle")
    assert res.returncode == 2  # click's usage error
    assert "unknown camera effect 'sparkle'" in res.output and "--camera-effects" in res.output
