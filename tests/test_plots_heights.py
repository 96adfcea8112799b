"""surfrec.plots.heights and surfrec.analysis.series: the colour scale, the figure, point sampling."""

import numpy as np
import pytest

from surfrec.analysis.series import point_weights, sample_point
from surfrec.errors import InputError
from surfrec.plots.heights import HEIGHT_MAP_ANCHORS, height_colormap, heights_figure, symmetric_limits


def test_symmetric_limits_are_centred_on_zero():
    rng = np.random.default_rng(0)
    h = rng.normal(-1.5, 0.7, (50, 60))  # mostly negative: the scale must still be symmetric
    lo, hi = symmetric_limits(h)
    assert lo == -hi and hi > 0
    # Reference: numpy's max of |h| (no outliers here, so nothing is clipped).
    assert hi == pytest.approx(np.abs(h).max())
    # One wild value is clipped to the 99.9th percentile of |h| (numpy.percentile).
    h[3, 4] = 80.0
    lo, hi = symmetric_limits(h)
    assert lo == -hi and hi == pytest.approx(np.percentile(np.abs(h), 99.9))
    assert symmetric_limits(h, limit=2.5) == (-2.5, 2.5)
    assert symmetric_limits(np.full((3, 3), np.nan)) == (-1.0, 1.0)
    with pytest.raises(ValueError):
        symmetric_limits(h, limit=-1)


def test_colour_map_lightness_is_symmetric_and_monotonic():
    from skimage.color import rgb2lab

    cmap = height_colormap()
    v = np.linspace(0.0, 1.0, 101)
    # Reference: CIE 1976 L* (CIE 15), computed by scikit-image from sRGB.
    lightness = rgb2lab(cmap(v)[None, :, :3])[0, :, 0]
    assert np.max(np.abs(lightness - lightness[::-1])) < 6.0  # equal distances from zero look equally strong
    assert np.all(np.diff(lightness[:51]) > 0) and np.all(np.diff(lightness[50:]) < 0)  # magnitude reads in grey
    assert lightness[50] > 94  # zero is near white
    assert HEIGHT_MAP_ANCHORS[0] != HEIGHT_MAP_ANCHORS[-1]


def test_figure_uses_the_symmetric_scale_and_equal_axes():
    x = np.arange(-50.0, 50.1, 2.0)
    y = np.arange(-30.0, 30.1, 2.0)
    h = np.cos(0.1 * x)[None, :] * np.ones((y.size, 1)) - 0.8
    h[:3, :3] = np.nan
    fig = heights_figure(x, y, h, frame=4, time_s=0.008, title="t.h5")
    ax = fig.axes[0]
    mesh = ax.collections[0]
    assert mesh.norm.vmin == -mesh.norm.vmax == pytest.approx(-np.nanmax(np.abs(h)))
    # The colour at zero is the map's middle (near-white) colour.
    np.testing.assert_allclose(mesh.cmap(mesh.norm(0.0)), height_colormap()(0.5), atol=1e-2)
    assert ax.get_aspect() == 1.0
    assert ax.get_xlim()[0] < ax.get_xlim()[1] and ax.get_ylim()[0] < ax.get_ylim()[1]  # x right, y up
    assert "mm" in ax.get_xlabel() and "mm" in ax.get_ylabel()
    bar = [a for a in [*fig.axes, *ax.child_axes] if a is not ax and "mm" in a.get_ylabel()]
    assert bar, "a colour bar labelled in mm"


def test_point_weights_bilinear_against_scipy():
    from scipy.interpolate import RegularGridInterpolator

    x = np.arange(0.0, 10.0, 1.5)
    y = np.arange(-4.0, 4.0, 0.5)
    rng = np.random.default_rng(1)
    h = rng.normal(size=(3, y.size, x.size))
    for px, py in ((2.2, 1.1), (0.0, -4.0), (x[-1], y[-1]), (7.49, -0.26)):
        rows, cols, w = point_weights(x, y, px, py)
        got, _ = sample_point(h, None, rows, cols, w)
        # Reference: scipy's RegularGridInterpolator (linear) on each frame.
        ref = [RegularGridInterpolator((y, x), f)([py, px])[0] for f in h]
        np.testing.assert_allclose(got, ref, atol=1e-12)
    rows, cols, w = point_weights(x, y, 2.2, 1.1, method="nearest")
    assert (rows[0], cols[0], w[0]) == (int(np.argmin(abs(y - 1.1))), int(np.argmin(abs(x - 2.2))), 1.0)
    with pytest.raises(InputError, match="outside the grid"):
        point_weights(x, y, 20.0, 0.0)


def test_sample_point_propagates_invalid_nodes_and_sigma():
    h = np.ones((2, 3, 3))
    s = np.full((2, 3, 3), 0.01)
    h[1, 1, 1] = np.nan
    rows, cols, w = point_weights(np.arange(3.0), np.arange(3.0), 0.5, 0.5)
    v, sig = sample_point(h, s, rows, cols, w)
    assert v[0] == pytest.approx(1.0) and np.isnan(v[1])
    # Fully correlated neighbours: the weighted sum of sigmas (weights sum to 1).
    assert sig[0] == pytest.approx(0.01) and np.isnan(sig[1])
