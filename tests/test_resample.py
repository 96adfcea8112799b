"""surfrec.geometry.resample: triangulation into the datum frame and resampling onto the world grid.

Exact inputs: the default synthetic scenario's true cameras and surface
(no images rendered): exact disparities at the matching grid come from
surfrec.synth.truthdisparity (the matcher's ground truth, itself checked
against the renderer), so any height error here is the resampling's own.
"""

import cv2
import numpy as np
import pytest
from scipy.interpolate import griddata

from surfrec.geometry.datum import datum_frame, plane_disparity
from surfrec.geometry.resample import (MAX_NODES, HeightResampler, datum_to_rectified, default_grid_step,
                                       exclusion_mask, footprint_mask, grid_axes, height_gain,
                                       heights_on_matching_grid, nice_step, point_in_polygon, still_water_points)
from surfrec.geometry.triangulate import triangulate
from surfrec.match.pipeline import matching_grid
from surfrec.synth.scenarios import build_scenario
from surfrec.synth.truthdisparity import true_disparity
from surfrec.synth.truthrig import true_rig


@pytest.fixture(scope="module")
def scene():
    """Full-size `waves` geometry: true rig, datum frame of the true still water, exact disparities."""
    sc = build_scenario("waves")
    cams = sc.rigs["rig"]
    left, right = cams.left, cams.right
    rig = true_rig(left, right)
    rect = rig.rectification
    # The tank's still water z = 0 in the left camera frame: normal R e_z, offset n . t.
    n = left.rotation[:, 2]
    m = datum_frame(n, float(n @ left.translation))
    gu, gv = matching_grid(rig.image_size, 4, 17)
    uu, vv = np.meshgrid(gu.astype(float), gv.astype(float))
    group = sc.group("waves")
    t = float(group.times[3])
    d, _ = true_disparity(left, right, rect, group.surface, t, uu, vv)
    return dict(left=left, right=right, rig=rig, rect=rect, m=m, gu=gu, gv=gv, uu=uu, vv=vv, d=d,
                surface=group.surface, t=t)


def _tank_error(scene, x, y, h):
    """Height error of datum-frame nodes in the true geometry: node -> left camera -> tank frame -> surface."""
    m, left = scene["m"], scene["left"]
    xx, yy = np.meshgrid(x, y)
    cam = np.stack([xx, yy, h], -1) @ m[:3, :3].T + m[:3, 3]
    w = (cam - left.translation) @ left.rotation
    return w[..., 2] - scene["surface"].height(w[..., 0], w[..., 1], scene["t"])


def _grid(scene):
    rect = scene["rect"]
    still = still_water_points(scene["gu"], scene["gv"], scene["m"], rect["R1"], rect["P1"])
    ext = (np.nanmin(still[..., 0]), np.nanmax(still[..., 0]), np.nanmin(still[..., 1]), np.nanmax(still[..., 1]))
    x, y = grid_axes(ext, default_grid_step(still), snap=True)
    fp = footprint_mask(x, y, scene["gu"], scene["gv"], scene["m"], rect["R1"], rect["P1"])
    return x, y, fp


def test_triangulation_agrees_with_opencv_triangulatepoints(scene):
    # Reference: OpenCV cv2.triangulatePoints (DLT) on the same rectified correspondences
    # (left (u, v), right (u - d, v)), in the left rectified frame, brought back by R1^T.
    rect = scene["rect"]
    ok = np.isfinite(scene["d"])
    u, v, d = scene["uu"][ok][::37], scene["vv"][ok][::37], scene["d"][ok][::37]
    ours = triangulate(u, v, d, rect["Q"], rect["R1"])
    hom = cv2.triangulatePoints(rect["P1"], rect["P2"], np.stack([u, v]), np.stack([u - d, v]))
    ref = (hom[:3] / hom[3]).T @ rect["R1"]
    rel = np.linalg.norm(ours - ref, axis=1) / np.linalg.norm(ref, axis=1)
    assert rel.max() < 1e-9


def test_height_gain_is_the_derivative_along_the_ray(scene):
    # Reference: a central finite difference of the triangulated height (step 1e-4 px;
    # the height is smooth in d, truncation error ~ step^2).
    rect, m = scene["rect"], scene["m"]
    ok = np.isfinite(scene["d"])
    u, v, d = scene["uu"][ok][::101], scene["vv"][ok][::101], scene["d"][ok][::101]

    gain = height_gain(u, v, d, rect["Q"], rect["R1"], m)
    step = 1e-4
    fd = ((triangulate(u, v, d + step / 2, rect["Q"], rect["R1"]) - triangulate(u, v, d - step / 2, rect["Q"],
                                                                                 rect["R1"])) @ m[:3, 2]) / step
    np.testing.assert_allclose(gain, fd, rtol=1e-6)
    # The datum-frame height is the distance above the plane (datum.h5 frame definition).
    gu, gv = scene["gu"][::10], scene["gv"][::10]
    dd = scene["d"][::10, ::10]
    pts, _ = heights_on_matching_grid(gu, gv, dd, rect["Q"], rect["R1"], m)
    uu, vv = np.meshgrid(gu.astype(float), gv.astype(float))
    cam = triangulate(uu, vv, dd, rect["Q"], rect["R1"])
    np.testing.assert_allclose(pts[..., 2], (cam - m[:3, 3]) @ m[:3, 2], atol=1e-9)


def test_still_water_map_inverts_the_projection(scene):
    # Reference: the datum engineer's plane_disparity (ray-plane intersection, then P1 / P2)
    # and our projective map: the still-water point of a pixel projects back onto that pixel.
    rect, m = scene["rect"], scene["m"]
    gu, gv = scene["gu"][::20], scene["gv"][::20]
    xy = still_water_points(gu, gv, m, rect["R1"], rect["P1"])
    a = datum_to_rectified(m, rect["R1"], rect["P1"])
    p = np.concatenate([xy, np.zeros(xy.shape[:-1] + (1,)), np.ones(xy.shape[:-1] + (1,))], -1) @ a.T
    uu, vv = np.meshgrid(gu.astype(float), gv.astype(float))
    np.testing.assert_allclose(p[..., 0] / p[..., 2], uu, atol=1e-9)
    np.testing.assert_allclose(p[..., 1] / p[..., 2], vv, atol=1e-9)
    d0 = plane_disparity(m[:3, 2], float(m[:3, 2] @ m[:3, 3]), uu, vv, rect["R1"], rect["P1"], rect["P2"])
    pts, _ = heights_on_matching_grid(gu, gv, d0, rect["Q"], rect["R1"], m)
    np.testing.assert_allclose(pts[..., :2], xy, atol=1e-6)
    np.testing.assert_allclose(pts[..., 2], 0.0, atol=1e-6)


def test_resampling_error_is_far_below_the_noise_and_below_griddata(scene):
    # The points move sideways with the surface (parallax); the resampling must add less
    # than a tenth of the per-point noise (issue 5). Per-point noise: 0.005 mm, the
    # default session's noise floor (docs/performance.md); bound 0.0005 mm RMS.
    # Reference method: scipy.interpolate.griddata on the same scattered (x, y, h),
    # which a correct resampling must match or beat.
    rect, m = scene["rect"], scene["m"]
    x, y, fp = _grid(scene)
    res = HeightResampler(scene["gu"], scene["gv"], rect["Q"], rect["R1"], rect["P1"], m, x, y, mask=fp)
    h, s, stats = res(scene["d"], np.full(scene["d"].shape, 0.01))
    err = _tank_error(scene, x, y, h)
    assert np.isfinite(h[fp]).mean() > 0.99
    assert np.sqrt(np.nanmean(err ** 2)) < 5e-4
    assert stats.unconverged == 0 and stats.max_iterations <= 10
    # sigma_h = |dh/dd| sigma_d, |dh/dd| about 1 mm/px for this rig (0.9 m away, 250 mm baseline).
    assert 0.008 < np.nanmedian(s) < 0.012
    # griddata on a part of the field (a Delaunay triangulation of the whole field is slow).
    pts, _ = heights_on_matching_grid(scene["gu"], scene["gv"], scene["d"], rect["Q"], rect["R1"], m)
    ok = np.isfinite(pts[..., 2]) & (np.abs(pts[..., 0]) < 60) & (np.abs(pts[..., 1]) < 60)
    sel = (np.abs(x) < 50)[None, :] & (np.abs(y) < 50)[:, None]
    xx, yy = np.meshgrid(x, y)
    ref = np.full(h.shape, np.nan)
    ref[sel] = griddata(pts[ok][:, :2], pts[ok][:, 2], (xx[sel], yy[sel]), method="cubic")
    err_ref = _tank_error(scene, x, y, ref)[sel]
    assert np.sqrt(np.nanmean(err[sel] ** 2)) <= np.sqrt(np.nanmean(err_ref ** 2))
    np.testing.assert_allclose(h[sel], ref[sel], atol=5e-3)


def test_linear_method_is_second_order_and_worse(scene):
    # Bilinear interpolation error of a sinusoid ~ A (k dx)^2 / 8 (Taylor remainder, common
    # practice): with A = 1 mm, k = 0.094 rad/mm, dx = 1.1 mm, about 1.3e-3 mm at most.
    rect, m = scene["rect"], scene["m"]
    x, y, fp = _grid(scene)
    res = HeightResampler(scene["gu"], scene["gv"], rect["Q"], rect["R1"], rect["P1"], m, x, y, mask=fp,
                          method="linear")
    h, _, stats = res(scene["d"])
    err = _tank_error(scene, x, y, h)
    assert stats.cubic == 0
    assert np.nanmax(np.abs(err)) < 4e-3
    assert np.sqrt(np.nanmean(err ** 2)) > 2e-4


def test_invalid_points_blank_only_their_cells_and_nothing_is_extrapolated(scene):
    rect, m = scene["rect"], scene["m"]
    x, y, fp = _grid(scene)
    d = scene["d"].copy()
    d[100, 150] = np.nan
    res = HeightResampler(scene["gu"], scene["gv"], rect["Q"], rect["R1"], rect["P1"], m, x, y, mask=fp)
    h, _, stats = res(d)
    h_full, _, _ = res(scene["d"])
    # A node is NaN iff its vertical meets the surface in a cell with the invalid corner.
    lost = np.isfinite(h_full) & ~np.isfinite(h)
    a = datum_to_rectified(m, rect["R1"], rect["P1"])
    xx, yy = np.meshgrid(x, y)
    p = np.stack([xx, yy, h_full, np.ones_like(xx)], -1) @ a.T
    fu = (p[..., 0] / p[..., 2] - scene["gu"][0]) / 4.0
    fv = (p[..., 1] / p[..., 2] - scene["gv"][0]) / 4.0
    in_cell = (np.floor(fu) >= 149) & (np.floor(fu) <= 150) & (np.floor(fv) >= 99) & (np.floor(fv) <= 100)
    np.testing.assert_array_equal(lost, in_cell & np.isfinite(h_full))
    assert 1 <= lost.sum() <= 8
    # Next to the hole the third-order stencil moves to the open side: no loss of accuracy.
    err = _tank_error(scene, x, y, h)
    assert np.nanmax(np.abs(err)) < 1e-3
    # Nodes beyond the matching grid stay NaN (a grid twice as wide as the field).
    wide = HeightResampler(scene["gu"], scene["gv"], rect["Q"], rect["R1"], rect["P1"], m, x * 2, y * 2)
    hw, _, _ = wide(scene["d"])
    outside = ~footprint_mask(x * 2, y * 2, scene["gu"], scene["gv"], m, rect["R1"], rect["P1"])
    assert np.isnan(hw[outside]).mean() > 0.98


def test_point_in_polygon_matches_matplotlib():
    # Reference: matplotlib.path.Path.contains_points (even-odd for simple polygons).
    from matplotlib.path import Path

    rng = np.random.default_rng(3)
    poly = np.array([[0, 0], [10, 0], [12, 8], [5, 4], [0, 9.0]])
    pts = rng.uniform(-2, 14, size=(5000, 2))
    ours = point_in_polygon(pts[:, 0], pts[:, 1], poly)
    ref = Path(poly).contains_points(pts)
    assert (ours != ref).sum() == 0


def test_exclusions_and_grid_rules():
    x, y = grid_axes((-10, 10, -5, 5), 1.0)
    assert x[0] == -10 and x[-1] == 10 and y.size == 11
    ex = exclusion_mask(x, y, circles=[(0, 0, 2.0)], polygons=[np.array([[5, -5], [10, -5], [10, 5], [5, 5.0]])])
    xx, yy = np.meshgrid(x, y)
    np.testing.assert_array_equal(ex[(xx < 4) & (xx > -4)], (np.hypot(xx, yy) <= 2.0)[(xx < 4) & (xx > -4)])
    assert ex[(xx > 5.5) & (xx < 9.5) & (np.abs(yy) < 4.5)].all()  # edges may fall either side
    # Snapped grids start and end on whole steps.
    xs, ys = grid_axes((-10.3, 10.2, -5.1, 4.9), 0.5, snap=True)
    assert xs[0] == -10.5 and xs[-1] == 10.5 and ys[0] == -5.5 and ys[-1] == 5.0
    with pytest.raises(ValueError, match="above the limit"):
        grid_axes((-1e4, 1e4, -1e4, 1e4), 1e-3)
    assert MAX_NODES == 50_000_000
    # Round steps from the 1-2-2.5-5 family (and 1.2, 1.5, 3, 4), never coarser than the data.
    assert [nice_step(s) for s in (1.08, 2.49, 0.37, 12.0)] == [1.0, 2.0, 0.3, 12.0]
