"""The journal of a run: finished chunks, durable as soon as they are reported done.

Layout: a folder ``OUTPUT.journal/`` beside the output, holding

- ``manifest.json``: format, version, software, the SHA-256 of the run file,
  the rig, the datum and the list of inputs (names and sizes of every image,
  the timestamps file), and the plan (slots, chunk ranges, grid shape);
- ``chunk-NNNNNN.npz``: one finished chunk (numpy's zip of plain arrays,
  read back with ``allow_pickle=False``, so a journal is never unpickled);
- ``lock``: held (``flock``) by the run that owns the journal.

Every file is written under a temporary name, flushed to the disk
(``fsync``), renamed into place and the folder's entry flushed too, so after
a crash, ``kill -9`` or a power cut a chunk file is either complete or
absent. A full disk fails the write before the rename: the chunk is simply
not done, and a later run computes it again.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import numpy as np

from surfrec.errors import InputError

__all__ = ["Journal", "FORMAT", "VERSION", "CHUNK_KEYS"]

FORMAT = "surfrec.run-journal"
VERSION = 1
CHUNK_KEYS = ("height", "uncertainty", "flags", "time", "coverage", "valid_fraction", "sigma_median_mm", "info")
# Largest manifest we read back: it holds hashes and a few numbers per chunk.
_MAX_MANIFEST_BYTES = 64 << 20


class Journal:
    """The journal folder of one output (see the module docstring).

    Parameters
    ----------
    folder : Path of ``OUTPUT.journal``.
    """

    def __init__(self, folder):
        self.folder = Path(folder)
        self._lock_fd = None

    # ------------------------------------------------------------ lifecycle

    @property
    def manifest_path(self) -> Path:
        return self.folder / "manifest.json"

    def exists(self) -> bool:
        return self.manifest_path.is_file()

    def lock(self) -> None:
        """Take the journal's lock, or fail if another run holds it."""
        import fcntl

        self.folder.mkdir(exist_ok=True)
        fd = os.open(self.folder / "lock", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise InputError(f"another surfrec run is using {self.folder} (it holds the journal's lock)") from None
        self._lock_fd = fd

    def unlock(self) -> None:
        if self._lock_fd is not None:
            os.close(self._lock_fd)
            self._lock_fd = None

    def start(self, manifest: dict) -> None:
        """Begin a new journal (removing an old one's chunks)."""
        for p in self.folder.glob("chunk-*.npz"):
            p.unlink()
        self._write_bytes(self.manifest_path, json.dumps({"format": FORMAT, "version": VERSION, **manifest},
                                                         indent=1).encode())

    def read_manifest(self) -> dict:
        """The recorded manifest (validated as data: JSON only, size-capped)."""
        p = self.manifest_path
        if p.stat().st_size > _MAX_MANIFEST_BYTES:
            raise InputError(f"{p} is too large to be a surfrec journal manifest")
        try:
            m = json.loads(p.read_text(encoding="utf-8"))
        except (ValueError, UnicodeDecodeError):
            raise InputError(f"{p} is damaged (not JSON); run with --force to start the run over") from None
        if not isinstance(m, dict) or m.get("format") != FORMAT or m.get("version") != VERSION:
            raise InputError(f"{p} is not a surfrec run journal of version {VERSION}; run with --force to start over")
        return m

    def remove(self) -> None:
        """Delete the journal (after the output is in place)."""
        import shutil

        self.unlock()
        shutil.rmtree(self.folder, ignore_errors=True)

    # ------------------------------------------------------------ chunks

    def chunk_path(self, k: int) -> Path:
        return self.folder / f"chunk-{k:06d}.npz"

    def done(self, n_chunks: int) -> set:
        """Chunk numbers whose file is in place."""
        out = set()
        for p in self.folder.glob("chunk-*.npz"):
            try:
                k = int(p.stem.split("-")[1])
            except (IndexError, ValueError):
                continue
            if 0 <= k < n_chunks:
                out.add(k)
        return out

    def write_chunk(self, k: int, arrays: dict) -> None:
        """Store chunk k durably (returns only once it is on the disk)."""
        fd, tmp = tempfile.mkstemp(prefix=f".chunk-{k:06d}.", suffix=".partial", dir=self.folder)
        try:
            with os.fdopen(fd, "wb") as fh:
                np.savez(fh, **{key: arrays[key] for key in CHUNK_KEYS})
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, self.chunk_path(k))
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        self._fsync_folder()

    def read_chunk(self, k: int, n: int, shape) -> dict:
        """Chunk k, checked against what the plan says it holds (n frames of shape (Ny, Nx)).

        Raises
        ------
        InputError
            The file is damaged or does not hold what the plan says (the file is
            removed so that the next run computes the chunk again).
        """
        p = self.chunk_path(k)
        try:
            with np.load(p, allow_pickle=False) as z:
                out = {key: z[key] for key in CHUNK_KEYS}
        except Exception as exc:  # zip, format and value errors all mean "damaged"
            p.unlink(missing_ok=True)
            raise InputError(f"journal chunk {p} is damaged ({type(exc).__name__}); it was removed: run again to "
                             "compute it anew") from None
        want = {"height": (n, *shape), "uncertainty": (n, *shape), "flags": (n,), "time": (n,), "coverage": (n,),
                "valid_fraction": (n,), "sigma_median_mm": (n,), "info": ()}
        for key, shp in want.items():
            if out[key].shape != tuple(shp):
                p.unlink(missing_ok=True)
                raise InputError(f"journal chunk {p} holds '{key}' of shape {out[key].shape}, expected {tuple(shp)}; "
                                 "it was removed: run again to compute it anew")
        return out

    # ------------------------------------------------------------ helpers

    def _write_bytes(self, path: Path, data: bytes) -> None:
        self.folder.mkdir(exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=self.folder)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(data)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, path)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        self._fsync_folder()

    def _fsync_folder(self) -> None:
        # The rename is durable only once the folder's entry is on the disk too.
        try:
            fd = os.open(self.folder, os.O_RDONLY)
        except OSError:
            return
        try:
            os.fsync(fd)
        except OSError:  # some file systems do not fsync folders; the rename still happened
            pass
        finally:
            os.close(fd)
