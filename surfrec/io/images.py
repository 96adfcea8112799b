"""Camera image runs: from the user's input specification to validated, lazily read frames.

Input specifications
--------------------
:func:`open_frames` accepts one string, tried in this order:

``-``
    File names from standard input, one per line.
``@LIST``
    File names from the text file ``LIST``, one per line.
an existing folder
    The image files in it (no recursion). Names starting with ``.`` are
    skipped, as a shell glob would skip them (this also skips the ``._*``
    files that macOS leaves on removable drives).
an existing file
    One image file; a multi-page TIFF gives one frame per page.
anything else
    A glob pattern (:func:`glob.glob`), quoted so the shell does not expand
    it. Matches that are folders or not image files are skipped with a
    warning.

Image files are recognised by their extension, in any letter case: ``.png``,
``.tif``, ``.tiff``, ``.bmp``, ``.jpg``, ``.jpeg``. Every TIFF contributes all
its pages, in page order, wherever it comes from; so a folder that holds one
multi-page TIFF yields that file's pages.

In lists and on standard input, surrounding white space is stripped, blank
lines and lines starting with ``#`` are ignored, and relative names are
resolved against the current directory, not the list's folder, because that
is what the shell that wrote the list (``ls left/*.png > left.txt``) meant.

Frame order and names
---------------------
Folders and glob matches are put in natural order (:func:`natural_key`):
``frame_2`` comes before ``frame_10``. Lists and standard input keep the
order they give, because the user chose it. Frame names, used in messages,
are the file names as the user wrote them (as matched, for globs; bare file
names, for folders), with the 0-based page index appended for the pages of a
multi-page TIFF: ``run.tif[3]``.

Bit depth
---------
Frames are scaled to [0, 1] by the effective bit depth ``b``: ``raw / (2**b - 1)``.
8-bit samples have ``b = 8``. For 16-bit samples the first frame's values
decide, since cameras rarely record their real depth reliably (TIFF
``BitsPerSample`` below 16 is not trusted):

1. values whose two or more lowest bits are all zero are left-aligned data
   (say 12-bit data shifted up by 4 bits); they already span the full 16-bit
   range, so ``b = 16``;
2. otherwise a PNG ``sBIT`` chunk gives ``b`` if the largest value fits in it;
3. otherwise the largest value gives ``b``: up to 1023 -> 10, up to 4095 -> 12,
   up to 16383 -> 14, else 16.

A frame brighter than the first can therefore exceed 1 if the estimate was
too low; nothing is clipped. Pass ``bit_depth`` to :func:`open_frames` to
override the estimate.

Laziness
--------
Constructing a sequence reads only headers: PNG ``IHDR`` (and ``sBIT`` if it
precedes the image data), TIFF page directories, and, for BMP and JPEG whose
headers are not parsed here, the first such file decoded whole (the others
are checked when they are read). 16-bit runs also decode the first frame to
estimate the bit depth. Each later read decodes exactly one frame.
"""

from __future__ import annotations

import glob
import logging
import operator
import os
import re
import struct
import sys
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Iterator

import cv2
import numpy as np
import tifffile

from surfrec.errors import InputError

log = logging.getLogger("surfrec.io.images")

IMAGE_SUFFIXES = (".png", ".tif", ".tiff", ".bmp", ".jpg", ".jpeg")
_TIFF_SUFFIXES = (".tif", ".tiff")
_SUFFIX_LIST = ".png, .tif, .tiff, .bmp, .jpg or .jpeg"

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# Bit depths the PNG specification allows for each colour type (grey, RGB,
# palette, grey + alpha, RGBA); anything else is a damaged header.
_PNG_DEPTHS = {0: {1, 2, 4, 8, 16}, 2: {8, 16}, 3: {1, 2, 4, 8}, 4: {8, 16}, 6: {8, 16}}
_PNG_COLOUR_TYPES = {2, 3, 6}

_DIGIT_RUN = re.compile(r"([0-9]+)")


@dataclass(frozen=True)
class _Frame:
    """Where one frame is stored and what its header said (None: known only once decoded)."""

    path: Path  # absolute, so reads still work after the caller changes directory
    page: int | None  # TIFF page index; None for other formats
    name: str  # for messages
    kind: str  # "png", "tiff" or "cv2" (BMP, JPEG: decoded by OpenCV, header not parsed)
    size: tuple[int, int] | None  # (width, height), px
    dtype: np.dtype | None
    colour: bool | None
    sbit: int | None = None  # significant bits from a PNG sBIT chunk


# ---------------------------------------------------------------- public API


def open_frames(
    spec: str,
    *,
    stdin: IO[str] | None = None,
    expected_size: tuple[int, int] | None = None,
    bit_depth: int | None = None,
    name: str = "images",
) -> FrameSequence:
    """Open the image run that *spec* names, reading only file headers.

    Parameters
    ----------
    spec : str
        ``-``, ``@LIST``, a folder, a file or a glob pattern (see the module
        documentation for the rules and the frame order).
    stdin : text stream, optional
        Where ``-`` reads file names from; ``sys.stdin`` when None.
    expected_size : (int, int), optional
        (width, height) in px that every frame must have, e.g. the size the
        rig calibration was made for.
    bit_depth : int, optional
        Effective bit depth, from 1 to the stored sample size (8 or 16 bits);
        estimated from the data when None (see the module documentation).
    name : str
        What the run is called in messages, e.g. ``"left images"``.

    Returns
    -------
    FrameSequence
        The frames in order; pixel data are read only when a frame is asked for.

    Raises
    ------
    InputError
        No file found, a named file missing, an unreadable or unsupported
        file, frames of different sizes or sample types, or a size other
        than *expected_size*.
    """
    files = _expand_spec(spec, stdin, name)
    frames = _read_headers(files, name)
    _check_sizes(frames, expected_size, name)
    _check_dtypes(frames, name)
    return FrameSequence(frames, name=name, bit_depth=bit_depth)


class FrameSequence:
    """An ordered run of same-sized greyscale frames, decoded one at a time on demand.

    Create it with :func:`open_frames`. Indexing gives float32 frames scaled
    to [0, 1] by :attr:`bit_depth`; :meth:`read_raw` gives the stored
    integers. Frames from colour files are converted to grey. Reading a
    damaged file raises :class:`InputError` naming it. A multi-page TIFF is
    kept open between reads of its pages; :meth:`close` (or a ``with``
    block) releases it, and a later read reopens it.

    Attributes
    ----------
    name : str
        What the run is called in messages.
    size : (int, int)
        (width, height) of every frame, px.
    dtype : numpy.dtype
        Stored sample type, uint8 or uint16.
    bit_depth : int
        Effective bit depth used for scaling (normally 8, 10, 12, 14 or 16).
    names : list of str
        One name per frame, for messages (``run.tif[3]`` for TIFF pages).
    sources : list of (pathlib.Path, int or None)
        Absolute file and TIFF page index (None for other formats) per frame.
    """

    def __init__(self, frames: list[_Frame], *, name: str = "images", bit_depth: int | None = None):
        if not frames:
            raise InputError(f"{name}: there are no frames to read")
        self._frames = list(frames)
        self.name = name
        self.size = self._frames[0].size
        self.dtype = self._frames[0].dtype
        self._lock = threading.Lock()
        self._tiff = None  # (path, process id, open TiffFile) of the TIFF read last
        self._warned_colour = False
        if bit_depth is None:
            self.bit_depth = self._estimate_bit_depth()
        else:
            self.bit_depth = self._checked_bit_depth(bit_depth)
        if any(frame.colour for frame in self._frames):
            self._warn_colour()

    @property
    def names(self) -> list[str]:
        return [frame.name for frame in self._frames]

    @property
    def sources(self) -> list[tuple[Path, int | None]]:
        return [(frame.path, frame.page) for frame in self._frames]

    def __len__(self) -> int:
        return len(self._frames)

    def __getitem__(self, index: int) -> np.ndarray:
        """Frame *index* as a float32 (height, width) array, raw / (2**bit_depth - 1)."""
        frame = self.read_raw(index).astype(np.float32)
        frame /= np.float32(2**self.bit_depth - 1)
        return frame

    def __iter__(self) -> Iterator[np.ndarray]:
        for index in range(len(self)):
            yield self[index]

    def read_raw(self, index: int) -> np.ndarray:
        """Frame *index* as stored: a (height, width) uint8 or uint16 array.

        Parameters
        ----------
        index : int
            Frame number, 0-based; negative numbers count from the end.

        Returns
        -------
        numpy.ndarray
            Greyscale samples, shape (height, width) px, dtype :attr:`dtype`.

        Raises
        ------
        InputError
            The file cannot be decoded, or holds a frame whose size or sample
            type differs from the first frame's.
        IndexError
            *index* is out of range.
        """
        frame = self._frames[self._position(index)]
        stored = self._decode(frame)
        _check_sample_type(stored.dtype, frame.name, self.name)
        grey = self._to_grey(stored, frame)
        self._check_like_first(grey, frame)
        return grey

    def close(self) -> None:
        """Close the TIFF file kept open between reads, if any (reads reopen it)."""
        with self._lock:
            self._close_tiff()

    def __enter__(self) -> FrameSequence:
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def __getstate__(self):
        # Open files and locks do not cross process boundaries; workers reopen.
        state = self.__dict__.copy()
        state["_tiff"] = None
        del state["_lock"]
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def __repr__(self) -> str:
        width, height = self.size
        return (f"<FrameSequence {self.name}: {len(self)} frames, {width}x{height} px, "
                f"{self.bit_depth}-bit data in {self.dtype}>")

    # ------------------------------------------------------------ private

    def _position(self, index: int) -> int:
        position = operator.index(index)
        if not -len(self) <= position < len(self):
            raise IndexError(f"{self.name}: frame {position} does not exist, there are {len(self)} frames")
        return position % len(self)

    def _decode(self, frame: _Frame) -> np.ndarray:
        if frame.kind == "tiff":
            return self._read_tiff_page(frame)
        return _cv2_read(frame.path, frame.name, self.name)

    def _read_tiff_page(self, frame: _Frame) -> np.ndarray:
        with self._lock:
            try:
                page = self._open_tiff(frame.path).pages[frame.page]
                data = page.asarray()
            except Exception as exc:  # tifffile reports damage with many exception types
                self._close_tiff()
                raise InputError(f"{self.name}: {frame.name} cannot be decoded ({exc})") from exc
        if data.ndim == 3 and page.planarconfig == tifffile.PLANARCONFIG.SEPARATE:
            data = np.ascontiguousarray(np.moveaxis(data, 0, -1))
        return data

    def _open_tiff(self, path: Path) -> tifffile.TiffFile:
        # Keeping the file open lets tifffile remember where each page is, so
        # reading page k does not walk the directory chain from the start; the
        # process id guards against sharing a file offset with a forked worker.
        if self._tiff is not None and self._tiff[:2] == (path, os.getpid()):
            return self._tiff[2]
        self._close_tiff()
        tif = tifffile.TiffFile(path)
        self._tiff = (path, os.getpid(), tif)
        return tif

    def _close_tiff(self) -> None:
        if self._tiff is not None:
            self._tiff[2].close()
            self._tiff = None

    def _to_grey(self, stored: np.ndarray, frame: _Frame) -> np.ndarray:
        if stored.ndim == 2:
            return stored
        channels = stored.shape[2]
        if channels in (1, 2):  # grey, or grey + alpha: alpha is not scene brightness
            return np.ascontiguousarray(stored[:, :, 0])
        if channels not in (3, 4):
            raise InputError(f"{self.name}: {frame.name} has {channels} channels; expected grey, RGB or RGBA")
        if frame.colour is None:  # not known from a header, so not yet reported
            self._warn_colour()
        # OpenCV decodes to BGR(A), tifffile keeps the file's RGB(A) order.
        if frame.kind == "tiff":
            code = cv2.COLOR_RGB2GRAY if channels == 3 else cv2.COLOR_RGBA2GRAY
        else:
            code = cv2.COLOR_BGR2GRAY if channels == 3 else cv2.COLOR_BGRA2GRAY
        return cv2.cvtColor(stored, code)

    def _warn_colour(self) -> None:
        if not self._warned_colour:
            log.warning("%s: colour images converted to grey", self.name)
            self._warned_colour = True

    def _check_like_first(self, grey: np.ndarray, frame: _Frame) -> None:
        # Frames whose header was not parsed meet the first frame only here;
        # for the others this guards against a header that lies.
        first = self._frames[0]
        size = (grey.shape[1], grey.shape[0])
        if size != self.size:
            raise InputError(f"{self.name}: {frame.name} is {_wxh(size)} px but {first.name} is {_wxh(self.size)} px")
        if grey.dtype != self.dtype:
            raise InputError(f"{self.name}: {frame.name} holds {_describe(grey.dtype)} samples "
                             f"but {first.name} holds {_describe(self.dtype)} samples")

    def _estimate_bit_depth(self) -> int:
        if self.dtype == np.uint8:
            return 8
        first = self._frames[0]
        samples = self._decode(first)
        peak = int(samples.max())
        if peak == 0:
            log.warning("%s: the first frame %s is black, so its bit depth cannot be estimated; "
                        "assuming 16 bits", self.name, first.name)
            return 16
        bits = _bit_depth_of(samples, peak, first.sbit)
        log.info("%s: %d-bit data in 16-bit samples (estimated from %s, largest value %d)",
                 self.name, bits, first.name, peak)
        return bits

    def _checked_bit_depth(self, bits) -> int:
        stored_bits = self.dtype.itemsize * 8
        if isinstance(bits, bool) or not isinstance(bits, (int, np.integer)) or not 1 <= bits <= stored_bits:
            raise InputError(f"{self.name}: a bit depth of {bits!r} does not fit the {stored_bits}-bit samples "
                             f"of {self._frames[0].name}; expected an integer from 1 to {stored_bits}")
        return int(bits)


def pair_frames(left: FrameSequence, right: FrameSequence) -> None:
    """Check that two camera runs can be paired frame by frame.

    Parameters
    ----------
    left, right : FrameSequence
        The runs of the two cameras; frame i of one pairs with frame i of the other.

    Raises
    ------
    InputError
        The runs hold different numbers of frames.
    """
    if len(left) != len(right):
        raise InputError(f"{left.name}: {_frames_count(len(left))} but {right.name}: "
                         f"{_frames_count(len(right))}; frames are paired by index")


def natural_key(s: str | os.PathLike) -> tuple[tuple[str | int, ...], str]:
    """Sort key that orders digit runs by value: ``frame_2`` before ``frame_10``.

    Text between digit runs compares case-sensitively; names that differ only
    in zero padding (``f_02``, ``f_2``) are ordered by the whole string.

    Parameters
    ----------
    s : str or path
        A file name or path.

    Returns
    -------
    tuple
        The text and integer runs of *s*, then *s* itself as the tiebreak.
    """
    text = os.fspath(s)
    # re.split with a group alternates text (even indices) and digits (odd),
    # so equal positions of two keys always hold comparable types.
    parts = _DIGIT_RUN.split(text)
    return tuple(int(part) if i % 2 else part for i, part in enumerate(parts)), text


def save_image(path: str | os.PathLike, array: np.ndarray) -> None:
    """Write a greyscale image as PNG (OpenCV) or TIFF (tifffile), chosen by extension.

    Parameters
    ----------
    path : str or path
        Output file, ending in ``.png``, ``.tif`` or ``.tiff`` (any case).
    array : numpy.ndarray
        (height, width) px, uint8 or uint16.

    Raises
    ------
    ValueError
        *array* is not a 2-D uint8 or uint16 array.
    InputError
        *path* has another extension.
    OSError
        The file could not be written.
    """
    path = Path(path)
    array = np.asarray(array)
    if array.ndim != 2 or array.dtype not in (np.uint8, np.uint16):
        raise ValueError(f"save_image writes 2-D uint8 or uint16 arrays, not a {array.ndim}-D {array.dtype} array")
    suffix = path.suffix.lower()
    if suffix == ".png":
        try:
            written = cv2.imwrite(str(path), array)
        except cv2.error as exc:
            raise OSError(f"cannot write {path}: {exc}") from exc
        if not written:
            raise OSError(f"cannot write {path}")
    elif suffix in _TIFF_SUFFIXES:
        tifffile.imwrite(path, array, photometric="minisblack")
    else:
        raise InputError(f"cannot write {path}: images are saved as .png, .tif or .tiff")


# ---------------------------------------------------------------- input specifications


def _expand_spec(spec: str, stdin: IO[str] | None, label: str) -> list[tuple[Path, str]]:
    """The files *spec* names, in frame order, each with its name for messages."""
    if spec == "-":
        stream = sys.stdin if stdin is None else stdin
        return _listed_files(stream.read().splitlines(), "standard input", label)
    if spec.startswith("@"):
        return _listed_files(_list_lines(spec[1:], label), f"list {spec[1:]}", label)
    path = Path(spec)
    if path.is_dir():
        return _folder_files(path, label)
    if path.is_file():
        _require_image_suffix(path, spec, label)
        return [(path, spec)]
    return _glob_files(spec, label)


def _list_lines(list_path: str, label: str) -> list[str]:
    try:
        with open(list_path, encoding="utf-8") as fh:
            return fh.read().splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
        raise InputError(f"{label}: cannot read the list of files {list_path} ({reason})") from exc


def _listed_files(lines: list[str], origin: str, label: str) -> list[tuple[Path, str]]:
    files = []
    for line in lines:
        entry = line.strip()
        if not entry or entry.startswith("#"):
            continue
        path = Path(entry)  # relative to the current directory, like the shell that wrote it
        if not path.exists():
            raise InputError(f"{label}: {entry}, named in {origin}, does not exist")
        if path.is_dir():
            raise InputError(f"{label}: {entry}, named in {origin}, is a folder; expected an image file")
        _require_image_suffix(path, entry, label)
        files.append((path, entry))
    if not files:
        raise InputError(f"{label}: {origin} names no image files")
    return files


def _folder_files(folder: Path, label: str) -> list[tuple[Path, str]]:
    try:
        names = [p.name for p in folder.iterdir()
                 if not p.name.startswith(".") and _is_image(p) and p.is_file()]
    except OSError as exc:
        raise InputError(f"{label}: cannot list the folder {folder} ({exc.strerror or exc})") from exc
    if not names:
        raise InputError(f"{label}: the folder {folder} holds no image files ({_SUFFIX_LIST})")
    return [(folder / n, n) for n in sorted(names, key=natural_key)]


def _glob_files(pattern: str, label: str) -> list[tuple[Path, str]]:
    matches = sorted(glob.glob(pattern), key=natural_key)
    if not matches:
        raise InputError(f"{label}: no files match '{pattern}'")
    files = [m for m in matches if _is_image(Path(m)) and os.path.isfile(m)]
    if not files:
        raise InputError(f"{label}: none of the {len(matches)} paths matching '{pattern}' "
                         f"is an image file ({_SUFFIX_LIST})")
    if len(files) < len(matches):
        log.warning("%s: skipped %d paths matching '%s' that are not image files",
                    label, len(matches) - len(files), pattern)
    return [(Path(m), m) for m in files]


def _is_image(path: Path) -> bool:
    return path.suffix.lower() in IMAGE_SUFFIXES


def _require_image_suffix(path: Path, shown: str, label: str) -> None:
    if not _is_image(path):
        raise InputError(f"{label}: {shown} is not a supported image file (expected {_SUFFIX_LIST})")


# ---------------------------------------------------------------- headers


def _read_headers(files: list[tuple[Path, str]], label: str) -> list[_Frame]:
    """One :class:`_Frame` per frame: TIFFs expand to their pages."""
    frames = []
    decoded_one = False
    for path, shown in files:
        suffix = path.suffix.lower()
        if suffix == ".png":
            frames.append(_png_frame(path, shown, label))
        elif suffix in _TIFF_SUFFIXES:
            frames.extend(_tiff_frames(path, shown, label))
        elif not decoded_one:
            # No header parser for BMP/JPEG here: decode one to learn the
            # run's size and type; the rest are checked when read.
            frames.append(_decoded_frame(path, shown, label))
            decoded_one = True
        else:
            frames.append(_Frame(path.absolute(), None, shown, "cv2", None, None, None))
    return frames


def _png_frame(path: Path, shown: str, label: str) -> _Frame:
    try:
        with open(path, "rb") as fh:
            # signature (8 bytes), IHDR length and type (8), then width, height,
            # bit depth, colour type, compression, filter, interlace (13), CRC (4)
            head = fh.read(33)
            if len(head) < 33 or head[:8] != _PNG_SIGNATURE or head[12:16] != b"IHDR":
                raise _bad_png_header(shown, label)
            width, height, depth, colour_type = struct.unpack(">IIBB", head[16:26])
            if width == 0 or height == 0 or depth not in _PNG_DEPTHS.get(colour_type, ()):
                raise _bad_png_header(shown, label)
            sbit = _png_sbit(fh, colour_type, depth, shown, label)
    except OSError as exc:
        raise InputError(f"{label}: cannot read {shown} ({exc.strerror or exc})") from exc
    dtype = np.dtype(np.uint16 if depth == 16 else np.uint8)  # OpenCV expands 1-4 bit samples to 8
    return _Frame(path.absolute(), None, shown, "png", (width, height), dtype,
                  colour_type in _PNG_COLOUR_TYPES, sbit)


def _bad_png_header(shown: str, label: str) -> InputError:
    return InputError(f"{label}: {shown} is not a valid PNG file (damaged or truncated header)")


def _png_sbit(fh, colour_type: int, depth: int, shown: str, label: str) -> int | None:
    """Significant bits from the sBIT chunk, or None; stops at the image data."""
    while True:
        head = fh.read(8)
        if len(head) < 8:
            raise InputError(f"{label}: {shown} is truncated (it ends before its image data)")
        length, chunk_type = struct.unpack(">I4s", head)
        if chunk_type in (b"IDAT", b"IEND"):
            return None
        if chunk_type == b"sBIT":
            values = fh.read(length)
            # grey types give one value, colour types one per colour (alpha ignored)
            colours = values[:1] if colour_type in (0, 4) else values[:3]
            bits = max(colours, default=0)
            return bits if 1 <= bits <= depth else None
        fh.seek(length + 4, os.SEEK_CUR)  # chunk data and CRC


def _tiff_frames(path: Path, shown: str, label: str) -> list[_Frame]:
    try:
        with tifffile.TiffFile(path) as tif:
            pages = [(p.imagewidth, p.imagelength, p.dtype, p.samplesperpixel, p.imagedepth)
                     for p in tif.pages]
    except Exception as exc:  # tifffile reports damage with many exception types
        raise InputError(f"{label}: {shown} is not a readable TIFF file ({exc})") from exc
    if not pages:
        raise InputError(f"{label}: {shown} holds no images")
    frames = []
    for k, (width, height, dtype, samples, depth) in enumerate(pages):
        page_name = shown if len(pages) == 1 else f"{shown}[{k}]"
        if dtype is None:
            raise InputError(f"{label}: {page_name} has a sample format that cannot be read; "
                             f"expected 8- or 16-bit unsigned integers")
        _check_sample_type(dtype, page_name, label)
        if depth != 1:
            raise InputError(f"{label}: {page_name} is a 3-D volume; expected 2-D images")
        frames.append(_Frame(path.absolute(), k, page_name, "tiff", (width, height), dtype, samples >= 3))
    return frames


def _decoded_frame(path: Path, shown: str, label: str) -> _Frame:
    stored = _cv2_read(path, shown, label)
    _check_sample_type(stored.dtype, shown, label)
    height, width = stored.shape[:2]
    colour = stored.ndim == 3 and stored.shape[2] >= 3
    return _Frame(path.absolute(), None, shown, "cv2", (width, height), stored.dtype, colour)


def _cv2_read(path: Path, shown: str, label: str) -> np.ndarray:
    try:
        stored = cv2.imread(str(path), cv2.IMREAD_UNCHANGED)
    except cv2.error as exc:
        raise InputError(f"{label}: {shown} cannot be decoded ({exc})") from exc
    if stored is None:  # OpenCV's only signal for missing, truncated or garbled files
        raise InputError(f"{label}: {shown} cannot be decoded (missing, truncated or not an image)")
    return stored


# ---------------------------------------------------------------- checks


def _check_sizes(frames: list[_Frame], expected_size: tuple[int, int] | None, label: str) -> None:
    first = frames[0]
    reference = first.size if expected_size is None else tuple(int(v) for v in expected_size)
    for frame in frames:
        if frame.size is not None and frame.size != reference:
            holder = f"{first.name} is" if expected_size is None else "the rig expects"
            raise InputError(f"{label}: {frame.name} is {_wxh(frame.size)} px but {holder} {_wxh(reference)} px")


def _check_dtypes(frames: list[_Frame], label: str) -> None:
    first = frames[0]
    for frame in frames:
        if frame.dtype is not None and frame.dtype != first.dtype:
            raise InputError(f"{label}: {frame.name} holds {_describe(frame.dtype)} samples "
                             f"but {first.name} holds {_describe(first.dtype)} samples")


def _check_sample_type(dtype: np.dtype, shown: str, label: str) -> None:
    if dtype not in (np.uint8, np.uint16):
        raise InputError(f"{label}: {shown} holds {_describe(dtype)} samples; "
                         f"expected 8- or 16-bit unsigned integers")


def _bit_depth_of(samples: np.ndarray, peak: int, sbit: int | None) -> int:
    """Effective bit depth of 16-bit samples whose largest value is *peak* (> 0)."""
    combined = int(np.bitwise_or.reduce(samples, axis=None))
    low_zero_bits = (combined & -combined).bit_length() - 1
    if low_zero_bits >= 2:  # left-aligned data already span the 16-bit range
        return 16
    if sbit is not None and peak < 2**sbit:
        return sbit
    for bits in (10, 12, 14):
        if peak < 2**bits:
            return bits
    return 16


def _describe(dtype: np.dtype) -> str:
    dtype = np.dtype(dtype)
    kinds = {"u": "unsigned integer", "i": "signed integer", "f": "floating-point",
             "b": "boolean", "c": "complex"}
    if dtype in (np.uint8, np.uint16):
        return f"{dtype.itemsize * 8}-bit"
    return f"{dtype.itemsize * 8}-bit {kinds.get(dtype.kind, dtype.name)}"


def _wxh(size: tuple[int, int]) -> str:
    return f"{size[0]}x{size[1]}"


def _frames_count(n: int) -> str:
    return f"{n} frame" if n == 1 else f"{n} frames"
