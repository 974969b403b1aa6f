"""Classical, hand-crafted segmentation of a camera frame into tinyloc's classes (per-class scores).

No learned network: a handful of colour and texture features (features.py) and the
position of each pixel relative to the horizon are combined by fixed rules whose
thresholds sit in :class:`SegmentParams`:

- **sky**: bright low-saturation or bluish (Lab b* < 0) pixels with little gradient energy, near or
  above the horizon, and 4-connected to the top row of the image (flood fill);
- **ground** (below the horizon): the surface under the robot is recognised by its colour distance
  to a patch at the bottom centre of the image (the robot stands on it), with smooth texture helping;
  other smooth ground is the other paved class (road vs sidewalk, chosen by the preset);
- **vegetation**: ExG - ExR above a threshold (Meyer and Neto 2008) gives grass below the horizon and
  trees above it; above the horizon, textured regions mixed with bright sky pixels (bare crowns
  against the sky: high local variance and a high share of bright pixels) also score as tree;
- **tree or building above the horizon** (the "street" preset): a small linear score fitted once on
  hand-crafted texture and colour features (the crown model, crown_model.py: orientation coherence,
  axis share, fine-texture ratio, saturation, ...) gives a tree probability, smoothed over a window;
  sky seen through a crown becomes tree by the share of tree around it and a second fitted score
  (the sky-gap model). With the models off the bright-mix crown rule above decides;
- **building**: what remains above the horizon (not sky, not vegetation); a facade is carried down
  across the horizon (everything nearer than the camera's height appears below it) while its colour
  holds and until the strong horizontal edge of its foot.

Work happens at reduced resolution (``width`` pixels wide, default 160): the frame is area-averaged
down first, which also removes sensor noise. Scores are normalised per pixel to sum to 1.

Two further rules exist but are off by default because they measured worse than leaving them out
(docs/perception.md): **poles** from thin vertical lines crossing the horizon (``pole_contrast``,
``pole_run``) and **fences** from building runs too low for a house (``fence_top``).

Known limits (measured, see docs/perception.md and docs/perception-real.md): bare trees and buildings
are still confused in part (real frames, held out, ``street`` with the context crown models: building
IoU 0.61, vegetation 0.57); overcast grey skies darker than ``sky_v`` are missed unless
``sky_ref_dist`` is on; road and sidewalk are told apart only by colour contrast to the robot's own
surface (``surface_auto`` picks that surface per frame, and shaded paving can pass for asphalt); with
the defaults poles, vehicles and people are not output.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import cv2
import numpy as np

from ..classes import CLASSES, NUM_CLASSES
from ..errors import InputError
from . import _kernels as K
from .crown_features import CrownContext, CrownExtras
from .crown_model import load_crown_model


@dataclass(frozen=True)
class SegmentParams:
    """Thresholds of the classical segmenter (dimensionless unless stated).

    Features are on 0..1 scales: V and S (HSV), gradient energy ``tex`` (grey-level change per pixel,
    0..1, summed over x and y), ``u`` = height above the horizon in image heights (negative below).
    Soft steps are logistic functions ``sig((x - x0) / w)``.
    """

    width: int = 160  # segmentation width (px); height keeps the frame's aspect
    horizon_frac: float = 0.56  # horizon row / image height when no camera model is given
    tex_window: int = 5  # window of the gradient-energy mean (px at segmentation size)
    mix_window: int = 3  # window of the bright-share and variance statistics (px)
    sky_tex: float = 0.251  # sky is smoother than this
    sky_v: float = 0.704  # ... and brighter than this (HSV value) with saturation below sky_s
    sky_s: float = 0.04823
    sky_blue: float = 1.918  # ... or bluer than b* < -sky_blue (Lab units) with value above sky_v2
    sky_v2: float = 0.591
    sky_below: float = 0.0098  # sky may reach this far (image heights) below the horizon
    green0: float = -0.02  # ExG - ExR vegetation threshold
    green_w: float = 0.07791
    ground_u0: float = 0.0  # ground starts this far (image heights) below the horizon
    ground_w: float = 0.00702
    smooth_tex: float = 0.314  # paved ground is smoother than this
    smooth_w: float = 0.013
    here_weight: float = 2.197  # weight of the surface under the robot
    other_weight: float = 0.206  # weight of the other paved surface
    grass_weight: float = 0.58
    building_weight: float = 0.576
    tree_weight: float = 1.077
    crown_weight: float = 0.312
    ground_floor: float = 0.06525  # score any ground pixel keeps for "surface under the robot"
    ref_l_weight: float = 0.245  # weight of lightness in the colour distance to the robot's surface
    ref_dist: float = 13.65  # colour distance (Lab units) still counted as the same surface
    ref_w: float = 2.548
    crown_bright: float = 0.06356  # share of bright pixels that makes a textured patch a crown
    crown_var: float = 0.0098  # local grey-level variance of a crown (0..1 units)
    crown_var_w: float = 0.00203
    tree_low: float = 1.0  # how much green below the horizon counts less as tree (1: none, it is grass)
    wall_dist: float = 13.125  # a facade continues below the horizon while its colour stays this close (Lab)
    wall_edge: float = 0.101  # ... and until a horizontal edge at least this strong (|dI/dy|, 0..1): its foot
    wall_ground: float = 12.421  # ... or a pixel this close (Lab distance) to the surface under the robot
    wall_reach: int = 0  # rows above the horizon pixel a facade may start, ground pixels between (0: off)
    wall_base: float = 0.0  # a carry stopped by a colour change goes on across a base band of one colour that
    #                         ends on the robot's surface, if at most this share of the camera height tall (0: off)
    wall_dark: float = 0.0  # ... or across the dark gap under an object: ground pixels no lighter than this share
    #                         of the facade's lightness, on lighter ground (0: off; seventh round)
    ground_power: float = 1.0  # the ground probabilities (road, sidewalk, grass; not the labels) are re-split by
    #                            their scores to this power, keeping their sum (1: off; eighth round)
    wall_median: bool = False  # the facade's colour for the carry is the per-channel median of its three lowest
    #                            building pixels instead of the mean of the three at the horizon (a window sill
    #                            at the horizon; eighth round)
    pole_contrast: float = 0.0  # a pole is a line this much darker/brighter than both sides (0: off)
    pole_run: float = 0.15  # ... at least this long (image heights), crossing the horizon
    fence_top: float = 0.0  # building runs ending less than this above the horizon are fences (0: off)
    robot_on: str = "road"  # surface under the robot: "road" or "sidewalk"
    sky_ref_dist: float = 0.0  # also sky: smooth pixels this close (Lab) to the top rows' colour (0: off) ...
    sky_ref_rows: float = 0.08  # ... taken from this band of top rows (image heights)
    sky_ref_share: float = 0.5  # ... when this share of the band is smooth and above the horizon,
    sky_ref_warm: float = 4.0  # ... its a* and b* are below this (grey or bluish),
    sky_ref_below: float = 0.2  # ... and fewer than this share of columns have that colour just below the horizon
    crown_model: str = "context"  # linear crown score (crown_model.py): "context", "default", "colour", a path, or "" (rule)
    crown_u_min: float = -0.05  # the crown score applies above this height (image heights) rel. to the horizon
    crown_threshold: float = 0.7  # above the horizon, tree where the smoothed crown probability exceeds this
    crown_smooth: int = 9  # window of the masked mean of the crown probability (px)
    crown_sky_share: float = 0.3  # sky pixels whose window holds more tree than this are crown gaps (0: off)
    crown_sky_window: int = 9  # ... window (px)
    gap_model: str = "default"  # sky-gap score (crown_model.GAP_FEATURES): "default", "colour", a path, or "" (off);
    #                             needs the crown model
    gap_threshold: float = 0.85  # a sky pixel whose gap probability exceeds this is tree ...
    gap_near: float = 0.02  # ... when at least this share of its 15 x 15 window is tree (near a crown)
    soil_b: float = 0.0  # ground whose b* exceeds the robot's surface's by this (Lab) is bare or dry ground:
    #                      grass class (0: off)
    soil_w: float = 1.5  # ... soft step width (Lab units)
    surface_auto: float = 0.0  # decide per frame which paved surface the robot is on: road when the other
    #                            paved ground in view is this much lighter (Lab L, 0..255) than the patch
    #                            under the robot, sidewalk when this much darker (0: off, keep robot_on)
    surface_u: float = -0.05  # ... counting paved pixels this far below the horizon (image heights)
    surface_share: float = 0.02  # ... and only when they cover this share of the raster
    surface_keep: bool = False  # ... otherwise keep the previous frame's decision (False: fall back to robot_on)
    surface_dark: float = 0.0  # ... but not "road" when this share of those pixels is clearly darker (0: off)
    surface_joints: float = 0.0  # the robot is also on the road when less than this share of the patch under
    #                              it shows paving joints (0: off; seventh round)

    def __post_init__(self):
        if not 32 <= int(self.width) <= 1024:
            raise InputError(f"segmentation width {self.width} px is out of range (32 .. 1024)")
        if self.robot_on not in ("road", "sidewalk"):
            raise InputError(f"robot_on must be 'road' or 'sidewalk', got {self.robot_on!r}")
        for f in fields(self):
            v = getattr(self, f.name)
            if isinstance(v, float) and not np.isfinite(v):
                raise InputError(f"segmentation parameter {f.name} must be finite")
        if not isinstance(self.wall_reach, (int, np.integer)) or isinstance(self.wall_reach, bool) \
                or not 0 <= self.wall_reach <= 8:
            raise InputError(f"wall_reach must be a whole number of rows within 0 .. 8, got {self.wall_reach!r}")
        if not 0.0 <= self.wall_base < 1.0:
            raise InputError(f"wall_base must be within 0 .. 1 (a share of the camera height), got {self.wall_base}")
        if not 0.0 <= self.wall_dark < 1.0:
            raise InputError(f"wall_dark must be within 0 .. 1 (a share of the facade's lightness), got {self.wall_dark}")
        if not 0.0 <= self.tree_low <= 1.0:
            raise InputError("tree_low must be within 0 .. 1")
        if self.tex_window % 2 == 0 or self.mix_window % 2 == 0:
            raise InputError("tex_window and mix_window must be odd")
        if not 0.05 <= self.crown_threshold <= 0.95:
            raise InputError("crown_threshold must be within 0.05 .. 0.95")
        if not 0.05 <= self.gap_threshold <= 0.995:
            raise InputError("gap_threshold must be within 0.05 .. 0.995")
        if not 0.0 <= self.gap_near <= 1.0:
            raise InputError("gap_near must be within 0 .. 1")
        if not (self.soil_b >= 0.0 and self.soil_w > 0.0 and self.surface_auto >= 0.0):
            raise InputError("soil_b and surface_auto must be >= 0 and soil_w > 0")
        if not 0.0 <= self.surface_joints < 1.0:
            raise InputError(f"surface_joints must be within 0 .. 1 (a share of the patch), got {self.surface_joints}")
        if not 1.0 <= self.ground_power <= 8.0:
            raise InputError(f"ground_power must be within 1 .. 8, got {self.ground_power}")
        if not 0.0 <= self.surface_dark <= 1.0:
            raise InputError("surface_dark must be within 0 .. 1")
        if not (-1.0 <= self.surface_u <= 0.0 and 0.0 <= self.surface_share <= 1.0):
            raise InputError("surface_u must be within -1 .. 0 and surface_share within 0 .. 1")
        if self.crown_smooth % 2 == 0 or self.crown_sky_window % 2 == 0 or self.crown_smooth < 1 \
                or self.crown_sky_window < 1:
            raise InputError("crown_smooth and crown_sky_window must be odd and positive")

    def vector(self) -> np.ndarray:
        """The kernel's parameter vector (layout in _kernels.P_*)."""
        v = np.zeros(K.NP, np.float64)
        v[K.P_SKY_TEX], v[K.P_SKY_V], v[K.P_SKY_S] = self.sky_tex, self.sky_v, self.sky_s
        v[K.P_SKY_BLUE], v[K.P_SKY_V2], v[K.P_SKY_BELOW] = self.sky_blue, self.sky_v2, self.sky_below
        v[K.P_GREEN0], v[K.P_GREEN_W], v[K.P_G_U0], v[K.P_G_W] = self.green0, self.green_w, self.ground_u0, \
            self.ground_w
        v[K.P_T_SMOOTH], v[K.P_T_W] = self.smooth_tex, self.smooth_w
        v[K.P_ROAD_W], v[K.P_SIDE_W], v[K.P_GRASS_W] = self.here_weight, self.other_weight, self.grass_weight
        v[K.P_BLD_W], v[K.P_TREE_W], v[K.P_MIX_W] = self.building_weight, self.tree_weight, self.crown_weight
        v[K.P_GROUND_FLOOR], v[K.P_REF_L], v[K.P_REF_D], v[K.P_REF_W] = self.ground_floor, self.ref_l_weight, \
            self.ref_dist, self.ref_w
        v[K.P_MIX0], v[K.P_VAR0], v[K.P_VAR_W] = self.crown_bright, self.crown_var, self.crown_var_w
        v[K.P_TREE_LOW] = self.tree_low
        v[K.P_ON_ROAD] = 1.0 if self.robot_on == "road" else 0.0
        v[K.P_WALL_DIST], v[K.P_WALL_EDGE], v[K.P_WALL_GROUND] = self.wall_dist, self.wall_edge, self.wall_ground
        v[K.P_POLE_CONTRAST], v[K.P_POLE_RUN], v[K.P_FENCE_TOP] = self.pole_contrast, self.pole_run, self.fence_top
        v[K.P_CROWN_MODEL] = 1.0 if self.crown_model not in ("", "off") else 0.0
        v[K.P_CROWN_T] = self.crown_threshold
        v[K.P_SOIL_B], v[K.P_SOIL_W] = self.soil_b, self.soil_w
        v[K.P_WALL_REACH] = self.wall_reach
        v[K.P_WALL_BASE] = self.wall_base
        v[K.P_WALL_DARK] = self.wall_dark
        v[K.P_WALL_MEDIAN] = 1.0 if self.wall_median else 0.0
        v[K.P_GROUND_POWER] = self.ground_power
        return v


#: Named parameter sets. The defaults ("street") were tuned jointly on the labelled street-image set
#: (a car on city roads) and on rendered frames of simulated sites 1 and 2; "sidewalk" has the robot on
#: the footway (lightness weighs more in telling paving from asphalt, and facades may reach further
#: down; both chosen on the same rendered sites 1 and 2; the soil rule, the per-frame surface decision
#: and the tighter colour match ref_dist = 12 were chosen on the loop's tuning drives 11-17; the sky by
#: colour, sky_ref_dist = 20, stays off: it did not raise the loop's recall there, docs/perception.md); "park"
#: expects more vegetation (not tuned on data).
PRESETS: dict[str, SegmentParams] = {
    "street": SegmentParams(),
    # the dark gap under parked vehicles carried into the object above it (wall_dark 0.5) and the robot on
    # the road also when no paving joints show under it (surface_joints 0.02; seventh round,
    # docs/perception.md); "sidewalk_nojoints" is the set without the joints (c97f383), "sidewalk_nogap" the
    # set without either, as it was until then
    "sidewalk": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0, crown_model="",
                              gap_model="", soil_b=6.0, surface_auto=20.0, wall_dark=0.5, surface_joints=0.02),
    "sidewalk_nojoints": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0,
                                       crown_model="", gap_model="", soil_b=6.0, surface_auto=20.0, wall_dark=0.5),
    "sidewalk_nogap": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0,
                                    crown_model="", gap_model="", soil_b=6.0, surface_auto=20.0),
    # candidate for "sidewalk" (eighth round, docs/perception.md): the facade's colour for the carry is the
    # median of its three lowest building pixels, so a window sill at the horizon does not stop the carry
    # candidate (eighth round): the ground probabilities sharpened (ground_power 3), labels unchanged
    "sidewalk_sharp": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0,
                                    crown_model="", gap_model="", soil_b=6.0, surface_auto=20.0, wall_dark=0.5,
                                    surface_joints=0.02, ground_power=3.0),
    "sidewalk_median": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0,
                                     crown_model="", gap_model="", soil_b=6.0, surface_auto=20.0, wall_dark=0.5,
                                     surface_joints=0.02, wall_median=True),
    # candidate for "sidewalk" (fifth round, docs/perception.md): facades found up to 2 rows above the
    # horizon pixel are carried down to a visible foot, and the per-frame surface margin is 15 (was 20)
    "footway": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0, crown_model="",
                             gap_model="", soil_b=6.0, surface_auto=15.0, wall_reach=2),
    # candidate for "sidewalk" (sixth round, docs/perception.md): as "footway"'s facade carry (wall_reach 2)
    # with the base band (wall_base 0.6) and sidewalk's own surface margin (20)
    "frontage": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=12.0, crown_model="",
                              gap_model="", soil_b=6.0, surface_auto=20.0, wall_reach=2, wall_base=0.6),
    "park": SegmentParams(robot_on="sidewalk", wall_ground=6.0, ref_l_weight=0.8, ref_dist=18.0, green0=-0.04,
                          grass_weight=0.7, crown_model="", gap_model=""),
}


def preset(name: str) -> SegmentParams:
    """The named parameter set; raises InputError naming the known ones."""
    try:
        return PRESETS[name]
    except KeyError:
        raise InputError(f"unknown segmentation preset {name!r}; known: {', '.join(PRESETS)}") from None


def seg_size(width: int, height: int, params: SegmentParams) -> tuple[int, int]:
    """(w, h) of the segmentation raster for a ``width`` x ``height`` frame."""
    w = min(int(params.width), int(width))
    return w, max(8, int(round(height * w / width)))


class Segmenter:
    """Workspace for segmenting frames of one size; every buffer is allocated once here.

    Parameters
    ----------
    frame_size : (width, height)
        Input frame size in pixels.
    params : SegmentParams
    """

    def __init__(self, frame_size: tuple[int, int], params: SegmentParams = SegmentParams()):
        self.params = params
        self.frame_size = (int(frame_size[0]), int(frame_size[1]))
        w, h = seg_size(*self.frame_size, params)
        self.size = (w, h)
        self._prm = params.vector()
        f32 = np.float32
        self.small = np.zeros((h, w, 3), np.uint8)
        self.lab = np.zeros((h, w, 3), np.uint8)
        self.feat = np.zeros((K.NF, h, w), f32)
        self.tx = np.zeros((h, w), f32)
        self.ty = np.zeros((h, w), f32)
        self.tex = np.zeros((h, w), f32)
        self.tmp = np.zeros((h, w), f32)
        self.bright = np.zeros((h, w), np.uint8)
        self.cand = np.zeros((h, w), np.uint8)
        self.sky = np.zeros((h, w), np.uint8)
        self.brightf = np.zeros((h, w), f32)
        self.brightmix = np.zeros((h, w), f32)
        self.gmean = np.zeros((h, w), f32)
        self.g2mean = np.zeros((h, w), f32)
        self.queue = np.zeros(h * w, np.int32)
        self.band = np.zeros((3, w), np.int32)  # facade base bands per column (extend_walls' scratch)
        self.crown_model = load_crown_model(params.crown_model)
        if self.crown_model is not None:
            self._cw, self._cb = self.crown_model.folded()
            if self.crown_model.first is not None:  # a "context" model scores twice (crown_features.py)
                self._cw1, self._cb1 = self.crown_model.first.folded()
                self._context = CrownContext(h, w)
        self.gap_model = load_crown_model(params.gap_model, gaps=True, base=self.crown_model.features) \
            if self.crown_model is not None else None
        if self.gap_model is not None:
            self._gw, self._gb = self.gap_model.folded()
            self._gz = float(np.log(params.gap_threshold / (1.0 - params.gap_threshold)))
        self.gextra = np.zeros((4, h, w), f32)  # sky-gap features beyond tfeat (zero when the model is off)
        # crown-model features (zero when the model is off); a "colour" model adds planes (crown_features.py)
        n_extra = self.crown_model.n_extra if self.crown_model is not None else 0
        self.tfeat = np.zeros((K.NT + n_extra, h, w), f32)
        self._extras = CrownExtras(h, w) if n_extra else None
        self.small2 = np.zeros((2 * h, 2 * w, 3), np.uint8)
        self.g2x = np.zeros((2 * h, 2 * w), f32)
        self.lap2x = np.zeros((2 * h, 2 * w), f32)
        self._t = np.zeros((12, h, w), f32)  # scratch planes of the crown features
        self.crown = np.zeros((h, w), f32)
        self.hist = np.zeros((3, 256), np.int64)
        self.ref = np.zeros(3, np.float64)
        self.skyref = np.zeros(3, np.float64)
        self.probs = np.zeros((NUM_CLASSES, h, w), f32)
        self.labels = np.zeros((h, w), np.uint8)
        self.hrow = np.full(w, params.horizon_frac * h - 0.5)
        self._patch = (int(h * 0.85), h, int(w * 0.35), max(int(w * 0.65), int(w * 0.35) + 1))
        self.surface = params.robot_on  # the surface under the robot in the last frame (surface_auto)

    def default_horizon(self) -> np.ndarray:
        """Horizon rows (segmentation pixels) used without a camera model: ``horizon_frac`` of the height."""
        h = self.size[1]
        self.hrow[:] = self.params.horizon_frac * h - 0.5
        return self.hrow

    def run(self, bgr: np.ndarray, hrow: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Segment one BGR uint8 frame of ``frame_size``.

        Parameters
        ----------
        bgr : ndarray (H, W, 3) uint8
        hrow : ndarray (w,) float64, optional
            Horizon row of each segmentation column (pixel centres at integers); default
            :meth:`default_horizon`.

        Returns
        -------
        probs : ndarray (NUM_CLASSES, h, w) float32
            Per-class scores normalised to sum 1 per pixel (views of the workspace, overwritten next call).
        labels : ndarray (h, w) uint8
            Arg-max class index.
        """
        p = self.params
        if hrow is None:
            hrow = self.default_horizon()
        w, h = self.size
        if (w, h) == self.frame_size:
            self.small[...] = bgr
        else:
            cv2.resize(bgr, (w, h), dst=self.small, interpolation=cv2.INTER_AREA)
        cv2.cvtColor(self.small, cv2.COLOR_BGR2Lab, dst=self.lab)
        K.seg_features(self.small, self.lab, hrow, self.feat)
        rt = p.tex_window // 2
        K.box_mean(self.feat[K.F_GX], rt, self.tmp, self.tx)
        K.box_mean(self.feat[K.F_GY], rt, self.tmp, self.ty)
        np.add(self.tx, self.ty, out=self.tex)
        K.sky_candidates(self.feat, self.tex, self._prm, self.bright, self.cand)
        if p.sky_ref_dist > 0.0:
            self._sky_by_colour(hrow)
        K.flood_from_top(self.cand, self.sky, self.queue)
        np.greater(self.bright, self.sky, out=self.cand)  # bright but not sky (reuses the buffer)
        self.brightf[...] = self.cand
        rm = p.mix_window // 2
        K.box_mean(self.brightf, rm, self.tmp, self.brightmix)
        K.box_mean(self.feat[K.F_GRAY], rm, self.tmp, self.gmean)
        K.box_mean(self.feat[K.F_G2], rm, self.tmp, self.g2mean)
        r0, r1, c0, c1 = self._patch
        K.patch_median_lab(self.lab, r0, r1, c0, c1, self.hist, self.ref)
        if p.surface_auto > 0.0:
            self._decide_surface()
        if p.surface_joints > 0.0:
            self._decide_surface_by_joints()
        if self.crown_model is not None:
            self.crown_features(self.small if (w, h) == self.frame_size else bgr)
            self._crown_prob()
        K.seg_scores(self.feat, self.lab, self.tex, self.sky, self.brightmix, self.gmean, self.g2mean, self.crown,
                     self.ref, self._prm, self.probs, self.labels)
        K.extend_walls(self.feat, self.lab, hrow, self.ref, self._prm, _IS_GROUND, self.probs, self.labels, self.band)
        if self.crown_model is not None and p.crown_sky_share > 0.0:
            t = self._t
            K.class_indicator(self.labels, K.TREE, t[0])
            K.box_mean(t[0], p.crown_sky_window // 2, self.tmp, t[1])
            K.sky_in_crowns(t[1], p.crown_sky_share, self.probs, self.labels)
        if self.gap_model is not None:
            self.gap_features()
            K.sky_gaps(self.tfeat, self.gextra, self._gw, self._gb, self._gz, p.gap_near, self.probs, self.labels)
        K.thin_and_low(self.feat, hrow, self._prm, self.probs, self.labels, self.cand)
        return self.probs, self.labels

    def _decide_surface_by_joints(self) -> None:
        """The robot is on the road also when the patch under it shows no paving joints: fewer than
        ``surface_joints`` of its pixels with an edge above ``_kernels.JOINT_EDGE`` (asphalt shows none,
        slabs show their joints). Lightness misses it where a lit carriageway is as light as the footway
        (docs/perception.md, "Seventh round"); a footway of asphalt is taken for road. Runs after the
        lightness decision (``surface_auto``), or alone on the preset's ``robot_on``."""
        r0, r1, c0, c1 = self._patch
        share = K.patch_edge_share(self.feat, r0, r1, c0, c1, K.JOINT_EDGE)
        p = self.params
        on_road = share < p.surface_joints or (self.surface if p.surface_auto > 0.0 else p.robot_on) == "road"
        self._prm[K.P_ON_ROAD] = 1.0 if on_road else 0.0
        self.surface = "road" if on_road else "sidewalk"

    def _decide_surface(self) -> None:
        """Which paved surface is under the robot, for this frame: asphalt is the darker one. When the other
        paved ground in view (unlike the patch under the robot) is clearly lighter, the robot stands on the
        road (crossing a street); clearly darker, on the sidewalk; otherwise the preset's ``robot_on``, or
        with ``surface_keep`` the previous frame's decision.

        Asphalt is the darkest paving, so with ``surface_dark`` > 0 a frame is not called "on the road"
        when at least that share of the other paved pixels is clearly darker than the patch (by
        ``surface_auto`` too): the patch is then paving in a shadow, with sunlit paving beyond it."""
        p = self.params
        w, h = self.size
        med, n = K.other_paved_lightness(self.lab, self.feat, self.tex, self.ref, self._prm, p.surface_u, self.hist)
        on_road = (self.surface if p.surface_keep else p.robot_on) == "road"
        if n >= p.surface_share * w * h:
            if med >= self.ref[0] + p.surface_auto:
                dark_to = int(self.ref[0] - p.surface_auto) + 1  # bins 0 .. dark_to - 1: clearly darker
                if p.surface_dark <= 0.0 or dark_to <= 0 or self.hist[0, :dark_to].sum() < p.surface_dark * n:
                    on_road = True
            elif med <= self.ref[0] - p.surface_auto:
                on_road = False
        self._prm[K.P_ON_ROAD] = 1.0 if on_road else 0.0
        self.surface = "road" if on_road else "sidewalk"

    def _sky_by_colour(self, hrow: np.ndarray) -> bool:
        """Overcast skies darker than ``sky_v``: take the sky colour from the top rows and add what is
        close to it as sky candidates, unless that colour goes on below the horizon (then it is a near
        facade filling the top of the picture, not sky). Returns whether candidates were added."""
        p = self.params
        w, h = self.size
        rows = max(1, int(round(p.sky_ref_rows * h)))
        n = K.sky_reference(self.lab, self.tex, self.feat, rows, p.sky_tex, self.hist, self.skyref)
        sr = self.skyref
        if n < p.sky_ref_share * rows * w or sr[1] - 128.0 >= p.sky_ref_warm or sr[2] - 128.0 >= p.sky_ref_warm:
            return False
        if K.sky_colour_below_horizon(self.lab, hrow, sr, p.sky_ref_dist, 3) >= p.sky_ref_below:
            return False
        K.sky_like_reference(self.feat, self.lab, self.tex, sr, p.sky_ref_dist, p.sky_tex, p.sky_below, self.bright,
                             self.cand)
        return True

    def crown_features(self, bgr: np.ndarray) -> np.ndarray:
        """Fill and return ``tfeat`` (planes ``_kernels.T_*``, names ``crown_model.FEATURES``) for the frame
        just segmented by :meth:`run` (``bgr`` is that frame). Called by :meth:`run` when a crown model is
        set; callable after :meth:`run` otherwise (to collect features for fitting a model)."""
        f, tf, t, tmp = self.feat, self.tfeat, self._t, self.tmp
        w, h = self.size
        for dst, src in ((K.T_V, K.F_V), (K.T_S, K.F_S), (K.T_EXGR, K.F_EXGR), (K.T_U, K.F_U)):
            tf[dst] = f[src]
        g = f[K.F_GRAY]
        # structure tensor over 9 x 9: coherence, axis share, vertical-edge share, energy
        K.gradient_products(g, t[0], t[1], t[2], t[3])
        for q in range(4):
            _blur(t[q], 4, t[4 + q])
        K.tensor_shape(t[4], t[5], t[6], t[7], tf[K.T_COH9], tf[K.T_AXIS9], t[8], tf[K.T_LOGEN9], t[9])
        # grey-level variance over 9 x 9
        _blur(g, 4, t[0])
        _blur(f[K.F_G2], 4, t[1])
        np.multiply(t[0], t[0], out=t[2])
        np.subtract(t[1], t[2], out=tf[K.T_VAR9])
        np.maximum(tf[K.T_VAR9], 0.0, out=tf[K.T_VAR9])
        # fine texture: |Laplacian| at twice the raster's resolution pooled down, against the raster's own
        cv2.resize(bgr, (2 * w, 2 * h), dst=self.small2, interpolation=cv2.INTER_AREA)
        K.gray_mean(self.small2, self.g2x)
        K.abs_laplacian(self.g2x, self.lap2x)
        K.pool2(self.lap2x, t[0])
        _blur(t[0], 2, t[10])  # fine energy, 5 x 5
        K.abs_laplacian(g, t[0])
        _blur(t[0], 2, t[1])  # coarse energy, 5 x 5
        K.fine_ratio(t[10], t[1], tf[K.T_FR])
        # region statistics
        _blur(f[K.F_EXGR], 4, tf[K.T_EXGR9])
        _blur(f[K.F_S], 4, tf[K.T_S9])
        _blur(f[K.F_V], 7, tf[K.T_V15])
        _blur(f[K.F_S], 7, tf[K.T_S15])
        _blur(f[K.F_S], 15, tf[K.T_S31])
        _blur(tf[K.T_COH9], 7, tf[K.T_COH15])
        _blur(tf[K.T_COH9], 15, tf[K.T_COH31])
        _blur(tf[K.T_AXIS9], 7, tf[K.T_AXIS15])
        _blur(t[8], 7, tf[K.T_VERT15])
        _blur(t[10], 7, tf[K.T_FINE15])
        _blur(tf[K.T_FR], 7, tf[K.T_FR15])
        _blur(tf[K.T_FR], 15, tf[K.T_FR31])
        _blur(t[9], 7, tf[K.T_EN15])
        K.class_indicator(self.sky, 0, t[0])  # 1 where not sky (a uint8 -> float ufunc would allocate)
        _blur(t[0], 4, tf[K.T_NONSKY9])
        if self._extras is not None:
            self._extras.fill(self.lab, self.sky, tf)
        return tf

    def gap_features(self) -> np.ndarray:
        """Fill and return ``gextra`` (tree share 9 x 9 and 15 x 15 of the current labels, gradient energy,
        smoothed crown probability): with ``tfeat``, the sky-gap model's features (``GAP_FEATURES``)."""
        t, g = self._t, self.gextra
        K.class_indicator(self.labels, K.TREE, t[0])
        _blur(t[0], 4, g[0])
        _blur(t[0], 7, g[1])
        g[2] = self.tex
        g[3] = self.crown
        return g

    def _crown_prob(self) -> None:
        """Tree probability of the crown model, averaged over the pixels it applies to, into ``crown``.
        A context model first does this with its first model, then adds the layout of that map as planes."""
        first = self.crown_model.first
        if first is not None:
            n1 = len(first.features)
            self._crown_pass(self.tfeat[:n1], self._cw1, self._cb1)
            self._context.fill(self.crown, self.tfeat[n1:])
        self._crown_pass(self.tfeat, self._cw, self._cb)

    def _crown_pass(self, tf: np.ndarray, wts: np.ndarray, bias: float) -> None:
        p, f, t = self.params, self.feat, self._t
        K.crown_prob(tf, wts, bias, f, self.sky, p.green0, 1.0 / p.green_w, p.crown_u_min, t[0], t[1])
        r = p.crown_smooth // 2
        _blur(t[0], r, t[2])
        _blur(t[1], r, t[3])
        K.masked_ratio(t[2], t[3], self.crown)


def _blur(src: np.ndarray, r: int, dst: np.ndarray) -> None:
    """Mean over a (2r+1)^2 window, edge pixels repeated (OpenCV's box filter; same result as K.box_mean)."""
    cv2.blur(src, (2 * r + 1, 2 * r + 1), dst=dst, borderType=cv2.BORDER_REPLICATE)


_IS_GROUND = np.zeros(256, np.uint8)
for _c in CLASSES:
    _IS_GROUND[_c.index] = (not _c.vertical) and _c.name != "sky"


def labels_at(probs: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    """Class index per pixel at ``size`` (w, h): probabilities upsampled bilinearly, then arg-max.

    For debug output and evaluation, not for the per-frame path (it allocates).
    """
    w, h = size
    up = np.stack([cv2.resize(p, (w, h), interpolation=cv2.INTER_LINEAR) for p in probs])
    return up.argmax(axis=0).astype(np.uint8)


def segment_image(bgr: np.ndarray, params: SegmentParams = SegmentParams(), *, hrow=None):
    """One-shot segmentation of a BGR frame (allocates a workspace; use :class:`Segmenter` in loops).

    Returns (probs, labels_small, labels_full) where labels_full is at the input size.
    """
    img = np.ascontiguousarray(bgr)
    if img.ndim != 3 or img.shape[2] != 3 or img.dtype != np.uint8:
        raise InputError(f"segment: expected an (H, W, 3) uint8 BGR image, got {img.shape} {img.dtype}")
    seg = Segmenter((img.shape[1], img.shape[0]), params)
    probs, labels = seg.run(img, hrow)
    return probs.copy(), labels.copy(), labels_at(probs, (img.shape[1], img.shape[0]))


__all__ = ["SegmentParams", "PRESETS", "preset", "Segmenter", "segment_image", "labels_at", "seg_size"]
