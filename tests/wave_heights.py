"""Test helper: small heights.h5 files of exactly known wave fields (not a test module)."""

import numpy as np

from surfrec.io.heightsfile import write_heights


def write_field(path, x, y, t, amplitude, frequency, *, noise_mm=0.0, seed=0, attrs=None):
    """heights.h5 of h = Re[amplitude(x, y) exp(-i 2 pi f t)] (+ white noise), NaN where amplitude is NaN.

    A minimal file in the heights.h5 layout: identity world_to_left_camera and no surfrec-only attributes.
    """
    h = np.real(np.asarray(amplitude)[None] * np.exp(-1j * 2 * np.pi * frequency * np.asarray(t))[:, None, None])
    if noise_mm:
        h = h + noise_mm * np.random.default_rng(seed).standard_normal(h.shape)
    sig = np.full(h.shape, max(noise_mm, 1e-3))
    write_heights(path, x, y, t, h, sig, None, {"world_to_left_camera": np.eye(4).ravel(), **(attrs or {})})
    return path
