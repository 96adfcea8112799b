"""surfrec: calibrated height fields h(x, y, t) of small water waves from a speckle-lit stereo rig.

The stages are importable for scripting as well as the command line:

* :mod:`surfrec.io` — reading frame sequences (:func:`surfrec.io.open_frames`) and every file kind;
* :mod:`surfrec.synth` — invented laboratory sessions with exact ground truth
  (:func:`surfrec.synth.build_scenario`, :func:`surfrec.synth.render_session`);
* :mod:`surfrec.waves` — water-wave physics (dispersion relation, MacCamy–Fuchs scattering).

Units throughout: millimetres, seconds, pixels; angles in degrees at the interfaces.
"""

import importlib

from surfrec._version import __version__

_SUBPACKAGES = ("io", "synth", "waves", "calib", "match", "geometry", "batch", "analysis", "cli")

__all__ = ["__version__", *_SUBPACKAGES]


def __getattr__(name):
    # Subpackages load on first use so that `import surfrec` stays light.
    if name in _SUBPACKAGES:
        return importlib.import_module(f"surfrec.{name}")
    raise AttributeError(f"module 'surfrec' has no attribute {name!r}")
