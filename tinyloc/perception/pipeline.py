"""One object per calibration that turns a camera frame into bird's-eye evidence, frame after frame.

>>> perc = Perception(camera)                 # once: lookups, kernels warmed, buffers allocated
>>> grid = perc.new_grid()                    # once: the caller owns the grid
>>> status = perc.process(frame_bgr, gravity, grid)   # every frame; never raises on a bad frame

The per-frame path allocates nothing of frame size: the frame is area-resized into a
workspace, segmented by numba kernels and projected into the caller's grid. A frame that
cannot be used (missing, wrong size or type, black, saturated, NaN gravity, no ground in
view) leaves the grid zeroed (zero visibility) with ``grid.status`` saying why, and
``process`` returns the same text.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ._kernels import frame_stats
from .gravity import level_from_base
from .labels_in import LabelImporter
from .overhead import BevGrid, OverheadParams, OverheadProjector
from .segment import SegmentParams, Segmenter


@dataclass(frozen=True)
class PerceptionParams:
    """Parameters of the whole frame -> evidence path.

    Attributes
    ----------
    segment, overhead : SegmentParams, OverheadParams
    max_tilt_deg : float
        Base tilt (from gravity) beyond which a frame is refused.
    dark_v : float
        A frame whose mean HSV value (0..1) is below this is "too dark".
    saturated_share : float
        A frame with more than this share of pixels at 250+ in every channel is "saturated".
    min_ground_share : float
        Below this share of segmentation pixels under the horizon the frame has "no ground in view".
    """

    segment: SegmentParams = field(default_factory=SegmentParams)
    overhead: OverheadParams = field(default_factory=OverheadParams)
    max_tilt_deg: float = 30.0
    dark_v: float = 0.04
    saturated_share: float = 0.9
    min_ground_share: float = 0.02


class Perception:
    """Segmentation + overhead projection for one calibrated camera.

    Parameters
    ----------
    camera : CameraModel
        Calibration at the frame size the robot delivers, with its mount.
    params : PerceptionParams
    warm_up : bool
        Run one synthetic frame through every kernel now, so the first real frame is not slow.
    """

    def __init__(self, camera, params: PerceptionParams = PerceptionParams(), *, warm_up: bool = True):
        self.camera = camera
        self.params = params
        self.frame_size = (camera.width, camera.height)
        self.segmenter = Segmenter(self.frame_size, params.segment)
        sw, sh = self.segmenter.size
        self.camera_seg = camera.scaled(sw, sh)
        self.projector = OverheadProjector(self.camera_seg, params.overhead)
        self._level = np.eye(3)
        self._hrow = np.empty(sw)
        self.last_status = "empty"
        self.last_feet = 0
        self._importer = None
        if warm_up:
            # a grey sky above the level horizon and lighter ground below it, so that the conditional
            # rules (the sky by colour needs a sky colour that ends at the horizon) compile too
            frame = np.full((camera.height, camera.width, 3), 160, np.uint8)
            r = float(np.clip(np.median(self.projector.hrow_level), 0, sh - 1))
            frame[:int((r + 0.5) * camera.height / sh)] = 90
            self.process(frame, None, self.new_grid())

    def new_grid(self) -> BevGrid:
        """A zeroed grid of the configured geometry (allocate once, pass to every :meth:`process`)."""
        return self.params.overhead.new_grid()

    @property
    def probs(self) -> np.ndarray:
        """Class probabilities (C, h, w) of the last frame (workspace view)."""
        return self.segmenter.probs

    @property
    def labels(self) -> np.ndarray:
        """Arg-max labels (h, w) of the last frame (workspace view)."""
        return self.segmenter.labels

    @property
    def horizon(self) -> np.ndarray:
        """Horizon row per segmentation column used for the last frame."""
        return self._hrow

    def check_frame(self, frame) -> str:
        """"ok" or the reason the frame cannot be used (no exception)."""
        if frame is None:
            return "bad-frame: no image (unreadable or corrupted file?)"
        if not isinstance(frame, np.ndarray):
            return f"bad-frame: not an image array ({type(frame).__name__})"
        if frame.dtype != np.uint8:
            return f"bad-frame: pixel type {frame.dtype}, expected uint8"
        if frame.ndim == 2 or (frame.ndim == 3 and frame.shape[2] == 1):
            return "bad-frame: grayscale; the segmenter needs colour (BGR)"
        if frame.ndim != 3 or frame.shape[2] != 3:
            return f"bad-frame: shape {frame.shape}, expected (H, W, 3) BGR"
        w, h = self.frame_size
        if frame.shape[0] != h or frame.shape[1] != w:
            return f"bad-frame: size {frame.shape[1]}x{frame.shape[0]}, the calibration is for {w}x{h}"
        return "ok"

    def process(self, frame, gravity, out: BevGrid) -> str:
        """Segment ``frame`` and write its bird's-eye evidence into ``out``.

        Parameters
        ----------
        frame : ndarray (H, W, 3) uint8 BGR
            At the calibration's size.
        gravity : array_like (3,) or None
            Accelerometer specific force in the base frame (FLU, m/s^2), or None without an IMU.
        out : BevGrid
            Caller-owned grid (from :meth:`new_grid`); overwritten.

        Returns
        -------
        str
            "ok" or the reason the frame gave no evidence (also in ``out.status``).
        """
        st = self.check_frame(frame)
        if st != "ok":
            return self._fail(out, st)
        small = self.segmenter.small
        level, gst = level_from_base(gravity, max_tilt_deg=self.params.max_tilt_deg, out=self._level)
        if gst.startswith("bad"):
            return self._fail(out, gst)
        tilted = gst == "ok"
        hrow = self.projector.horizon(level, self._hrow) if tilted else self._copy_level_horizon()
        sh = small.shape[0]
        below = float(np.clip(sh - 1 - hrow, 0, sh).mean()) / sh
        if below < self.params.min_ground_share:
            return self._fail(out, "no-ground: the camera sees no ground (pointing at the sky?)")
        frame_c = frame if frame.flags.c_contiguous else np.ascontiguousarray(frame)
        probs, labels = self.segmenter.run(frame_c, hrow)
        v, sat = frame_stats(small)
        if v < self.params.dark_v:
            return self._fail(out, f"bad-frame: too dark (mean value {v:.3f})")
        if sat > self.params.saturated_share:
            return self._fail(out, f"bad-frame: saturated ({100 * sat:.0f} % of pixels white)")
        self.last_feet = self.projector.project(probs, labels, level, hrow, out, tilted=tilted,
                                                lab=self.segmenter.lab)
        out.status = "ok"
        self.last_status = "ok"
        if not out.visible.any():
            return self._fail(out, "no-ground: nothing projected (all sky or obstacles, or out of range)")
        return "ok"

    def process_labels(self, label_img, gravity, out: BevGrid, lut: np.ndarray) -> str:
        """Like :meth:`process`, with an external label image instead of the built-in segmenter.

        Parameters
        ----------
        label_img : ndarray (H, W) uint8
            Another segmenter's class ids at the calibration's size.
        lut : ndarray (256,) uint8
            External id -> tinyloc class (:func:`tinyloc.perception.labels_in.mapping_lut`).
        """
        imp = self._importer
        if imp is None or imp.lut is not lut and not np.array_equal(imp.lut, lut):
            imp = self._importer = LabelImporter(self.frame_size, self.segmenter.size, lut)
        st = imp.check(label_img)
        if st != "ok":
            return self._fail(out, st)
        level, gst = level_from_base(gravity, max_tilt_deg=self.params.max_tilt_deg, out=self._level)
        if gst.startswith("bad"):
            return self._fail(out, gst)
        tilted = gst == "ok"
        hrow = self.projector.horizon(level, self._hrow) if tilted else self._copy_level_horizon()
        probs, labels = imp.run(label_img)
        self.last_feet = self.projector.project(probs, labels, level, hrow, out, tilted=tilted)
        if not out.visible.any():
            return self._fail(out, "no-ground: nothing projected (all sky or obstacles, or out of range)")
        out.status = self.last_status = "ok"
        return "ok"

    def _copy_level_horizon(self) -> np.ndarray:
        self._hrow[:] = self.projector.hrow_level
        return self._hrow

    def _fail(self, out: BevGrid, status: str) -> str:
        out.clear(status)
        self.last_status = status
        self.last_feet = 0
        return status


__all__ = ["Perception", "PerceptionParams", "BevGrid", "OverheadParams", "SegmentParams"]
