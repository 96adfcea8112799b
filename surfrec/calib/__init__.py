"""Stereo rig calibration: target detection, intrinsics and stereo pose, rectification, drift check."""

from surfrec.calib.calibrate import RigCalibration, calibrate_rig, coverage, outlier_views, pose_change, repose_rig
from surfrec.calib.rectify import rectification_maps, rectify
from surfrec.calib.targets import Board, Detection, find_target, parse_board_size, repair_defects

__all__ = ["Board", "Detection", "RigCalibration", "calibrate_rig", "coverage", "find_target", "outlier_views",
           "parse_board_size", "pose_change", "rectification_maps", "rectify", "repair_defects", "repose_rig"]
