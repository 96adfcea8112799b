"""Invented laboratory sessions with exact ground truth.

Public API (all lengths mm, times s, pixels px; world/tank frame with z up
and the still water at z = 0):

* :func:`build_scenario` — a named scenario ("waves", "scatter", "plane", "ripples",
  "moved") as plain data: rigs, lighting, sensor, frame groups;
* :func:`render_session` — render every frame pair of a scenario into a sink;
* :class:`Camera`, :class:`Projector`, :func:`look_at`, :func:`stereo_from_cameras`
  — the camera model (pinhole with Brown–Conrady distortion, OpenCV's convention);
* :mod:`surfrec.synth.surfaces` — still water, plane capillary–gravity waves,
  ripples, a depression, the MacCamy–Fuchs scattered field;
* :mod:`surfrec.synth.render` — the renderer (ray casting, radiometry, sensor);
* :class:`CameraEffects`, :data:`EFFECTS` — the switchable camera effects
  (:mod:`surfrec.synth.effects`: vignetting, hotspot, defocus, dust, defects,
  glints, noise, bit depth, motion blur).

Writing a session to disk is :func:`surfrec.io.sessionfolder.write_session`.
"""

from surfrec.synth.cameras import Camera, Projector, look_at, stereo_from_cameras
from surfrec.synth.effects import EFFECTS, CameraEffects
from surfrec.synth.scenarios import SCENARIOS, build_scenario
from surfrec.synth.session import frame_count, render_session, truth_records, truth_surface_grids

__all__ = ["EFFECTS", "SCENARIOS", "Camera", "CameraEffects", "Projector", "build_scenario", "frame_count", "look_at", "render_session",
           "stereo_from_cameras", "truth_records", "truth_surface_grids"]
