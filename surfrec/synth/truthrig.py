"""The true stereo rig of a synthetic session, as a StereoRig (what a perfect calibration would give)."""

from __future__ import annotations

from surfrec.calib.rectify import rectify
from surfrec.io.rigfile import StereoRig
from surfrec.synth.cameras import Camera, stereo_from_cameras


def true_rig(left: Camera, right: Camera, *, alpha: float = 0.0) -> StereoRig:
    """StereoRig of two synthetic cameras, rectified as calibration would do it.

    Parameters
    ----------
    left, right : surfrec.synth.cameras.Camera (world -> camera poses).
    alpha : rectification free scaling (see surfrec.calib.rectify.rectify).
    """
    r, t = stereo_from_cameras(left, right)
    rect = rectify(left.matrix, left.distortion, right.matrix, right.distortion, left.image_size, r, t, alpha=alpha)
    return StereoRig(left.image_size, left.matrix.copy(), left.distortion.copy(), right.matrix.copy(),
                     right.distortion.copy(), r, t, rect, residuals={"rms_px": 0.0, "epipolar_rms_px": 0.0,
                                                                     "views": []},
                     board=None, extra={"note": "true rig of a synthetic session (no calibration)"})


def true_rig_from_truth(truth: dict, rig_name: str = "rig", **kw) -> StereoRig:
    """True rig from a truth dict as read by surfrec.io.truthfile.read_truth."""
    rig = truth["rigs"][rig_name]
    return true_rig(Camera.from_dict(rig["left"]), Camera.from_dict(rig["right"]), **kw)
