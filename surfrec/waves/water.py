"""Handbook properties of clean (uncontaminated) fresh water at 20 C.

All values are module constants in SI units, which is how the dispersion
relation takes them (:mod:`surfrec.waves.dispersion` converts to the
package's millimetre lengths internally).

Sources
-------
* Density: the CRC Handbook of Chemistry and Physics table "Properties of
  water in the range 0-100 C" lists 998.21 kg/m^3 at 20 C (from memory; the
  same figure follows from Kell's 1975 density equation, J. Chem. Eng. Data
  20, 97). Rounded here to 998.2 kg/m^3.
* Surface tension against air: Vargaftik, Volkov & Voljak (1983), J. Phys.
  Chem. Ref. Data 12, 817, and the IAPWS release on the surface tension of
  ordinary water built on it, give about 72.75 mN/m at 20 C (from memory).
  Real laboratory water is often a few mN/m lower once surfactants collect
  on the surface. The dispersion relation takes the value as an argument so
  a measured one can be passed instead.
* Standard gravity: 9.80665 m/s^2 exactly, by definition (3rd CGPM, 1901).
  Local gravity differs from it by up to about 0.3 %.
"""

#: Temperature the constants below refer to, degrees Celsius.
TEMPERATURE_C: float = 20.0

#: Density of water at 20 C, kg/m^3 (CRC Handbook; Kell 1975; from memory).
DENSITY: float = 998.2

#: Surface tension of clean water against air at 20 C, N/m
#: (Vargaftik, Volkov & Voljak 1983 / IAPWS; from memory).
SURFACE_TENSION: float = 0.07275

#: Standard acceleration of gravity, m/s^2 (exact by definition, 3rd CGPM 1901).
STANDARD_GRAVITY: float = 9.80665

__all__ = ["TEMPERATURE_C", "DENSITY", "SURFACE_TENSION", "STANDARD_GRAVITY"]
