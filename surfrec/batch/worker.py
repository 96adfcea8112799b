"""One chunk of a run, computed in a worker process (local pool or Dask worker).

The client sends a small :class:`JobSpec` (file names and parameters, no
image data) and a chunk number with its slot range; the worker opens the
inputs itself (on a cluster they sit on a shared file system at the same
paths), sets the run up once per process (kept in :data:`_STATE`, keyed by
the run's token: rig, datum, frame headers, rectification maps, grid, band,
mask, resampler and the compiled kernels are made or loaded once, not per
chunk), and writes the chunk's heights itself, compressed as heights.h5
stores them, durably into the journal. It returns only the file's hash and a
few numbers per frame, so the compression runs in parallel and nothing big
travels back. The client checks each reported file and is the single writer
of heights.h5.

A frame's result depends only on the frames of its own time window, so a
chunk reads the frames its first and last windows need from its neighbours'
ranges and the result equals that of a sequential run.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import asdict, dataclass, field

import numpy as np

__all__ = ["JobSpec", "run_chunk", "compute_chunk", "limit_threads", "worker_init", "warm_up", "THREAD_ENV"]

# One compute thread per worker: these libraries read them when they load, so
# they are set in the environment the workers start with (and again at run
# time where the library allows it).
THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
              "NUMBA_NUM_THREADS": "1", "VECLIB_MAXIMUM_THREADS": "1", "NUMEXPR_NUM_THREADS": "1"}

# Per-process state: the set-up of the run last asked for (token, state dict).
_STATE: dict = {}


@dataclass
class JobSpec:
    """What a worker needs to compute any chunk of one run (small, picklable, no images).

    Paths are absolute. ``slot_left`` / ``slot_right`` give each slot's image
    index per camera (-1: dropped), ``slot_time`` its time (s); ``journal``
    is the journal folder the chunk files go to.
    """

    rig: str
    datum: str
    left: str
    right: str
    slot_left: np.ndarray
    slot_right: np.ndarray
    slot_time: np.ndarray
    slot_flags: np.ndarray
    match: dict
    heights: dict
    on_bad_frame: str = "abort"
    check_rig_every: int = 0
    check_rig_frames: int = 3
    rig_tolerance_px: float = 0.3
    journal: str = ""
    token: str = field(default="")

    def __post_init__(self):
        if not self.token:
            h = hashlib.sha256()
            for k, v in sorted(asdict(self).items()):
                if k == "token":
                    continue
                h.update(k.encode())
                h.update(np.asarray(v).tobytes() if isinstance(v, np.ndarray) else json.dumps(v, default=str).encode())
            self.token = h.hexdigest()


def limit_threads() -> None:
    """One compute thread in this process (OpenCV, numba, BLAS/OpenMP).

    numba's thread count is set through the environment only before numba is
    loaded (a worker's case): once its threads run, changing the variable
    makes numba's next compilation fail, so a process that already uses numba
    gets the run-time limit (``numba.set_num_threads``) alone.
    """
    import sys

    for k, v in THREAD_ENV.items():
        if k != "NUMBA_NUM_THREADS" or "numba" not in sys.modules:
            os.environ[k] = v
    import cv2

    cv2.setNumThreads(1)
    try:
        import numba

        numba.set_num_threads(1)
    except (ImportError, ValueError):  # numba absent, or its pool already smaller
        pass
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except ImportError:  # BLAS threads then follow the environment set at start
        pass


def worker_init(spec: "JobSpec | None" = None) -> None:
    """Initializer of a local pool worker: one thread, Ctrl-C left to the client, the run set up at once.

    The terminal sends SIGINT to the whole process group; the client finishes
    the chunks in hand, so the workers must not die of it. With ``spec`` the
    worker makes the run's set-up (and loads the compiled kernels) as soon as
    it starts, while the client still checks the rig, instead of in its first
    chunk.
    """
    import signal
    import threading

    signal.signal(signal.SIGINT, signal.SIG_IGN)
    limit_threads()
    # A client killed with SIGKILL cannot stop its pool: each worker leaves by
    # itself once its parent is gone (it is then adopted by another process).
    parent = os.getppid()

    def watch():
        while os.getppid() == parent:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, daemon=True, name="surfrec-parent-watch").start()
    if spec is not None:
        try:
            warm_up(spec)
        except Exception:  # the first chunk makes the set-up again and reports the error properly
            _STATE.clear()


def warm_up(spec: "JobSpec") -> None:
    """Make the run's set-up in this process and compile or load every kernel the chunks use.

    numba loads a cached kernel on its first call, not at import: a call on
    a tiny input here moves that cost out of the first chunk.
    """
    st = _state(spec)
    if st.get("warm"):
        return
    from surfrec.match.pipeline import match_frame

    setup = st["setup"]
    p, band = setup.params, int(setup.band)
    rng = np.random.default_rng(0)
    h = p.window + 16
    img = rng.random((1, h, p.window + 2 * band + 32), dtype=np.float32)
    gu = np.array([p.window // 2 + band + 16])
    gv = np.array([h // 2])
    centre = np.zeros((1, 1))
    match_frame(img, img, np.zeros(1), gu, gv, centre, band, p)
    if p.time_window > 1:
        stack = np.concatenate([img, img, img])
        match_frame(stack, stack, np.array([-1.0, 0.0, 1.0]), gu, gv, centre, band, p)
    w, h = st["rig"].image_size
    setup.rectifier.left(np.zeros((h, w), np.float32))
    st["warm"] = True


class _SlotFrames:
    """Frames of one camera indexed by slot (the image each slot pairs)."""

    def __init__(self, seq, index):
        self.seq = seq
        self.index = index

    def __getitem__(self, slot):
        return self.seq[int(self.index[slot])]

    def __len__(self):
        return len(self.index)


def _state(spec: JobSpec, *, limit: bool = True) -> dict:
    """The run's set-up in this process (made once per run; ``limit``: one compute thread)."""
    if _STATE.get("token") == spec.token:
        return _STATE
    from surfrec.geometry.session import prepare_heights
    from surfrec.io.datumfile import read_datum
    from surfrec.io.images import open_frames
    from surfrec.io.rigfile import read_rig
    from surfrec.match.session import prepare_matching

    if limit:
        limit_threads()
    rig = read_rig(spec.rig)
    datum = read_datum(spec.datum)
    lf = open_frames(spec.left, expected_size=rig.image_size, name="left images")
    rf = open_frames(spec.right, expected_size=rig.image_size, name="right images")
    left, right = _SlotFrames(lf, spec.slot_left), _SlotFrames(rf, spec.slot_right)
    unusable = set(np.flatnonzero((spec.slot_left < 0) | (spec.slot_right < 0)).tolist())
    first = lf[int(spec.slot_left[spec.slot_left >= 0][0])]
    m = spec.match
    mask = None
    if m.get("mask"):
        mk = open_frames(m["mask"], expected_size=rig.image_size, name="mask")
        mask = mk.read_raw(0)
    segment = np.cumsum(spec.slot_flags > 0) if unusable else None
    setup = prepare_matching(rig, datum, first, spec.slot_time, window=m.get("window"), spacing=m.get("spacing"),
                             time_window=m["time_window"], max_excursion_mm=m["max_excursion_mm"],
                             rectify_method=m["rectify"], mask_image=mask, segment=segment,
                             shape_order=m.get("shape_order", 1), saturation=m.get("saturation"),
                             bad_pixels=m.get("bad_pixels", True))
    h = spec.heights
    hsetup = prepare_heights(setup.grid_u, setup.grid_v, rig, datum, step=h.get("grid_step_mm"),
                             extent=h.get("extent_mm"), circles=h.get("circles", ()),
                             polygons=[np.asarray(p) for p in h.get("polygons", ())],
                             still_correction=h["still_correction"])
    _STATE.clear()
    _STATE.update(token=spec.token, rig=rig, setup=setup, hsetup=hsetup, left=left, right=right, lf=lf, rf=rf,
                  unusable=unusable, views=None)
    return _STATE


def run_chunk(spec: JobSpec, k: int, start: int, stop: int) -> dict:
    """Compute chunk k (slots [start, stop)) and store it durably in the run's journal.

    Returns
    -------
    dict: ``chunk`` (k), ``sha256`` of the chunk file, and the per-frame
    figures of :data:`surfrec.batch.journal.SUMMARY_KEYS` (``flags``,
    ``time``, ``coverage``, ``valid_fraction``, ``sigma_median_mm``,
    ``info``) — everything but the heights, which stay in the file.
    """
    from surfrec.batch.journal import SUMMARY_KEYS, Journal

    res = compute_chunk(spec, start, stop)
    t0 = time.monotonic()
    sha = Journal(spec.journal).write_chunk(k, res)
    info = json.loads(str(res["info"]))
    info["write_seconds"] = round(time.monotonic() - t0, 4)
    return {"chunk": int(k), "sha256": sha, **{key: res[key] for key in SUMMARY_KEYS if key != "info"},
            "info": json.dumps(info)}


def compute_chunk(spec: JobSpec, start: int, stop: int) -> dict:
    """Match and resample slots [start, stop) of the run.

    Returns
    -------
    dict of numpy arrays: ``height``, ``uncertainty`` (n, Ny, Nx) float32 mm;
    ``flags`` (n,) uint8; ``time`` (n,) s; ``coverage``, ``valid_fraction``,
    ``sigma_median_mm`` (n,) float64; ``info``: a JSON text (rejection counts,
    resample counts, bad frames, mean water level mm, the rig check when one
    fell in this chunk, seconds, host and process).
    """
    from surfrec.errors import InputError
    from surfrec.match.pipeline import FLAG_BLANK, FLAG_UNREADABLE
    from surfrec.match.session import match_frames
    from surfrec.geometry.session import heights_of_frame

    t0 = time.monotonic()
    st = _state(spec)
    setup, hsetup = st["setup"], st["hsetup"]
    ny, nx = hsetup.shape
    n = stop - start
    height = np.empty((n, ny, nx), np.float32)
    sigma = np.empty((n, ny, nx), np.float32)
    flags = np.zeros(n, np.uint8)
    coverage = np.zeros(n)
    valid = np.zeros(n)
    smed = np.full(n, np.nan)
    reasons, resample, bad = {}, {}, []
    measurable = np.isfinite(setup.centre) & (setup.measure if setup.measure is not None else True)
    for res in _with_hint(match_frames(setup, st["left"], st["right"], range(start, stop), unusable=st["unusable"],
                                       on_bad_frame=spec.on_bad_frame, bad_frame_errors=(InputError,)),
                          spec.on_bad_frame):
        k = res.index - start
        if res.flags & FLAG_BLANK and spec.on_bad_frame == "abort":
            raise InputError(f"frame {res.index} ({_names(st, res.index)}) is blank (no speckle contrast); "
                             "set on_bad_frame = \"skip\" in [batch] to keep going past such frames")
        if res.flags & (FLAG_BLANK | FLAG_UNREADABLE):
            bad.append([int(res.index), "blank" if res.flags & FLAG_BLANK else "unreadable", _names(st, res.index)])
        fh = heights_of_frame(hsetup, res.disparity, res.disparity_sigma, res.flags)
        height[k], sigma[k], flags[k], coverage[k] = fh.height, fh.uncertainty, fh.flags, fh.coverage
        valid[k] = float(np.isfinite(res.disparity)[measurable].mean()) if measurable.any() else 0.0
        ok = np.isfinite(fh.uncertainty)
        if ok.any():
            smed[k] = float(np.median(fh.uncertainty[ok]))
        for key, val in res.reasons.items():
            reasons[key] = reasons.get(key, 0) + int(val)
        for key in ("cubic", "bilinear", "invalid", "unconverged"):
            resample[key] = resample.get(key, 0) + int(getattr(fh.stats, key))
    finite = np.isfinite(height)
    level = float(height[finite].mean()) if finite.any() else float("nan")
    info = {"reasons": reasons, "resample": resample, "bad_frames": bad, "level_mm": level,
            "check": _periodic_check(spec, st, start, stop), "host": os.uname().nodename, "pid": os.getpid(),
            "threads": _threads()}
    info["seconds"] = time.monotonic() - t0
    return {"height": height, "uncertainty": sigma, "flags": flags, "time": np.asarray(spec.slot_time[start:stop]),
            "coverage": coverage, "valid_fraction": valid, "sigma_median_mm": smed,
            "info": np.array(json.dumps(info))}


def _with_hint(results, policy: str):
    """The matcher's results; an unreadable frame under ``abort`` says how to keep going past it."""
    from surfrec.errors import InputError

    try:
        yield from results
    except InputError as exc:
        if policy != "abort":
            raise
        raise InputError(f"{exc}; set on_bad_frame = \"skip\" in [batch] to keep going past such frames") from None


def _threads() -> dict:
    """Compute threads this process uses (recorded per chunk, so the log shows one per worker)."""
    import cv2
    import numba

    return {"numba": int(numba.get_num_threads()), "opencv": int(cv2.getNumThreads())}


def _names(st, slot) -> str:
    parts = []
    for side, seq, idx in (("left", st["lf"], st["left"].index), ("right", st["rf"], st["right"].index)):
        if idx[slot] >= 0:
            parts.append(seq.names[int(idx[slot])])
    return ", ".join(parts)


def _periodic_check(spec: JobSpec, st, start: int, stop: int):
    """The rig check on the first frames from each multiple of check_rig_every inside the chunk."""
    every = spec.check_rig_every
    if every <= 0 or spec.check_rig_frames <= 0:
        return None
    first = ((start + every - 1) // every) * every
    if first == 0:
        first = every  # the client checks the start of the run itself
    if first >= stop:
        return None
    from surfrec.errors import InputError

    slots = [s for s in range(first, stop) if s not in st["unusable"]][:spec.check_rig_frames]
    if not slots:
        return None
    try:
        result = check_rig_on(st, slots, spec.rig_tolerance_px)
    except InputError as exc:  # an unreadable frame among them: the matching reports it
        return {"slot": first, "error": str(exc)}
    return {"slot": first, **result}


def check_rig_on(st, slots, tolerance_px: float) -> dict:
    """check-rig on the given slots (original frames); a small JSON-ready summary."""
    from surfrec.calib.drift import check_rig, rectified_views

    rig = st["rig"]
    if st.get("views") is None:
        st["views"] = rectified_views(rig.left_matrix, rig.left_distortion, rig.right_matrix, rig.right_distortion,
                                      rig.rectification, rig.image_size)
    lefts = [st["left"][s] for s in slots]
    rights = [st["right"][s] for s in slots]
    r = check_rig(lefts, rights, st["views"], tolerance=tolerance_px, max_offset=min(2, max(0, len(slots) - 1)))
    return {"holds": bool(r.holds), "message": r.message, "p95_px": float(r.drift.p95_abs_px),
            "median_px": float(r.drift.median_px), "warnings": list(r.warnings)}
