"""Camera intrinsics from checkerboard photos (OpenCV corner detection and ``calibrateCamera``).

Each photo is checked before it is used: the board must be found whole (all inner
corners), must not touch the image border (a partial board gives biased corners),
and must be sharp enough (variance of the Laplacian inside the board's outline).
Rejected photos keep a one-line reason; the calibration reports the RMS
reprojection error over all used corners and the RMS error of each photo.

The pinhole + distortion model is OpenCV's (k1, k2, p1, p2, k3), the same one
:class:`tinyloc.camera.model.CameraModel` applies.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import math

import cv2
import numpy as np

from ..errors import CalibrationError
from .model import CameraModel, Mount


@dataclass(frozen=True)
class BoardSpec:
    """A checkerboard: number of inner corners along its width (cols) and height (rows), square size (m)."""

    cols: int
    rows: int
    square_m: float

    def __post_init__(self):
        if self.cols < 3 or self.rows < 3 or self.cols > 60 or self.rows > 60:
            raise CalibrationError(f"board {self.cols}x{self.rows}: needs 3..60 inner corners each way")
        if not (math.isfinite(self.square_m) and 0.0 < self.square_m < 10.0):
            raise CalibrationError(f"board square size {self.square_m} m is out of range (0 .. 10 m)")

    @property
    def pattern_size(self) -> tuple[int, int]:
        """(cols, rows) as OpenCV's pattern size wants it."""
        return (self.cols, self.rows)

    def object_points(self) -> np.ndarray:
        """(N, 3) float32 board-frame corner positions (m): x along cols, y along rows, z = 0, row-major."""
        jj, ii = np.meshgrid(np.arange(self.cols), np.arange(self.rows))
        pts = np.zeros((self.rows * self.cols, 3), np.float32)
        pts[:, 0] = jj.ravel() * self.square_m
        pts[:, 1] = ii.ravel() * self.square_m
        return pts


def parse_board(text: str, square_m: float) -> BoardSpec:
    """Parse ``COLSxROWS`` (inner corners, e.g. ``9x6``) into a :class:`BoardSpec`."""
    parts = str(text).lower().split("x")
    try:
        cols, rows = (int(p) for p in parts)
    except ValueError:
        raise CalibrationError(f"--board: expected COLSxROWS inner corners such as 9x6, got {text!r}") from None
    return BoardSpec(cols, rows, float(square_m))


@dataclass(frozen=True)
class CalibrateParams:
    """Acceptance thresholds for calibration photos.

    Attributes
    ----------
    max_edge_px : float
        Largest accepted mean width of the board's black/white edges (pixels, from
        ``cv2.estimateChessboardSharpness``, 10 %-90 % rise). A sharp photo gives about 1.5-2.5 px; a
        defocus of 2 px (Gaussian sigma) gives about 5 px and a photo that blurred corrupts corner positions.
    border_px : float
        Corners closer than this to the image border mark the board as partial (pixels).
    min_images : int
        Photos that must survive the checks before calibrating.
    max_image_rms_px : float
        After a first solve, photos whose own RMS error exceeds this are dropped and the solve repeated.
    """

    max_edge_px: float = 4.5
    border_px: float = 4.0
    min_images: int = 4
    max_image_rms_px: float = 2.0


@dataclass
class BoardView:
    """The outcome of looking for the board in one photo."""

    name: str
    ok: bool
    reason: str = ""
    corners: np.ndarray | None = None  # (N, 1, 2) float32 pixels
    edge_px: float = math.nan  # mean edge width, pixels (lower is sharper)
    rms_px: float = math.nan  # filled in after calibration


@dataclass
class IntrinsicsResult:
    """A calibration: the camera, RMS reprojection error (px), and what happened to each photo."""

    camera: CameraModel
    rms_px: float
    views: list[BoardView] = field(default_factory=list)

    @property
    def used(self) -> list[BoardView]:
        return [v for v in self.views if v.ok]

    @property
    def rejected(self) -> list[BoardView]:
        return [v for v in self.views if not v.ok]


def board_edge_width(gray: np.ndarray, board: "BoardSpec", corners: np.ndarray) -> float:
    """Mean width (pixels) of the board's edges, as ``cv2.estimateChessboardSharpness`` measures it."""
    try:
        res = cv2.estimateChessboardSharpness(gray, board.pattern_size, corners)
    except cv2.error:
        return math.inf
    return float(res[0][0])


def find_board(gray: np.ndarray, board: BoardSpec, *, name: str = "image",
               params: CalibrateParams = CalibrateParams()) -> BoardView:
    """Detect the board's inner corners to sub-pixel accuracy, or say why the photo is not usable.

    Parameters
    ----------
    gray : ndarray (H, W) uint8
        The photo in grey levels.
    board : BoardSpec
        Which board to look for.
    """
    if gray.ndim != 2 or gray.dtype != np.uint8:
        return BoardView(name, False, "not an 8-bit grey image")
    flags = cv2.CALIB_CB_ADAPTIVE_THRESH | cv2.CALIB_CB_NORMALIZE_IMAGE
    found, corners = cv2.findChessboardCorners(gray, board.pattern_size, flags=flags)
    if not found or corners is None or len(corners) != board.cols * board.rows:
        return BoardView(name, False, f"board {board.cols}x{board.rows} not found whole "
                                      "(partial, occluded, wrong --board size or too blurred)")
    h, w = gray.shape
    c = corners.reshape(-1, 2)
    margin = float(c[:, 0].min()), float(w - 1 - c[:, 0].max()), float(c[:, 1].min()), float(h - 1 - c[:, 1].max())
    if min(margin) < params.border_px:
        return BoardView(name, False, f"board touches the image border ({min(margin):.1f} px): partial board")
    edge = board_edge_width(gray, board, corners)
    if not edge <= params.max_edge_px:
        return BoardView(name, False, f"blurred: edges {edge:.1f} px wide (limit {params.max_edge_px:g} px)",
                         edge_px=edge)
    # Half-window from the corner spacing: large enough to see the saddle, small enough to stay in one square.
    grid = c.reshape(board.rows, board.cols, 2)
    spacing = min(float(np.min(np.linalg.norm(np.diff(grid, axis=1), axis=2))),
                  float(np.min(np.linalg.norm(np.diff(grid, axis=0), axis=2))))
    win = int(max(2, min(11, spacing * 0.35)))
    crit = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 50, 1e-4)
    corners = cv2.cornerSubPix(gray, corners.astype(np.float32), (win, win), (-1, -1), crit)
    return BoardView(name, True, "", corners, edge)


def _to_gray(img: np.ndarray) -> np.ndarray:
    if img.ndim == 3:
        return cv2.cvtColor(img, cv2.COLOR_BGR2GRAY)
    return img


def calibrate_intrinsics(images, board: BoardSpec, *, names=None, params: CalibrateParams = CalibrateParams(),
                         mount: Mount | None = None, progress=None) -> IntrinsicsResult:
    """Calibrate intrinsics and distortion from checkerboard photos.

    Parameters
    ----------
    images : sequence of ndarray
        Photos (BGR or grey, uint8), all the same size.
    board : BoardSpec
        The board's inner corners and square size.
    names : sequence of str, optional
        Names used in reasons and reports (file names).
    mount : Mount, optional
        Mount to store in the result (calibration does not measure it).
    progress : callable(str), optional
        Called with a line of progress per photo.

    Returns
    -------
    IntrinsicsResult

    Raises
    ------
    CalibrationError
        Fewer than ``params.min_images`` usable photos, or photos of different sizes.
    """
    images = list(images)
    names = list(names) if names is not None else [f"image {i}" for i in range(len(images))]
    size = None
    views: list[BoardView] = []
    for img, name in zip(images, names):
        gray = _to_gray(np.asarray(img))
        if size is None:
            size = gray.shape[::-1]
        if gray.shape[::-1] != size:
            views.append(BoardView(name, False, f"size {gray.shape[1]}x{gray.shape[0]} differs from "
                                                f"{size[0]}x{size[1]} of the first photo"))
            continue
        v = find_board(gray, board, name=name, params=params)
        views.append(v)
        if progress:
            progress(f"{name}: " + ("board found" if v.ok else f"rejected: {v.reason}"))
    good = [v for v in views if v.ok]
    if len(good) < params.min_images:
        raise CalibrationError(f"only {len(good)} usable board photos (need {params.min_images}); "
                               + "; ".join(f"{v.name}: {v.reason}" for v in views if not v.ok)[:400])
    objp = board.object_points()
    for _ in range(2):  # solve, drop photos far worse than the rest, solve again
        obj = [objp] * len(good)
        img_pts = [v.corners for v in good]
        rms, k, dist, rvecs, tvecs = cv2.calibrateCamera(obj, img_pts, size, None, None)
        for v, rv, tv in zip(good, rvecs, tvecs):
            proj, _ = cv2.projectPoints(objp, rv, tv, k, dist)
            v.rms_px = float(np.sqrt(np.mean(np.sum((proj.reshape(-1, 2) - v.corners.reshape(-1, 2)) ** 2, axis=1))))
        bad = [v for v in good if v.rms_px > params.max_image_rms_px]
        if not bad or len(good) - len(bad) < params.min_images:
            break
        for v in bad:
            v.ok = False
            v.reason = f"reprojection error {v.rms_px:.2f} px > {params.max_image_rms_px:g} px after the first solve"
        good = [v for v in good if v.ok]
    d = [float(x) for x in np.asarray(dist).ravel()[:5]] + [0.0] * max(0, 5 - np.asarray(dist).size)
    cam = CameraModel(width=int(size[0]), height=int(size[1]), fx=float(k[0, 0]), fy=float(k[1, 1]),
                      cx=float(k[0, 2]), cy=float(k[1, 2]), dist=tuple(d), mount=mount or Mount())
    return IntrinsicsResult(cam, float(rms), views)
