"""Validity tests of matched disparities."""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def normalised_median_test(field, *, threshold: float = 2.0, eps: float = 0.1) -> np.ndarray:
    """Outliers by the normalised median test (Westerweel & Scarano, Exp. Fluids 39 (2005) 1096).

    For each point, r = |d - median(neighbours)| / (median(|neighbours - median|) + eps)
    over its 3x3 neighbourhood (the point itself excluded, NaN neighbours
    ignored); points with r > threshold are outliers.

    Parameters
    ----------
    field : (Nv, Nu) disparity, px, NaN where already invalid.
    threshold : dimensionless; 2 is the value recommended by the authors.
    eps : px, the expected noise level of the measurement (0.1 px in the paper;
        our sub-pixel noise is far lower, so the value is conservative).

    Returns
    -------
    outlier : (Nv, Nu) bool (False where ``field`` is NaN).
    """
    f = np.asarray(field, dtype=np.float64)
    pad = np.pad(f, 1, constant_values=np.nan)
    nv, nu = f.shape
    neigh = np.stack([pad[1 + dy:1 + dy + nv, 1 + dx:1 + dx + nu]
                      for dy in (-1, 0, 1) for dx in (-1, 0, 1) if (dy, dx) != (0, 0)])
    with np.errstate(all="ignore"):
        import warnings
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN neighbourhoods are expected at edges
            med = np.nanmedian(neigh, axis=0)
            resid = np.nanmedian(np.abs(neigh - med), axis=0)
    r = np.abs(f - med) / (resid + eps)
    enough = np.sum(np.isfinite(neigh), axis=0) >= 3
    return np.isfinite(f) & enough & (r > threshold)


def window_fully_inside(mask_rect, us, vs, window: int) -> np.ndarray:
    """True where a point's whole window lies on measured pixels of the rectified mask."""
    k = np.ones((window, window), np.uint8)
    eroded = ndimage.binary_erosion(mask_rect, structure=k, border_value=0)
    return eroded[vs, us]
