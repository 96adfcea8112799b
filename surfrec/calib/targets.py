"""Calibration targets: chessboards and circle grids, and finding them in an image.

A target is described by a :class:`Board`; :func:`find_target` looks for it in
one greyscale image and returns a :class:`Detection` that says whether it was
found, where its points are (px) or why it was not found.

Conventions
-----------
Board points are in the board's own plane (z = 0), in mm, in the order in
which OpenCV's detectors return the image points: row by row, ``cols``
points per row.

- ``chessboard``: ``cols x rows`` inner corners, ``square_mm`` the side of a
  square; point (i, j) at (i * square, j * square).
- ``circles``: a symmetric grid of ``cols x rows`` circles, ``square_mm`` the
  centre spacing; point (i, j) at (i * square, j * square).
- ``asymmetric-circles``: OpenCV's asymmetric grid, ``cols`` circles in each
  row and ``rows`` rows; successive rows are shifted by half the in-row
  spacing. ``square_mm`` is OpenCV's grid unit: circles in one row are
  2 * square apart, successive rows square apart, so nearest neighbours (in
  adjacent rows) are square * sqrt(2) apart; point (i, j) at
  ((2 i + j mod 2) * square, j * square) (OpenCV's calibration sample).

Pixel coordinates have their origin at the centre of the top-left pixel
(OpenCV's convention), x to the right, y down.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import cv2
import numpy as np

BOARD_KINDS = ("chessboard", "circles", "asymmetric-circles")

# Chessboard detection: OpenCV's sector-based detector (Duda & Frese, BMVC
# 2018) with its up-sampling for sub-pixel accuracy and histogram
# normalisation for uneven lighting.
CHESSBOARD_FLAGS = cv2.CALIB_CB_ACCURACY | cv2.CALIB_CB_NORMALIZE_IMAGE

# cornerSubPix after the sector-based detector: on rendered views with known
# corners it brings the corner error from about 0.1 px RMS to about 0.035 px
# (tests/test_calib_targets.py). Its half-window is this fraction of the
# smallest spacing between neighbouring corners, so that the window holds one
# corner's four edges and never a neighbouring corner.
SUBPIX_WINDOW_FRACTION = 0.35
_SUBPIX_CRITERIA = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 100, 1e-4)

# Stuck (hot or dead) pixels: see repair_defects.
DEFECT_THRESHOLD = 0.3

_BOARD_SIZE = re.compile(r"^\s*(\d+)\s*[xX]\s*(\d+)\s*$")


@dataclass(frozen=True)
class Board:
    """A planar calibration target.

    Attributes
    ----------
    kind : "chessboard", "circles" or "asymmetric-circles"
    cols, rows : int
        Inner corners (chessboard) or circles per row and number of rows.
    square_mm : float
        Square side (chessboard), centre spacing (circles) or OpenCV's grid
        unit (asymmetric circles; see the module documentation), mm.
    """

    kind: str
    cols: int
    rows: int
    square_mm: float

    def __post_init__(self):
        if self.kind not in BOARD_KINDS:
            raise ValueError(f"board kind {self.kind!r} is not one of {', '.join(BOARD_KINDS)}")
        if self.cols < 2 or self.rows < 2:
            raise ValueError(f"a board needs at least 2x2 points, got {self.cols}x{self.rows}")
        if not (np.isfinite(self.square_mm) and self.square_mm > 0):
            raise ValueError(f"the square size must be a positive number of mm, got {self.square_mm}")

    @property
    def n_points(self) -> int:
        """Number of target points (corners or circles)."""
        return self.cols * self.rows

    @property
    def pattern_size(self) -> tuple[int, int]:
        """(points per row, rows), as OpenCV's detectors take it."""
        return (self.cols, self.rows)

    @property
    def symmetric(self) -> bool:
        """True when the target looks the same after a half turn.

        Then nothing in the image tells which end is which, and two cameras
        may number the points from opposite ends. A chessboard is safe when
        one of its counts of inner corners is odd and the other even (its
        corner squares then have different colours).
        """
        if self.kind == "chessboard":
            return (self.cols + self.rows) % 2 == 0
        return self.kind == "circles"

    def describe(self) -> str:
        """Short description for messages, e.g. ``11x8 chessboard``."""
        name = {"chessboard": "chessboard", "circles": "circle grid",
                "asymmetric-circles": "asymmetric circle grid"}[self.kind]
        return f"{self.cols}x{self.rows} {name}"

    def object_points(self) -> np.ndarray:
        """Board points in the board plane, mm.

        Returns
        -------
        points : ndarray, shape (cols * rows, 3), float64
            (x, y, 0) mm in detection order (row by row).
        """
        j, i = np.mgrid[0:self.rows, 0:self.cols]
        i = i.ravel().astype(float)
        j = j.ravel().astype(float)
        if self.kind == "asymmetric-circles":
            x = (2.0 * i + j % 2) * self.square_mm
        else:
            x = i * self.square_mm
        return np.stack([x, j * self.square_mm, np.zeros_like(x)], axis=-1)

    def to_dict(self) -> dict:
        """The rig.json ``board`` entry."""
        return {"kind": self.kind, "cols": int(self.cols), "rows": int(self.rows), "square_mm": float(self.square_mm)}


@dataclass(frozen=True)
class Detection:
    """The result of looking for the target in one image.

    Attributes
    ----------
    found : bool
        True when every point of the target was found.
    points : ndarray (N, 2) float64 px, or None
        Image points in :meth:`Board.object_points` order.
    reason : str
        Why the target was not found ("" when found).
    """

    found: bool
    points: np.ndarray | None = None
    reason: str = ""


def parse_board_size(text: str) -> tuple[int, int]:
    """Parse ``COLSxROWS`` (e.g. ``11x8``) into two whole numbers.

    Raises
    ------
    ValueError
        With a message that says what is expected.
    """
    m = _BOARD_SIZE.match(str(text))
    if not m:
        raise ValueError(f"{text!r} is not COLSxROWS (two whole numbers such as 11x8)")
    cols, rows = int(m.group(1)), int(m.group(2))
    if cols < 2 or rows < 2:
        raise ValueError(f"{text!r}: a board needs at least 2 columns and 2 rows of points")
    return cols, rows


def find_target(image, board: Board, *, refine: bool = True) -> Detection:
    """Find the whole target in one greyscale image.

    Isolated hot and dead pixels are repaired first (:func:`repair_defects`),
    for the detector and for the corner refinement alike; a view without
    them reaches the detector unchanged.

    Parameters
    ----------
    image : ndarray (height, width)
        uint8, uint16 or float samples (any scale).
    board : Board
    refine : bool
        Refine chessboard corners with ``cv2.cornerSubPix`` on the full-
        precision image (see ``SUBPIX_WINDOW_FRACTION``). Circle centres are
        the centroids that ``cv2.findCirclesGrid``'s blob detector returns;
        note that the centroid of a circle's image is not exactly the image
        of its centre under perspective (a bias that grows with the circle's
        size and tilt; from memory, Heikkilä 2000), which is one reason to
        prefer chessboards for accurate work.

    Returns
    -------
    Detection
        Points in px (origin at the centre of the top-left pixel), in
        :meth:`Board.object_points` order, or the reason for failure.
    """
    a = np.asarray(image)
    if a.ndim != 2:
        raise ValueError(f"expected a greyscale image (height, width), got shape {a.shape}")
    a = repair_defects(a)[0]
    img8, span = _to_uint8(a)
    if span <= 0:
        return Detection(False, None, "the image is uniform (no contrast)")
    if board.kind == "chessboard":
        pts = _find_chessboard(img8, board)
        if pts is None:
            return Detection(False, None, f"no {board.describe()} found")
        if refine:
            pts = _refine_corners(a, pts, board)
    else:
        flags = cv2.CALIB_CB_ASYMMETRIC_GRID if board.kind == "asymmetric-circles" else cv2.CALIB_CB_SYMMETRIC_GRID
        ok, pts = cv2.findCirclesGrid(img8, board.pattern_size, flags=flags, blobDetector=_blob_detector(a.shape))
        if not ok or pts is None:
            return Detection(False, None, f"no {board.describe()} found")
        pts = pts.reshape(-1, 2).astype(np.float64)
    if pts.shape != (board.n_points, 2) or not np.all(np.isfinite(pts)):
        return Detection(False, None, f"the detector returned an incomplete {board.describe()}")
    h, w = a.shape
    if np.any(pts < -0.5) or np.any(pts[:, 0] > w - 0.5) or np.any(pts[:, 1] > h - 0.5):
        return Detection(False, None, "target points outside the image")
    return Detection(True, pts, "")


def _find_chessboard(img8: np.ndarray, board: Board):
    """The sector-based detector at full size, then on images reduced 2 and 4 times.

    A strongly defocused view (blur sigma of 3 px or more on part of the
    board) defeats the detector at full size, because its sectors are tuned
    to sharp corners; reduced by pixel averaging (``cv2.INTER_AREA``) the
    same blur spans half or a quarter as many pixels, and there the board is
    found. The corners are then refined at full size by ``cv2.cornerSubPix``
    as usual, so only finding, not accuracy, comes from the reduced image.
    A view found at full size never reaches the reduced ones.

    Returns
    -------
    points : ndarray (N, 2) float64 px (full-size pixel coordinates) or None.
    """
    h, w = img8.shape
    for factor in (1, 2, 4):
        if min(h, w) / factor < 120:  # too few pixels per square left to find anything
            break
        # Cropped to whole blocks, so that the reduction is exactly factor x factor averaging.
        small = img8 if factor == 1 else cv2.resize(img8[:h - h % factor, :w - w % factor],
                                                    (w // factor, h // factor), interpolation=cv2.INTER_AREA)
        ok, pts = cv2.findChessboardCornersSB(small, board.pattern_size, flags=CHESSBOARD_FLAGS)
        if ok and pts is not None:
            # Pixel k of the reduced image averages full-size pixels factor*k ... factor*k + factor - 1,
            # so its centre is at factor*k + (factor - 1) / 2 (centre-of-pixel origin).
            return pts.reshape(-1, 2).astype(np.float64) * factor + (factor - 1) / 2.0
    return None


def repair_defects(image, threshold: float = DEFECT_THRESHOLD):
    """Replace isolated hot and dead pixels (stuck near full scale or zero).

    Each pixel is predicted from each pair of opposite neighbours
    (horizontal, vertical, the two diagonals) as the pair's mean; a pixel
    that every prediction misses by more than ``threshold`` times the
    image's data span (0.1 to 99.9 percentile) is a defect. In a focused,
    band-limited view of a target one pair always runs along the local edge
    and predicts the pixel well: on the rendered target views (lens PSF
    0.6 px, shot and read noise) no pixel misses by more than 0.2 of the
    span, so the default 0.3 leaves clean views untouched. A stuck pixel on
    a white square, or a hot one on a black square, misses by more than half
    the span and is replaced; a dead pixel on black or a hot one on an
    unshaded white square, which are barely off their true value, may stay.

    Parameters
    ----------
    image : ndarray (height, width)
        Greyscale samples, any dtype and scale.
    threshold : float
        Margin, as a fraction of the data span.

    Returns
    -------
    repaired : ndarray (height, width)
        ``image`` itself (the same object) when no defect was found,
        otherwise a float32 copy with the defects filled from the pair of
        neighbours that agree best (along the edge).
    defects : ndarray (height, width) bool
        The pixels that were replaced.

    Notes
    -----
    Two defects side by side see each other as a neighbour and may escape;
    at 1e-4 to 5e-4 stuck pixels per pixel (typical of machine-vision
    sensors; from memory) such pairs are rare. A dead pixel exactly at an
    X-junction looks like the black squares' diagonal and also escapes; it
    pulls that corner by up to a few hundredths of a px.
    """
    a = np.asarray(image)
    f = a.astype(np.float32)
    lo, hi = np.percentile(f, [0.1, 99.9])
    t = threshold * (hi - lo)
    if not (np.isfinite(t) and t > 0):
        return a, np.zeros(a.shape, bool)
    p = np.pad(f, 1, mode="reflect")
    c = p[1:-1, 1:-1]
    # Predictions of the centre from its neighbours: the mean of each pair of
    # opposite neighbours (horizontal, vertical, two diagonals). Along an edge
    # one of them is right; a pixel none of them explains is a defect.
    pairs = [(p[1:-1, :-2], p[1:-1, 2:]), (p[:-2, 1:-1], p[2:, 1:-1]), (p[:-2, :-2], p[2:, 2:]),
             (p[:-2, 2:], p[2:, :-2])]
    pred = np.stack([(u + v) * 0.5 for u, v in pairs])
    bad = np.min(np.abs(c[None] - pred), axis=0) > t
    if not bad.any():
        # Clean data stays bit-for-bit what it was, so the detector sees the same 8-bit image.
        return a, bad
    # Fill along the direction whose two neighbours agree (along an edge, not
    # across it); where no pair agrees (an X-junction) with the mean of all
    # eight, which a saddle m + k x y of any orientation gives exactly as m.
    spread = np.stack([np.abs(u - v) for u, v in pairs])
    best = np.argmin(spread, axis=0)
    fill = np.take_along_axis(pred, best[None], axis=0)[0]
    fill = np.where(np.min(spread, axis=0) <= t, fill, pred.mean(axis=0))
    out = f.copy()
    out[bad] = fill[bad]
    return out, bad


def _to_uint8(a: np.ndarray):
    """8-bit copy for the detectors (they take 8-bit images only), and the data span."""
    if a.dtype == np.uint8:
        return a, int(a.max()) - int(a.min())
    f = a.astype(np.float64)
    # Percentiles, not min/max: a few hot pixels must not squash the target's contrast.
    lo, hi = np.percentile(f, [0.1, 99.9])
    if not np.isfinite(lo) or not np.isfinite(hi) or hi <= lo:
        return np.zeros(a.shape, np.uint8), 0.0
    out = np.clip((f - lo) * (255.0 / (hi - lo)), 0, 255)
    return np.rint(out).astype(np.uint8), hi - lo


def _refine_corners(image: np.ndarray, pts: np.ndarray, board: Board) -> np.ndarray:
    grid = pts.reshape(board.rows, board.cols, 2)
    spacing = min(np.linalg.norm(np.diff(grid, axis=0), axis=2).min(),
                  np.linalg.norm(np.diff(grid, axis=1), axis=2).min())
    half = int(np.clip(round(SUBPIX_WINDOW_FRACTION * spacing), 2, 30))
    f = image.astype(np.float32)
    refined = cv2.cornerSubPix(f, pts.reshape(-1, 1, 2).astype(np.float32), (half, half), (-1, -1), _SUBPIX_CRITERIA)
    refined = refined.reshape(-1, 2).astype(np.float64)
    # A corner that ran off by more than a third of the spacing locked onto
    # something else: keep the detector's estimate there.
    moved = np.linalg.norm(refined - pts, axis=1) > spacing / 3
    refined[moved] = pts[moved]
    return refined


def _blob_detector(shape):
    # OpenCV's default blob sizes (25 to 5000 px^2) suit VGA images; allow
    # circles from a few px across up to a tenth of the image's smaller side.
    p = cv2.SimpleBlobDetector_Params()
    p.minArea = 12.0
    p.maxArea = float(np.pi * (0.1 * min(shape)) ** 2)
    p.minDistBetweenBlobs = 3.0
    return cv2.SimpleBlobDetector_create(p)
