"""Segmentation to bird's-eye evidence: the per-calibration lookup and the per-frame projection.

The grid is the robot-centred raster fixed by docs/interfaces.md: ``evidence[K, h, w]`` (one
channel per map class), ``free`` and ``visible``, laid out as the map would be with the robot
facing east: column index grows along body +x (forward), row index along body -y; body point
(xf, yl) sits at ``col = origin_col + xf / res_m``, ``row = origin_row - yl / res_m``.

Ground classes (road, sidewalk, grass, parking, water) are gathered: each cell centre, a point
on flat ground in the gravity-levelled frame, is projected through the camera (with its
distortion) into the segmentation raster, and the class probabilities there are sampled
bilinearly. Cells further than ``max_range_m``, outside the picture, above the horizon or whose
pixel shows something other than ground are not seen. Seen ground is also free space: negative
evidence for the vertical classes.

Vertical classes (building, fence, tree, pole) are scattered: in each image column, scanning up
from the bottom, each run of a vertical class standing directly on seen ground marks that object's
foot (the lowest such run is the nearest object; runs further up stand further away); the ray through
the foot (sub-pixel, where the class probability crosses 0.5) meets the ground at the object's range,
and the evidence is written there and ``building_depth_m`` (``object_depth_m`` for thin objects)
beyond it along the ray (a building's from ``building_start_m`` behind the foot). An object resting
on another in the picture (a house behind a hedge) has no visible foot and is not placed. Building
checks: a building run lower than ``min_building_height_m`` at its range (a vehicle, a fence) becomes
``low_building_as`` (on by default); one narrower than ``min_building_width_m`` (a trunk, a pole) is
placed as a tree trunk (off); a tall run whose base's colour its upper part does not share is another
object in front of a facade (``stack_share``, on), and a narrow run under a crown a trunk
(``trunk_width_m``, on).

The lookup (cell centre -> pixel) is computed once per calibration for a level base; a frame
whose gravity vector tilts the base gets its own lookup, recomputed in place by a kernel
(a 64 x 64 grid is 4096 projections, tens of microseconds).
"""

from __future__ import annotations

from dataclasses import dataclass
import math

import numpy as np

from ..classes import BUILDING, CLASSES, DYNAMIC, FENCE, NUM_MAP_CLASSES, TREE
from ..errors import InputError
from . import _kernels as K


@dataclass
class BevGrid:
    """Bird's-eye evidence of one frame (docs/interfaces.md).

    Attributes
    ----------
    evidence : ndarray (NUM_MAP_CLASSES, h, w) float32
        Positive evidence 0..1 per map class.
    free : ndarray (h, w) float32
        Observed free ground 0..1 (negative evidence for vertical classes).
    visible : ndarray (h, w) float32
        1 where the camera saw the cell (ground or an object's foot), else 0.
    res_m : float
        Cell size (m), equal to the map's.
    origin_row, origin_col : float
        Continuous cell coordinates of the robot base origin.
    status : str
        "ok", or the reason the frame gave no evidence (then every array is zero).
    """

    evidence: np.ndarray
    free: np.ndarray
    visible: np.ndarray
    res_m: float = 0.5
    origin_row: float = 32.0
    origin_col: float = 0.0
    status: str = "empty"

    @classmethod
    def empty(cls, h: int = 64, w: int = 64, *, res_m: float = 0.5, origin_row: float = 32.0,
              origin_col: float = 0.0) -> "BevGrid":
        """A zeroed grid (allocates; make one per run and reuse it every frame)."""
        return cls(np.zeros((NUM_MAP_CLASSES, h, w), np.float32), np.zeros((h, w), np.float32),
                   np.zeros((h, w), np.float32), float(res_m), float(origin_row), float(origin_col), "empty")

    @property
    def shape(self) -> tuple[int, int]:
        return self.free.shape

    def clear(self, status: str = "empty") -> "BevGrid":
        """Zero every array in place and set the status."""
        self.evidence.fill(0.0)
        self.free.fill(0.0)
        self.visible.fill(0.0)
        self.status = status
        return self

    def cell_of(self, xf_m, yl_m):
        """(row, col) continuous cell coordinates of body point(s) (xf forward, yl left), metres."""
        return self.origin_row - np.asarray(yl_m) / self.res_m, self.origin_col + np.asarray(xf_m) / self.res_m

    def cell_centres(self) -> tuple[np.ndarray, np.ndarray]:
        """Body coordinates (xf, yl) of every cell centre, each (h, w), metres."""
        h, w = self.shape
        rr, cc = np.mgrid[0:h, 0:w]
        return (cc + 0.5 - self.origin_col) * self.res_m, (self.origin_row - (rr + 0.5)) * self.res_m


@dataclass(frozen=True)
class OverheadParams:
    """Bird's-eye grid geometry and projection limits.

    Attributes
    ----------
    rows, cols : int
        Grid size (cells). Defaults 64 x 64 at 0.5 m cover 32 m ahead and +-16 m sideways.
    res_m : float
        Cell size; must equal the map's resolution.
    origin_row, origin_col : float
        Robot base origin in continuous cell coordinates.
    max_range_m : float
        Ground and objects further than this (horizontal distance from the base origin) are ignored:
        one image row spans about range^2 / camera height x the pixel's angle, so far ground is coarse.
    building_depth_m : float
        How far behind a building's foot (its facade) its evidence is written (m): a facade implies a
        footprint behind it, and the map holds footprints.
    object_depth_m : float
        The same for thin objects (fence, tree trunk, pole; also where vehicles and people stand).
    building_start_m : float
        Where a building's evidence starts behind its foot along the ray (m): the facade is a plane at
        the foot's range, and the grid cell holding that line lies about half in front of it (0.25 m,
        half a default cell, in ``CHECKED_BUILDINGS``).
    min_building_height_m : float
        A building run must reach this high above the ground at its foot's range (m) or leave the
        picture at the top: lower things with a building's colours (vehicles, fences, hedges, walls;
        the camera cannot tell a low wall from a car) are placed as ``low_building_as``. 0 turns the
        check off.
    min_building_width_m : float
        ... and be at least this wide across its foot row (m, as seen at the foot's range): a taller but
        narrower run is a trunk or a pole and is placed as a tree trunk (``object_depth_m`` deep).
        0 turns the check off.
    low_building_as : str
        What a building run too low for a house becomes: "none" (not placed), "fence" (a wall, fence or
        hedge, ``object_depth_m`` deep) or "dynamic" (an obstacle without map evidence: free space is
        cleared, no class evidence).
    low_on_road_as : str
        ... when it stands on road or parking (the ground pixel under its foot): "" (as
        ``low_building_as``), "none", "fence" or "dynamic" (a parked vehicle; walls and hedges stand
        beside the carriageway).
    min_run_px : int
        A vertical class must cover this many pixels upward from its foot to count (segmentation pixels).
    stack_share, stack_dist, stack_base_m : float
        A separate object in front of a facade (0: off; needs the frame's colour, so the built-in
        segmenter only): when fewer than ``stack_share`` of a tall building run's pixels at least
        ``min_building_height_m`` up lie within ``stack_dist`` (Lab, 0.5 |dL| + |da| + |db|) of the mean
        colour of its base (0.2 m .. ``stack_base_m`` above the ground at the foot's range), the base is
        a car, bus or garden wall standing in front: it is placed as ``low_building_as`` and the facade,
        whose own foot is hidden, is not placed. It acts only with the height check on
        (``min_building_height_m`` above ``stack_base_m``), whose height bounds the upper part.
    stack_chroma : float
        ... and, when above 0, an upper pixel matches the base only if its hue distance |da| + |db|
        (Lab) to the base's mean is at most this too: a fence or wall as light as the facade behind it
        but of another hue (wood in front of grey render) is another object (0: off; ninth round,
        docs/perception.md; 6 by default, 0 before).
    trunk_width_m : float
        A tall building run narrower than this across the horizon row and topped by a tree crown is a
        trunk and placed as one (0: off).
    trunk_at_top : bool
        ... and so is one that leaves the picture at the top while the top is lower than
        ``min_building_height_m`` at its range (a near trunk whose crown is out of view; its height
        cannot be verified).
    """

    rows: int = 64
    cols: int = 64
    res_m: float = 0.5
    origin_row: float = 32.0
    origin_col: float = 0.0
    max_range_m: float = 20.0
    building_depth_m: float = 2.0
    object_depth_m: float = 0.5
    # The height check with low runs placed as fences is on (it raised the live loop's recall on the
    # tuning drives, docs/perception.md, "The live loop"); the start offset and the width check stay off
    # (the width check drops true facades; CHECKED_BUILDINGS has all three as first measured). The
    # object-in-front and trunk-under-a-crown checks are on: fewer false building cells on the tuning
    # drives and the rendered sites, loop recall up (docs/perception.md, "Building precision");
    # trunk_at_top stays off (the loop's medians got worse).
    building_start_m: float = 0.0
    min_building_height_m: float = 3.0
    min_building_width_m: float = 0.0
    low_building_as: str = "fence"
    low_on_road_as: str = ""
    min_run_px: int = 3
    stack_share: float = 0.2
    # 10 since the eighth round (was 15): fences and walls coloured near their facade were read as it
    # (tuning drives 11-17 and 25-30: mean recall 95.25 -> 99.05 %, docs/perception.md, "Eighth round")
    stack_dist: float = 10.0
    stack_base_m: float = 1.0
    # 6 since the ninth round (0 before): a wooden fence as light as the grey facade behind it was placed as
    # the facade at the fence's foot (tuning drives 11-17 and 25-30: mean recall 99.05 -> 99.17 %, mean
    # median 0.2257 -> 0.2243 m; drive 26 98.4 -> 100 %, 0.459 -> 0.440 m; docs/perception.md, "Ninth round")
    stack_chroma: float = 6.0
    trunk_width_m: float = 1.0
    trunk_at_top: bool = False

    def __post_init__(self):
        if not (4 <= self.rows <= 2048 and 4 <= self.cols <= 2048):
            raise InputError(f"bird's-eye grid {self.rows}x{self.cols} is out of range (4 .. 2048 cells)")
        if not (math.isfinite(self.res_m) and 0.01 <= self.res_m <= 10.0):
            raise InputError(f"bird's-eye resolution {self.res_m} m is out of range (0.01 .. 10 m)")
        if not (math.isfinite(self.max_range_m) and self.max_range_m > 0):
            raise InputError("max_range_m must be a positive number of metres")
        for name in ("building_depth_m", "object_depth_m", "building_start_m", "min_building_height_m",
                     "min_building_width_m", "stack_base_m", "trunk_width_m"):
            v = getattr(self, name)
            if not (math.isfinite(v) and 0.0 <= v <= 20.0):
                raise InputError(f"{name} must be within 0 .. 20 m")
        if self.low_building_as not in ("none", "fence", "dynamic"):
            raise InputError(f"low_building_as must be 'none', 'fence' or 'dynamic', got {self.low_building_as!r}")
        if self.low_on_road_as not in ("", "none", "fence", "dynamic"):
            raise InputError(f"low_on_road_as must be '', 'none', 'fence' or 'dynamic', got {self.low_on_road_as!r}")
        if not (math.isfinite(self.stack_share) and 0.0 <= self.stack_share <= 1.0):
            raise InputError("stack_share must be within 0 .. 1")
        if not (math.isfinite(self.stack_dist) and self.stack_dist > 0.0):
            raise InputError("stack_dist must be a positive Lab distance")
        if not (math.isfinite(self.stack_chroma) and self.stack_chroma >= 0.0):
            raise InputError("stack_chroma must be a Lab distance >= 0 (0: off)")
        if not 1 <= int(self.min_run_px) <= 100:
            raise InputError("min_run_px must be within 1 .. 100")

    def new_grid(self) -> BevGrid:
        """A zeroed grid of this geometry."""
        return BevGrid.empty(self.rows, self.cols, res_m=self.res_m, origin_row=self.origin_row,
                             origin_col=self.origin_col)


#: The building size checks and start offset as measured in docs/perception.md (pass as
#: ``OverheadParams(**CHECKED_BUILDINGS, res_m=...)``).
CHECKED_BUILDINGS = {"building_start_m": 0.25, "min_building_height_m": 3.0, "min_building_width_m": 1.0,
                     "low_building_as": "none"}
#: The projection as it was before the height check became the default (no building checks).
UNCHECKED_BUILDINGS = {"min_building_height_m": 0.0, "low_building_as": "none", "stack_share": 0.0,
                       "trunk_width_m": 0.0}
#: The projection of the previous round (height check with low runs as fences; no object-in-front or
#: trunk check).
PREVIOUS_BUILDINGS = {"stack_share": 0.0, "trunk_width_m": 0.0}
#: The object-in-front check's colour distance until the eighth round (``OverheadParams(**STACK_DIST_15)``).
STACK_DIST_15 = {"stack_dist": 15.0}
#: The object-in-front check without the hue limit, as until the ninth round (``OverheadParams(**STACK_CHROMA_OFF)``).
STACK_CHROMA_OFF = {"stack_chroma": 0.0}

# Ground classes: seen by their surface; vertical classes (and "dynamic") by their foot.
# Indexed by label value (256 entries so that 255 = "unlabelled" is neither).
IS_GROUND = np.zeros(256, np.uint8)
IS_VERTICAL = np.zeros(256, np.uint8)
TO_MAP = np.full(256, -1, np.int64)
for _c in CLASSES:
    IS_GROUND[_c.index] = (not _c.vertical) and _c.name != "sky"
    IS_VERTICAL[_c.index] = _c.vertical
    TO_MAP[_c.index] = _c.index if _c.index < NUM_MAP_CLASSES else -1
if IS_VERTICAL[DYNAMIC] != 1 or TO_MAP[DYNAMIC] != -1:
    raise RuntimeError("class table: 'dynamic' must be vertical and image-only")


def _fov_limits(camera) -> tuple[float, float]:
    """Largest |x/z| and |y/z| (undistorted) of the image border, with 5 % margin."""
    w, h = camera.width, camera.height
    t = np.linspace(0.0, 1.0, 33)
    zero, one = np.zeros_like(t), np.ones_like(t)
    border = np.concatenate([np.stack([t * (w - 1), zero], 1), np.stack([t * (w - 1), one * (h - 1)], 1),
                             np.stack([zero, t * (h - 1)], 1), np.stack([one * (w - 1), t * (h - 1)], 1)])
    xy = camera.undistort_pixels(border)
    return float(np.abs(xy[:, 0]).max() * 1.05), float(np.abs(xy[:, 1]).max() * 1.05)


class OverheadProjector:
    """The per-calibration lookup and the per-frame projection into a caller-owned :class:`BevGrid`.

    Parameters
    ----------
    camera_seg : CameraModel
        The camera at the segmentation raster's size (``camera.scaled(w, h)``), with its mount.
    params : OverheadParams
    """

    def __init__(self, camera_seg, params: OverheadParams = OverheadParams()):
        self.camera = camera_seg
        self.params = params
        cam = camera_seg
        w, h = cam.width, cam.height
        vv, uu = np.mgrid[0:h, 0:w]
        _, d = cam.pixel_rays_base(np.stack([uu.ravel(), vv.ravel()], 1).astype(np.float64))
        self.rays = np.ascontiguousarray(d.reshape(h, w, 3))
        r_bc, t_bc = cam.mount.base_from_camera()
        self._r_cb = np.ascontiguousarray(r_bc.T)
        self._t_base = np.asarray(t_bc, np.float64)
        self._off = -self._r_cb @ self._t_base
        self._k = np.array([cam.fx, cam.fy, cam.cx, cam.cy])
        self._dist = cam.dist_array.copy()
        self._xlim, self._ylim = _fov_limits(cam)
        g = params.new_grid()
        xf, yl = g.cell_centres()
        self.cells = np.ascontiguousarray(np.stack([xf.ravel(), yl.ravel(), np.zeros(xf.size)], 1))
        self.cell_range = np.hypot(self.cells[:, 0], self.cells[:, 1])
        # Lookup for a level base (the calibration's own), and per-frame scratch for tilted frames.
        self.lut_u = np.empty(len(self.cells))
        self.lut_v = np.empty(len(self.cells))
        self._m = np.empty((3, 3))
        self._cam_l = np.empty(3)
        self._level_u = np.empty_like(self.lut_u)
        self._level_v = np.empty_like(self.lut_v)
        self.hrow = np.empty(w)
        self._lut_for(np.eye(3), self.lut_u, self.lut_v)
        self.depth = np.zeros(256)
        self.start = np.zeros(256)
        for c in CLASSES:
            if c.vertical:
                self.depth[c.index] = params.building_depth_m if c.index == BUILDING else params.object_depth_m
        self.start[BUILDING] = params.building_start_m
        lowmap = {"none": -1, "fence": FENCE, "dynamic": DYNAMIC}
        low = lowmap[params.low_building_as]
        self._geom = np.array([params.min_building_height_m, params.min_building_width_m, cam.fx, TREE, low,
                               params.stack_share, params.stack_dist, params.stack_base_m, params.trunk_width_m,
                               1.0 if params.trunk_at_top else 0.0,
                               float(lowmap[params.low_on_road_as or params.low_building_as]),
                               1.0 if params.low_on_road_as else 0.0, params.stack_chroma],
                              np.float64)
        self._geom_nocolour = self._geom.copy()
        self._geom_nocolour[5] = 0.0  # a label image has no colour: no stacked-object check
        self._nolab = np.zeros((1, 1, 3), np.uint8)
        self._ray3 = np.empty(3)
        self.hrow_level = np.empty(w)
        K.horizon_rows(self.rays, np.eye(3), self.hrow_level)

    def _lut_for(self, level: np.ndarray, u_out: np.ndarray, v_out: np.ndarray) -> None:
        # optical = R_cb (R_lb^T p_level - t)  ->  m = R_cb R_lb^T, off = -R_cb t
        np.matmul(self._r_cb, level.T, out=self._m)
        k = self._k
        K.cells_to_pixels(self.cells, self._m, self._off, k[0], k[1], k[2], k[3], self._dist, self._xlim,
                          self._ylim, u_out, v_out)

    def horizon(self, level: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Horizon row per segmentation column for ``level`` (= level_from_base)."""
        out = self.hrow if out is None else out
        K.horizon_rows(self.rays, level, out)
        return out

    def lookup(self, level: np.ndarray, *, tilted: bool) -> tuple[np.ndarray, np.ndarray]:
        """Cell -> pixel lookup for this frame's attitude (the cached one when the base is level)."""
        if not tilted:
            return self.lut_u, self.lut_v
        self._lut_for(level, self._level_u, self._level_v)
        return self._level_u, self._level_v

    def project(self, probs: np.ndarray, labels: np.ndarray, level: np.ndarray, hrow: np.ndarray,
                out: BevGrid, *, tilted: bool = True, lab: np.ndarray | None = None) -> int:
        """Write this frame's evidence into ``out`` (cleared first). Returns the number of object feet placed.

        ``lab`` is the segmentation raster's Lab colour (h, w, 3) uint8, needed by the stacked-object
        check (``stack_share``); without it (label images) that check is skipped.
        """
        p = self.params
        if lab is None:
            lab, geom = self._nolab, self._geom_nocolour
        else:
            geom = self._geom
        out.clear("ok")
        pu, pv = self.lookup(level, tilted=tilted)
        K.ground_gather(probs, labels, pu, pv, self.cell_range, p.max_range_m, IS_GROUND, TO_MAP, hrow,
                        out.evidence, out.free, out.visible)
        np.matmul(level, self._t_base, out=self._cam_l)
        return K.vertical_contacts(labels, probs, self.rays, level, self._cam_l, hrow, IS_VERTICAL, IS_GROUND, TO_MAP,
                                   int(p.min_run_px), p.max_range_m, self.depth, self.start, geom, p.res_m,
                                   p.origin_row, p.origin_col, self._ray3, out.evidence, out.free, out.visible, lab)

    def pixel_to_ground(self, uv_seg, level: np.ndarray | None = None) -> np.ndarray:
        """Ground points (N, 2) body (xf, yl) metres under segmentation pixels (N, 2); NaN above the horizon.

        Plain NumPy (for tests and tools): the same geometry as the kernels.
        """
        lv = np.eye(3) if level is None else np.asarray(level)
        t, d = self.camera.pixel_rays_base(np.asarray(uv_seg, np.float64).reshape(-1, 2))
        d = d @ lv.T
        c = lv @ t
        with np.errstate(divide="ignore", invalid="ignore"):
            s = np.where(d[:, 2] < -1e-9, -c[2] / d[:, 2], np.nan)
        return np.stack([c[0] + s * d[:, 0], c[1] + s * d[:, 1]], 1)
