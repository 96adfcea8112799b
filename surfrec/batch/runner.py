"""The batch driver: chunks through an executor into the journal, then one assembly into heights.h5.

The pattern is a map with a sink: :func:`execute_chunks` hands chunk ranges
to any executor (this process, a local pool, Dask), keeps a bounded number in
flight so memory stays flat whatever the run length; each worker stores its
chunk in the journal (durably, already compressed) before it reports it done,
and the client checks the file. :func:`assemble` then copies the journal's
chunks in order into a :class:`HeightsWriter` without decompressing them,
whose file appears under its final name only when complete.
"""

from __future__ import annotations

import json
import logging
import time
from dataclasses import dataclass, field

import numpy as np

from surfrec.batch.journal import Journal

__all__ = ["execute_chunks", "assemble", "RunSummary"]

log = logging.getLogger("surfrec")


def execute_chunks(executor, fn, spec, chunks, journal: Journal, *, todo, on_done=None, should_stop=None,
                   in_flight_per_worker: int = 2) -> bool:
    """Compute the chunks in ``todo`` and journal each one as it finishes.

    Parameters
    ----------
    executor : SerialExecutor, LocalPool or DaskExecutor.
    fn : the chunk function, ``fn(spec, k, start, stop) -> dict``: it computes
        chunk k, stores it in the journal itself and returns the file's
        ``sha256`` with the per-frame figures (surfrec.batch.worker.run_chunk).
    spec : its first argument (a JobSpec).
    chunks : list of (start, stop) slot ranges.  journal : where results go.
    todo : chunk numbers still to compute, in order.
    on_done : ``on_done(k, result)`` after chunk k is durable (progress, log).
    should_stop : ``should_stop() -> bool``; when it turns true no further chunk
        is started, the chunks in hand are finished and journaled.
    in_flight_per_worker : chunks queued per worker (keeps every worker busy
        while the client checks the last result; bounds what waits in memory).

    Returns
    -------
    True when every chunk of ``todo`` is done, False when stopped early.

    Raises
    ------
    Whatever a chunk raised (the other chunks in hand are cancelled).
    """
    pending = list(todo)
    in_flight = {}
    limit = max(1, executor.workers * in_flight_per_worker)
    stopping = False
    try:
        while pending or in_flight:
            stopping = stopping or bool(should_stop and should_stop())
            while pending and len(in_flight) < limit and not stopping:
                k = pending.pop(0)
                in_flight[executor.submit(fn, spec, k, *chunks[k])] = k
            if not in_flight:
                break
            for f in executor.wait_first(list(in_flight)):
                k = in_flight.pop(f)
                result = f.result()
                journal.accept_chunk(k, result["sha256"])
                if on_done is not None:
                    on_done(k, result)
    except BaseException:
        for f in in_flight:
            f.cancel()
        raise
    return not pending


@dataclass
class RunSummary:
    """What the closing summary reports (accumulated during the assembly)."""

    frames: int = 0
    dropped: int = 0
    bad: int = 0
    valid_fraction: list = field(default_factory=list)
    coverage: list = field(default_factory=list)
    sigma_median: list = field(default_factory=list)
    reasons: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        def med(a):
            a = np.asarray(a, float)
            a = a[np.isfinite(a)]
            return float(np.median(a)) if a.size else float("nan")

        return {"frames": self.frames, "dropped_frames": self.dropped, "bad_frames": self.bad,
                "valid_fraction_mean": float(np.mean(self.valid_fraction)) if self.valid_fraction else float("nan"),
                "coverage_median": med(self.coverage), "noise_floor_mm": med(self.sigma_median),
                "rejected": self.reasons}


def assemble(journal: Journal, chunks, shape, writer, *, extra_attrs=None):
    """Stream every journaled chunk, in order, into ``writer`` and publish the file.

    Parameters
    ----------
    journal : Journal holding every chunk.  chunks : the (start, stop) ranges.
    shape : (Ny, Nx) of the height grid.
    writer : a surfrec.io.heightsfile.HeightsWriter (closed here, or aborted on error).
    extra_attrs : root attributes added at the end (with the summary's).

    Returns
    -------
    (Path of the published file, RunSummary)
    """
    from surfrec.match.pipeline import FLAG_DROPPED

    summary = RunSummary()
    try:
        for k, (a, b) in enumerate(chunks):
            with journal.open_chunk(k, b - a, shape) as c:
                info = json.loads(c["info"])
                writer.append_block(c["time"], c["height"], c["uncertainty"], c["flags"])
            summary.frames += b - a
            dropped = (c["flags"] & FLAG_DROPPED) > 0
            summary.dropped += int(dropped.sum())
            summary.bad += len(info.get("bad_frames", []))
            summary.valid_fraction.extend(c["valid_fraction"][~dropped].tolist())
            summary.coverage.extend(c["coverage"].tolist())
            summary.sigma_median.extend(c["sigma_median_mm"].tolist())
            for key, val in info.get("reasons", {}).items():
                summary.reasons[key] = summary.reasons.get(key, 0) + int(val)
        attrs = {f"run_{k}": v for k, v in summary.to_dict().items()}
        attrs.update(extra_attrs or {})
        path = writer.close(attrs)
    except BaseException:
        writer.abort()
        raise
    return path, summary


def wall_clock() -> float:
    """Monotonic seconds, for timings."""
    return time.monotonic()
