"""The frame slots of a run and their chunks.

A run's output has one *slot* per frame time: a left and a right image paired
by time (or by index with a fixed frame rate), or a frame one camera or both
dropped. Dropped slots stay in the output as NaN frames flagged ``dropped``
(never bridged: no time window reaches across them), so every later frame
keeps its true time and its true partner.

Chunks are consecutive slot ranges, the unit of parallel work and of resume.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from surfrec.match.pipeline import FLAG_DROPPED

__all__ = ["SlotPlan", "slots_by_index", "slots_by_time", "chunk_ranges", "auto_chunk_frames", "GAP_PERIODS"]

# A gap between consecutive frame times longer than this many frame periods
# means frames were dropped (design: 1.5 periods).
GAP_PERIODS = 1.5
# Most slots a run may have: 10^8 frames is weeks at 100 frames/s; the cap stops
# a crafted timestamps file (a gap of 10^12 periods) from allocating without limit.
MAX_SLOTS = 100_000_000


@dataclass
class SlotPlan:
    """Slots of a run.

    Attributes
    ----------
    time : (T,) float, s from the first slot.
    left, right : (T,) int64, the image index of each camera in the slot, -1 if missing.
    flags : (T,) uint8, FLAG_DROPPED where a camera (or both) has no frame.
    period : float, s, the frame period (median interval).
    drops : list of (slot, count, what), the dropped stretches for the report.
    """

    time: np.ndarray
    left: np.ndarray
    right: np.ndarray
    flags: np.ndarray
    period: float
    drops: list = field(default_factory=list)

    def __len__(self):
        return int(self.time.size)

    @property
    def dropped(self) -> np.ndarray:
        """Slot numbers without a frame pair."""
        return np.flatnonzero(self.flags & FLAG_DROPPED)

    @property
    def segment(self) -> np.ndarray:
        """(T,) int: a label that changes at every dropped slot, so time windows stay inside one stretch."""
        return np.cumsum((self.flags & FLAG_DROPPED) > 0)

    def describe_drops(self, limit: int = 10) -> str:
        """One line: how many frames were dropped and where (slot numbers and times)."""
        n = int((self.flags & FLAG_DROPPED > 0).sum())
        if n == 0:
            return "no dropped frames"
        parts = [f"{count} at slot {s} (t = {self.time[s]:.6g} s, {what})" for s, count, what in self.drops[:limit]]
        more = f", and {len(self.drops) - limit} more stretches" if len(self.drops) > limit else ""
        return f"{n} dropped frame{'s' if n > 1 else ''}: " + "; ".join(parts) + more


def slots_by_index(n: int, fps: float) -> SlotPlan:
    """Slots of a run paired by index at a fixed frame rate (no drops can be told)."""
    idx = np.arange(n, dtype=np.int64)
    return SlotPlan(time=idx / float(fps), left=idx.copy(), right=idx.copy(), flags=np.zeros(n, np.uint8),
                    period=1.0 / float(fps))


def slots_by_time(left_s, right_s, *, tolerance_s: float | None = None) -> SlotPlan:
    """Pair two cameras' frames by time, find dropped frames, and lay out the slots.

    Parameters
    ----------
    left_s, right_s : (N_left,), (N_right,) increasing frame times, s.
    tolerance_s : largest |left - right| of a pair, s (default: a tenth of the frame period).

    Returns
    -------
    SlotPlan: one slot per pair; a frame whose partner is missing gets a slot of
    its own flagged dropped; a gap longer than :data:`GAP_PERIODS` periods gets
    one dropped slot per missing frame time.

    Raises
    ------
    ValueError
        Left and right times that disagree by more than the tolerance but are
        too close to be a dropped frame (the cameras are not synchronised), or
        too many slots.
    """
    a = np.asarray(left_s, float)
    b = np.asarray(right_s, float)
    both = np.concatenate([np.diff(a), np.diff(b)])
    period = float(np.median(both)) if both.size else 1.0
    if not period > 0:
        raise ValueError("the frame times do not increase")
    tol = 0.1 * period if tolerance_s is None else float(tolerance_s)
    times, li, ri = [], [], []
    i = j = 0
    # Merge the two clocks: close times pair; a time the other camera lacks by
    # about a period or more is a frame that camera dropped; anything between is
    # a synchronisation fault, which no pairing can repair.
    while i < a.size or j < b.size:
        if i < a.size and j < b.size:
            d = a[i] - b[j]
            if abs(d) <= tol:
                times.append(a[i]); li.append(i); ri.append(j); i += 1; j += 1
                continue
            if abs(d) < 0.5 * period:
                raise ValueError(f"left frame {i} (t = {a[i]:.6g} s) and right frame {j} (t = {b[j]:.6g} s) differ by "
                                 f"{abs(d):.3g} s, more than the tolerance {tol:.3g} s: the cameras are not "
                                 "synchronised")
            if d < 0:
                times.append(a[i]); li.append(i); ri.append(-1); i += 1
            else:
                times.append(b[j]); li.append(-1); ri.append(j); j += 1
        elif i < a.size:
            times.append(a[i]); li.append(i); ri.append(-1); i += 1
        else:
            times.append(b[j]); li.append(-1); ri.append(j); j += 1
    t = np.array(times)
    left = np.array(li, np.int64)
    right = np.array(ri, np.int64)
    # Gaps: missing frame times in which neither camera recorded anything.
    gaps = np.diff(t)
    counts = np.zeros(t.size, np.int64)
    if t.size > 1:
        missing = np.where(gaps > GAP_PERIODS * period, np.rint(gaps / period) - 1, 0)
        missing = np.maximum(missing, np.where(gaps > GAP_PERIODS * period, 1, 0))
        counts[1:] = missing.astype(np.int64)
    total = int(t.size + counts.sum())
    if total > MAX_SLOTS:
        raise ValueError(f"the frame times span {total:,} frame periods, above the limit of {MAX_SLOTS:,}")
    out_t = np.empty(total)
    out_l = np.full(total, -1, np.int64)
    out_r = np.full(total, -1, np.int64)
    pos = np.arange(t.size) + np.cumsum(counts)
    out_t[pos], out_l[pos], out_r[pos] = t, left, right
    drops = []
    for k in np.flatnonzero(counts):
        start = pos[k] - counts[k]
        step = (t[k] - t[k - 1]) / (counts[k] + 1)
        out_t[start:pos[k]] = t[k - 1] + step * np.arange(1, counts[k] + 1)
        drops.append((int(start), int(counts[k]), "both cameras"))
    flags = np.where((out_l < 0) | (out_r < 0), FLAG_DROPPED, 0).astype(np.uint8)
    for s in np.flatnonzero((out_l < 0) ^ (out_r < 0)):
        drops.append((int(s), 1, "left camera" if out_l[s] < 0 else "right camera"))
    drops.sort()
    return SlotPlan(time=out_t - out_t[0], left=out_l, right=out_r, flags=flags, period=period, drops=drops)


def chunk_ranges(n: int, chunk_frames: int) -> list[tuple[int, int]]:
    """Consecutive [start, stop) slot ranges of at most ``chunk_frames`` slots covering 0..n."""
    k = max(1, int(chunk_frames))
    return [(a, min(n, a + k)) for a in range(0, n, k)]


# Automatic chunk size (batch.chunk_frames not given): at most this many frames
# per chunk (a minute or two of work on 1-megapixel frames: little is lost to a
# crash, and a chunk's heights stay a few tens of MB in memory) ...
AUTO_CHUNK_MAX = 64
# ... at least this many time windows per chunk: a chunk re-reads and
# rectifies time_window - 1 frames of its neighbours' ranges, so they stay
# under a tenth of its own ...
AUTO_WINDOWS_PER_CHUNK = 10
# ... and, where the run is long enough, at least this many chunks per worker,
# so that the last round leaves a worker idle for a small part of the run.
AUTO_CHUNKS_PER_WORKER = 8


def auto_chunk_frames(n: int, *, workers: int, time_window: int = 1, ny: int = 1, nx: int = 1) -> int:
    """A chunk size for a run of ``n`` slots on ``workers`` workers (the default of batch.chunk_frames).

    Between ``AUTO_WINDOWS_PER_CHUNK * time_window`` and :data:`AUTO_CHUNK_MAX`
    frames, aiming at :data:`AUTO_CHUNKS_PER_WORKER` chunks per worker; then
    the number of chunks is rounded up to a multiple of ``workers`` and the
    frames shared out evenly, so that every worker gets the same work (chunks
    of 8 frames rather than 5 of 10 and a short one for 48 frames on 2
    workers). Kept under the 2 GiB per chunk of :func:`frames_fit` for a grid
    of ``ny`` x ``nx`` nodes.

    Returns
    -------
    int, frames per chunk (>= 1).
    """
    n = max(1, int(n))
    w = max(1, int(workers))
    k = max(AUTO_WINDOWS_PER_CHUNK * max(1, int(time_window)), math.ceil(n / (AUTO_CHUNKS_PER_WORKER * w)))
    k = min(k, AUTO_CHUNK_MAX, n)
    while k > 1 and not frames_fit(k, ny, nx):
        k //= 2
    m = math.ceil(n / k)
    m = math.ceil(m / w) * w
    return max(1, math.ceil(n / m))


def frames_fit(chunk_frames: int, ny: int, nx: int, limit_bytes: float = 2**31) -> bool:
    """Whether one chunk's heights and uncertainties (float32) stay under ``limit_bytes``."""
    return 8.0 * chunk_frames * ny * nx <= limit_bytes and math.isfinite(ny * nx)
