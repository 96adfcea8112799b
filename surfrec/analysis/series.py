"""Time series at a point of a regular height grid.

Used by ``surfrec preview --point`` (and meant for ``spectrum --point``): a
point given in datum-frame mm is read from the grid either at its nearest
node or bilinearly from the four nodes around it. Pure functions on arrays.
"""

from __future__ import annotations

import numpy as np

from surfrec.errors import InputError

__all__ = ["longest_finite_run", "point_weights", "regular_stretch", "sample_point"]


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


def regular_stretch(time, *, rtol: float = 0.01):
    """The longest run of evenly sampled frames of a time axis.

    Dropped frames leave gaps in ``time``; spectra and harmonic fits assume
    an even sampling, so they use the longest stretch without a gap.

    Parameters
    ----------
    time : (T,) array_like
        Frame times, s, increasing.
    rtol : float, optional
        A step counts as regular when it is within ``rtol`` of the median
        step (1% by default: timestamp jitter of a frame clock is far below
        that, a dropped frame doubles the step).

    Returns
    -------
    start, stop : int
        Frames ``start:stop`` (stop exclusive) form the stretch.
    dt : float
        Mean step over the stretch, s (NaN for a single frame).
    gaps : int
        Number of irregular steps in the whole axis (0: evenly sampled).

    Raises
    ------
    InputError
        If the times are not finite and strictly increasing.
    """
    t = np.asarray(time, np.float64).reshape(-1)
    if t.size == 0:
        raise InputError("the time axis is empty")
    if not np.all(np.isfinite(t)) or (t.size > 1 and not np.all(np.diff(t) > 0)):
        raise InputError("the time axis must be finite and strictly increasing (s)")
    if t.size == 1:
        return 0, 1, float("nan"), 0
    d = np.diff(t)
    step = float(np.median(d))
    good = np.abs(d - step) <= rtol * step
    run_start, run_len = longest_finite_run(np.where(good, 1.0, np.nan))
    if run_len == 0:  # every step irregular: any two neighbouring frames are a "stretch"
        return 0, 2, float(d[0]), int(d.size)
    start, stop = run_start, run_start + run_len + 1
    return start, stop, float((t[stop - 1] - t[start]) / (stop - 1 - start)), int(np.count_nonzero(~good))


def longest_finite_run(values):
    """Start and length of the longest run of consecutive finite values.

    Parameters
    ----------
    values : (N,) array_like

    Returns
    -------
    start, length : int (length 0 when nothing is finite; then start is 0).
    """
    ok = np.isfinite(np.asarray(values, np.float64).reshape(-1))
    if not ok.any():
        return 0, 0
    # Run boundaries from the changes of the padded indicator.
    edges = np.diff(np.concatenate([[0], ok.astype(np.int8), [0]]))
    starts = np.nonzero(edges == 1)[0]
    stops = np.nonzero(edges == -1)[0]
    i = int(np.argmax(stops - starts))
    return int(starts[i]), int(stops[i] - starts[i])
