"""Linear water-wave theory used by the synthetic renderer and the analysis.

* :mod:`surfrec.waves.water` -- handbook properties of clean water at 20 C.
* :mod:`surfrec.waves.dispersion` -- capillary-gravity dispersion relation
  (Lamb, *Hydrodynamics*; Lighthill, *Waves in Fluids*).
* :mod:`surfrec.waves.scattering` -- diffraction of a plane wave by a vertical
  cylinder (MacCamy & Fuchs 1954).

Units: mm, s, Hz, rad/mm; g in m/s^2, sigma in N/m, rho in kg/m^3.
"""

from surfrec.waves.dispersion import (
    angular_frequency,
    group_speed,
    minimum_phase_speed,
    phase_speed,
    wavenumber,
)
from surfrec.waves.scattering import (
    maccamy_fuchs_amplitude,
    mode_coefficients,
    reflection_coefficients,
)
from surfrec.waves.water import DENSITY, STANDARD_GRAVITY, SURFACE_TENSION, TEMPERATURE_C

__all__ = [
    "DENSITY",
    "STANDARD_GRAVITY",
    "SURFACE_TENSION",
    "TEMPERATURE_C",
    "angular_frequency",
    "group_speed",
    "maccamy_fuchs_amplitude",
    "minimum_phase_speed",
    "mode_coefficients",
    "phase_speed",
    "reflection_coefficients",
    "wavenumber",
]
