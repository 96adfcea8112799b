"""Time series at a point of a regular height grid.

Used by ``surfrec preview --point`` (and meant for ``spectrum --point``): a
point given in datum-frame mm is read from the grid either at its nearest
node or bilinearly from the four nodes around it. Pure functions on arrays.
"""

from __future__ import annotations

import numpy as np

from surfrec.errors import InputError

__all__ = ["point_weights", "sample_point"]


def point_weights(x, y, px: float, py: float, *, method: str = "bilinear"):
    """Nodes and weights that read a regular grid at the point (px, py).

    Parameters
    ----------
    x (Nx,), y (Ny,) : grid coordinates, mm, strictly increasing.
    px, py : the point, mm, in the same frame.
    method : "bilinear" (the four nodes around the point) or "nearest".

    Returns
    -------
    rows (K,), cols (K,) int and weights (K,) float summing to 1
    (K = 4 for bilinear, 1 for nearest).

    Raises
    ------
    InputError
        If the point lies outside the grid (no extrapolation) or ``method``
        is unknown.
    """
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    if not (np.isfinite(px) and np.isfinite(py)):
        raise InputError(f"the point ({px}, {py}) mm must be finite")
    if not (x[0] <= px <= x[-1] and y[0] <= py <= y[-1]):
        raise InputError(f"point ({px:g}, {py:g}) mm lies outside the grid (x {x[0]:g} to {x[-1]:g} mm, "
                         f"y {y[0]:g} to {y[-1]:g} mm)")
    if method == "nearest":
        return (np.array([int(np.argmin(np.abs(y - py)))]), np.array([int(np.argmin(np.abs(x - px)))]),
                np.array([1.0]))
    if method != "bilinear":
        raise InputError(f"unknown point method {method!r}; use 'bilinear' or 'nearest'")
    i = int(np.clip(np.searchsorted(x, px, side="right") - 1, 0, max(x.size - 2, 0)))
    j = int(np.clip(np.searchsorted(y, py, side="right") - 1, 0, max(y.size - 2, 0)))
    if x.size == 1 or y.size == 1:  # a degenerate grid: fall back to the node itself
        return np.array([j]), np.array([i]), np.array([1.0])
    fx = (px - x[i]) / (x[i + 1] - x[i])
    fy = (py - y[j]) / (y[j + 1] - y[j])
    rows = np.array([j, j, j + 1, j + 1])
    cols = np.array([i, i + 1, i, i + 1])
    w = np.array([(1 - fx) * (1 - fy), fx * (1 - fy), (1 - fx) * fy, fx * fy])
    return rows, cols, w


def sample_point(height, uncertainty, rows, cols, weights):
    """Read frames of a grid (and their 1-sigma) at a point, from :func:`point_weights`.

    Parameters
    ----------
    height : (T, Ny, Nx) mm, NaN where invalid.
    uncertainty : (T, Ny, Nx) mm (1-sigma) or None.
    rows, cols, weights : from :func:`point_weights`.

    Returns
    -------
    h (T,) mm and sigma (T,) mm (None without ``uncertainty``): NaN in a
    frame where a node with non-zero weight is invalid. sigma is the
    weighted sum of the nodes' sigmas, not their root-sum-square: neighbouring
    nodes share most of their correlation windows, so their errors are
    strongly correlated and the linear sum is the honest (upper) value.
    """
    h = np.asarray(height)[:, rows, cols].astype(np.float64)
    used = weights > 0
    w = weights[used]
    value = h[:, used] @ w
    sigma = None
    if uncertainty is not None:
        s = np.asarray(uncertainty)[:, rows, cols].astype(np.float64)[:, used]
        sigma = s @ w
        sigma[~np.isfinite(value)] = np.nan
    return value, sigma
