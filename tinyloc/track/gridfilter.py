"""Grid (histogram) Bayes filter over heading x north x east in a window that follows the robot.

The belief is a float32 array ``bel[A, H, W]`` of probabilities: A heading layers
covering the full circle, and an H x W window of map cells (same resolution and
raster convention as the packed map: global cell (row, col) has its centre at
``x = x_min + (col + 0.5) res``, ``y = y_max - (row + 0.5) res``). Window cell (i, j)
is global cell (row0 + i, col0 + j).

Shifted lattice. Each heading layer a carries a sub-cell offset (dr[a], dc[a]) in
[-0.5, 0.5] cells, and all layers share a sub-bin heading offset ``hoff``: cell
(a, i, j) stands for the pose at continuous global cell coordinates
``(row0 + i + 0.5 + dr[a], col0 + j + 0.5 + dc[a])`` with yaw ``(a + hoff) * dyaw``.
Prediction adds the odometry displacement to the offsets and moves the content by
whole cells only, so driving does not smear the belief by interpolation (a plain
bilinear shift adds f (1 - f) cells^2 of spurious variance every frame). The motion
noise is then added on purpose as a 3-tap diffusion whose variance is exactly the
model's (see :class:`TrackParams`).

Steps (Thrun, Burgard and Fox, Probabilistic Robotics, 2005, ch. 2 and 4, the
discrete Bayes filter and the histogram filter):

- predict: shift each heading layer along its own heading by the odometry increment,
  rotate along the heading axis, diffuse;
- update: multiply by the tempered likelihood sampled from the correlator's volume,
  normalise; the normaliser is the predictive likelihood, a measure of surprise;
- floor: mix a small uniform share back in so a wrong belief can recover.

The pose reported is the refined top mode (not the mean, which can sit between two
modes); the covariance is the posterior's second moment about that pose, so a
second mode d metres away with weight w adds about w d^2 to it.
"""

from __future__ import annotations

from dataclasses import dataclass, field
import math

import numpy as np

from ..errors import InputError
from ..frames import wrap_angle
from . import _kernels as K
from .gnss_prior import GnssParams, search_fix_weight

QUALITIES = ("no-fix", "searching", "tracking", "degraded")


@dataclass(frozen=True)
class MapGeometry:
    """Where the map raster sits in the world (ENU metres)."""

    x_min: float
    y_max: float
    res_m: float

    def cell_of(self, x_m: float, y_m: float) -> tuple[float, float]:
        """Continuous (row, col) of a world point; a cell centre is at +0.5."""
        return (self.y_max - y_m) / self.res_m, (x_m - self.x_min) / self.res_m

    def xy_of(self, row: float, col: float) -> tuple[float, float]:
        """World (x, y) of continuous cell coordinates."""
        return self.x_min + col * self.res_m, self.y_max - row * self.res_m


@dataclass
class LikelihoodVolume:
    """A correlator output as the filter reads it.

    ``loglik[a, i, j]``: log-likelihood (up to a constant) of yaw ``yaw0_rad + a * dyaw_rad`` with the
    robot origin at continuous global cell coordinates ``(row0 + scale (i + 0.5), col0 + scale (j + 0.5))``:
    with ``scale = 1`` the centre of global map cell (row0 + i, col0 + j); with ``scale = 2`` (a
    half-resolution volume) the centre of the 2 x 2 block starting at (row0 + 2 i, col0 + 2 j).

    ``cue`` (optional, for ``track.cue_cov``): a second volume of the same layout, the log-likelihood of
    the cue family alone (the ground-surface features of the scoring model); its layer 0 is used.
    """

    loglik: np.ndarray
    row0: int
    col0: int
    yaw0_rad: float = 0.0
    dyaw_rad: float = 2.0 * math.pi / 256
    scale: int = 1
    cue: "LikelihoodVolume | None" = None

    @property
    def full_circle(self) -> bool:
        """True when the headings wrap around the whole circle."""
        return abs(self.loglik.shape[0] * self.dyaw_rad - 2.0 * math.pi) < 1e-6


@dataclass
class GlobalEvidence:
    """A global search as the tracker weighs it: the best log-likelihood per cell over all headings.

    ``best[i, j]`` covers the global map cells ``row0 + scale*i .. row0 + scale*i + scale - 1`` (and
    likewise for columns): ``scale`` is 1 at full resolution, 2 for a coarse search. ``best_yaw``
    (rad), optional, is the heading of that maximum.
    """

    best: np.ndarray
    row0: int
    col0: int
    scale: int = 1
    best_yaw: np.ndarray | None = None

    @classmethod
    def from_volume(cls, vol: "LikelihoodVolume", out: np.ndarray | None = None) -> "GlobalEvidence":
        """Reduce a full volume (max over heading); ``out`` is an optional (H, W) float32 buffer."""
        A, H, W = vol.loglik.shape
        if out is None:
            out = np.empty((H, W), np.float32)
        K.max_over_heading(vol.loglik, out)
        yaw = vol.yaw0_rad + np.argmax(vol.loglik, axis=0) * vol.dyaw_rad
        return cls(out, vol.row0, vol.col0, int(vol.scale), wrap_angle(yaw))


@dataclass(frozen=True)
class TrackParams:
    """Parameters of the grid filter and its lost/recovered logic (defaults in brackets).

    Parameters
    ----------
    window_cells : int
        Side of the square belief window, cells [64; 32 m at 0.5 m].
    headings : int
        Heading layers over the full circle [256, 1.4 deg each].
    floor : float
        Share of probability mixed back in uniformly after each update [1e-4].
    likelihood_weight : float
        Tempering exponent on each frame's log-likelihood, also applied to global-search scores
        [0.1]. The correlator's volume is already a calibrated single-frame log-likelihood (its
        scoring temperature, 15.06 in tinyloc/correlate/scoring_default.json, fitted on generated
        frames one at a time); this second factor is the share of a frame that is new evidence:
        at 5 Hz and about 0.25 m per frame successive frames see nearly the same scene, so they are
        far from independent. The product is 1 / 150 of the raw score. 0.1 was kept after a
        sweep of 0.05-0.2 on drives not in the reported table (docs/tracking.md).
    evidence_step_m : float
        Path per frame that ``likelihood_weight`` stands for (0.25 m: 5 Hz at walking pace, where it
        was chosen). A frame taken further along the path than this, because the camera is slower or
        the loop dropped frames that were late, holds the new evidence of the frames it stands for:
        its weight is ``likelihood_weight * min(evidence_max, max(1, d / evidence_step_m))``, d the
        odometry path since the previous frame. Frames closer together keep the full weight (more
        frames gave smaller errors at 8 Hz on the demo drive, docs/tracking.md "Evidence per metre") [0.25].
    evidence_max : float
        Largest factor on a frame's weight from ``evidence_step_m``; 1 gives every frame the same
        weight (the behaviour before this option) [4.0].
    loglik_clip : float
        Dynamic range kept below the frame's best log-likelihood [40].
    outside_fill : str
        Log-likelihood given to poses the frame's volume does not cover (outside its box in
        position or heading, and the inactive heading layers): "min" (the volume's worst value) or
        "mean" (its average: the frame says nothing about them) ["mean"].
    q_xy_m2, q_xy_per_m : float
        Position diffusion variance per frame (m^2) and per metre driven (m^2/m) [1e-4, 4e-3].
    q_yaw_rad2, q_yaw_per_m, q_yaw_per_rad : float
        Heading diffusion variance per frame (rad^2), per metre (rad^2/m) and per radian turned
        (rad^2/rad) [1e-6, 3e-5, 2.5e-3].
    q_no_odometry_m2, q_no_odometry_rad2 : float
        Diffusion added when a frame comes without usable odometry [1.0, 0.01].
    max_step_m, max_turn_rad : float
        An odometry increment larger than this is a jump: it is not applied, the belief is
        diffused as for missing odometry and the status says so [3.0, 1.0].
    recentre_cells : int
        Re-centre the window when the estimate is this far from its centre [6].
    mode_radius_cells, mode_radius_layers : int
        Box around the top cell used to refine the pose [2, 3].
    top_modes : int
        Number of modes reported [3].
    track_sigma_m, track_sigma_deg : float
        Tracking needs the position (largest axis) and heading 1-sigma below these [1.0, 4.0].
    confident_sigma_m : float
        Once locked on, the flag is "tracking" only while the position 1-sigma (largest axis) is
        also at most this; above it (and below ``track_sigma_m``) the filter keeps its belief and
        the flag says "degraded" ("position spread"), so the satellite fix joins the covariance and
        the wheel scale learns nothing. A posterior this broad along a street is often a neighbour
        mode: on tuning drive 14 the 51 frames flagged tracking 1.7-2.2 m behind the truth (in its
        first 30 m) had a 1-sigma of 0.89-0.97 m (docs/tracking.md, "Confident sigma"). Lock-on
        from searching still needs ``track_sigma_m``; a lock-on above this is flagged "degraded".
        0 turns the check off [0.85]. Adopted with ``odo_scale_rate`` 0.02 after the held-out drives
        1-5 (lead, 89b209a): wrong-while-tracking over whole drives 0/0/2/13/21 % -> 0/0/1/0/4 %,
        recall 99.3 -> 99.6 %, mean median 0.291 -> 0.269 m (docs/tracking.md).
    confident_sigma_deg : float
        The same for the heading: "tracking" only while the posterior's heading 1-sigma is at most
        this (deg); above it the flag says "degraded" ("heading spread"). A heading that is 2 deg
        uncertain cannot promise the 3 deg a pose within spec needs, and a segmenter whose facade
        feet drift with range pulls the heading that way: on a tuning drive 4-5 deg off while
        tracking, the posterior's heading 1-sigma was 2.0-2.2 deg, against 1.2-1.4 deg where the
        heading was right (docs/tracking.md, "Confident heading"). The check never asks for less than
        1.1 heading layers (``headings``; 1.55 deg at 256, 3.1 deg at 128), since a posterior is rarely
        narrower than its lattice. 0 turns the check off [1.6].
        Adopted after the held-out drives 1-5 (lead, sixth session, wheel factor calibrated): drive 3's
        frames tracking while wrong 8 -> 4 %, every other figure identical.
    lost_sigma_m, lost_sigma_deg : float
        Beyond these the filter is lost and searches again [6.0, 30.0].
    converge_frames : int
        Consecutive confident updates before searching becomes tracking [3].
    degraded_frames : int
        Consecutive frames without a usable likelihood before tracking becomes degraded [5].
    lost_frames : int
        Consecutive updates with surprise beyond ``surprise_lost`` before the filter is lost [8].
    surprise_lost : float
        Log predictive likelihood below which an update is surprising [-8.0].
    verify_every : int
        While tracking, a global check runs every this many frames [15].
    switch_margin : float
        A global check votes "elsewhere" when the best pose 5 m or more away scores this much
        better (tempered log units) than the best near the estimate [6.0]. At 4.0, tuning drives 25
        and 27 lost a right track (0.2-0.75 m off) on checks 4.4-5.4 better 15-20 m away, during a
        turn and on a street with a look-alike stretch, and came back 15-20 m wrong (recall 86 / 69 %);
        at 6.0 they hold it (100 / 100 %). A kidnap beyond the check's window is unaffected (nothing
        near the estimate to compare); a short one (10-18 m) can take longer to recover
        (docs/tracking.md, "Switch margin").
    switch_votes : int
        Consecutive "elsewhere" votes that declare the filter lost [2].
    watch_frames : int
        After an odometry jump (a step beyond ``max_step_m`` or ``max_turn_rad``, dropped: the
        robot may have been lifted and carried), the global check runs on every frame for this
        many frames instead of every ``verify_every`` [25; 5 s at 5 Hz]; 0 turns it off. The
        margin and votes stay as they are: only the wait for the next check goes. On the 13 tuning
        drives carried 13-33 m, the loss came 0.8 s after the jump instead of 4-6 s, and drives
        without a jump are unchanged (docs/tracking.md, "Watch after a jump").
    ambiguity_margin : float
        A pose elsewhere scoring within this (tempered log units) of the best near the estimate in
        two global checks in a row makes the output ambiguous: quality "degraded", the competing
        pose among the modes and in the covariance, until a later check clears it [0.5].
    course_span_m : float
        Odometry path over which the satellite track and the odometry track are compared for the
        robot's heading (tinyloc/track/course.py); 0 turns the check off [15.0].
    course_sigma_deg : float
        Smallest 1-sigma of that heading (deg) [8.0].
    course_weight : float
        Tempering of the heading prior from that check, per frame while searching [0.3].
    course_veto_deg : float
        While tracking, an estimate whose heading differs from the checked heading by more than
        ``max(course_veto_deg, 3 sigma)`` for ``course_veto_frames`` frames in a row is lost [40.0].
    course_veto_frames : int
        See ``course_veto_deg`` [5].
    model_sigma_m, model_sigma_deg : float
        Error the likelihood cannot show (map survey errors of open vector map data, calibration,
        the ground not being flat), added to the reported covariance as an independent term after
        the quality decision: the output never claims better than this [0.15, 0.5]. The position
        floor was 0.5 m until the eighth session (see ``cov_scale_xy``).
    model_sigma_uncal_m : float
        ``model_sigma_m`` when the accelerometer bias is not calibrated (the loop uses it when every
        ``loop.accel_bias_*`` is 0): a bias of 0.04 m/s^2 tilts the levelling by 0.23 deg, which
        moves ground seen at 10 m by about 0.5 m from a 0.8 m camera, and the likelihood cannot
        show it [0.5].
    cov_scale : float
        Multiplier of the posterior's own heading variance in the output, in every formula (before the
        model-error and fallback terms) [1.0]. At 0.5 or 0.25 the tracking frames of tuning drive 27
        fall to 82 / 69 % inside their 95 % heading interval; at 1 all tuning drives are at 99-100 %.
    cov_scale_xy : float
        Multiplier of the posterior's own position covariance in the default formula (the cross terms
        take ``sqrt(cov_scale_xy * cov_scale)``) [0.3]. The tempered grid posterior is broader than
        the errors it holds: with 1 and a 0.5 m floor every drive had 100 % of its frames inside the 95 %
        ellipse (median d^2 0.01-0.09 against 1.39 for a calibrated one). With the 0.15 m floor, 0.3
        brings the 13 tuning drives' pooled share into the 85-99 % band (98.4 %, every drive 90-100 %);
        0.25 gave 97.4 % but drive 26 (a 0.44 m bias across the street) 84 % (docs/tracking.md,
        "Covariance, eighth session"). Held-out drives 1-5: pooled 99.9 %. With an uncalibrated
        accelerometer the floor stays 0.5 m (``model_sigma_uncal_m``).
    odometry_scale : float
        Factor on odometry distances at start: a calibrated wheel scale, or 1 [1.0].
    odo_scale_span_m : float
        The scale is learned online from the poses flagged tracking against the raw odometry over this
        much path (tinyloc/track/odoscale.py); 0 turns learning off [30.0].
    odo_scale_rate : float
        Share of the way to each new fit taken per frame; 0 learns nothing [0.02]. Alone it lowered the
        tuning drives' median error (0.333 -> 0.250 m) but led held-out drive 4 into a wrong
        along-street mode flagged tracking (6 % of its frames); with ``confident_sigma_m`` (no learning
        from broad posteriors) the held-out drives gained on every figure (docs/tracking.md, "Wheel scale").
    odo_scale_max_dev : float
        The scale in use stays within 1 +- this [0.05].
    odo_scale_settle_m : float
        Path after each lock-on before poses are used (the belief may still be catching up) [5.0].
    adapt_cov : bool
        Adaptive reported covariance (docs/tracking.md, "Adaptive covariance"): while the wheel-scale
        fit of the last ``odo_scale_span_m`` is current (tracking, tinyloc/track/odoscale.py), the
        position part is ``adapt_cov_scale`` x posterior + ``adapt_sigma_m``^2 I + drag^2 u u^T, with
        u the heading and drag the distance the map moved the estimate along its path against the
        odometry over that track; otherwise the default formula (``cov_scale_xy``, ``cov_scale``, ``model_sigma_m``)
        [False].
    adapt_cov_scale, adapt_sigma_m : float
        See ``adapt_cov`` [0.35, 0.2].
    cue_cov : bool
        Reported covariance from the ground cues' say (docs/tracking.md, "Cue offset covariance";
        tinyloc/track/cueoffset.py): the loop also scores each frame with the ground-surface features
        of the scoring model alone (``cue_features``), keeps a decaying sum of that log-likelihood on a
        grid of offsets about the estimate, and while tracking the position part is
        ``cue_cov_scale`` x posterior + ``cue_sigma_m``^2 I + ``cue_gain`` R diag(u^2, v^2) R^T, (u, v)
        the (along, left) offset of the sum's maximum and R the heading's rotation; otherwise (fewer than ``cue_min_frames`` frames since a restart,
        searching, degraded) the default formula. Costs one more tracking correlation per frame with
        the named features [False].
    cue_cov_scale, cue_sigma_m, cue_gain : float
        See ``cue_cov`` [0.1, 0.1, 1.0]. 0.1 is ``likelihood_weight``: the posterior as if every frame
        were independent evidence; what the frames share (a bias) is what the offset term is for.
    cue_memory : float
        Factor on the sum per frame [0.9; about 10 frames].
    cue_half_m, cue_step_m : float
        Half-size and spacing of the offset grid (m) [2.0, 0.25]. The offset, and so the term, is at most
        ``cue_half_m`` along and left: the largest the term says where the ground cannot tell.
    cue_min_frames : int
        Frames with ground evidence since a restart before the term is used [10].
    cue_features : str
        Comma-separated feature names of the scoring model that make the cue family
        ["road,sidewalk,grass"].
    catchup_m : float
        Once locked on, the flag is "tracking" only while the map evidence has moved the estimate
        against the odometry by at most this much lately (m): the length of a decaying sum
        (``catchup_memory`` per frame) of each frame's estimate minus the previous estimate carried
        by the odometry increment (tinyloc/track/catchup.py). Above it the flag says "degraded"
        ("catching up"): a belief still being pulled towards another pose, or whose mode has just
        jumped, has not settled, however tight it is. On tuning drive 16 the filter re-locked 2 m
        ahead of the truth with a 0.79 m posterior and stayed "tracking" for 8 frames while it closed
        in (docs/tracking.md, "Catch-up check"). The sum covers the frames since the last lock-on
        (a search moves the belief on purpose). 0 turns the check off [0.5]. Tuning drives 11-17
        (segmenter, --imu-cal), off -> 0.5 in one tree: wrong while tracking over the whole drive
        0/0/0/0/0/3/0 % -> 0 % on all, recall and medians identical (only the flag changes), frames
        flagged tracking drive 14 51.3 -> 50.3 %, drive 16 79.3 -> 69.7 %, the others unchanged.
    catchup_memory : float
        Factor on that sum per frame, in [0, 1) [0.9; about 10 frames].
    fallback_weight : float
        While not tracking (searching, degraded), the reported covariance also holds the satellite
        fix of the frame as a competing pose with this weight: ``w (S + d d^T)`` with S the fix's
        scale squared (isotropic) and d the fix minus the estimate, the second moment of a two-pose
        mixture about the estimate. The flag says the filter's mode is in doubt, so its covariance
        must cover the pose the receiver gives; 0 turns it off [0.25].
    gnss : GnssParams
        Robust satellite-fix prior.
    """

    window_cells: int = 64
    headings: int = 256
    floor: float = 1e-4
    likelihood_weight: float = 0.1
    evidence_step_m: float = 0.25
    evidence_max: float = 4.0
    loglik_clip: float = 40.0
    outside_fill: str = "mean"
    q_xy_m2: float = 1e-4
    q_xy_per_m: float = 4e-3
    q_yaw_rad2: float = 1e-6
    q_yaw_per_m: float = 3e-5
    q_yaw_per_rad: float = 2.5e-3
    q_no_odometry_m2: float = 1.0
    q_no_odometry_rad2: float = 0.01
    max_step_m: float = 3.0
    max_turn_rad: float = 1.0
    recentre_cells: int = 6
    mode_radius_cells: int = 2
    mode_radius_layers: int = 3
    top_modes: int = 3
    track_sigma_m: float = 1.0
    track_sigma_deg: float = 4.0
    confident_sigma_m: float = 0.85
    confident_sigma_deg: float = 1.6
    lost_sigma_m: float = 6.0
    lost_sigma_deg: float = 30.0
    converge_frames: int = 3
    degraded_frames: int = 5
    lost_frames: int = 8
    surprise_lost: float = -8.0
    verify_every: int = 15
    switch_margin: float = 6.0
    switch_votes: int = 2
    watch_frames: int = 25
    ambiguity_margin: float = 0.5
    course_span_m: float = 15.0
    course_sigma_deg: float = 8.0
    course_weight: float = 0.3
    course_veto_deg: float = 40.0
    course_veto_frames: int = 5
    model_sigma_m: float = 0.15
    model_sigma_deg: float = 0.5
    model_sigma_uncal_m: float = 0.5
    cov_scale: float = 1.0
    cov_scale_xy: float = 0.3
    odometry_scale: float = 1.0
    odo_scale_span_m: float = 30.0
    odo_scale_rate: float = 0.02
    odo_scale_max_dev: float = 0.05
    odo_scale_settle_m: float = 5.0
    adapt_cov: bool = False
    adapt_cov_scale: float = 0.35
    adapt_sigma_m: float = 0.2
    cue_cov: bool = False
    cue_cov_scale: float = 0.1
    cue_sigma_m: float = 0.1
    cue_gain: float = 1.0
    cue_memory: float = 0.9
    cue_half_m: float = 2.0
    cue_step_m: float = 0.25
    cue_min_frames: int = 10
    cue_features: str = "road,sidewalk,grass"
    catchup_m: float = 0.5
    catchup_memory: float = 0.9
    fallback_weight: float = 0.25
    gnss: GnssParams = field(default_factory=GnssParams)

    def __post_init__(self):
        if not 8 <= self.window_cells <= 1024:
            raise InputError(f"track.window_cells = {self.window_cells}: must be in 8..1024")
        if not 4 <= self.headings <= 4096:
            raise InputError(f"track.headings = {self.headings}: must be in 4..4096")
        if not 0.0 <= self.floor < 0.5:
            raise InputError(f"track.floor = {self.floor}: must be in [0, 0.5)")
        if not (0.0 < self.adapt_cov_scale <= 10.0 and 0.0 <= self.adapt_sigma_m <= 10.0):
            raise InputError("track.adapt_cov_scale must be in (0, 10] and track.adapt_sigma_m in [0, 10]")
        if not (0.0 < self.cue_cov_scale <= 10.0 and 0.0 <= self.cue_sigma_m <= 10.0 and 0.0 <= self.cue_gain <= 100.0
                and 0.0 <= self.cue_memory < 1.0 and 0.0 < self.cue_step_m <= self.cue_half_m <= 50.0
                and self.cue_half_m / self.cue_step_m <= 200 and self.cue_min_frames >= 0):
            raise InputError("track.cue_*: cov_scale in (0, 10], sigma_m in [0, 10], gain in [0, 100], memory in "
                             "[0, 1), 0 < step_m <= half_m <= 50 with at most 200 steps, min_frames >= 0")
        if not 0.0 < self.cov_scale <= 10.0:
            raise InputError(f"track.cov_scale = {self.cov_scale}: must be in (0, 10]")
        if not 0.0 < self.cov_scale_xy <= 10.0:
            raise InputError(f"track.cov_scale_xy = {self.cov_scale_xy}: must be in (0, 10]")
        if not 0.5 <= self.odometry_scale <= 2.0:
            raise InputError(f"track.odometry_scale = {self.odometry_scale}: must be in [0.5, 2]")
        if not (0.0 <= self.odo_scale_rate <= 1.0 and 0.0 <= self.odo_scale_max_dev <= 0.5
                and self.odo_scale_span_m >= 0.0):
            raise InputError("track.odo_scale_*: span_m must be >= 0, rate in [0, 1], max_dev in [0, 0.5]")
        if not (math.isfinite(self.confident_sigma_m) and 0.0 <= self.confident_sigma_m <= 100.0):
            raise InputError(f"track.confident_sigma_m = {self.confident_sigma_m}: must be in [0, 100] (0: off)")
        if not (math.isfinite(self.confident_sigma_deg) and 0.0 <= self.confident_sigma_deg <= 180.0):
            raise InputError(f"track.confident_sigma_deg = {self.confident_sigma_deg}: must be in [0, 180] (0: off)")
        if not (math.isfinite(self.catchup_m) and 0.0 <= self.catchup_m <= 100.0):
            raise InputError(f"track.catchup_m = {self.catchup_m}: must be in [0, 100] (0: off)")
        if not 0.0 <= self.catchup_memory < 1.0:
            raise InputError(f"track.catchup_memory = {self.catchup_memory}: must be in [0, 1)")
        if not (math.isfinite(self.gnss.search_tau_s) and 0.0 <= self.gnss.search_tau_s <= 3600.0):
            raise InputError(f"track.gnss.search_tau_s = {self.gnss.search_tau_s}: must be in [0, 3600] s (0: off)")
        if not 0 <= self.watch_frames <= 10000:
            raise InputError(f"track.watch_frames = {self.watch_frames}: must be in [0, 10000] (0: off)")
        if not 0.0 <= self.fallback_weight <= 1.0:
            raise InputError(f"track.fallback_weight = {self.fallback_weight}: must be in [0, 1]")
        if self.outside_fill not in ("min", "mean"):
            raise InputError(f"track.outside_fill = {self.outside_fill!r}: must be \"min\" or \"mean\"")
        if not 0.0 < self.likelihood_weight <= 10.0:
            raise InputError(f"track.likelihood_weight = {self.likelihood_weight}: must be in (0, 10]")
        if not (0.01 <= self.evidence_step_m <= 100.0 and 1.0 <= self.evidence_max <= 100.0):
            raise InputError(f"track.evidence_step_m = {self.evidence_step_m} must be in [0.01, 100] and "
                             f"track.evidence_max = {self.evidence_max} in [1, 100]")
        for k in ("q_xy_m2", "q_xy_per_m", "q_yaw_rad2", "q_yaw_per_m", "q_yaw_per_rad",
                  "q_no_odometry_m2", "q_no_odometry_rad2"):
            v = getattr(self, k)
            if not (math.isfinite(v) and v >= 0.0):
                raise InputError(f"track.{k} = {v}: must be a finite number >= 0")


@dataclass
class FilterEstimate:
    """What the posterior says (world frame; covariance over x, y, yaw)."""

    x: float
    y: float
    yaw: float
    cov: np.ndarray
    modes: list
    peak_mass: float
    sigma_xy_m: float
    sigma_yaw_rad: float


class GridFilter:
    """The belief and its three operations (predict, update, floor). Buffers are allocated once.

    Parameters
    ----------
    geom : MapGeometry
        Map raster placement (the filter's cells are map cells).
    params : TrackParams
        Filter parameters.
    """

    def __init__(self, geom: MapGeometry, params: TrackParams = TrackParams()):
        self.geom = geom
        self.p = params
        A, n = params.headings, params.window_cells
        self.A, self.H, self.W = A, n, n
        self.dyaw = 2.0 * math.pi / A
        self.bel = np.zeros((A, n, n), np.float32)
        self._scr = np.zeros_like(self.bel)
        self._tmp2 = np.zeros((n, n), np.float32)
        self._m2 = np.zeros((n, n), np.float32)
        self._m2w = np.zeros((n, n), np.float32)
        self._best = np.zeros((n, n), np.int64)
        self.dr = np.zeros(A, np.float64)
        self.dc = np.zeros(A, np.float64)
        self._tmp_a = np.zeros(A, np.float64)
        self._kr = np.zeros(A, np.int64)
        self._kc = np.zeros(A, np.int64)
        self._yaw = np.zeros(A, np.float64)
        self._cos = np.zeros(A, np.float64)
        self._sin = np.zeros(A, np.float64)
        self._acc = np.zeros(10, np.float64)
        self.active = np.ones(A, np.uint8)
        self._act_b = np.zeros(A, np.bool_)
        self._act_t = np.zeros(A, np.bool_)
        self.lsum = np.zeros(A, np.float64)
        self._bestv = np.zeros((n, n), np.float32)
        self._acc4 = np.zeros(4, np.float64)
        self.hoff = 0.0
        self.row0 = 0
        self.col0 = 0
        self._qxy = 0.0  # pending diffusion variance, cells^2
        self._qh = 0.0  # pending heading diffusion variance, layers^2
        self.n_cells = A * n * n
        self.reset(0.0, 0.0)

    # ---- window placement -------------------------------------------------------------------
    @property
    def fill(self) -> float:
        """Probability per cell of the uniform floor."""
        return self.p.floor / self.n_cells

    def window_centre_xy(self) -> tuple[float, float]:
        """World position (m) of the window centre."""
        return self.geom.xy_of(self.row0 + self.H / 2.0, self.col0 + self.W / 2.0)

    def _origin_for(self, x_m: float, y_m: float) -> tuple[int, int]:
        r, c = self.geom.cell_of(x_m, y_m)
        return int(math.floor(r - self.H / 2.0 + 0.5)), int(math.floor(c - self.W / 2.0 + 0.5))

    def reset(self, x_m: float, y_m: float, *, yaw_rad: float | None = None, sigma_yaw_rad: float = 0.0) -> None:
        """Uniform belief over the window centred at (x, y); optionally concentrated around a yaw."""
        self.row0, self.col0 = self._origin_for(x_m, y_m)
        self.dr[:] = 0.0
        self.dc[:] = 0.0
        self.hoff = 0.0
        self._qxy = self._qh = 0.0
        self.active.fill(1)
        self.lsum.fill(1.0 / self.A)
        if yaw_rad is None or not math.isfinite(yaw_rad):
            self.bel.fill(1.0 / self.n_cells)
            return
        a = np.arange(self.A) * self.dyaw
        d = wrap_angle(a - yaw_rad)
        s = max(sigma_yaw_rad, self.dyaw)
        w = np.exp(-0.5 * (d / s) ** 2)
        w /= w.sum()
        self.bel[:] = (w / (self.H * self.W)).astype(np.float32)[:, None, None]
        self.lsum[:] = w

    def recentre(self, x_m: float, y_m: float) -> None:
        """Move the window (by whole cells) so that (x, y) is near its centre; keeps the overlap."""
        r0, c0 = self._origin_for(x_m, y_m)
        kr, kc = self.row0 - r0, self.col0 - c0
        if kr == 0 and kc == 0:
            return
        self._kr.fill(kr)
        self._kc.fill(kc)
        K.shift_roll(self.bel, self._scr, self._kr, self._kc, 0, np.float32(self.fill), self.active)
        self.bel, self._scr = self._scr, self.bel
        self.row0, self.col0 = r0, c0
        self.normalise()

    def normalise(self) -> float:
        """Scale the belief to sum 1; returns the sum before (a zero or non-finite sum resets to uniform)."""
        s = float(K.scale_add(self.bel, self.active, self.lsum, 1.0, 0.0))
        if not (math.isfinite(s) and s > 0.0):
            self.bel.fill(1.0 / self.n_cells)
            self.active.fill(1)
            self.lsum.fill(1.0 / self.A)
            return s
        K.scale_add(self.bel, self.active, self.lsum, 1.0 / s, 0.0)
        return s

    # ---- predict ------------------------------------------------------------------------------
    def predict(self, d_fwd_m: float, d_left_m: float, d_yaw_rad: float) -> None:
        """Apply a body-frame odometry increment (forward m, left m, CCW rad) plus its motion noise."""
        p = self.p
        res = self.geom.res_m
        yaw = self._yaw
        np.add(self._layer_index(), self.hoff, out=yaw)
        yaw *= self.dyaw
        yaw += 0.5 * d_yaw_rad  # mid-point heading of the increment
        np.cos(yaw, out=self._cos)
        np.sin(yaw, out=self._sin)
        # displacement in cells (col grows east, row grows south): dx = c f - s l, dy = s f + c l
        t = self._tmp_a
        np.multiply(self._cos, d_fwd_m / res, out=t)
        self.dc += t
        np.multiply(self._sin, -d_left_m / res, out=t)
        self.dc += t
        np.multiply(self._sin, -d_fwd_m / res, out=t)
        self.dr += t
        np.multiply(self._cos, -d_left_m / res, out=t)
        self.dr += t
        np.rint(self.dr, out=self._tmp_a)
        self._kr[:] = self._tmp_a
        self.dr -= self._tmp_a
        np.rint(self.dc, out=self._tmp_a)
        self._kc[:] = self._tmp_a
        self.dc -= self._tmp_a
        self.hoff += d_yaw_rad / self.dyaw
        kh = int(round(self.hoff))
        self.hoff -= kh
        if kh or self._kr.any() or self._kc.any():
            K.shift_roll(self.bel, self._scr, self._kr, self._kc, kh, np.float32(self.fill), self.active)
            self.bel, self._scr = self._scr, self.bel
            if kh:
                self._roll_offsets(kh)
        dist = math.hypot(d_fwd_m, d_left_m)
        self.add_noise(p.q_xy_m2 + p.q_xy_per_m * dist,
                       p.q_yaw_rad2 + p.q_yaw_per_m * dist + p.q_yaw_per_rad * abs(d_yaw_rad))

    def _layer_index(self) -> np.ndarray:
        li = getattr(self, "_li", None)
        if li is None:
            li = self._li = np.arange(self.A, dtype=np.float64)
        return li

    def _roll_offsets(self, kh: int) -> None:
        k = kh % self.A
        for arr in (self.dr, self.dc, self.lsum):
            self._tmp_a[:] = arr
            arr[k:] = self._tmp_a[:self.A - k]
            arr[:k] = self._tmp_a[self.A - k:]
        t = self._act_t
        t[:] = self.active
        self.active[k:] = t[:self.A - k]
        self.active[:k] = t[self.A - k:]

    def activate_all(self) -> None:
        """Evaluate every heading layer on the next update (before a global search)."""
        if not self.active.all():
            K.flatten_layers(self.bel, self.active, self.lsum)
            self.active.fill(1)

    def _refresh_active(self, tau: float = 1e-6, margin: int = 3) -> None:
        """Layers holding more than ``tau`` of the mass, and ``margin`` layers on each side, stay active.

        The others become a uniform level holding their (tiny) mass in ``lsum``: they are carried but
        not evaluated until a global search reactivates them.
        """
        b = self._act_b
        np.greater(self.lsum, tau, out=b)
        t = self._act_t
        t[:] = b
        for k in range(1, margin + 1):
            t[k:] |= b[:-k]
            t[:k] |= b[-k:]
            t[:-k] |= b[k:]
            t[-k:] |= b[:k]
        self.active[:] = t

    def add_noise(self, var_xy_m2: float, var_yaw_rad2: float, *, now: bool = False) -> None:
        """Add diffusion (variance in m^2 and rad^2); small amounts wait until they are worth a pass."""
        self._qxy += var_xy_m2 / self.geom.res_m ** 2
        self._qh += var_yaw_rad2 / self.dyaw ** 2
        if self._qxy >= 0.05 or (now and self._qxy > 0):
            n = int(math.ceil(self._qxy / 0.5))
            w = self._qxy / (2.0 * n)
            for _ in range(n):
                K.blur3_space(self.bel, self._scr, self._tmp2, w, w, np.float32(self.fill), self.active)
                self.bel, self._scr = self._scr, self.bel
            self._qxy = 0.0
        if self._qh >= 0.05 or (now and self._qh > 0):
            n = int(math.ceil(self._qh / 0.5))
            w = self._qh / (2.0 * n)
            for _ in range(min(n, 4 * self.A)):
                K.blur3_heading(self.bel, self._scr, w, self.active, self.lsum)
                self.bel, self._scr = self._scr, self.bel
            self._qh = 0.0

    # ---- update -------------------------------------------------------------------------------
    def update(self, vol: LikelihoodVolume, *, weight: float | None = None) -> float:
        """Multiply by the tempered likelihood and normalise.

        Returns the log predictive likelihood ``log sum(prior * exp(w (L - max L)))``: 0 when the
        belief sits on the frame's best poses (or the frame is flat), very negative when the frame
        says the robot is somewhere the belief does not expect it.
        """
        L = vol.loglik
        lmax = float(L.max())
        lout = float(L.min()) if self.p.outside_fill == "min" else float(L.mean(dtype=np.float64))
        w = self.p.likelihood_weight if weight is None else weight
        s = K.sample_update(self.bel, self.dr, self.dc, self.hoff, self.dyaw, L,
                            float(self.row0 - vol.row0), float(self.col0 - vol.col0), float(vol.scale),
                            float(vol.yaw0_rad), float(vol.dyaw_rad), vol.full_circle,
                            lmax, lout, float(w), float(self.p.loglik_clip), self.active, self.lsum)
        before = self.normalise()
        if not (before > 0 and math.isfinite(before)):
            self.active.fill(1)
            return -self.p.loglik_clip
        self._refresh_active()
        return max(math.log(before), -self.p.loglik_clip)

    def update_xy(self, x_m: float, y_m: float, sigma_m: float, *, nu: float, weight: float) -> None:
        """Multiply by a robust (Student-t) position likelihood centred at (x, y)."""
        fr, fc = self.geom.cell_of(x_m, y_m)
        K.xy_robust_update(self.bel, self.dr, self.dc, float(self.row0), float(self.col0), fr, fc,
                           sigma_m / self.geom.res_m, float(nu), float(weight), self.active)
        self.normalise()

    def update_heading(self, yaw_rad: float, sigma_rad: float, *, nu: float, weight: float) -> None:
        """Multiply by a robust (1D Student-t) heading likelihood centred at ``yaw_rad``; every layer active after."""
        self.activate_all()
        w = self._tmp_a
        np.add(self._layer_index(), self.hoff, out=w)
        w *= self.dyaw
        w -= yaw_rad
        np.sin(w * 0.5, out=w)  # wrap-safe: 2 sin(d / 2) ~ d near 0, no jump at +-pi
        w *= 2.0 / sigma_rad
        np.square(w, out=w)
        w /= nu
        np.log1p(w, out=w)
        w *= -0.5 * (nu + 1.0) * weight
        np.exp(w, out=w)
        self.bel *= w.astype(np.float32)[:, None, None]
        self.normalise()

    def add_floor(self) -> None:
        """Mix the uniform floor in (keeps the belief able to recover)."""
        if self.p.floor > 0:
            K.scale_add(self.bel, self.active, self.lsum, 1.0 - self.p.floor, self.fill)

    # ---- read out -----------------------------------------------------------------------------
    def estimate(self) -> FilterEstimate:
        """Refined top mode, covariance about it, and the top modes (world frame)."""
        p = self.p
        res = self.geom.res_m
        k = int(K.argmax3(self.bel, self.active))
        a0, rem = divmod(k, self.H * self.W)
        i0, j0 = divmod(rem, self.W)
        ref = self._refine_peak(a0, i0, j0)
        if ref is None:
            K.local_mean(self.bel, self.dr, self.dc, self.hoff, self.dyaw, a0, i0, j0,
                         p.mode_radius_cells, p.mode_radius_layers, self._acc4)
            m = self._acc4[0]
            if m > 0:
                row_w, col_w, dyaw = self._acc4[1] / m, self._acc4[2] / m, self._acc4[3] / m
            else:
                row_w, col_w, dyaw = i0 + 0.5 + self.dr[a0], j0 + 0.5 + self.dc[a0], 0.0
        else:
            row_w, col_w, dyaw = ref
        yaw = wrap_angle((a0 + self.hoff) * self.dyaw + dyaw)
        K.moments_about(self.bel, self.dr, self.dc, self.hoff, self.dyaw, row_w, col_w, yaw,
                        2.0 * self.fill, self._acc, self.active)
        acc = self._acc
        mass = acc[0] if acc[0] > 0 else 1.0
        # second moments in cells / radians about the pose: rr, cc, aa, rc, ra, ca
        m = [acc[4] / mass, acc[5] / mass, acc[6] / mass, acc[7] / mass, acc[8] / mass, acc[9] / mass]
        self._sharpen(m, ref, a0, i0, j0, row_w, col_w, yaw, mass)
        e_rr, e_cc, e_aa, e_rc, e_ra, e_ca = m
        cov = np.empty((3, 3))
        cov[0, 0] = res * res * e_cc
        cov[1, 1] = res * res * e_rr
        cov[0, 1] = cov[1, 0] = -res * res * e_rc
        cov[2, 2] = e_aa
        cov[0, 2] = cov[2, 0] = res * e_ca
        cov[1, 2] = cov[2, 1] = -res * e_ra
        x, y = self.geom.xy_of(self.row0 + row_w, self.col0 + col_w)
        tr = 0.5 * (cov[0, 0] + cov[1, 1])
        det = cov[0, 0] * cov[1, 1] - cov[0, 1] ** 2
        lam = tr + math.sqrt(max(tr * tr - det, 0.0))
        modes = self._modes()
        peak = modes[0][3] if modes else 0.0
        return FilterEstimate(x, y, yaw, cov, modes, peak, math.sqrt(max(lam, 0.0)), math.sqrt(max(cov[2, 2], 0.0)))

    def _sharpen(self, m, ref, a0, i0, j0, row_w, col_w, yaw, mass) -> None:
        """Replace the lattice moments of the peak's own mass by its Laplace covariance when the peak
        is sharper than a cell (or a heading layer).

        A lattice second moment is only right for a peak wider than about 0.7 cells; for a sharper
        one it measures where the peak sits between lattice points. The negative inverse Hessian of
        the log-posterior (the Laplace approximation, exact for a Gaussian) is used for the mass in
        the 3 x 3 x 3 neighbourhood of the peak; everything else (tails, other modes) keeps its
        lattice moments. Without a usable fit, the quantisation variance (1/12 cell^2, 1/12 layer^2)
        is added instead. ``m`` = [rr, cc, aa, rc, ra, ca] is updated in place.
        """
        if ref is None:
            m[0] += 1.0 / 12.0
            m[1] += 1.0 / 12.0
            m[2] += self.dyaw ** 2 / 12.0
            return
        hrr, hcc, hrc, haa = self._hess
        A = self.A
        lays = ((a0 - 1) % A, a0, (a0 + 1) % A)
        blk = np.empty((3, 3, 3))
        for k, a in enumerate(lays):
            blk[k] = self.bel[a, i0 - 1:i0 + 2, j0 - 1:j0 + 2]
        wb = blk / mass
        mb = float(wb.sum())
        rr = np.array([[i0 - 1 + 0.5 + self.dr[a] + t - (row_w) for t in range(3)] for a in lays])  # (3 layers, 3)
        cc = np.array([[j0 - 1 + 0.5 + self.dc[a] + t - (col_w) for t in range(3)] for a in lays])
        aa = np.array([wrap_angle((a0 + d + self.hoff) * self.dyaw - yaw) for d in (-1, 0, 1)])
        R = rr[:, :, None]
        C = cc[:, None, :]
        Aa = aa[:, None, None]
        box = [float((wb * R * R).sum()), float((wb * C * C).sum()), float((wb * Aa * Aa).sum()),
               float((wb * R * C).sum()), float((wb * R * Aa).sum()), float((wb * C * Aa).sum())]
        det = hrr * hcc - hrc * hrc
        if det > 0 and hrr < 0:
            lrr, lcc, lrc = -hcc / det, -hrr / det, hrc / det  # -inverse of the 2x2 Hessian (cells^2)
            if max(lrr, lcc) < 0.5:
                m[0] += mb * lrr - box[0]
                m[1] += mb * lcc - box[1]
                m[3] += mb * lrc - box[3]
        else:
            m[0] += 1.0 / 12.0
            m[1] += 1.0 / 12.0
        if haa < 0:
            laa = -1.0 / haa  # layers^2
            if laa < 0.5:
                m[2] += mb * laa * self.dyaw ** 2 - box[2]
                m[4] -= box[4]
                m[5] -= box[5]
        else:
            m[2] += self.dyaw ** 2 / 12.0

    def _refine_peak(self, a0: int, i0: int, j0: int):
        """Sub-cell peak from a quadratic fit of the log-posterior around cell (a0, i0, j0).

        Sampled on a lattice, a posterior sharper than a cell puts nearly all its mass in one cell,
        so a weighted mean snaps to the lattice; the Newton step on the log values (central
        differences on the 3 x 3 neighbourhood, and a 3-point parabola across heading layers) is
        exact for a Gaussian. Returns (row, col, dyaw) in window coordinates, or None when the
        neighbourhood is not usable (window edge, inactive layer, not concave).
        """
        H, W, A = self.H, self.W, self.A
        if not (0 < i0 < H - 1 and 0 < j0 < W - 1):
            return None
        am, ap = (a0 - 1) % A, (a0 + 1) % A
        if not (self.active[am] and self.active[ap]):
            return None
        blk = self.bel[a0, i0 - 1:i0 + 2, j0 - 1:j0 + 2]
        if float(blk.min()) <= 0.0:
            return None
        f = np.log(blk.astype(np.float64))
        gx = 0.5 * (f[1, 2] - f[1, 0])
        gy = 0.5 * (f[2, 1] - f[0, 1])
        hxx = f[1, 2] - 2.0 * f[1, 1] + f[1, 0]
        hyy = f[2, 1] - 2.0 * f[1, 1] + f[0, 1]
        hxy = 0.25 * (f[2, 2] - f[2, 0] - f[0, 2] + f[0, 0])
        det = hxx * hyy - hxy * hxy
        if not (hxx < 0.0 and hyy < 0.0 and det > 0.0):
            return None
        oc = -(hyy * gx - hxy * gy) / det
        orow = -(hxx * gy - hxy * gx) / det
        oc = min(max(oc, -1.0), 1.0)
        orow = min(max(orow, -1.0), 1.0)
        vm, v0, vp = float(self.bel[am, i0, j0]), float(blk[1, 1]), float(self.bel[ap, i0, j0])
        oa = 0.0
        haa = 0.0
        if vm > 0.0 and vp > 0.0:
            lm, l0, lp = math.log(vm), math.log(v0), math.log(vp)
            den = lm - 2.0 * l0 + lp
            if den < 0.0:
                oa = min(max(0.5 * (lm - lp) / den, -1.0), 1.0)
                haa = den
        self._hess = (hyy, hxx, hxy, haa)  # d2/drow2, d2/dcol2, d2/drow dcol, d2/dlayer2 of log bel
        return i0 + 0.5 + self.dr[a0] + orow, j0 + 0.5 + self.dc[a0] + oc, oa * self.dyaw

    def _modes(self) -> list:
        """Top modes after non-maximum suppression in x, y: (x, y, yaw, weight)."""
        p = self.p
        K.marginal_xy(self.bel, self.active, self._m2, self._best, self._bestv)
        self._m2w[:] = self._m2
        out = []
        r = p.mode_radius_cells
        for _ in range(p.top_modes):
            k = int(np.argmax(self._m2w))
            i, j = divmod(k, self.W)
            if self._m2w[i, j] <= 2.0 * self.fill * self.A:
                break
            wgt = float(K.box_mass(self._m2, i, j, r))
            a = int(self._best[i, j])
            x, y = self.geom.xy_of(self.row0 + i + 0.5 + self.dr[a], self.col0 + j + 0.5 + self.dc[a])
            out.append((x, y, wrap_angle((a + self.hoff) * self.dyaw), wgt))
            K.suppress_box(self._m2w, i, j, 3 * r)
        return out


@dataclass
class TrackOutput:
    """One tracker step's result (world frame)."""

    t: float
    x: float
    y: float
    yaw: float
    cov: np.ndarray
    quality: str
    modes: list
    status: str
    surprise: float = 0.0
    global_search: bool = False


def _scaled_blocks(cov: np.ndarray, k_xy: float, k_yaw: float) -> np.ndarray:
    """A copy of a 3x3 (x, y, yaw) covariance with the position block x ``k_xy``, the heading variance x ``k_yaw``
    and the cross terms x ``sqrt(k_xy k_yaw)`` (the covariance of the position scaled by sqrt(k_xy) and the heading
    by sqrt(k_yaw): still positive definite)."""
    a, h = math.sqrt(k_xy), math.sqrt(k_yaw)
    out = cov.copy()
    out[:2, :2] *= a * a
    out[:2, 2] *= a * h
    out[2, :2] *= a * h
    out[2, 2] *= h * h
    return out


def evidence_factor(step_m: float, p: "TrackParams") -> float:
    """How many frames' worth of new evidence a frame holds: ``min(evidence_max, max(1, step / evidence_step_m))``.

    ``step_m`` is the odometry path since the previous frame (m).
    """
    return min(p.evidence_max, max(1.0, step_m / p.evidence_step_m))


class Tracker:
    """The filter plus the lost/recovered logic and the GNSS prior: the tracker the loop calls.

    One call per frame: :meth:`wants_global` says whether the correlator should search the whole
    window around :meth:`search_centre` (at start, while searching, for periodic checks), then
    :meth:`step` takes the odometry increment, the likelihood volume (or ``None`` for an unusable
    frame) and the latest GNSS fix.
    """

    def __init__(self, geom: MapGeometry, params: TrackParams = TrackParams()):
        self.p = params
        self.filter = GridFilter(geom, params)
        self.geom = geom
        from .gnss_prior import DisagreementClock

        self._clock = DisagreementClock(params.gnss)
        from .course import CourseCheck

        self.course = CourseCheck(max(params.course_span_m, 1.0), params.course_sigma_deg)
        from .odoscale import OdometryScale

        from .cueoffset import CueOffset

        self.cue = CueOffset(params.cue_half_m, params.cue_step_m, params.cue_memory)
        from .catchup import CatchUp

        self.catchup = CatchUp(params.catchup_memory)
        self.odo_scale = OdometryScale(max(params.odo_scale_span_m, 1.0),
                                       params.odo_scale_rate if params.odo_scale_span_m > 0 else 0.0,
                                       params.odo_scale_max_dev, params.odometry_scale,
                                       settle_m=params.odo_scale_settle_m)
        self.reset_state()

    def reset_state(self) -> None:
        """Forget everything: no fix, searching on the next frame."""
        self.state = "no-fix"
        self.started = False
        self.frames = 0
        self._converge = 0
        self._no_update = 0
        self._evidence = 1.0
        self._surprised = 0
        self._votes = 0
        self._since_verify = 0
        self._search_fix_t = None  # time of the last fix used while searching
        self._watch = 0  # frames left with a global check on each (after an odometry jump)
        self._gnss_disagree_s = 0.0
        self._gnss_xy = None  # last usable fix (x, y, sigma, t)
        self._ambig = None  # (x, y, yaw, weight) of a competing pose found by the last global check
        self._ambig_seen = 0
        self._fix_used_t = -math.inf
        self._t = 0.0
        self._notes = []
        self._g = None
        self._was_global = False
        self.last = None
        self._clock.reset()
        self.course.reset()
        self.odo_scale.reset()
        self.cue.reset()
        self.catchup.reset()
        self._course = None  # (yaw, sigma) of the current frame, or None
        self._course_off = 0
        # degraded only by the catch-up or heading check: the wheel scale learns as if tracking
        self._learn_while_degraded = False
        self._off_e = self._off_n = math.nan  # average (estimate - fix) over recent fixes (m)
        self._off_t = -math.inf
        self.counters = {"global_searches": 0, "lost": 0, "recovered": 0, "odometry_jumps": 0,
                         "no_odometry": 0, "frames_without_likelihood": 0}

    # ---- what the loop asks before correlating --------------------------------------------------
    def wants_global(self) -> bool:
        """True when this frame should be matched over the whole search window."""
        if self.state in ("no-fix", "searching"):
            return True
        if self._gnss_disagree_s >= self.p.gnss.disagree_s or self._watch > 0:
            return True
        return self._since_verify >= self.p.verify_every

    def search_centre(self) -> tuple[float, float] | None:
        """Centre (x, y) of the global search: the fix when searching or disagreeing, else the estimate."""
        g = self._gnss_xy
        if g is not None and (self.state in ("no-fix", "searching") or self._gnss_disagree_s > 0):
            return g[0], g[1]
        if self.last is not None:
            return self.last.x, self.last.y
        if g is not None:
            return g[0], g[1]
        return None

    def track_centre(self) -> tuple[float, float, float]:
        """Estimate (x, y, yaw) around which a tracking-mode correlation should look."""
        if self.last is None:
            x, y = self.filter.window_centre_xy()
            return x, y, 0.0
        return self.last.x, self.last.y, self.last.yaw

    # ---- one frame ------------------------------------------------------------------------------
    def step(self, t: float, odo: tuple[float, float, float] | None, vol: LikelihoodVolume | None, *,
             is_global: bool = False, gnss: tuple[float, float, float, float] | None = None,
             frame_status: str = "ok") -> TrackOutput:
        """Advance the filter by one frame (one call: :meth:`begin`, :meth:`consider_global`, :meth:`finish`).

        Parameters
        ----------
        t : float
            Sensor time of the frame (s).
        odo : (d_forward_m, d_left_m, d_yaw_rad) or None
            Body-frame odometry increment since the previous frame; None when it is missing.
        vol : LikelihoodVolume or None
            The frame's likelihood (None when the frame was unusable).
        is_global : bool
            ``vol`` comes from a global search: it also serves as the global evidence (its
            per-cell maximum over heading) and may re-centre the window or declare the filter lost.
        gnss : (x_m, y_m, acc_m, t_fix) or None
            Latest satellite fix in the world frame with its reported 1-sigma accuracy.
        frame_status : str
            Why the frame is unusable when ``vol`` is None (carried into the status text).
        """
        self.begin(t, odo, gnss, have_frame=vol is not None)
        if vol is not None and is_global:
            self.consider_global(GlobalEvidence.from_volume(vol, self._gm2_for(vol)))
        return self.finish(vol, frame_status=frame_status)

    def begin(self, t: float, odo, gnss, *, have_frame: bool = True) -> None:
        """Phase 1 of a frame: predict with odometry and apply a new satellite fix."""
        p = self.p
        f = self.filter
        self._t = t
        self._notes = notes = []
        self._was_global = False
        self.frames += 1
        g = self._usable_fix(t, gnss)
        self._g = g
        if not self.started:
            if g is None and not have_frame:
                return
            if g is not None:
                f.reset(g[0], g[1])
                self.started = True
                self.state = "searching"
            return
        self._predict(odo, notes)
        if g is not None and g[3] > self._fix_used_t:
            self.course.fix(g[0], g[1])
        self._course = self.course.heading() if p.course_span_m > 0 else None
        if g is not None and g[3] > self._fix_used_t:
            self._fix_used_t = g[3]
            if self.state == "searching":
                w = search_fix_weight(None if self._search_fix_t is None else g[3] - self._search_fix_t, p.gnss)
                self._search_fix_t = g[3]
            else:
                w = p.gnss.weight_track
            if self.state == "searching" and self._far_from_window(g[0], g[1]):
                f.recentre(g[0], g[1])
            f.update_xy(g[0], g[1], g[2], nu=p.gnss.nu, weight=w)

    def consider_global(self, ev: "GlobalEvidence") -> tuple[float, float, float]:
        """Phase 2 (only when :meth:`wants_global`): weigh a global search.

        Returns the pose (x, y, yaw) around which the frame's likelihood should be computed for
        :meth:`finish`: the best candidate while searching or after being declared lost, else the
        estimate.
        """
        if not self.started:
            A, H, W = 1, ev.best.shape[0], ev.best.shape[1]
            x, y = self.geom.xy_of(ev.row0 + ev.scale * H / 2.0, ev.col0 + ev.scale * W / 2.0)
            self.filter.reset(x, y)
            self.started = True
            self.state = "searching"
        self.counters["global_searches"] += 1
        self._since_verify = 0
        self._was_global = True
        self.filter.activate_all()
        return self._global_decision(ev, self._g, self._notes)

    def finish(self, vol: LikelihoodVolume | None, *, frame_status: str = "ok") -> TrackOutput:
        """Phase 3: update with the frame's likelihood (None: unusable frame), estimate, decide quality."""
        p = self.p
        f = self.filter
        t, notes, g = self._t, self._notes, self._g
        if not self.started:
            msg = ["waiting for a fix or a frame"] + ([frame_status] if frame_status != "ok" else [])
            return self._output(t, "no-fix", msg)
        surprise = 0.0
        if self._course is not None and self.state == "searching" and p.course_weight > 0:
            f.update_heading(self._course[0], self._course[1], nu=p.gnss.nu, weight=p.course_weight)
        if vol is not None:
            surprise = f.update(vol, weight=p.likelihood_weight * self._evidence)
            self._no_update = 0
            self._surprised = self._surprised + 1 if surprise < p.surprise_lost else 0
        else:
            self._no_update += 1
            self.counters["frames_without_likelihood"] += 1
            if frame_status != "ok":
                notes.append(frame_status)
        self._since_verify += 1
        if self._watch > 0:
            self._watch -= 1
        est = f.estimate()
        # since the last lock-on only: while searching the belief moves by metres on purpose
        self.catchup.observe(est.x, est.y, est.yaw, add=self.state != "searching")
        if p.cue_cov:
            cue = getattr(vol, "cue", None) if vol is not None else None
            if cue is not None:
                gm = self.geom
                self.cue.add(cue.loglik[0], cue.row0, cue.col0, cue.scale, est.x, est.y, est.yaw, gm.x_min, gm.y_max,
                             gm.res_m)
            else:
                self.cue.decay()
        if g is not None:
            self._gnss_disagree_s = self._clock.observe(t, math.hypot(est.x - g[0], est.y - g[1]), g[2])
            if g[3] > self._off_t:
                self._off_t = g[3]
                a = p.gnss.offset_alpha
                if math.isnan(self._off_e):
                    self._off_e, self._off_n = est.x - g[0], est.y - g[1]
                else:
                    self._off_e += a * (est.x - g[0] - self._off_e)
                    self._off_n += a * (est.y - g[1] - self._off_n)
        self._decide(est, notes)
        if self.state == "tracking" or self.state == "degraded":
            r, c = self.geom.cell_of(est.x, est.y)
            if (abs(r - (f.row0 + f.H / 2)) > p.recentre_cells or abs(c - (f.col0 + f.W / 2)) > p.recentre_cells):
                f.recentre(est.x, est.y)
        f.add_floor()
        self.last = est
        if self.state == "tracking" or self._learn_while_degraded:
            # learn the wheel scale from poses the map holds; the catch-up check changes only the flag
            self.odo_scale.pose(est.x, est.y)
        elif self.state == "searching":
            self.odo_scale.reset()  # the track starts again at the next lock-on
        if self._ambig is not None and self.state != "searching":
            est = self._with_alternative(est)
        return self._output(t, self.state, notes, est, surprise, self._was_global)

    # ---- internals ------------------------------------------------------------------------------
    def _usable_fix(self, t, gnss):
        from .gnss_prior import effective_sigma_m, fix_usable

        if gnss is None:
            return None
        x, y, acc, tf = gnss
        if not fix_usable(acc, t - tf, x, y, self.p.gnss):
            return None
        g = (x, y, effective_sigma_m(acc, self.p.gnss), tf)
        self._gnss_xy = g
        return g

    def _vol_centre(self, vol):
        A, H, W = vol.loglik.shape
        return self.geom.xy_of(vol.row0 + vol.scale * H / 2.0, vol.col0 + vol.scale * W / 2.0)

    def _far_from_window(self, x, y) -> bool:
        f = self.filter
        r, c = self.geom.cell_of(x, y)
        return abs(r - (f.row0 + f.H / 2)) > f.H / 4 or abs(c - (f.col0 + f.W / 2)) > f.W / 4

    def _predict(self, odo, notes) -> None:
        p = self.p
        f = self.filter
        self._evidence = 1.0  # no usable odometry: the frame counts as one
        if odo is None or not all(math.isfinite(v) for v in odo):
            self.counters["no_odometry"] += 1
            notes.append("no odometry")
            self.course.reset()
            self.odo_scale.reset()
            self.catchup.reset()
            f.add_noise(p.q_no_odometry_m2, p.q_no_odometry_rad2)
            return
        d_fwd, d_left, d_yaw = odo
        if math.hypot(d_fwd, d_left) > p.max_step_m or abs(d_yaw) > p.max_turn_rad:
            self.counters["odometry_jumps"] += 1
            self._watch = p.watch_frames  # carried? check the whole window on every frame for a while
            notes.append("odometry jump ignored")
            self.course.reset()
            self.odo_scale.reset()
            self.catchup.reset()
            f.add_noise(p.q_no_odometry_m2 + (p.q_xy_per_m * math.hypot(d_fwd, d_left)),
                        p.q_no_odometry_rad2)
            return
        self.course.odometry(d_fwd, d_left, d_yaw)
        self.odo_scale.odometry(d_fwd, d_left, d_yaw)
        k = self.odo_scale.scale
        self.catchup.moved(d_fwd * k, d_left * k, d_yaw)
        f.predict(d_fwd * k, d_left * k, d_yaw)
        self._evidence = evidence_factor(math.hypot(d_fwd, d_left) * k, p)

    def _global_decision(self, ev: "GlobalEvidence", g, notes) -> tuple[float, float, float]:
        """Compare the best pose of a global search with the best near the belief; move, vote or flag."""
        p = self.p
        f = self.filter
        H, W = ev.best.shape
        sc = self._score_for(H, W)
        np.multiply(ev.best, p.likelihood_weight, out=sc)  # the same tempering as the update
        if g is not None:
            # robust GNSS prior on the candidates (same tempering as while searching)
            rows = ev.row0 + ev.scale * (np.arange(H) + 0.5)
            cols = ev.col0 + ev.scale * (np.arange(W) + 0.5)
            fr, fc = self.geom.cell_of(g[0], g[1])
            s = g[2] / self.geom.res_m
            nu = p.gnss.nu
            r2 = (rows - fr)[:, None] ** 2 + (cols - fc)[None, :] ** 2
            sc += np.log1p(r2 / (nu * s * s)) * (-0.5 * (nu + 2.0) * p.gnss.weight_search)
            gate = max(p.gnss.gate_m / self.geom.res_m, 5.0 * s)
            gated = r2 > gate * gate
        else:
            gated = None
        score = sc

        def pose_at(i, j):
            x, y = self.geom.xy_of(ev.row0 + ev.scale * (i + 0.5), ev.col0 + ev.scale * (j + 0.5))
            yaw = float(ev.best_yaw[i, j]) if ev.best_yaw is not None else math.nan
            return x, y, yaw

        if self.state == "searching" or self.last is None:
            if gated is not None and not gated.all():
                score[gated] = -np.inf
            if self._course is not None and ev.best_yaw is not None:
                # candidates that drive another way than the fixes and odometry say are less likely
                cy, cs = self._course
                d = np.sin(0.5 * (ev.best_yaw - cy)) * (2.0 / cs)
                score += np.log1p(d * d / p.gnss.nu) * (-0.5 * (p.gnss.nu + 1.0))
            k = int(np.argmax(score))
            bx, by, byaw = pose_at(*divmod(k, W))
            if self._far_from_window(bx, by):
                f.recentre(bx, by)
                notes.append("search moved")
            return bx, by, byaw
        est = self.last
        er, ec = self.geom.cell_of(est.x, est.y)
        i0, j0 = int((er - ev.row0) // ev.scale), int((ec - ev.col0) // ev.scale)
        here = -np.inf
        rad = max(1, int(round(2.0 / (self.geom.res_m * ev.scale))))
        lo_i, hi_i, lo_j, hi_j = max(0, i0 - rad), min(H, i0 + rad + 1), max(0, j0 - rad), min(W, j0 + rad + 1)
        if lo_i < hi_i and lo_j < hi_j:
            here = float(score[lo_i:hi_i, lo_j:hi_j].max())
        rad = int(round(5.0 / (self.geom.res_m * ev.scale)))  # "elsewhere" is 5 m or more away
        lo_i, hi_i, lo_j, hi_j = max(0, i0 - rad), min(H, i0 + rad + 1), max(0, j0 - rad), min(W, j0 + rad + 1)
        if lo_i < hi_i and lo_j < hi_j:
            score[lo_i:hi_i, lo_j:hi_j] = -np.inf
        if gated is not None:
            score[gated] = -np.inf  # "elsewhere" must also be where the fix allows
        k = int(np.argmax(score))
        bi, bj = divmod(k, W)
        alt = float(score[bi, bj])
        bx, by, byaw = pose_at(bi, bj)
        d = math.hypot(bx - est.x, by - est.y)
        gap = alt - here
        if gap > p.switch_margin:
            self._votes += 1
            self._ambig = None
            notes.append(f"check: better pose {d:.0f} m away ({self._votes}/{p.switch_votes})")
            if self._votes >= p.switch_votes:
                self._lose(notes, "global check found a better pose elsewhere")
                f.reset(bx, by)
                return bx, by, byaw
            return est.x, est.y, est.yaw
        self._votes = 0
        if gap > -p.ambiguity_margin and math.isfinite(gap):
            # a pose elsewhere explains the frame about as well; one frame's check is a weak test
            # (the belief holds many frames), so it must be seen twice in a row before it is reported
            self._ambig_seen += 1
            if self._ambig_seen >= 2:
                w = 1.0 / (1.0 + math.exp(-gap))
                self._ambig = (bx, by, byaw if math.isfinite(byaw) else est.yaw, w)
                notes.append(f"ambiguous: a similar pose {d:.0f} m away")
        else:
            self._ambig_seen = 0
            self._ambig = None
        return est.x, est.y, est.yaw

    def _with_alternative(self, est: FilterEstimate) -> FilterEstimate:
        """The estimate with the competing pose of the last global check folded into modes and covariance."""
        ax, ay, ayaw, w = self._ambig
        d = np.array([ax - est.x, ay - est.y, float(wrap_angle(ayaw - est.yaw))])
        cov = est.cov + w * np.outer(d, d)  # second moment about the reported pose of the two-pose mixture
        modes = [(m[0], m[1], m[2], m[3] * (1.0 - w)) for m in est.modes] + [(ax, ay, ayaw, w)]
        modes.sort(key=lambda m: -m[3])
        return FilterEstimate(est.x, est.y, est.yaw, cov, modes[:max(self.p.top_modes, 2)], est.peak_mass,
                              est.sigma_xy_m, est.sigma_yaw_rad)

    def _gm2_for(self, vol):
        A, H, W = vol.loglik.shape
        return self._m2_for(H, W)

    def _m2_for(self, H, W):
        b = getattr(self, "_gm2", None)
        if b is None or b.shape != (H, W):
            b = self._gm2 = np.empty((H, W), np.float32)
        return b

    def _score_for(self, H, W):
        b = getattr(self, "_gsc", None)
        if b is None or b.shape != (H, W):
            b = self._gsc = np.empty((H, W), np.float64)
        return b

    def _lose(self, notes, why) -> None:
        self.state = "searching"
        self.counters["lost"] += 1
        self._watch = 0  # searching checks every frame anyway
        self._search_fix_t = None  # the new search counts its first fix in full
        self.odo_scale.reset()
        self._converge = 0
        self._votes = 0
        self._surprised = 0
        self._ambig = None
        self._ambig_seen = 0
        self._off_e = self._off_n = math.nan
        self.cue.reset()  # the sum is about offsets from an estimate that is no longer trusted
        self.catchup.reset()  # the restart moves the belief; that is not the map pulling it
        notes.append(f"lost: {why}")

    def _spread(self, est: FilterEstimate) -> int:
        """Whether the posterior is too broad to promise a pose within spec: 0 no, 1 position, 2 heading."""
        p = self.p
        if 0.0 < p.confident_sigma_m < est.sigma_xy_m:
            return 1
        # a posterior is rarely narrower than its heading lattice: never ask for less than 1.1 layers
        # (1.55 deg at 256 headings, below the default; with 128 a right heading carries 2.1-2.4 deg)
        if p.confident_sigma_deg > 0.0 and math.degrees(est.sigma_yaw_rad) > max(
                p.confident_sigma_deg, 1.1 * math.degrees(self.filter.dyaw)):
            return 2
        return 0

    @staticmethod
    def _spread_note(kind: int, est: FilterEstimate) -> str:
        """The flag's note for a spread of ``kind`` (1 position, 2 heading)."""
        if kind == 1:
            return f"position spread {est.sigma_xy_m:.2f} m"
        return f"heading spread {math.degrees(est.sigma_yaw_rad):.1f} deg"

    def _decide(self, est: FilterEstimate, notes) -> None:
        p = self.p
        self._learn_while_degraded = False
        ok_sigma = (est.sigma_xy_m <= p.track_sigma_m and math.degrees(est.sigma_yaw_rad) <= p.track_sigma_deg)
        if self.state == "searching":
            self._converge = self._converge + 1 if (ok_sigma and self._no_update == 0) else 0
            if self._converge >= p.converge_frames:
                self.counters["recovered"] += 1
                notes.append("locked on")
                kind = self._spread(est)
                if kind:
                    self.state = "degraded"
                    notes.append(f"degraded: {self._spread_note(kind, est)}")
                else:
                    self.state = "tracking"
            return
        lost_sigma = (est.sigma_xy_m > p.lost_sigma_m or math.degrees(est.sigma_yaw_rad) > p.lost_sigma_deg)
        if lost_sigma:
            self._lose(notes, f"uncertainty {est.sigma_xy_m:.1f} m")
            return
        if self._surprised >= p.lost_frames:
            self._lose(notes, f"{self._surprised} frames disagree with the belief")
            return
        if self._course is not None:
            dh = abs(math.degrees(wrap_angle(est.yaw - self._course[0])))
            off = dh > max(p.course_veto_deg, 3.0 * math.degrees(self._course[1]))
            self._course_off = self._course_off + 1 if off else 0
            if self._course_off >= p.course_veto_frames:
                self._course_off = 0
                self._lose(notes, f"heading {dh:.0f} deg off the satellite track")
                return
        else:
            self._course_off = 0
        off = math.hypot(self._off_e, self._off_n)
        offset = p.gnss.offset_degrade_m > 0 and off > p.gnss.offset_degrade_m  # NaN (no fix yet) is False
        # a broad posterior along the street is often a neighbour mode the frames cannot yet tell apart
        kind = self._spread(est)
        # a heading spread says nothing about the distance driven
        head_only = kind == 2
        # a belief the map keeps pulling against the odometry has not settled, however tight it is
        catching = 0.0 < p.catchup_m < self.catchup.drift_m
        other = (not ok_sigma or self._no_update >= p.degraded_frames
                 or self._gnss_disagree_s >= p.gnss.disagree_s or self._ambig is not None or offset
                 or kind == 1)
        degraded = other or catching or head_only
        # the catch-up and heading checks change only the flag: the wheel scale learns on those frames as before
        # (with the learning stopped there too, tuning drive 16 started learning 6 s later and its median rose
        # 0.13 -> 0.19 m; with the heading check, drive 17 0.28 -> 0.43 m)
        self._learn_while_degraded = (catching or head_only) and not other
        if degraded:
            if self.state != "degraded":
                why = ("uncertainty grew" if not ok_sigma else
                       self._spread_note(kind, est) if kind else
                       f"catching up {self.catchup.drift_m:.2f} m" if catching else
                       "no usable frames" if self._no_update >= p.degraded_frames else
                       "ambiguous" if self._ambig is not None else
                       f"satellite fixes {off:.1f} m off" if offset else "satellite fix disagrees")
                notes.append(f"degraded: {why}")
            self.state = "degraded"
        else:
            if self.state == "degraded":
                notes.append("tracking again")
            self.state = "tracking"

    def _output(self, t, quality, notes, est=None, surprise=0.0, was_global=False) -> TrackOutput:
        status = "; ".join(n for n in notes if n) or ("global search" if was_global else "ok")
        if est is None:
            nan = math.nan
            return TrackOutput(t, nan, nan, nan, np.full((3, 3), np.nan), quality, [], status, surprise, was_global)
        drag = self.odo_scale.drag_m
        p = self.p
        if p.cue_cov and quality == "tracking" and self.cue.frames >= p.cue_min_frames:
            # scaled posterior (position; heading as by default) + floor + the ground cues' offset along/across
            cov = _scaled_blocks(est.cov, p.cue_cov_scale, p.cov_scale)
            xx, yy, xy = self.cue.term(est.yaw)
            v = p.cue_sigma_m ** 2
            cov[0, 0] += v + p.cue_gain * xx
            cov[1, 1] += v + p.cue_gain * yy
            cov[0, 1] += p.cue_gain * xy
            cov[1, 0] += p.cue_gain * xy
        elif self.p.adapt_cov and quality == "tracking" and math.isfinite(drag):
            cov = est.cov * self.p.adapt_cov_scale
            cov[2, 2] = est.cov[2, 2] * self.p.cov_scale
            v = self.p.adapt_sigma_m ** 2
            c, s = math.cos(est.yaw), math.sin(est.yaw)
            d2 = drag * drag
            cov[0, 0] += v + d2 * c * c
            cov[1, 1] += v + d2 * s * s
            cov[0, 1] += d2 * c * s
            cov[1, 0] += d2 * c * s
        else:
            cov = _scaled_blocks(est.cov, p.cov_scale_xy, p.cov_scale)
            cov[0, 0] += self.p.model_sigma_m ** 2
            cov[1, 1] += self.p.model_sigma_m ** 2
        cov[2, 2] += math.radians(self.p.model_sigma_deg) ** 2
        g = self._g
        if quality != "tracking" and g is not None and self.p.fallback_weight > 0:
            w = self.p.fallback_weight
            dx, dy = g[0] - est.x, g[1] - est.y
            cov[0, 0] += w * (g[2] * g[2] + dx * dx)
            cov[1, 1] += w * (g[2] * g[2] + dy * dy)
            cov[0, 1] += w * dx * dy
            cov[1, 0] += w * dx * dy
        return TrackOutput(t, est.x, est.y, est.yaw, cov, quality, est.modes, status, surprise, was_global)
