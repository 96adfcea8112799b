"""Accuracy of height fields: against a synthetic session's exact truth, or from the data alone.

Two ways to put a height node into the truth's tank frame (docs/conventions.md,
"Conventions"; issue 5):

* **true geometry** — the node (datum-frame x, y, height) goes through the
  file's own ``world_to_left_camera`` into the left-camera frame, i.e. back
  to the point the rig reconstructed, and then through the *true* left
  camera pose into the tank. The error is the reconstructed point's height
  above the exact surface at the same tank (x, y): the rig's 3-D error,
  whatever the estimated datum did.
* **true datum frame** — the node's numbers are read at face value in the
  datum frame built from the true camera and the true still water (z = 0):
  origin where the left optical axis meets it, z up, x the left camera's x
  axis projected on it, plus the file's own ``--origin`` / ``--rotate``. The
  error is what a user reading the file would see, datum errors (a tilted or
  offset plane, a turned x axis) included.

Both go through :func:`height_errors`; only the 4x4 matrix differs.

The recovered amplitude of a known plane wave comes from a per-frame linear
least-squares fit of ``a cos(k.x - omega t) + b sin(k.x - omega t) + c`` at
the known wavenumber vector and frequency, after the known stationary part
of the surface (the depression) has been removed: a, b carry the amplitude
and phase, c any residual datum offset.

Without truth, the noise floor comes from the data alone: the n-th temporal
difference of each node's series (a high-pass filter that removes the
resolved, smooth motion), scaled to the noise of one sample, with a robust
(median) scale estimate. See :func:`noise_floor_from_data`.

Everything here is a pure function (or a small accumulator) on arrays; mm, s
and rad/mm throughout; nothing opens a file.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from surfrec.geometry.datum import datum_frame

__all__ = [
    "ErrorAccumulator",
    "HighPassNoise",
    "TruthComparison",
    "error_statistics",
    "exact_heights",
    "height_errors",
    "noise_floor_from_data",
    "plane_wave_amplitude",
    "split_plane_wave",
    "tank_positions",
    "true_datum_frame",
    "visible_in_both",
]

# Streamed percentiles of |error| come from a histogram with logarithmic bins:
# 0.1% relative resolution from 1e-9 mm to 1e3 mm (27.6k bins), so a median
# or a 95th percentile is exact to 0.1% whatever the run length; smaller
# magnitudes count as zero.
_LOG_LO, _LOG_HI, _LOG_STEP = math.log(1e-9), math.log(1e3), 1e-3
_HIST_BINS = int(math.ceil((_LOG_HI - _LOG_LO) / _LOG_STEP)) + 1

# Gaussian consistency factor of the median absolute value: 1 / Phi^-1(3/4).
_MAD_TO_SIGMA = 1.482602218505602


# ----------------------------------------------------------------- geometry


def tank_positions(x, y, height, world_to_left_camera, camera_rotation, camera_translation) -> np.ndarray:
    """Map datum-frame nodes into the tank frame through a left-camera pose.

    Parameters
    ----------
    x : (Nx,) or array broadcasting with ``height``, datum-frame mm.
    y : (Ny,) or array broadcasting with ``height``, datum-frame mm. With 1-D
        ``x`` and ``y`` and a 2-D ``height`` (Ny, Nx), the grid is meshed.
    height : array, datum-frame z, mm (NaN allowed; it propagates).
    world_to_left_camera : (4, 4) or (16,) row-major, datum-frame mm ->
        left-camera mm (as in datum.h5 and heights.h5).
    camera_rotation : (3, 3) tank -> left camera rotation R (X_cam = R X_tank + t).
    camera_translation : (3,) mm, t of the same mapping.

    Returns
    -------
    (..., 3) float64 tank-frame mm (x along the tank, y across, z up).
    """
    xx, yy, hh = _mesh(x, y, height)
    m = np.asarray(world_to_left_camera, np.float64).reshape(4, 4)
    r = np.asarray(camera_rotation, np.float64).reshape(3, 3)
    t = np.asarray(camera_translation, np.float64).reshape(3)
    pts = np.stack([xx, yy, hh], axis=-1)
    cam = pts @ m[:3, :3].T + m[:3, 3]
    # X_tank = R^T (X_cam - t); with row vectors that is (X_cam - t) @ R.
    return (cam - t) @ r


def _mesh(x, y, height):
    """x, y and height broadcast together; 1-D x (Nx) and y (Ny) against a (..., Ny, Nx) height are meshed."""
    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.float64)
    h = np.asarray(height, np.float64)
    if x.ndim == 1 and y.ndim == 1 and h.ndim >= 2 and h.shape[-2:] == (y.size, x.size):
        x, y = x[None, :], y[:, None]
    return np.broadcast_arrays(x, y, h)


def true_datum_frame(camera_rotation, camera_translation, *, origin=(0.0, 0.0), rotate_deg: float = 0.0) -> np.ndarray:
    """The datum frame a perfect datum stage would build from the true camera and still water.

    The still water is the tank plane z = 0; its normal and offset in the
    left-camera frame go through :func:`surfrec.geometry.datum.datum_frame`,
    the same construction the datum stage uses (docs/conventions.md convention).

    Parameters
    ----------
    camera_rotation : (3, 3) tank -> left camera rotation.
    camera_translation : (3,) mm.
    origin : (X, Y) mm, the file's ``--origin`` (in the convention frame).
    rotate_deg : degrees, the file's ``--rotate``.

    Returns
    -------
    (4, 4) float64 world_to_left_camera, datum-frame mm -> left-camera mm.
    """
    r = np.asarray(camera_rotation, np.float64).reshape(3, 3)
    t = np.asarray(camera_translation, np.float64).reshape(3)
    # Tank normal e_z in the camera frame is R e_z; on the plane,
    # n . X_cam = e_z . (X_tank + R^T t) = (R^T t)_z.
    normal = r[:, 2]
    offset = float((r.T @ t)[2])
    return datum_frame(normal, offset, origin=origin, rotate_deg=rotate_deg)


def height_errors(x, y, height, *, time_s: float, surface, world_to_left_camera, camera_rotation,
                  camera_translation):
    """Height error of every node against an exact surface, in the tank frame.

    Parameters
    ----------
    x (Nx,), y (Ny,) : datum-frame mm of the grid.
    height : (Ny, Nx) datum-frame mm, NaN where invalid.
    time_s : the frame's time on the truth's clock, s.
    surface : object with ``height(x, y, t)`` (mm, tank frame), e.g. from
        :func:`surfrec.synth.surfaces.surface_from_dict`.
    world_to_left_camera : (4, 4) datum-frame -> left-camera mapping used to
        place the nodes (the file's own: "true geometry"; or
        :func:`true_datum_frame`: "true datum frame").
    camera_rotation, camera_translation : the true left-camera pose
        (X_cam = R X_tank + t, mm).

    Returns
    -------
    error : (Ny, Nx) mm, the node's tank z minus the exact surface height at
        its tank (x, y) and ``time_s``; NaN where ``height`` is NaN.
    positions : (Ny, Nx, 3) tank mm of the nodes.
    """
    p = tank_positions(x, y, height, world_to_left_camera, camera_rotation, camera_translation)
    ok = np.isfinite(p[..., 2])
    err = np.full(p.shape[:-1], np.nan)
    if ok.any():
        err[ok] = p[..., 2][ok] - surface.height(p[..., 0][ok], p[..., 1][ok], float(time_s))
    return err, p


def exact_heights(x, y, time_s, surface, world_to_left_camera, camera_rotation, camera_translation, *,
                  tol_mm: float = 1e-9, max_iter: int = 50) -> np.ndarray:
    """Exact heights a perfect pipeline would write on a grid of a given datum frame.

    For each node (x, y) the height h is found along the frame's z axis so
    that the point (x, y, h), mapped into the tank frame through
    ``world_to_left_camera`` and the camera pose, lies on the surface. In a
    frame whose z axis is the tank's (a true datum frame) that is just the
    surface height at the node's tank (x, y); in a tilted frame it takes a
    few fixed-point steps (slopes of a few per cent converge in under ten).

    Parameters
    ----------
    x (Nx,), y (Ny,) : datum-frame mm.
    time_s : float or (T,) s, truth clock.
    surface : ``height(x, y, t)`` mm in the tank frame.
    world_to_left_camera : (4, 4) datum-frame -> left-camera mm.
    camera_rotation, camera_translation : tank -> left camera pose (mm).
    tol_mm : stop when no height changes by more than this, mm.
    max_iter : fixed-point steps at most.

    Returns
    -------
    (Ny, Nx) mm for a scalar ``time_s``, (T, Ny, Nx) for an array.
    """
    times = np.atleast_1d(np.asarray(time_s, np.float64))
    m = np.asarray(world_to_left_camera, np.float64).reshape(4, 4)
    r = np.asarray(camera_rotation, np.float64).reshape(3, 3)
    # The frame's z axis in the tank frame: how much tank z one mm of h buys.
    ez = (m[:3, 2] @ r)[2]
    out = np.empty((times.size, np.size(y), np.size(x)))
    for k, t in enumerate(times):
        h = np.zeros((np.size(y), np.size(x)))
        for _ in range(max_iter):
            p = tank_positions(x, y, h, m, r, camera_translation)
            f = p[..., 2] - surface.height(p[..., 0], p[..., 1], float(t))
            step = f / ez
            h -= step
            if np.max(np.abs(step)) <= tol_mm:
                break
        out[k] = h
    return out if np.ndim(time_s) else out[0]


def visible_in_both(points, left_camera, right_camera, *, margin_px: float = 0.0, post=None) -> np.ndarray:
    """Which tank-frame points both true cameras see.

    Parameters
    ----------
    points : (..., 3) tank mm.
    left_camera, right_camera : objects with ``project(points) -> (..., 2)``
        px, ``image_size`` (w, h) px and ``centre`` (3,) tank mm
        (:class:`surfrec.synth.cameras.Camera`).
    margin_px : a point must project at least this far inside each image, px.
    post : optional dict with ``centre_mm`` (x, y), ``radius_mm`` and
        ``top_mm`` (a surface-piercing post, as truth.h5 ``post`` holds it):
        points inside it, or hidden behind it from either camera, are not seen.

    Returns
    -------
    bool array (...,); False for non-finite points.
    """
    pts = np.asarray(points, np.float64)
    seen = np.all(np.isfinite(pts), axis=-1)
    safe = np.where(seen[..., None], pts, 0.0)
    for cam in (left_camera, right_camera):
        uv = cam.project(safe)
        w, h = cam.image_size
        with np.errstate(invalid="ignore"):
            seen &= ((uv[..., 0] >= margin_px) & (uv[..., 0] <= w - 1 - margin_px)
                     & (uv[..., 1] >= margin_px) & (uv[..., 1] <= h - 1 - margin_px))
        if post is not None:
            seen &= ~_behind_post(safe, np.asarray(cam.centre, np.float64), post)
    return seen


def _behind_post(pts, centre, post):
    """True where the segment point -> camera centre passes through the post (a vertical cylinder)."""
    cx, cy = (float(c) for c in post["centre_mm"])
    rad, top = float(post["radius_mm"]), float(post["top_mm"])
    px, py = pts[..., 0] - cx, pts[..., 1] - cy
    inside = px * px + py * py <= rad * rad
    dx, dy = centre[0] - pts[..., 0], centre[1] - pts[..., 1]
    dz = centre[2] - pts[..., 2]
    # Closest approach of the horizontal projection of the segment to the axis.
    a = dx * dx + dy * dy
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.clip(-(px * dx + py * dy) / a, 0.0, 1.0)
    qx, qy = px + s * dx, py + s * dy
    hits = qx * qx + qy * qy <= rad * rad
    # The ray passes the axis at height z(s); below the post's top it is blocked
    # (an approximation at the closest point, fine for a post far thinner than the camera height).
    hits &= pts[..., 2] + s * dz <= top
    return inside | hits


# ------------------------------------------------------------ statistics


def error_statistics(errors) -> dict:
    """RMS, bias and 95th percentile of the magnitude of height errors.

    Parameters
    ----------
    errors : array of mm; NaN entries are ignored.

    Returns
    -------
    dict: n, rms_mm, bias_mm (mean), std_mm (about the mean, ddof = 0),
    p95_abs_mm (95th percentile of |error|), max_abs_mm; values None when n = 0.
    """
    e = np.asarray(errors, np.float64)
    e = e[np.isfinite(e)]
    if e.size == 0:
        return {"n": 0, "rms_mm": None, "bias_mm": None, "std_mm": None, "p95_abs_mm": None, "max_abs_mm": None}
    a = np.abs(e)
    return {"n": int(e.size), "rms_mm": float(np.sqrt(np.mean(e * e))), "bias_mm": float(e.mean()),
            "std_mm": float(e.std()), "p95_abs_mm": float(np.percentile(a, 95)), "max_abs_mm": float(a.max())}


class ErrorAccumulator:
    """Streamed :func:`error_statistics` over many frames, with per-node mean and spread.

    The 95th percentile comes from a logarithmic histogram of |error|, so it
    matches the in-memory value to 0.1% whatever the run length.

    Parameters
    ----------
    shape : (Ny, Nx) of the grid, for the per-node parts.
    """

    def __init__(self, shape):
        self.shape = tuple(shape)
        self.n = 0
        self.total = 0.0
        self.total_sq = 0.0
        self.max_abs = 0.0
        self.hist = np.zeros(_HIST_BINS, np.int64)
        self.node_n = np.zeros(self.shape, np.int64)
        self.node_sum = np.zeros(self.shape)
        self.node_sq = np.zeros(self.shape)

    def add(self, errors):
        """Add one frame's errors, (Ny, Nx) mm (NaN ignored)."""
        e = np.asarray(errors, np.float64)
        ok = np.isfinite(e)
        v = e[ok]
        if v.size == 0:
            return
        self.n += v.size
        self.total += float(v.sum())
        self.total_sq += float(v @ v)
        a = np.abs(v)
        self.max_abs = max(self.max_abs, float(a.max()))
        self.hist += _log_hist(a)
        self.node_n += ok
        z = np.where(ok, e, 0.0)
        self.node_sum += z
        self.node_sq += z * z

    def result(self) -> dict:
        """The pooled statistics (as :func:`error_statistics`) plus the split into
        systematic (RMS over nodes of each node's mean error) and random (RMS over
        nodes of each node's standard deviation over frames, ddof = 1) parts, mm."""
        if self.n == 0:
            return error_statistics([]) | {"systematic_rms_mm": None, "random_rms_mm": None}
        mean = self.total / self.n
        out = {"n": int(self.n), "rms_mm": math.sqrt(self.total_sq / self.n), "bias_mm": mean,
               "std_mm": math.sqrt(max(self.total_sq / self.n - mean * mean, 0.0)),
               "p95_abs_mm": _hist_percentile(self.hist, 95.0), "max_abs_mm": self.max_abs}
        many = self.node_n >= 2
        if many.any():
            nm = self.node_sum[many] / self.node_n[many]
            var = (self.node_sq[many] - self.node_n[many] * nm * nm) / (self.node_n[many] - 1)
            out["systematic_rms_mm"] = float(np.sqrt(np.mean(nm * nm)))
            out["random_rms_mm"] = float(np.sqrt(np.mean(np.maximum(var, 0.0))))
        else:
            out["systematic_rms_mm"] = out["random_rms_mm"] = None
        return out


class UncertaintyCheck:
    """How honest a file's 1-sigma is: observed errors against the predicted ones, streamed.

    Two figures, both 1 for an honest Gaussian 1-sigma:

    - ``random_to_sigma``: the random part of the error (each node's spread
      over frames, pooled as a variance over nodes with two or more frames)
      over the RMS predicted sigma of the same node-frames;
    - ``error_to_sigma_median``: median over node-frames of |error| / sigma,
      divided by 0.6745 (the median of |z| for a standard normal z), which
      includes the systematic part of the error that a per-frame sigma does
      not claim to cover.

    Parameters
    ----------
    shape : (Ny, Nx) of the grid.
    """

    def __init__(self, shape):
        self.shape = tuple(shape)
        self.node_n = np.zeros(self.shape, np.int64)
        self.node_sum = np.zeros(self.shape)
        self.node_sq = np.zeros(self.shape)
        self.node_s2 = np.zeros(self.shape)
        self.hist = np.zeros(_HIST_BINS, np.int64)

    def add(self, errors, sigma):
        """One frame's errors and predicted 1-sigma, (Ny, Nx) mm (NaN ignored)."""
        e = np.asarray(errors, np.float64)
        sg = np.asarray(sigma, np.float64)
        ok = np.isfinite(e) & np.isfinite(sg) & (sg > 0)
        if not ok.any():
            return
        self.node_n += ok
        z = np.where(ok, e, 0.0)
        self.node_sum += z
        self.node_sq += z * z
        self.node_s2 += np.where(ok, sg * sg, 0.0)
        self.hist += _log_hist(np.abs(e[ok]) / sg[ok])

    def result(self) -> dict:
        out = {"random_to_sigma": None, "error_to_sigma_median": None, "sigma_rms_mm": None}
        if self.hist.sum() == 0:
            return out
        out["error_to_sigma_median"] = _hist_percentile(self.hist, 50.0) * _MAD_TO_SIGMA
        many = self.node_n >= 2
        if many.any():
            n = self.node_n[many]
            m = self.node_sum[many] / n
            ss = np.maximum(self.node_sq[many] - n * m * m, 0.0)  # sum of squared deviations from the node mean
            s2 = self.node_s2[many] / n
            # Pooled: sum (n-1) var over sum (n-1) sigma^2, so few frames per node bias nothing.
            out["random_to_sigma"] = float(np.sqrt(ss.sum() / np.sum((n - 1) * s2)))
            out["sigma_rms_mm"] = float(np.sqrt(np.sum(n * s2) / n.sum()))
        return out


def _log_hist(a):
    """Counts of magnitudes ``a`` (>= 0) in the logarithmic bins; bin 0 holds everything below 1e-9."""
    with np.errstate(divide="ignore"):
        la = np.log(np.maximum(a, 1e-300))
    idx = np.clip(np.floor((la - _LOG_LO) / _LOG_STEP).astype(np.int64) + 1, 0, _HIST_BINS - 1)
    return np.bincount(idx, minlength=_HIST_BINS)


def _hist_percentile(hist, q):
    """The q-th percentile (0..100) of the magnitudes counted in ``hist`` (geometric bin centre)."""
    c = np.cumsum(hist)
    k = int(np.searchsorted(c, q / 100.0 * c[-1]))
    if k == 0:
        return 0.0
    return math.exp(_LOG_LO + (k - 0.5) * _LOG_STEP)


# ---------------------------------------------------------- the plane wave


def split_plane_wave(surface):
    """Split a truth surface into its one plane wave and the rest.

    Parameters
    ----------
    surface : a surface from :func:`surfrec.synth.surfaces.surface_from_dict`.

    Returns
    -------
    (wave, rest) : the :class:`~surfrec.synth.surfaces.PlaneWave` part (or
        None when the surface holds no single plane wave) and a surface of
        the remaining parts (None when nothing remains).
    """
    from surfrec.synth.surfaces import PlaneWave, Superposition

    parts = list(surface.parts) if isinstance(surface, Superposition) else [surface]
    waves = [p for p in parts if isinstance(p, PlaneWave)]
    if len(waves) != 1:
        return None, surface
    rest = [p for p in parts if p is not waves[0]]
    return waves[0], (Superposition(*rest) if rest else None)


def plane_wave_amplitude(x, y, height, *, wavevector, omega: float, time_s: float = 0.0,
                         fit_offset: bool = True) -> dict:
    """Amplitude and phase of a plane wave of known wavenumber vector and frequency, by least squares.

    Fits ``height = a cos(phi) + b sin(phi) [+ c]`` with
    ``phi = kx x + ky y - omega t`` (so ``A cos(phi + phase)`` has
    ``A = hypot(a, b)`` and ``phase = atan2(-b, a)``), a linear problem.

    Parameters
    ----------
    x, y : arrays of the same shape as ``height``, tank mm.
    height : array, mm, with the known non-wave part already removed; NaN ignored.
    wavevector : (kx, ky), rad/mm.
    omega : angular frequency, rad/s.
    time_s : the frame's time, s.
    fit_offset : also fit a constant c (it takes up a residual datum offset).

    Returns
    -------
    dict: amplitude_mm, phase_deg (degrees, at the tank origin, t = time_s
    included in phi), a_mm, b_mm, offset_mm (0 when not fitted),
    residual_rms_mm, n (points used). amplitude None with fewer points than
    unknowns.
    """
    x, y, h = (np.asarray(v, np.float64).ravel() for v in np.broadcast_arrays(x, y, height))
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(h)
    kx, ky = (float(k) for k in wavevector)
    ncol = 3 if fit_offset else 2
    n = int(ok.sum())
    if n < ncol + 1:
        return {"amplitude_mm": None, "phase_deg": None, "a_mm": None, "b_mm": None, "offset_mm": None,
                "residual_rms_mm": None, "n": n}
    phi = kx * x[ok] + ky * y[ok] - float(omega) * float(time_s)
    cols = [np.cos(phi), np.sin(phi)] + ([np.ones(n)] if fit_offset else [])
    design = np.column_stack(cols)
    coef, *_ = np.linalg.lstsq(design, h[ok], rcond=None)
    resid = h[ok] - design @ coef
    a, b = float(coef[0]), float(coef[1])
    return {"amplitude_mm": math.hypot(a, b), "phase_deg": math.degrees(math.atan2(-b, a)), "a_mm": a, "b_mm": b,
            "offset_mm": float(coef[2]) if fit_offset else 0.0,
            "residual_rms_mm": float(np.sqrt(np.mean(resid * resid))), "n": n}


# -------------------------------------------------------- the comparison


@dataclass
class _Frame:
    index: int
    time_s: float
    stats: dict = field(default_factory=dict)


class TruthComparison:
    """Compare height frames with a synthetic session's exact surface, in both ways.

    Feed frames with :meth:`add` (one at a time, so a long run never sits in
    memory) and read the summary with :meth:`result`.

    Parameters
    ----------
    x (Nx,), y (Ny,) : datum-frame mm of the file's grid.
    surface : the exact surface (tank frame), ``height(x, y, t)`` mm.
    world_to_left_camera : (4, 4) or (16,), the file's datum frame -> left camera.
    left_camera, right_camera : the true cameras (:class:`surfrec.synth.cameras.Camera`).
    origin, rotate_deg : the file's datum ``--origin`` (mm) and ``--rotate`` (deg),
        applied to the true datum frame too.
    post : truth.h5 ``post`` dict or None (for the visibility test).
    margin_px : see :func:`visible_in_both`.
    step_time_s : time of a known amplitude step on the truth's clock, s, or None.
    """

    GEOMETRIES = ("true_geometry", "true_datum_frame")

    def __init__(self, x, y, surface, world_to_left_camera, left_camera, right_camera, *, origin=(0.0, 0.0),
                 rotate_deg: float = 0.0, post=None, margin_px: float = 0.0, step_time_s: float | None = None):
        self.x = np.asarray(x, np.float64)
        self.y = np.asarray(y, np.float64)
        self.surface = surface
        self.left, self.right = left_camera, right_camera
        self.post = post
        self.margin_px = float(margin_px)
        self.matrices = {"true_geometry": np.asarray(world_to_left_camera, np.float64).reshape(4, 4),
                         "true_datum_frame": true_datum_frame(left_camera.rotation, left_camera.translation,
                                                              origin=origin, rotate_deg=rotate_deg)}
        shape = (self.y.size, self.x.size)
        self.acc = {g: ErrorAccumulator(shape) for g in self.GEOMETRIES}
        self.wave, self.rest = split_plane_wave(surface)
        self.step_time_s = step_time_s
        if self.step_time_s is None and self.wave is not None and self.wave.step_time_s is not None:
            self.step_time_s = self.wave.step_time_s
        self.frames: list[_Frame] = []
        self.uncertainty = UncertaintyCheck(shape)
        self.n_seen = 0
        self.n_valid_seen = 0
        self.n_valid_unseen = 0

    def add(self, height, time_s: float, index: int | None = None, sigma=None):
        """Compare one frame.

        Parameters
        ----------
        height : (Ny, Nx) datum-frame mm, NaN where invalid.
        time_s : the frame's time on the truth's clock, s.
        index : the frame's index in the file (for the report; default: running count).
        sigma : (Ny, Nx) mm or None, the file's height_uncertainty (checked
            against the errors in the true datum frame, :class:`UncertaintyCheck`).
        """
        h = np.asarray(height, np.float64)
        fr = _Frame(len(self.frames) if index is None else int(index), float(time_s))
        valid = np.isfinite(h)
        pose = (self.left.rotation, self.left.translation)
        for g in self.GEOMETRIES:
            err, pos = height_errors(self.x, self.y, h, time_s=time_s, surface=self.surface,
                                     world_to_left_camera=self.matrices[g], camera_rotation=pose[0],
                                     camera_translation=pose[1])
            if g == "true_datum_frame":
                # Coverage is judged where the node truly is: its nominal (x, y) in
                # the true datum frame, on the exact surface.
                seen = self._seen_nominal(time_s)
                fr.stats["seen"] = int(seen.sum())
                fr.stats["valid_seen"] = int((valid & seen).sum())
                fr.stats["valid_outside_seen"] = int((valid & ~seen).sum())
                fr.stats["coverage"] = fr.stats["valid_seen"] / fr.stats["seen"] if fr.stats["seen"] else None
                self.n_seen += fr.stats["seen"]
                self.n_valid_seen += fr.stats["valid_seen"]
                self.n_valid_unseen += fr.stats["valid_outside_seen"]
            self.acc[g].add(err)
            if g == "true_datum_frame" and sigma is not None:
                self.uncertainty.add(err, sigma)
            st = error_statistics(err)
            fr.stats[g] = {k: st[k] for k in ("n", "rms_mm", "bias_mm", "p95_abs_mm")}
            if g == "true_geometry" and self.wave is not None:
                fr.stats["wave"] = self._amplitude(h, pos, time_s)
        self.frames.append(fr)

    def _seen_nominal(self, time_s):
        m = self.matrices["true_datum_frame"]
        flat = tank_positions(self.x, self.y, np.zeros((self.y.size, self.x.size)), m, self.left.rotation,
                              self.left.translation)
        flat[..., 2] = self.surface.height(flat[..., 0], flat[..., 1], float(time_s))
        return visible_in_both(flat, self.left, self.right, margin_px=self.margin_px, post=self.post)

    def _amplitude(self, h, pos, time_s):
        wave = self.wave
        z = pos[..., 2].copy()
        ok = np.isfinite(z)
        if self.rest is not None and ok.any():
            z[ok] -= self.rest.height(pos[..., 0][ok], pos[..., 1][ok], float(time_s))
        phi = math.radians(wave.direction_deg)
        fit = plane_wave_amplitude(pos[..., 0], pos[..., 1], z,
                                   wavevector=(wave.wavenumber * math.cos(phi), wave.wavenumber * math.sin(phi)),
                                   omega=wave.omega, time_s=time_s)
        true = wave.amplitude_at(time_s)
        fit["true_amplitude_mm"] = true
        fit["ratio_to_true"] = fit["amplitude_mm"] / true if fit["amplitude_mm"] is not None and true else None
        return fit

    def result(self) -> dict:
        """Summary: pooled statistics per geometry, coverage, per-frame table and the amplitude step.

        Returns
        -------
        dict with "true_geometry" and "true_datum_frame" (error statistics,
        mm), "coverage" (valid nodes the cameras truly see / nodes they see,
        over all frames), "valid_outside_seen" (nodes with a value where the
        cameras cannot see: extrapolation), "frames" (per-frame rows), and
        "plane_wave" (amplitudes, the step ratio) when the truth has one.
        """
        out = {g: self.acc[g].result() for g in self.GEOMETRIES}
        out["uncertainty"] = self.uncertainty.result()
        out["coverage"] = self.n_valid_seen / self.n_seen if self.n_seen else None
        out["seen_nodes"] = int(self.n_seen)
        out["valid_outside_seen"] = int(self.n_valid_unseen)
        out["margin_px"] = self.margin_px
        rows = []
        for fr in self.frames:
            row = {"frame": fr.index, "time_s": fr.time_s, "coverage": fr.stats["coverage"]}
            for g in self.GEOMETRIES:
                row[f"{g}_rms_mm"] = fr.stats[g]["rms_mm"]
                row[f"{g}_bias_mm"] = fr.stats[g]["bias_mm"]
            if "wave" in fr.stats:
                w = fr.stats["wave"]
                row.update(amplitude_mm=w["amplitude_mm"], true_amplitude_mm=w["true_amplitude_mm"],
                           amplitude_ratio=w["ratio_to_true"], phase_deg=w["phase_deg"],
                           fit_residual_rms_mm=w["residual_rms_mm"])
            rows.append(row)
        out["per_frame"] = rows
        if self.wave is not None:
            out["plane_wave"] = self._wave_summary(rows)
        return out

    def _wave_summary(self, rows):
        w = self.wave
        amps = [r.get("amplitude_mm") for r in rows]
        summary = {"wavenumber_rad_mm": w.wavenumber, "direction_deg": w.direction_deg,
                   "frequency_hz": w.frequency_hz, "wavelength_mm": 2 * math.pi / w.wavenumber,
                   "amplitudes_mm": amps, "step_time_s": self.step_time_s}
        if self.step_time_s is not None:
            before = [a for r, a in zip(rows, amps) if a is not None and r["time_s"] < self.step_time_s]
            after = [a for r, a in zip(rows, amps) if a is not None and r["time_s"] >= self.step_time_s]
            summary["frames_before_step"] = len(before)
            summary["frames_after_step"] = len(after)
            summary["mean_before_mm"] = float(np.mean(before)) if before else None
            summary["mean_after_mm"] = float(np.mean(after)) if after else None
            summary["step_ratio"] = (summary["mean_after_mm"] / summary["mean_before_mm"]
                                     if before and after else None)
            summary["true_step_ratio"] = w.step_factor
        return summary


# --------------------------------------------------------- the noise floor


def _difference_scale(order: int) -> float:
    # Var of the n-th difference of white noise: sum_k C(n, k)^2 sigma^2 = C(2n, n) sigma^2.
    return math.sqrt(math.comb(2 * order, order))


def _scaled_differences(height, order: int, lag: int) -> np.ndarray:
    h = np.asarray(height, np.float64)
    d = h
    for _ in range(order):
        d = d[lag:] - d[:-lag]
    return d / _difference_scale(order)


class HighPassNoise:
    """Streamed :func:`noise_floor_from_data`: feed consecutive blocks of frames with :meth:`add`.

    Parameters
    ----------
    orders : difference orders to evaluate (the first is the reported one).
    lag : frames between the samples that are differenced.
    """

    def __init__(self, orders=(3, 2, 4), lag: int = 1):
        self.orders = tuple(int(o) for o in orders)
        if not self.orders or min(self.orders) < 1:
            raise ValueError("difference orders must be 1 or more")
        self.lag = int(lag)
        if self.lag < 1:
            raise ValueError("lag must be 1 or more frames")
        self.keep = max(self.orders) * self.lag
        self.tail = None
        self.hist = {o: np.zeros(_HIST_BINS, np.int64) for o in self.orders}
        self.count = {o: 0 for o in self.orders}
        self.frames = 0

    def add(self, block):
        """Add the next frames, (T', Ny, Nx) mm, in time order."""
        b = np.asarray(block, np.float64)
        if b.ndim != 3:
            raise ValueError("blocks must be (frames, Ny, Nx)")
        self.frames += b.shape[0]
        # Overlap with the previous block so no difference straddling the seam is lost.
        # Each order only counts differences that end in the new frames.
        work = b if self.tail is None else np.concatenate([self.tail, b])
        new = b.shape[0]
        for o in self.orders:
            d = _scaled_differences(work, o, self.lag)
            d = d[-new:] if d.shape[0] > new else d
            a = np.abs(d[np.isfinite(d)])
            if a.size:
                self.hist[o] += _log_hist(a)
                self.count[o] += a.size
        self.tail = work[-self.keep:] if work.shape[0] > self.keep else work

    def result(self) -> dict:
        """The estimate (see :func:`noise_floor_from_data` for the keys)."""
        by_order = {}
        for o in self.orders:
            by_order[o] = _MAD_TO_SIGMA * _hist_median(self.hist[o]) if self.count[o] else None
        main = by_order[self.orders[0]]
        others = [v for o, v in by_order.items() if o != self.orders[0] and v]
        spread = max(abs(v / main - 1.0) for v in others) if main and others else None
        return {"sigma_mm": main, "order": self.orders[0], "lag": self.lag, "frames": self.frames,
                "samples": self.count[self.orders[0]],
                "sigma_by_order_mm": {str(o): v for o, v in by_order.items()},
                "order_spread": spread,
                "consistent": None if spread is None else bool(spread <= CONSISTENCY_TOLERANCE)}


# Relative spread between the orders' estimates beyond which the high-pass is
# judged to leak resolved motion (or the noise to be correlated in time); for
# white noise the orders agree to within the sampling error, a few per cent
# with thousands of samples.
CONSISTENCY_TOLERANCE = 0.15


def _hist_median(hist):
    return _hist_percentile(hist, 50.0)


def noise_floor_from_data(height, *, order: int = 3, lag: int = 1, check_orders=(2, 4)) -> dict:
    """Random height noise of one sample, estimated from the data alone.

    Estimator: for each node, the ``order``-th difference in time at ``lag``
    frames, ``D = sum_k (-1)^k C(n, k) h(t + k lag)``, is a high-pass filter:
    a resolved wave of angular frequency omega sampled every dt is scaled by
    ``(2 sin(omega lag dt / 2))^n``, tiny when the wave is well sampled
    (5 Hz at 500 frames/s: 2.5e-4 for n = 3), while white noise of standard
    deviation sigma gives ``Var D = C(2n, n) sigma^2``. So
    ``sigma = 1.4826 median(|D|) / sqrt(C(2n, n))`` over every node and
    frame: the median keeps the estimate immune to the few differences that
    straddle a real jump or an outlier, and 1.4826 makes it consistent for
    Gaussian noise. The same estimate at other orders (``check_orders``)
    tells whether it can be trusted: they agree for white noise, and drift
    apart when the high-pass leaks the motion (waves sampled at few frames
    per period) or the noise is correlated in time.

    Frames from a spatio-temporal match window of N frames share input
    frames, and their noise is correlated: use ``lag = N``.

    Parameters
    ----------
    height : (T, Ny, Nx) mm, NaN where invalid (differences touching a NaN are dropped).
    order : difference order n, 1 or more (3 by default).
    lag : frames between differenced samples.
    check_orders : further orders evaluated for the consistency check.

    Returns
    -------
    dict: sigma_mm (None with too few frames), order, lag, frames, samples,
    sigma_by_order_mm ({order: mm}), order_spread (largest relative
    difference from the main estimate), consistent (bool or None).
    """
    acc = HighPassNoise(orders=(order, *[o for o in check_orders if o != order]), lag=lag)
    acc.add(height)
    return acc.result()
