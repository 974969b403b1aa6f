"""Replay drives the live loop: :class:`tinyloc.runtime.loop.Localizer`, built for the run's camera and map.

The loop's ``step(frame)`` takes exactly what replay hands out per frame
(:class:`~tinyloc.replay.replay.ReplayFrame`: image, and the IMU, odometry and GNSS rows
since the previous frame), so nothing is translated on the way. This module adds the
views of a frame the report shows (segmentation, bird's-eye view, likelihood map),
computed again for the few worst frames after the run.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError


def make_loop_localizer(rf, packed, *, config_path=None, overrides=(), perceiver=None, matcher=None):
    """The live loop for one run: ``Localizer(packed, rf.camera, load_config(config_path, overrides))``.

    ``perceiver`` / ``matcher`` replace the loop's default stages (as ``Localizer`` allows).

    Raises
    ------
    InputError
        When there is no map (the loop matches against one), or the config is wrong.
    """
    if packed is None:
        raise InputError(f"{rf.path}: the live loop needs a map: give --map SITE.tlm "
                         "(or name it in run.json as \"map\")")
    from ..runtime.config import load_config
    from ..runtime.loop import Localizer

    cfg = load_config(config_path, tuple(overrides))
    return LoopLocalizer(Localizer(packed, rf.camera, cfg, perceiver=perceiver, matcher=matcher), rf)


class LoopLocalizer:
    """The loop plus the debug views replay's report asks for."""

    def __init__(self, loop, rf):
        self.loop = loop
        self.rf = rf

    def step(self, frame):
        return self.loop.step(frame)

    def health(self) -> dict:
        h = getattr(self.loop, "health", None)
        return h() if h is not None else {}

    def _gravity_at(self, t: float):
        imu = self.rf.imu
        if not len(imu):
            return None
        sel = np.abs(imu[:, 0] - t) <= 0.1
        if not np.any(sel):
            return None
        return imu[sel, 1:4].mean(axis=0)

    def debug_images(self, index: int, image: np.ndarray, *, pose=None, truth=None) -> dict:
        """Segmentation, bird's-eye view and likelihood map of frame ``index`` (BGR uint8 each).

        Views the stages cannot give are left out. ``pose`` (x, y, yaw), default the loop's last
        estimate, centres the likelihood map; ``truth`` (x, y, yaw) is marked on it (white cross;
        the estimate is the red circle).
        """
        from .report import colour_labels

        out = {}
        per = self.loop.perceiver
        t = float(self.rf.frame_t[index])
        bev = per.perceive(image, self._gravity_at(t))
        # The default perceiver keeps its segmenter's last labels; other perceivers may offer segment().
        perc = getattr(per, "perc", None)
        labels = getattr(perc, "labels", None) if perc is not None else None
        if labels is None and hasattr(per, "segment"):
            scores = np.asarray(per.segment(image))
            labels = np.argmax(scores, axis=0) if scores.ndim == 3 else scores
        if labels is not None:
            out["segmentation"] = colour_labels(np.asarray(labels).astype(np.uint8))
        out["bird's-eye view (forward = right)"] = _upscale(bev_image(bev), 4)
        if pose is None and self.loop.last_pose is not None:
            lp = self.loop.last_pose
            pose = (lp.x, lp.y, lp.yaw)
        if pose is not None and all(math.isfinite(v) for v in pose):
            vol = self.loop.matcher.track(bev, pose[0], pose[1], pose[2])
            if vol is not None:
                out["likelihood (max over heading)"] = likelihood_image(vol, self.loop.geom, pose, truth)
        return out


def bev_image(bev) -> np.ndarray:
    """Bird's-eye evidence as colour: the strongest class per cell in the class palette, its strength as
    opacity over dark grey; cells the camera did not see stay near black."""
    from ..classes import CLASSES

    ev = np.asarray(bev.evidence, dtype=np.float32)
    vis = np.asarray(bev.visible, dtype=np.float32)
    k = np.argmax(ev, axis=0)
    strength = np.clip(np.max(ev, axis=0), 0.0, 1.0)[..., None]
    pal = np.array([CLASSES[i].color_bgr for i in range(ev.shape[0])], dtype=np.float32)
    img = 70.0 * (1.0 - strength) + pal[k] * strength
    img[vis < 0.5] = 25.0
    return np.clip(img, 0, 255).astype(np.uint8)


def likelihood_image(vol, geom, pose, truth, *, size_px: int = 252) -> np.ndarray:
    """Max-over-heading log-likelihood of a volume as a heat map, north up, with estimate and truth marked."""
    import cv2

    ll = np.asarray(vol.loglik, dtype=np.float32).max(axis=0)
    h, w = ll.shape
    k = max(1, size_px // max(h, w))
    img = _upscale(_heat(ll), k)

    def px(x, y):
        r, c = geom.cell_of(x, y)
        return int(round((c - vol.col0) * k)), int(round((r - vol.row0) * k))

    cv2.circle(img, px(pose[0], pose[1]), max(3, k), (40, 40, 230), 2, cv2.LINE_AA)
    if truth is not None and all(math.isfinite(v) for v in truth[:2]):
        c, r = px(truth[0], truth[1])
        cv2.drawMarker(img, (c, r), (255, 255, 255), cv2.MARKER_CROSS, max(8, 2 * k), 2)
    return img


def _heat(a: np.ndarray) -> np.ndarray:
    import cv2

    fin = np.isfinite(a)
    if not np.any(fin):
        return np.zeros(a.shape + (3,), np.uint8)
    lo, hi = float(np.min(a[fin])), float(np.max(a[fin]))
    u = np.zeros(a.shape, np.uint8)
    if hi > lo:
        u[fin] = np.clip((a[fin] - lo) / (hi - lo) * 255.0, 0, 255).astype(np.uint8)
    return cv2.applyColorMap(u, cv2.COLORMAP_VIRIDIS)


def _upscale(img: np.ndarray, k: int) -> np.ndarray:
    import cv2

    return cv2.resize(img, (img.shape[1] * k, img.shape[0] * k), interpolation=cv2.INTER_NEAREST)
