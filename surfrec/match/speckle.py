"""Speckle size of an image, and the correlation window it calls for."""

from __future__ import annotations

import numpy as np


def speckle_size_px(image, *, max_px: int = 40) -> float:
    """Mean speckle size: the full width at half maximum of the image's autocorrelation, px.

    Computed from the power spectrum of the central part of the image
    (Wiener–Khinchin theorem), averaged over the horizontal and vertical cuts.
    """
    a = np.asarray(image, dtype=np.float64)
    h, w = a.shape
    cut = a[h // 4: h - h // 4, w // 4: w - w // 4]
    cut = cut - cut.mean()
    if not np.any(cut):
        return float("nan")
    spec = np.abs(np.fft.fft2(cut)) ** 2
    ac = np.real(np.fft.ifft2(spec))
    ac /= ac[0, 0]
    widths = []
    for profile in (ac[0, :max_px], ac[:max_px, 0]):
        below = np.nonzero(profile < 0.5)[0]
        if below.size == 0:
            continue
        k = below[0]
        # linear interpolation of the half-maximum crossing between samples k-1 and k
        x = k - 1 + (profile[k - 1] - 0.5) / (profile[k - 1] - profile[k])
        widths.append(2.0 * x)
    return float(np.mean(widths)) if widths else float("nan")


def default_window(speckle_px: float) -> int:
    """Odd window side of about 3.5 speckles, between 9 and 41 px.

    A window must hold enough independent speckles (a dozen or more, so
    about 3–4 speckle diameters across — common practice in correlation
    matching) for a sharp, unique ZNCC peak, and no more, since larger
    windows smooth the surface.
    """
    if not np.isfinite(speckle_px):
        return 15
    n = int(round(3.5 * speckle_px))
    n += 1 - n % 2
    return int(min(max(n, 9), 41))
