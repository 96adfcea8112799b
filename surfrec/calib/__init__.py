"""Stereo rig calibration: target detection, intrinsics and stereo pose, rectification, drift check."""
