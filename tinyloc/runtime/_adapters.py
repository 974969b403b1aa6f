"""tinyloc's own perception and correlator stages behind the loop's perceiver/matcher seam.

The correlator works in a square map window (``match.search_window_cells``, 128 m at the
defaults) read from the packed map into a buffer owned here. The window is moved (read
again and its spectra recomputed, about a tenth of a second) only when a global search
is centred far from it or the tracked pose nears its edge, so most frames never touch it.
"""

from __future__ import annotations

import math

import numpy as np

from ..classes import BUILDING, NUM_MAP_CLASSES
from ..track.gridfilter import GlobalEvidence, LikelihoodVolume


class PerceptionAdapter:
    """Segment + project one frame into a bird's-eye grid owned here (reused every frame)."""

    def __init__(self, camera, cfg, geom):
        from ..perception.overhead import OverheadParams
        from ..perception.pipeline import Perception, PerceptionParams
        from ..perception.segment import preset

        # The grid's cell must be the map's cell; the preset fits where the robot drives. Far ground is
        # where a small tilt error moves evidence most (r^2 d / h): the loop may see less far than the
        # projector can (loop.bev_range_m, docs/tracking.md).
        ov = {"res_m": geom.res_m}
        rng = float(getattr(cfg.loop, "bev_range_m", 0.0))
        if rng > 0.0 and not getattr(cfg.loop, "search_full_range", False):
            ov["max_range_m"] = rng
        params = PerceptionParams(segment=preset(cfg.loop.segment_preset), overhead=OverheadParams(**ov))
        self.perc = Perception(camera, params, warm_up=cfg.loop.warmup)
        self.grid = self.perc.new_grid()
        self.status = "ok"
        self.external = bool(cfg.loop.external_labels)
        from ..classes import NUM_CLASSES

        self.lut = np.full(256, 255, np.uint8)  # labels already speak tinyloc's class indices
        self.lut[:NUM_CLASSES] = np.arange(NUM_CLASSES)

    def perceive(self, image, gravity, labels=None):
        if self.external:
            if labels is None:
                self.grid.status = self.status = "bad-frame: no external label image for this frame"
                return self.grid
            self.status = self.perc.process_labels(labels, gravity, self.grid, self.lut)
        else:
            self.status = self.perc.process(image, gravity, self.grid)
        return self.grid


class CorrelatorAdapter:
    """Global and tracking-mode correlation against a moving map window.

    Parameters
    ----------
    packed_map : PackedMap
    cfg : LoopConfig
    geom : MapGeometry
    bev : BevGrid
        A grid of the perceiver's geometry (shape, origin), to size the correlator.
    """

    def __init__(self, packed_map, cfg, geom, bev=None):
        from ..correlate import Correlator, CorrelatorParams

        m = cfg.match
        self.map = packed_map
        self.geom = geom
        n = int(m.search_window_cells)
        self.n = n
        self.A = int(m.headings)
        self.dyaw = 2.0 * math.pi / self.A
        R = max(1, int(round(m.track_radius_m / geom.res_m)))
        hh = max(1, int(round(m.track_heading_deg / math.degrees(self.dyaw))))
        kw = {}
        if bev is not None:
            kw = dict(bev_shape=tuple(bev.visible.shape), origin_row=float(bev.origin_row),
                      origin_col=float(bev.origin_col))
        self.params = CorrelatorParams(n_headings=self.A, window_shape=(n, n), res_m=geom.res_m,
                                       track_radius_cells=R, track_half_headings=hh, **kw)
        self.corr = Correlator(self.params)
        self.exact = bool(m.track_exact)
        h, w = self.params.bev_shape
        reach = int(math.ceil(math.hypot(max(self.params.origin_row, h - self.params.origin_row),
                                         max(self.params.origin_col, w - self.params.origin_col))))
        # keep the tracked pose this far inside the window (cells): the tracking box plus most of the view
        self.margin = min(n // 2 - 1, R + reach * 2 // 3)
        self.win = np.zeros((NUM_MAP_CLASSES, n, n), np.float32)
        self.known = np.zeros((n, n), np.uint8)
        self.wrow0 = self.wcol0 = None
        self._yaw = np.zeros((n, n), np.float64)
        self.status = "ok"
        self.counters = {"window_moves": 0, "damaged_tiles": 0}
        # with loop.search_full_range the grid arrives at the projector's full range and is cut to
        # loop.bev_range_m here, after any global search of the frame and before the tracking match
        rng = float(getattr(cfg.loop, "bev_range_m", 0.0))
        self.track_range_m = rng if (rng > 0.0 and getattr(cfg.loop, "search_full_range", False)) else 0.0
        self._range_mask = None
        self.building_taper_m = float(getattr(cfg.loop, "building_taper_m", 0.0))
        self._taper = None
        # track.cue_cov: a second tracking correlation with the cue family's features alone (docs/tracking.md)
        self.cue_corr = None
        tp = getattr(cfg, "track", None)
        lp = cfg.loop
        # with an uncalibrated accelerometer (every loop.accel_bias_* 0) the tilt moves far ground and the
        # ground cues' offset does not show it: the cue term stays off and the output keeps the loop's
        # wider floor (track.model_sigma_uncal_m). Measured: drive 11 uncalibrated was 75 % inside with it.
        calibrated = any(float(getattr(lp, f"accel_bias_{a}", 0.0)) != 0.0 for a in "xyz")
        if tp is not None and getattr(tp, "cue_cov", False) and calibrated:
            self.cue_corr = Correlator(self.params, cue_model(self.corr.model, tp.cue_features))
            # the offsets reach cue_half_m along and left of an estimate that moves up to ~1 m a frame from
            # the box centre (the previous estimate); beyond the box the surface's edge is held
            self.cue_radius = min(R, int(math.ceil((tp.cue_half_m * math.sqrt(2.0) + 1.5) / geom.res_m)))

    def warmup(self) -> None:
        self.corr.warm_up(("fast", "track_exact") if self.exact else ("fast", "track"))
        if self.cue_corr is not None:
            c = self.cue_corr
            c.warm_up(("track_exact",) if self.exact else ("track",))
            # and the call the loop makes (one heading, the small box): its transforms are sized by the box
            from ..correlate.synth import SyntheticBev

            p = self.params
            z = np.full((NUM_MAP_CLASSES,) + p.bev_shape, 0.1, np.float32)
            c.set_map(self.win)  # the window buffer (zeros before the first move; set again at every move)
            c.track(SyntheticBev(z, z[0], z[0], p.res_m, p.origin_row, p.origin_col), self.n // 2, self.n // 2, 0,
                    exact=self.exact, radius_cells=self.cue_radius, half_headings=0)

    # ---- map window -----------------------------------------------------------------------------
    def _move_window(self, x, y) -> None:
        r, c = self.geom.cell_of(x, y)
        self.wrow0 = int(math.floor(r)) - self.n // 2
        self.wcol0 = int(math.floor(c)) - self.n // 2
        self.counters["damaged_tiles"] += int(self.map.read_window(self.wrow0, self.wcol0, self.win,
                                                                   known_out=self.known) or 0)
        self.corr.set_map(self.win)
        if self.cue_corr is not None:
            self.cue_corr.set_map(self.win)
        self.counters["window_moves"] += 1

    def _ensure(self, x, y, margin_cells) -> bool:
        """Move the window if (x, y) is closer than ``margin_cells`` to its edge; True if it moved."""
        r, c = self.geom.cell_of(x, y)
        if self.wrow0 is not None:
            i, j = r - self.wrow0, c - self.wcol0
            if margin_cells <= i <= self.n - margin_cells and margin_cells <= j <= self.n - margin_cells:
                return False
        self._move_window(x, y)
        return True

    # ---- the matcher interface ------------------------------------------------------------------
    def global_search(self, bev, x, y):
        """Coarse-to-fine full search of the window around (x, y): reduced evidence or None (see status)."""
        moved = self._ensure(x, y, self.n // 2 - int(round(16.0 / self.geom.res_m)))
        res = self.corr.search_fast(bev)
        if not res.ok:
            self.status = res.status
            return None
        self.status = "map window moved" if moved else "ok"
        s = int(res.scale)
        # best_heading counts heading_scale full steps, which need not equal the spatial scale
        hs = int(getattr(res, "heading_scale", s))
        np.multiply(res.best_heading, self.dyaw * hs, out=self._yaw[:res.best.shape[0], :res.best.shape[1]])
        return GlobalEvidence(res.best, self.wrow0, self.wcol0, s, self._yaw[:res.best.shape[0], :res.best.shape[1]])

    def _cut_range(self, bev) -> None:
        """Zero the grid beyond ``track_range_m`` from the robot (in place; the mask is made once)."""
        m = self._range_mask
        if m is None or m.shape != bev.visible.shape:
            m = self._range_mask = (cell_range_m(bev) <= self.track_range_m).astype(np.float32)
        np.multiply(bev.evidence, m, out=bev.evidence)
        np.multiply(bev.free, m, out=bev.free)
        np.multiply(bev.visible, m, out=bev.visible)

    def _taper_buildings(self, bev) -> None:
        """Weigh the building evidence by 1 / (1 + (r / building_taper_m)^4) (in place; the weights are made once)."""
        w = self._taper
        if w is None or w.shape != bev.visible.shape:
            w = self._taper = (1.0 / (1.0 + (cell_range_m(bev) / self.building_taper_m) ** 4)).astype(np.float32)
        np.multiply(bev.evidence[BUILDING], w, out=bev.evidence[BUILDING])

    def track(self, bev, x, y, yaw):
        """Full-resolution volume over the tracking box around (x, y, yaw), or None (see status)."""
        if self.track_range_m > 0.0:
            self._cut_range(bev)
        if self.building_taper_m > 0.0:
            self._taper_buildings(bev)
        moved = self._ensure(x, y, self.margin)
        r, c = self.geom.cell_of(x, y)
        a = int(round((yaw if math.isfinite(yaw) else 0.0) / self.dyaw)) % self.A
        res = self.corr.track(bev, r - 0.5 - self.wrow0, c - 0.5 - self.wcol0, a, exact=self.exact)
        if not res.ok:
            self.status = res.status
            return None
        self.status = "map window moved" if moved else "ok"
        s = int(getattr(res, "scale", 1))
        cue = None
        if self.cue_corr is not None:
            # one heading (the box's centre) and a small box: about a twentieth of the full model's work
            cr = self.cue_corr.track(bev, r - 0.5 - self.wrow0, c - 0.5 - self.wcol0, a, exact=self.exact,
                                     radius_cells=self.cue_radius, half_headings=0)
            if cr.ok:
                cs = int(getattr(cr, "scale", 1))
                cue = LikelihoodVolume(cr.volume, self.wrow0 + cs * cr.row0, self.wcol0 + cs * cr.col0,
                                       cr.a0 * cs * self.dyaw, cs * self.dyaw, cs)
        return LikelihoodVolume(res.volume, self.wrow0 + s * res.row0, self.wcol0 + s * res.col0,
                                res.a0 * s * self.dyaw, s * self.dyaw, s, cue)


def cell_range_m(bev) -> np.ndarray:
    """Horizontal distance of every cell centre of a bird's-eye grid from the robot (m, float64, the grid's shape)."""
    h, w = bev.visible.shape
    i = (np.arange(h) + 0.5 - float(bev.origin_row))[:, None]
    j = (np.arange(w) + 0.5 - float(bev.origin_col))[None, :]
    return np.hypot(i, j) * float(bev.res_m)


def cue_model(model, names: str):
    """The scoring model with only the named features (comma-separated), the same temperature.

    A model with fewer rows is a legal model (tinyloc/correlate/scoring.py); the score is linear in the
    features, so this family's score plus the others' is the full score.
    """
    from ..correlate.scoring import ScoringModel
    from ..errors import InputError

    want = [n.strip() for n in str(names).split(",") if n.strip()]
    idx = [i for i, n in enumerate(model.names) if n in want]
    missing = sorted(set(want) - set(model.names))
    if missing or not idx:
        raise InputError(f"track.cue_features: unknown feature(s) {', '.join(missing) or '(none given)'}; "
                         f"the scoring model has {', '.join(model.names)}")
    return ScoringModel(tuple(model.names[i] for i in idx), model.bev_weights[idx], model.map_weights[idx],
                        tuple(model.sigma_cells[i] for i in idx), model.temperature,
                        {"derived": f"features {', '.join(model.names[i] for i in idx)} of the loop's model"})
