"""Triangulation, the datum frame, and resampling onto the world grid.

* :mod:`surfrec.geometry.triangulate` — rectified (u, v, d) to left-camera mm and back
  (:func:`triangulate`, :func:`project_rectified`, :func:`height_sensitivity`);
* :mod:`surfrec.geometry.plane` — robust plane fit and smooth polynomial surfaces
  (:func:`robust_plane`, :func:`fit_plane`, :func:`fit_polynomial_surface`);
* :mod:`surfrec.geometry.datum` — the still-water datum: :class:`Datum`, :func:`datum_frame`,
  :func:`fit_still_water`, :func:`plane_disparity`;
* :mod:`surfrec.geometry.resample` — heights on a regular datum-frame grid: :class:`HeightResampler`
  (one frame), :func:`plan_grid` (step, extent, footprint, exclusions, still correction);
* :mod:`surfrec.geometry.uncertainty` — the systematic part of the height error.
"""

from surfrec.geometry.datum import Datum, StillWaterFit, datum_frame, fit_still_water, plane_disparity
from surfrec.geometry.plane import PlaneFit, PolynomialSurface, fit_plane, fit_polynomial_surface, robust_plane
from surfrec.geometry.resample import GridPlan, HeightResampler, plan_grid
from surfrec.geometry.triangulate import height_sensitivity, project_rectified, triangulate
from surfrec.geometry.uncertainty import height_scale_uncertainty, systematic_height_error

__all__ = ["Datum", "GridPlan", "HeightResampler", "PlaneFit", "PolynomialSurface", "StillWaterFit", "datum_frame",
           "fit_plane", "fit_polynomial_surface", "fit_still_water", "height_scale_uncertainty",
           "height_sensitivity", "plan_grid", "plane_disparity", "project_rectified", "robust_plane",
           "systematic_height_error", "triangulate"]
