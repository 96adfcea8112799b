"""The systematic part of the height uncertainty, as a figure users can quote beside the random 1-sigma.

Random part (per node and frame, in heights.h5): the matcher's disparity
1-sigma propagated along the left camera's ray, sigma_h = |dh/dd| sigma_d.

Systematic part (one figure per file), from two sources:

* what the still-water correction leaves. Calibration errors bend a flat
  surface into a smooth shape that is the same on every frame; the datum
  measures it on still water and the heights stage subtracts it. What is
  left is the part of the still-water residual the smooth shape does not
  hold (``rough_rms_mm`` of the datum, an upper bound: it also holds the
  still frames' averaged noise). Without the correction the whole bend is
  left (``residual_rms_mm`` as well).
* a height-scale error. The correction is exact at the still-water level
  only; away from it, errors of the focal length, the baseline and the
  rectified principal points scale heights by a relative error epsilon.
  From the calibration's 1-sigma parameters (rig.json
  ``calibration.uncertainty``): depth Z = f B / (d - c) along a ray, so
  epsilon^2 = (sigma_f / f)^2 + (sigma_B / B)^2 + (sigma_c / (d - c))^2,
  with sigma_c the two principal points' x uncertainties combined. Heights
  relative to the datum inherit it: the error at height h is epsilon |h|.

The total quoted is the root sum of squares at |h| = the 95th percentile of
the measured |h|.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["height_scale_uncertainty", "systematic_height_error"]


def height_scale_uncertainty(focal_px: float, baseline_mm: float, disparity_core_px: float,
                             uncertainty: dict | None) -> float:
    """Relative height-scale error epsilon of a calibration (dimensionless), or NaN when unknown.

    Parameters
    ----------
    focal_px : focal length of the rectified views, px.
    baseline_mm : distance between the camera centres, mm.
    disparity_core_px : typical d - (cx1 - cx2) of the measured points, px
        (f B / Z).
    uncertainty : rig.json ``calibration.uncertainty`` (``left`` / ``right``
        with ``fx``, ``cx`` px; ``translation_mm`` (3,)), or None.

    Returns
    -------
    float
    """
    if not uncertainty:
        return float("nan")
    try:
        left, right = uncertainty["left"], uncertainty["right"]
        sf = 0.5 * math.hypot(float(left["fx"]), float(right["fx"]))
        sc = math.hypot(float(left["cx"]), float(right["cx"]))
        sb = float(np.linalg.norm(np.asarray(uncertainty["translation_mm"], np.float64)))
    except (KeyError, TypeError, ValueError):
        return float("nan")
    return math.sqrt((sf / focal_px) ** 2 + (sb / baseline_mm) ** 2 + (sc / disparity_core_px) ** 2)


def systematic_height_error(*, still_correction: bool, rough_rms_mm: float, residual_rms_mm: float,
                            scale_relative: float, abs_height_mm: float) -> dict:
    """The systematic height error estimate and its parts, mm.

    Parameters
    ----------
    still_correction : whether the still-water residual was subtracted.
    rough_rms_mm : the datum's still residual not held by its smooth shape, mm.
    residual_rms_mm : RMS of the datum's smooth still-water shape, mm.
    scale_relative : epsilon of :func:`height_scale_uncertainty` (NaN: unknown, counted as 0).
    abs_height_mm : |h| at which the scale part is quoted, mm.

    Returns
    -------
    dict with ``height_systematic_mm`` (total), ``systematic_still_mm``,
    ``systematic_scale_mm``, ``systematic_scale_relative`` and
    ``systematic_at_height_mm``.
    """
    rough = float(rough_rms_mm) if np.isfinite(rough_rms_mm) else 0.0
    bend = float(residual_rms_mm) if np.isfinite(residual_rms_mm) else 0.0
    still = rough if still_correction else math.hypot(rough, bend)
    eps = float(scale_relative) if np.isfinite(scale_relative) else 0.0
    scale = eps * abs(float(abs_height_mm)) if np.isfinite(abs_height_mm) else 0.0
    return {"height_systematic_mm": math.hypot(still, scale), "systematic_still_mm": still,
            "systematic_scale_mm": scale, "systematic_scale_relative": float(scale_relative),
            "systematic_at_height_mm": float(abs_height_mm)}
