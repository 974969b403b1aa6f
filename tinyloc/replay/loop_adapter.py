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

    def debug_images(self, index: int, image: np.ndarray, *, pose=None) -> dict:
        """Segmentation, bird's-eye view and likelihood map of frame ``index`` (BGR uint8 each).

        Views the stages cannot give are left out. ``pose`` (x, y, yaw), default the loop's last
        estimate, centres the likelihood map.
        """
        from .report import colour_classes, colour_labels

        out = {}
        per = self.loop.perceiver
        t = float(self.rf.frame_t[index])
        grav = self._gravity_at(t)
        seg = getattr(per, "segment", None)
        if seg is not None:
            scores = np.asarray(seg(image))
            if scores.ndim == 3:
                out["segmentation"] = colour_labels(np.argmax(scores, axis=0).astype(np.uint8))
            elif scores.ndim == 2:
                out["segmentation"] = colour_labels(scores.astype(np.uint8))
        bev = per.perceive(image, grav)
        ev = np.asarray(bev.evidence, dtype=np.float32)
        vis = np.asarray(bev.visible, dtype=np.float32)
        img = colour_classes(ev[: min(ev.shape[0], 9)])
        img[vis < 0.5] = (40, 40, 40)
        out["bird's-eye view"] = _upscale(img, 4)
        if pose is None and self.loop.last_pose is not None:
            lp = self.loop.last_pose
            pose = (lp.x, lp.y, lp.yaw)
        if pose is not None and all(math.isfinite(v) for v in pose):
            vol = self.loop.matcher.track(bev, pose[0], pose[1], pose[2])
            ll = np.asarray(vol.loglik, dtype=np.float32).max(axis=0)
            out["likelihood (max over heading)"] = _upscale(_heat(ll), 4)
        return out


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
