"""Wave analysis of height time series: accuracy against truth and noise floors, point series;
spectra, dispersion and cylindrical modes to come.

* :mod:`surfrec.analysis.assess` — :class:`TruthComparison`, :func:`height_errors`,
  :func:`true_datum_frame`, :func:`exact_heights`, :func:`plane_wave_amplitude`,
  :func:`noise_floor_from_data` (and its streamed form :class:`HighPassNoise`);
* :mod:`surfrec.analysis.series` — :func:`point_weights`, :func:`sample_point`.
"""

from surfrec.analysis.assess import (ErrorAccumulator, HighPassNoise, TruthComparison, error_statistics,
                                     exact_heights, height_errors, noise_floor_from_data, plane_wave_amplitude,
                                     split_plane_wave, tank_positions, true_datum_frame, visible_in_both)
from surfrec.analysis.series import point_weights, sample_point

__all__ = ["ErrorAccumulator", "HighPassNoise", "TruthComparison", "error_statistics", "exact_heights",
           "height_errors", "noise_floor_from_data", "plane_wave_amplitude", "point_weights", "sample_point",
           "split_plane_wave", "tank_positions", "true_datum_frame", "visible_in_both"]
