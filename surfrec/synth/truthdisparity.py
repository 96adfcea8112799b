"""Exact disparities of a synthetic scene at rectified grid points (the matcher's ground truth).

For each rectified left pixel (u, v): the left camera's ray through it
(undo P1, then R1, then the camera's world pose), its first intersection
with the surface z = h(x, y, t) (the renderer's fixed-point iteration), and
that surface point projected into the right rectified view (R1, then P2,
which OpenCV defines on the left rectified frame): d = u - u_right. Points that the post hides
from either camera, or that the projector cannot light, get NaN.
"""

from __future__ import annotations

import numpy as np

from surfrec.synth.cameras import Camera


def true_disparity(left: Camera, right: Camera, rectification: dict, surface, t: float, u, v, *, post=None,
                   projector_centre=None, tol_mm: float = 1e-9, max_iter: int = 100):
    """Exact disparity (px) at rectified left pixels.

    Parameters
    ----------
    left, right : the true cameras (world -> camera poses, world mm).
    rectification : dict with R1, R2, P1, P2 (as in rig.json).
    surface : an object with height(x, y, t) in world mm.
    u, v : rectified left pixel coordinates (any matching shapes), px.
    post : surfrec.synth.render.Post or None.
    projector_centre : (3,) world mm; with a post, points in its shadow are NaN too.

    Returns
    -------
    d : ndarray like u, px; also the world points (x, y, z) mm.
    """
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    r1, p1 = np.asarray(rectification["R1"]), np.asarray(rectification["P1"])
    p2 = np.asarray(rectification["P2"])
    k1 = p1[:, :3]
    rays_rect = np.stack([(u - k1[0, 2]) / k1[0, 0], (v - k1[1, 2]) / k1[1, 1], np.ones_like(u)], -1)
    rays_cam = rays_rect @ r1          # R1^T applied to row vectors
    rays_world = rays_cam @ left.rotation
    c = left.centre
    sx = rays_world[..., 0] / rays_world[..., 2]
    sy = rays_world[..., 1] / rays_world[..., 2]
    z = np.zeros_like(u)
    for _ in range(max_iter):
        x = c[0] + (z - c[2]) * sx
        y = c[1] + (z - c[2]) * sy
        z_new = surface.height(x, y, t)
        change = np.nanmax(np.abs(z_new - z)) if z.size else 0.0
        z = z_new
        if change < tol_mm:
            break
    x = c[0] + (z - c[2]) * sx
    y = c[1] + (z - c[2]) * sy
    pts = np.stack([x, y, z], -1)
    # P2 projects points given in the LEFT rectified frame into the right rectified view (OpenCV).
    xr = left.to_camera(pts) @ r1.T
    ur = (p2[0, 0] * xr[..., 0] + p2[0, 2] * xr[..., 2] + p2[0, 3]) / xr[..., 2]
    d = u - ur
    if post is not None:
        hidden = post.contains(x, y) | _segment_hits_post(pts, left.centre, post) \
            | _segment_hits_post(pts, right.centre, post)
        if projector_centre is not None:
            hidden |= _segment_hits_post(pts, np.asarray(projector_centre, float), post)
        d = np.where(hidden, np.nan, d)
    return d, (x, y, z)


def _segment_hits_post(pts, centre, post):
    # Same test as the renderer's projector shadow: the segment from the point to `centre` meets the post.
    from surfrec.synth.render import _post_shades

    return _post_shades(pts[..., 0], pts[..., 1], pts[..., 2], centre, post)
