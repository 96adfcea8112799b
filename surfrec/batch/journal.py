"""The journal of a run: finished chunks, durable as soon as they are reported done.

Layout: a folder ``OUTPUT.journal/`` beside the output, holding

- ``manifest.json``: format, version, software, the SHA-256 of the run file,
  the rig, the datum and the list of inputs (names and sizes of every image,
  the timestamps file), and the plan (slots, chunk ranges, grid shape);
- ``chunk-NNNNNN.h5``: one finished chunk, written by the worker that
  computed it (HDF5, read back with h5py: a journal is never unpickled). Its
  heights are already compressed exactly as heights.h5 stores them
  (:func:`surfrec.io.heightsfile.frame_dataset_options`), so the compression
  runs in parallel in the workers and the one assembly only copies chunks;
- ``lock``: held (``flock``) by the run that owns the journal.

Every file is written under a temporary name, flushed to the disk
(``fsync``), renamed into place and the folder's entry flushed too, so after
a crash, ``kill -9`` or a power cut a chunk file is either complete or
absent. A full disk fails the write before the rename: the chunk is simply
not done, and a later run computes it again.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import tempfile
from pathlib import Path

import numpy as np

from surfrec.errors import InputError

__all__ = ["Journal", "FORMAT", "VERSION", "CHUNK_KEYS", "SUMMARY_KEYS", "CHUNK_FORMAT"]

FORMAT = "surfrec.run-journal"
# 2: chunks are HDF5 files written by the workers (1 held numpy .npz files written by the client).
VERSION = 2
CHUNK_FORMAT = "surfrec.run-chunk"
CHUNK_KEYS = ("height", "uncertainty", "flags", "time", "coverage", "valid_fraction", "sigma_median_mm", "info")
# What a worker sends back besides the file: per-frame figures for the log, not the heights.
SUMMARY_KEYS = ("flags", "time", "coverage", "valid_fraction", "sigma_median_mm", "info")
_FRAME_VARS = {"height": "height", "uncertainty": "height_uncertainty"}
_SMALL = {"flags": np.uint8, "time": np.float64, "coverage": np.float64, "valid_fraction": np.float64,
          "sigma_median_mm": np.float64}
# Largest manifest we read back: it holds hashes and a few numbers per chunk.
_MAX_MANIFEST_BYTES = 64 << 20
# Largest info text of a chunk we read back (counts, bad frames, timings).
_MAX_INFO_BYTES = 16 << 20


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
        for p in [*self.folder.glob("chunk-*.h5"), *self.folder.glob("chunk-*.npz"), *self.folder.glob(".chunk-*")]:
            p.unlink(missing_ok=True)
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
        return self.folder / f"chunk-{k:06d}.h5"

    def done(self, n_chunks: int) -> set:
        """Chunk numbers whose file is in place."""
        out = set()
        for p in self.folder.glob("chunk-*.h5"):
            try:
                k = int(p.stem.split("-")[1])
            except (IndexError, ValueError):
                continue
            if 0 <= k < n_chunks:
                out.add(k)
        return out

    def write_chunk(self, k: int, arrays: dict) -> str:
        """Store chunk k durably (returns only once it is on the disk); called where the chunk was computed.

        Parameters
        ----------
        k : chunk number.
        arrays : the :data:`CHUNK_KEYS`: ``height``, ``uncertainty`` (n, Ny, Nx)
            float32 mm; ``flags`` (n,) uint8; ``time`` (n,) s; ``coverage``,
            ``valid_fraction``, ``sigma_median_mm`` (n,); ``info`` JSON text.

        Returns
        -------
        The SHA-256 (hex) of the file's bytes, for the client to check that it
        sees the same file (a worker on another machine writes through the
        shared file system).
        """
        import h5py

        from surfrec.io.heightsfile import frame_dataset_options

        self.folder.mkdir(exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".chunk-{k:06d}.", suffix=".partial", dir=self.folder)
        os.close(fd)
        try:
            h = np.asarray(arrays["height"], np.float32)
            n, ny, nx = h.shape
            opts = frame_dataset_options(ny, nx)
            with h5py.File(tmp, "w") as f:
                f.attrs["format"] = CHUNK_FORMAT
                f.attrs["version"] = VERSION
                f.attrs["info"] = str(arrays["info"])
                for key, name in _FRAME_VARS.items():
                    f.create_dataset(name, data=np.asarray(arrays[key], np.float32), **opts)
                for key, dtype in _SMALL.items():
                    f.create_dataset(key, data=np.asarray(arrays[key], dtype))
            digest = hashlib.sha256()
            with open(tmp, "rb") as fh:
                for block in iter(lambda: fh.read(1 << 20), b""):
                    digest.update(block)
                os.fsync(fh.fileno())
            os.replace(tmp, self.chunk_path(k))
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        self._fsync_folder()
        return digest.hexdigest()

    def accept_chunk(self, k: int, sha256: str) -> None:
        """Check that chunk k, reported done by a worker, is the file this process sees.

        Raises
        ------
        InputError
            The file is missing or holds other bytes: the worker wrote somewhere
            this process does not see (a folder local to another machine).
        """
        p = self.chunk_path(k)
        try:
            digest = hashlib.sha256()
            with open(p, "rb") as fh:
                for block in iter(lambda: fh.read(1 << 20), b""):
                    digest.update(block)
        except FileNotFoundError:
            digest = None
        if digest is None or digest.hexdigest() != sha256:
            raise InputError(f"chunk {k} was reported done but {p} is {'missing' if digest is None else 'another file'} "
                             "here: the output folder must be on a file system every worker shares, at the same path")

    @contextlib.contextmanager
    def open_chunk(self, k: int, n: int, shape):
        """Chunk k, opened and checked against what the plan says it holds (n frames of shape (Ny, Nx)).

        Yields
        ------
        dict: ``height``, ``uncertainty`` as open h5py datasets (n, Ny, Nx)
        float32 mm; the other :data:`CHUNK_KEYS` as numpy arrays (``info`` a str).

        Raises
        ------
        InputError
            The file is damaged or does not hold what the plan says (the file is
            removed so that the next run computes the chunk again).
        """
        import h5py

        p = self.chunk_path(k)

        def refuse(why):
            p.unlink(missing_ok=True)
            return InputError(f"journal chunk {p} {why}; it was removed: run again to compute it anew")

        try:
            f = h5py.File(p, "r")
        except Exception as exc:  # not HDF5, truncated: all mean "damaged"
            raise refuse(f"is damaged ({type(exc).__name__})") from None
        with f:
            try:
                if f.attrs.get("format") != CHUNK_FORMAT:
                    raise refuse("is not a surfrec run chunk")
                out = {}
                for key, name in _FRAME_VARS.items():
                    ds = f[name]
                    if not isinstance(ds, h5py.Dataset) or ds.shape != (n, *shape) or ds.dtype != np.float32:
                        raise refuse(f"holds '{key}' of shape {getattr(ds, 'shape', None)}, expected {(n, *shape)}")
                    out[key] = ds
                for key, dtype in _SMALL.items():
                    ds = f[key]
                    if not isinstance(ds, h5py.Dataset) or ds.shape != (n,) or ds.dtype != np.dtype(dtype):
                        raise refuse(f"holds '{key}' of shape {getattr(ds, 'shape', None)}, expected {(n,)}")
                    out[key] = ds[()]
                info = f.attrs.get("info")
                if isinstance(info, bytes):
                    info = info.decode("utf-8")
                if not isinstance(info, str) or len(info) > _MAX_INFO_BYTES:
                    raise refuse("holds no readable 'info' text")
                json.loads(info)
                out["info"] = info
            except InputError:
                raise
            except Exception as exc:  # missing datasets, bad JSON, HDF5 errors: damaged
                raise refuse(f"is damaged ({type(exc).__name__})") from None
            yield out

    def read_chunk(self, k: int, n: int, shape) -> dict:
        """Chunk k as numpy arrays (see :meth:`open_chunk`; the heights decompressed)."""
        with self.open_chunk(k, n, shape) as c:
            return {key: (v[()] if key in _FRAME_VARS else v) for key, v in c.items()}

    def read_info(self, k: int) -> dict | None:
        """The ``info`` of chunk k (None if it cannot be read: the assembly finds a damaged chunk again)."""
        import h5py

        try:
            with h5py.File(self.chunk_path(k), "r") as f:
                info = f.attrs["info"]
            return json.loads(info.decode("utf-8") if isinstance(info, bytes) else info)
        except Exception:
            return None

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
