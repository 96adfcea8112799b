"""The parallel cubic B-spline prefilter against scipy.ndimage (a general-purpose reference library)."""

import numpy as np
import pytest
from scipy import ndimage

from surfrec.match.prefilter import spline_coefficients


@pytest.mark.parametrize("shape", [(64, 80), (2, 2), (7, 3), (3, 17, 9)])
def test_matches_scipy_spline_filter(shape):
    # Reference: scipy.ndimage.spline_filter1d with order 3 and mode "mirror", along each axis.
    rng = np.random.default_rng(3)
    image = rng.normal(3000.0, 800.0, size=shape).astype(np.float32)
    ours = spline_coefficients(image, 3)
    ref = image.astype(np.float64)
    for axis in (-1, -2):
        ref = ndimage.spline_filter1d(ref, order=3, axis=axis, mode="mirror")
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12 * np.abs(ref).max())


def test_rows_only_and_other_orders():
    rng = np.random.default_rng(4)
    image = rng.normal(size=(5, 40))
    rows = spline_coefficients(image, 3, axes=(-1,))
    np.testing.assert_allclose(rows, ndimage.spline_filter1d(image, order=3, axis=-1, mode="mirror"), atol=1e-12)
    quintic = spline_coefficients(image, 5)
    np.testing.assert_allclose(quintic, ndimage.spline_filter(image, order=5, mode="mirror"), atol=1e-12)


def test_interpolates_the_samples():
    # Defining property of the prefilter (Unser et al. 1993): the cubic B-spline with these
    # coefficients passes through the samples, c[i-1]/6 + 2 c[i]/3 + c[i+1]/6 = s[i] (mirror ends).
    rng = np.random.default_rng(5)
    s = rng.normal(size=(1, 50))
    c = spline_coefficients(s, 3, axes=(-1,))[0]
    cp = np.pad(c, 1, mode="reflect")
    np.testing.assert_allclose(cp[:-2] / 6 + 2 * cp[1:-1] / 3 + cp[2:] / 6, s[0], atol=1e-12)
