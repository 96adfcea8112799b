"""Heights of a run, set up once: the shared code path of ``surfrec heights`` and ``surfrec run``.

:func:`prepare_heights` plans the output grid (step, extent, footprint,
exclusions, still-water correction) and builds the resampler;
:func:`heights_of_frame` turns one frame's disparities into heights on that
grid. Each frame is independent of every other, so chunks of a run resample
exactly as the whole run does. Nothing here opens a file.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from surfrec.geometry.resample import HeightResampler, GridPlan, ResampleStats, plan_grid

__all__ = ["HeightsSetup", "FrameHeights", "prepare_heights", "heights_of_frame", "FLAG_FEW_HEIGHTS",
           "FEW_HEIGHTS_FRACTION"]

# The bit heights.h5 uses for a frame whose heights cover too little of the
# footprint (the same value as surfrec.io.heightsfile.FLAG_FEW_HEIGHTS; the
# stage must not import the I/O layer, so the value is repeated and a test
# keeps the two equal).
FLAG_FEW_HEIGHTS = 16
# A frame whose measured nodes cover less than this fraction of the footprint is flagged.
FEW_HEIGHTS_FRACTION = 0.5


@dataclass
class HeightsSetup:
    """The output grid of a run and the resampler onto it.

    Attributes
    ----------
    plan : surfrec.geometry.resample.GridPlan (x, y mm in the datum frame, footprint ...).
    resampler : surfrec.geometry.resample.HeightResampler
    """

    plan: GridPlan
    resampler: HeightResampler

    @property
    def shape(self):
        """(Ny, Nx) of every height frame."""
        return self.plan.footprint.shape


@dataclass
class FrameHeights:
    """One frame's heights: (Ny, Nx) float32 mm (NaN where not measured), flags and statistics.

    coverage : fraction of the footprint's nodes holding a height.
    abs_p95_mm : 95th percentile of |height| over the valid nodes, mm (NaN if none).
    stats : ResampleStats of the frame.
    """

    height: np.ndarray
    uncertainty: np.ndarray
    flags: int
    coverage: float
    abs_p95_mm: float
    stats: ResampleStats


def prepare_heights(grid_u, grid_v, rig, datum, *, step=None, extent=None, circles=(), polygons=(),
                    still_correction: bool = True) -> HeightsSetup:
    """Plan the output grid of a run and build its resampler.

    Parameters
    ----------
    grid_u (Nu,), grid_v (Nv,) : matching grid, rectified left px.
    rig : surfrec.io.rigfile.StereoRig (its rectification R1, P1, Q).
    datum : the still-water datum the disparities were matched with.
    step, extent, circles, polygons, still_correction : see
        :func:`surfrec.geometry.resample.plan_grid` (mm, datum frame).

    Returns
    -------
    HeightsSetup

    Raises
    ------
    ValueError
        With a message for the user (see ``plan_grid``).
    """
    rect = rig.rectification
    plan = plan_grid(grid_u, grid_v, rect["R1"], rect["P1"], datum, step=step, extent=extent, circles=circles,
                     polygons=polygons, still_correction=still_correction)
    resampler = HeightResampler(grid_u, grid_v, rect["Q"], rect["R1"], rect["P1"], datum.world_to_left_camera,
                                plan.x, plan.y, mask=plan.footprint, still=plan.still)
    return HeightsSetup(plan=plan, resampler=resampler)


def heights_of_frame(setup: HeightsSetup, disparity, disparity_sigma, flags: int = 0) -> FrameHeights:
    """Heights of one frame on the setup's grid.

    Parameters
    ----------
    disparity, disparity_sigma : (Nv, Nu) px on the matching grid (NaN invalid).
    flags : the frame's matcher flags; :data:`FLAG_FEW_HEIGHTS` is added when
        the heights cover less than :data:`FEW_HEIGHTS_FRACTION` of the footprint.

    Returns
    -------
    FrameHeights (heights in mm, datum frame; 1-sigma in mm).
    """
    h, s, st = setup.resampler(disparity, disparity_sigma)
    ok = np.isfinite(h)
    coverage = float(ok[setup.plan.footprint].mean())
    flags = int(flags)
    if coverage < FEW_HEIGHTS_FRACTION:
        flags |= FLAG_FEW_HEIGHTS
    p95 = float(np.percentile(np.abs(h[ok]), 95)) if ok.any() else float("nan")
    return FrameHeights(height=np.asarray(h, np.float32), uncertainty=np.asarray(s, np.float32), flags=flags,
                        coverage=coverage, abs_p95_mm=p95, stats=st)
