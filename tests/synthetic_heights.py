"""Test helper: heights.h5 files made from a synthetic session's exact surface (not a test module).

The heights are computed from the truth surface on a grid of a chosen datum
frame (:func:`surfrec.analysis.assess.exact_heights`) and written through
the heights.h5 writer, so tests of ``assess``, ``preview`` and ``inspect``
run on files with exactly known content.
"""

import numpy as np

from surfrec.analysis.assess import exact_heights, true_datum_frame
from surfrec.io.heightsfile import write_heights
from surfrec.io.truthfile import read_truth
from surfrec.synth.cameras import Camera
from surfrec.synth.surfaces import surface_from_dict

# A grid well inside the area both quick-session cameras see (their common
# footprint reaches about x -179..177 mm, y -136..136 mm at the still water).
X = np.arange(-120.0, 120.0 + 1e-9, 2.5)
Y = np.arange(-90.0, 90.0 + 1e-9, 2.5)


def truth_parts(truth_path, group="waves"):
    """(left camera, right camera, surface, times (T,) s) of a synthetic session."""
    t = read_truth(truth_path)
    g = t["groups"][group]
    rig = t["rigs"][g["rig"]]
    return (Camera.from_dict(rig["left"]), Camera.from_dict(rig["right"]), surface_from_dict(g["surface"]),
            np.asarray(g["time"], np.float64))


def write_exact_heights(truth_path, out, *, noise_mm=0.0, bias_mm=0.0, sigma_mm=None, seed=0, lift_mm=0.0,
                        frames=None, x=X, y=Y, flags=None, blank=None, attrs=None):
    """Write heights.h5 from the exact surface, optionally with known errors.

    Parameters
    ----------
    truth_path : truth.h5 of a synthetic session.
    out : output file.
    noise_mm : standard deviation of white Gaussian noise added to every node, mm.
    bias_mm : constant added to every height, mm.
    sigma_mm : the height_uncertainty written (default: noise_mm, or 0.001 mm).
    seed : numpy seed of the noise.
    lift_mm : the file's datum frame sits this far above the true still water
        (its world_to_left_camera moves the origin by lift_mm along z), with
        heights exact in that frame: the true geometry sees no error, the
        true datum frame a bias of -lift_mm.
    frames : indices of the truth frames to write (default all).
    flags : (T,) frame flags, or None.
    blank : (Ny, Nx) bool of nodes set to NaN in every frame, or None.
    attrs : further root attributes (as ``surfrec heights`` writes them).

    Returns
    -------
    dict: x, y, time (s, from the first written frame), height (T, Ny, Nx) as
    written (before float32), matrix (4, 4) world_to_left_camera.
    """
    left, _, surface, times = truth_parts(truth_path)
    idx = np.arange(times.size) if frames is None else np.asarray(frames)
    m = true_datum_frame(left.rotation, left.translation)
    if lift_mm:
        shift = np.eye(4)
        shift[2, 3] = lift_mm
        m = m @ shift
    h = exact_heights(x, y, times[idx], surface, m, left.rotation, left.translation)
    rng = np.random.default_rng(seed)
    h = h + bias_mm + noise_mm * rng.standard_normal(h.shape)
    if blank is not None:
        h[:, blank] = np.nan
    sig = np.full(h.shape, sigma_mm if sigma_mm is not None else (noise_mm or 0.001))
    t = times[idx] - times[idx[0]]
    write_heights(out, x, y, t, h, sig, flags,
                  {"world_to_left_camera": m.ravel(), "history": "test fixture", **(attrs or {})})
    return {"x": x, "y": y, "time": t, "height": h, "matrix": m}
