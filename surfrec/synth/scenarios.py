"""The invented laboratory sessions that ``surfrec synth`` renders.

The setting (our own invention, used throughout the docs): a glass-bottomed
ripple tank 1.2 m long, 0.8 m wide, filled 60 mm deep with water dyed white
so that the surface scatters light diffusely. A wedge paddle at one end
makes 3–5 Hz waves; a 40 mm post can be set in the middle. Two 1.3-megapixel
cameras hang about 0.9 m above the water on a rail, 250 mm apart and verged
on the field centre; a speckle projector between them shows a new random
pattern for every frame.

A scenario is plain data: the rigs, the lighting and sensor, and a list of
frame groups (calibration-target views or speckle frames of a surface). The
renderer and the file writers take it from there.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from surfrec.synth import surfaces as sf
from surfrec.synth.cameras import Camera, Projector, look_at, rotation_about_axis
from surfrec.synth.render import Lighting, Post, SensorModel
from surfrec.waves import water

SCENARIOS = ("waves", "scatter", "plane", "ripples", "moved")

TANK = {"length_mm": 1200.0, "width_mm": 800.0, "depth_mm": 60.0}


@dataclass
class Rig:
    """Two cameras and the projector between them (world frame, mm)."""

    left: Camera
    right: Camera
    projector: Projector

    def to_dict(self):
        return {"left": self.left.to_dict(), "right": self.right.to_dict(), "projector": self.projector.to_dict()}


@dataclass
class BoardView:
    """One pose of the calibration target (board -> world)."""

    rotation: np.ndarray
    origin: np.ndarray
    aimed_at: str  # "both", "left-corner", "right-corner"


@dataclass
class FrameGroup:
    """A folder of frame pairs: target views or speckle frames of a surface."""

    name: str          # folder name in the session, e.g. "target", "still", "waves"
    kind: str          # "board" or "speckle"
    rig: str           # key into Scenario.rigs
    views: list = field(default_factory=list)      # BoardView, for kind "board"
    surface: object = None                          # for kind "speckle"
    times: np.ndarray | None = None                 # s, for kind "speckle"
    fps: float | None = None
    group_id: int = 0  # feeds the random streams so each group gets its own


@dataclass
class Scenario:
    name: str
    description: str
    seed: int
    quick: bool
    rigs: dict
    sensor: SensorModel
    lighting: Lighting
    board: dict
    groups: list
    post: Post | None = None
    speckle_grain_px: float = 4.0
    projector_grain_px: float = 4.0
    water: dict = field(default_factory=dict)
    notes: dict = field(default_factory=dict)
    effects: object = None  # surfrec.synth.effects.CameraEffects, or None: the clean render

    def group(self, name: str) -> FrameGroup:
        for g in self.groups:
            if g.name == name:
                return g
        raise KeyError(name)


# --------------------------------------------------------------------------- rig

def _cameras(scale: float):
    """The default rig: cameras 250 mm apart, 900 mm above the water, verged."""
    w, h = (1280, 1024) if scale == 1.0 else (512, 384)
    f = 3200.0 * w / 1280.0
    # Slightly different lenses, as two real copies of one lens model are.
    kl = np.array([[f * 1.0000, 0.0, w / 2 - 0.5 + 6.3 * w / 1280], [0.0, f * 1.0004, h / 2 - 0.5 - 4.1 * w / 1280], [0, 0, 1]])
    kr = np.array([[f * 1.0031, 0.0, w / 2 - 0.5 - 3.7 * w / 1280], [0.0, f * 1.0029, h / 2 - 0.5 + 5.2 * w / 1280], [0, 0, 1]])
    dl = np.array([-0.118, 0.262, 2.1e-4, -1.3e-4, -0.31])
    dr = np.array([-0.109, 0.231, -1.6e-4, 2.4e-4, -0.22])
    cl = np.array([-125.0, 1.5, 902.0])
    cr = np.array([125.0, -1.0, 898.0])
    aim = np.array([0.0, 0.0, 0.0])
    left = Camera.from_pose(kl, dl, cl, look_at(cl, aim + [2.0, -1.0, 0.0]), (w, h), "left")
    # A small roll of the right camera, as any real mounting has.
    rr = rotation_about_axis([0, 0, 1], 0.35) @ look_at(cr, aim + [-1.5, 1.0, 0.0])
    right = Camera.from_pose(kr, dr, cr, rr, (w, h), "right")
    return left, right


def _projector(scale: float, grain_camera_px: float, camera: Camera):
    pw, ph = (1920, 1200) if scale == 1.0 else (800, 500)
    centre = np.array([0.0, -35.0, 940.0])
    # Cover about 1.4 times the cameras' field so both views are lit everywhere.
    field_mm = 520.0
    fp = pw * centre[2] / field_mm
    kp = np.array([[fp, 0, pw / 2 - 0.5], [0, fp, ph / 2 - 0.5], [0, 0, 1]])
    rot = look_at(centre, [0.0, 0.0, 0.0])
    proj = Projector(kp, rot, -rot @ centre, (pw, ph))
    # Speckle size in projector px so that speckles are grain_camera_px on the camera.
    mm_per_cam_px = camera.centre[2] / camera.matrix[0, 0]
    mm_per_proj_px = centre[2] / fp
    grain_proj = grain_camera_px * mm_per_cam_px / mm_per_proj_px
    return proj, grain_proj


def _moved(camera: Camera, angle_deg: float) -> Camera:
    """The camera turned by angle_deg about its own optical axis (centre fixed)."""
    r = rotation_about_axis([0, 0, 1], angle_deg) @ camera.rotation
    return Camera.from_pose(camera.matrix, camera.distortion, camera.centre, r, camera.image_size, camera.name)


# ----------------------------------------------------------------- board poses

def board_corners_world(view: BoardView, board: dict) -> np.ndarray:
    """World mm of the board's inner corners, OpenCV order (row by row)."""
    sq = board["square_mm"]
    j, i = np.mgrid[0:board["rows"], 0:board["cols"]]
    obj = np.stack([i.ravel() * sq, j.ravel() * sq, np.zeros(i.size)], axis=-1)
    return obj @ np.asarray(view.rotation).T + view.origin


def _board_outline_world(view: BoardView, board: dict) -> np.ndarray:
    sq, m = board["square_mm"], board["margin_mm"]
    x0, x1 = -sq - m, board["cols"] * sq + m
    y0, y1 = -sq - m, board["rows"] * sq + m
    t = np.linspace(0.0, 1.0, 9)
    edge = np.concatenate([
        np.stack([x0 + (x1 - x0) * t, np.full_like(t, y0)], -1),
        np.stack([x0 + (x1 - x0) * t, np.full_like(t, y1)], -1),
        np.stack([np.full_like(t, x0), y0 + (y1 - y0) * t], -1),
        np.stack([np.full_like(t, x1), y0 + (y1 - y0) * t], -1)])
    pts = np.concatenate([edge, np.zeros((len(edge), 1))], -1)
    return pts @ np.asarray(view.rotation).T + view.origin


def board_fully_visible(view: BoardView, board: dict, camera: Camera, border_px: float = 3.0) -> bool:
    """True when the whole board, margin included, lies inside the image."""
    outline = _board_outline_world(view, board)
    if np.min(outline[:, 2]) < 2.0:  # held above the water, never dipped into it
        return False
    uv = camera.project(outline)
    w, h = camera.image_size
    return bool(np.all(np.isfinite(uv)) and np.all(uv[:, 0] > border_px) and np.all(uv[:, 0] < w - 1 - border_px)
                and np.all(uv[:, 1] > border_px) and np.all(uv[:, 1] < h - 1 - border_px))


def _pose(centre, tilt_x, tilt_y, yaw, board) -> BoardView:
    r = (rotation_about_axis([0, 0, 1], yaw) @ rotation_about_axis([1, 0, 0], tilt_x)
         @ rotation_about_axis([0, 1, 0], tilt_y))
    half = np.array([(board["cols"] - 1) / 2 * board["square_mm"], (board["rows"] - 1) / 2 * board["square_mm"], 0.0])
    return BoardView(r, np.asarray(centre, float) - r @ half, "both")


def _corner_pose(cam: Camera, pu: float, pv: float, z: float, tilt, board: dict) -> BoardView:
    """Board pose whose centre is seen at pixel (pu, pv), at height z mm."""
    ray = cam.pixel_rays(np.array([pu]), np.array([pv]))[0]
    c0 = cam.centre + ray * (z - cam.centre[2]) / ray[2]
    return _pose(c0, *tilt, board)


def _board_views(rng, left: Camera, right: Camera, board: dict, n_central: int, n_corner: int):
    views = []
    tries = 0
    while len(views) < n_central:
        tries += 1
        if tries > 5000:
            raise RuntimeError("could not place the central target views")
        c = [rng.uniform(-45, 45), rng.uniform(-35, 35), rng.uniform(20, 140)]
        v = _pose(c, rng.uniform(-32, 32), rng.uniform(-32, 32), rng.uniform(-20, 20), board)
        if board_fully_visible(v, board, left) and board_fully_visible(v, board, right):
            views.append(v)
    # Views that fill each camera's image corners, where the distortion is
    # largest; half of them are wanted outside the other camera's view.
    for cam_name, cam, other in (("left", left, right), ("right", right, left)):
        w, h = cam.image_size
        corners = [(0, 0), (w - 1, 0), (w - 1, h - 1), (0, h - 1)]
        for k in range(n_corner):
            cu, cv = corners[k % 4]
            want_single = k % 2 == 0
            best = None
            for _ in range(60):
                z = rng.uniform(10, 160)
                # Nearly square to the image, so the board's own corner can reach the image corner.
                tilt = (rng.uniform(-15, 15), rng.uniform(-15, 15), rng.uniform(-4, 4))
                # Walk from the image corner toward the centre until the board fits...
                pix = None
                for frac in np.linspace(0.02, 0.45, 44):
                    pu = cu + (w / 2 - cu) * frac * 2
                    pv = cv + (h / 2 - cv) * frac * 2
                    v = _corner_pose(cam, pu, pv, z, tilt, board)
                    if board_fully_visible(v, board, cam):
                        pix = [pu, pv]
                        break
                if pix is None:
                    continue
                # ...then slide it along each image axis toward the corner while it still
                # fits, so its outer corners reach the image's corner cells.
                step = 0.01 * w
                for axis, target in ((0, cu), (1, cv)):
                    while True:
                        trial = list(pix)
                        trial[axis] += np.sign(target - trial[axis]) * step
                        cand = _corner_pose(cam, trial[0], trial[1], z, tilt, board)
                        if abs(target - pix[axis]) < step or not board_fully_visible(cand, board, cam):
                            break
                        pix, v = trial, cand
                single = not board_fully_visible(v, board, other)
                v.aimed_at = f"{cam_name}-corner"
                if single == want_single:
                    best = v
                    break
                best = best or v
            if best is None:
                raise RuntimeError("could not place a corner target view")
            views.append(best)
    return views


# ------------------------------------------------------------------ scenarios

def build_scenario(name: str = "waves", *, quick: bool = False, seed: int = 0, effects=None) -> Scenario:
    """Build a named scenario (see docs/synthetic-sessions.md).

    Parameters
    ----------
    name : "waves" (default), "scatter", "plane", "ripples" or "moved".
    quick : shrink to 512x384 px and a few frames (for tests).
    seed : seeds the target poses, speckle patterns and sensor noise.
    effects : None (the clean render), a comma list or set of effect names, or a
        :class:`surfrec.synth.effects.CameraEffects`. The "noise" and "bitdepth"
        effects replace the scenario's sensor and lighting levels.
    """
    if name not in SCENARIOS:
        raise ValueError(f"unknown scenario {name!r}; choose one of {', '.join(SCENARIOS)}")
    scale = 0.4 if quick else 1.0
    rng = np.random.default_rng([seed, 7])
    left, right = _cameras(scale)
    grain = 4.0
    projector, grain_proj = _projector(scale, grain, left)
    sensor = SensorModel(supersample=3)
    lighting = Lighting()
    board = {"kind": "chessboard", "cols": 11, "rows": 8, "square_mm": 15.0, "margin_mm": 10.0}
    depth = TANK["depth_mm"]
    n_central, n_corner = (8, 4) if quick else (12, 4)
    rigs = {"rig": Rig(left, right, projector)}
    views = _board_views(rng, left, right, board, n_central, n_corner)
    n_still = 3 if quick else 6
    fps = 500.0
    groups = [FrameGroup("target", "board", "rig", views=views, group_id=1),
              FrameGroup("still", "speckle", "rig", surface=sf.StillWater(), times=np.arange(n_still) / fps,
                         fps=fps, group_id=2)]
    post = None
    notes = {}
    if name in ("waves", "moved"):
        n = 6 if quick else 24
        times = np.arange(n) / fps
        wave = sf.PlaneWave(amplitude_mm=1.0, frequency_hz=5.0, depth_mm=depth, direction_deg=20.0,
                            phase_deg=30.0, step_time_s=float(times[n // 2]), step_factor=1.1)
        surface = sf.Superposition(wave, sf.Depression(centre_mm=(40.0, -30.0), depth_mm=3.0, radius_mm=25.0))
        groups.append(FrameGroup("waves", "speckle", "rig", surface=surface, times=times, fps=fps, group_id=3))
        notes["amplitude_step"] = {"frame": n // 2, "before_mm": 1.0, "after_mm": 1.1}
        desc = ("A 5 Hz plane wave of 1.0 mm amplitude runs across the field at 20 degrees to the tank axis, "
                "over a stationary dip 3 mm deep (an air jet below a grid holds it). Halfway through the "
                "run the paddle stroke is raised and the amplitude steps to 1.1 mm.")
    elif name == "scatter":
        f = 5.0
        periods = 2 if quick else 3
        fps_s = 50.0 if quick else 100.0
        n = int(round(periods * fps_s / f))
        times = np.arange(n) / fps_s
        post = Post(centre=(10.0, -5.0), radius=20.0, top=45.0)
        extent = _footprint_extent(left, right, margin=40.0)
        surface = sf.ScatteredWave(amplitude_mm=1.0, frequency_hz=f, depth_mm=depth, post_centre_mm=post.centre,
                                   post_radius_mm=post.radius, extent_mm=extent,
                                   grid_step_mm=0.5 if quick else 0.25)
        groups.append(FrameGroup("waves", "speckle", "rig", surface=surface, times=times, fps=fps_s, group_id=3))
        notes["periods"] = periods
        desc = (f"A {f:g} Hz plane wave of 1.0 mm amplitude from the paddle meets a 40 mm post that pierces "
                f"the surface near the field centre; {periods} whole wave periods are recorded at {fps_s:g} "
                "frames/s. The post is matte black: no speckle on it, and it shades the water behind it "
                "from the projector.")
    elif name == "plane":
        # A plain wave for the dispersion check: whole periods, as in "scatter", and nothing else on the water.
        f = 4.0
        periods = 2 if quick else 3
        fps_p = 50.0 if quick else 100.0
        n = int(round(periods * fps_p / f))
        times = np.arange(n) / fps_p
        surface = sf.PlaneWave(amplitude_mm=1.0, frequency_hz=f, depth_mm=depth, direction_deg=20.0, phase_deg=30.0)
        groups.append(FrameGroup("waves", "speckle", "rig", surface=surface, times=times, fps=fps_p, group_id=3))
        notes["periods"] = periods
        desc = (f"A {f:g} Hz plane capillary-gravity wave of 1.0 mm amplitude runs across the field at 20 degrees "
                f"to the tank axis, nothing else on the water; {periods} whole wave periods are recorded at "
                f"{fps_p:g} frames/s (for the dispersion check of `surfrec spectrum`).")
    elif name == "ripples":
        n = 6 if quick else 24
        times = np.arange(n) / fps
        surface = sf.CircularRipples(centre_mm=(-60.0, 40.0), amplitude_mm=0.5, frequency_hz=8.0, depth_mm=depth,
                                     start_time_s=-0.9)
        groups.append(FrameGroup("waves", "speckle", "rig", surface=surface, times=times, fps=fps, group_id=3))
        sensor = SensorModel(supersample=3, bits=12, container_bits=16, full_well_e=20000.0, read_noise_e=8.0)
        desc = ("A drop released from a needle above the water at (-60, 40) mm makes 8 Hz circular ripples "
                "of 0.5 mm that spread across the field. This session's cameras record 12-bit data in "
                "16-bit files.")
    if name == "moved":
        moved_right = _moved(right, 0.2)
        rigs["moved"] = Rig(left, moved_right, projector)
        for g in groups:
            if g.kind == "speckle":
                g.rig = "moved"
        new_views = _board_views(np.random.default_rng([seed, 11]), left, moved_right, board, 4, 0)
        groups.insert(1, FrameGroup("target-moved", "board", "moved", views=new_views, group_id=4))
        notes["move"] = {"camera": "right", "axis": "optical", "angle_deg": 0.2}
        desc = ("The waves session after someone bumped the right camera: it turned 0.2 degrees about its "
                "optical axis. target/ holds the views from before the move, target-moved/ four new ones; "
                "still/ and waves/ were recorded after the move.")
    fx = _effects(effects)
    if fx is not None:
        sensor, lighting = fx.sensor_and_lighting(sensor, lighting)
    return Scenario(name=name, description=desc, seed=seed, quick=quick, rigs=rigs, sensor=sensor,
                    lighting=lighting, board=board, groups=groups, post=post, speckle_grain_px=grain, effects=fx,
                    projector_grain_px=grain_proj,
                    water={"depth_mm": depth, "density_kg_m3": water.DENSITY,
                           "surface_tension_n_m": water.SURFACE_TENSION, "gravity_m_s2": water.STANDARD_GRAVITY,
                           "temperature_c": water.TEMPERATURE_C}, notes=notes)


def _effects(effects):
    """CameraEffects from names or an instance; None when no effect is on."""
    if effects is None:
        return None
    from surfrec.synth.effects import CameraEffects

    fx = effects if isinstance(effects, CameraEffects) else CameraEffects(enabled=effects)
    return fx if fx.any else None


def _footprint_extent(left: Camera, right: Camera, margin: float):
    """x/y bounds (mm) of the still-water area either camera sees, plus a margin."""
    xs, ys = [], []
    for cam in (left, right):
        w, h = cam.image_size
        u = np.array([0, w - 1, w - 1, 0, w / 2, w / 2, 0, w - 1], float)
        v = np.array([0, 0, h - 1, h - 1, 0, h - 1, h / 2, h / 2], float)
        d = cam.pixel_rays(u, v)
        s = -cam.centre[2] / d[:, 2]
        xs.extend(cam.centre[0] + s * d[:, 0])
        ys.extend(cam.centre[1] + s * d[:, 1])
    return (min(xs) - margin, max(xs) + margin, min(ys) - margin, max(ys) + margin)


def common_footprint(rig: Rig, step_mm: float):
    """A regular x/y grid (mm) over the still-water area both cameras see."""
    ext = _footprint_extent(rig.left, rig.right, margin=0.0)
    x = np.arange(np.floor(ext[0]), np.ceil(ext[1]) + step_mm, step_mm)
    y = np.arange(np.floor(ext[2]), np.ceil(ext[3]) + step_mm, step_mm)
    xx, yy = np.meshgrid(x, y)
    pts = np.stack([xx, yy, np.zeros_like(xx)], -1)
    seen = np.ones(xx.shape, bool)
    for cam in (rig.left, rig.right):
        uv = cam.project(pts)
        w, h = cam.image_size
        seen &= (uv[..., 0] >= 0) & (uv[..., 0] <= w - 1) & (uv[..., 1] >= 0) & (uv[..., 1] <= h - 1)
    rows = np.any(seen, axis=1)
    cols = np.any(seen, axis=0)
    return x[cols], y[rows], seen[np.ix_(rows, cols)]
