"""The synthetic camera: renders a world seen from a robot pose into a BGR frame and a class-label image.

Geometry is exact for the pinhole + OpenCV-distortion model of
:class:`~tinyloc.camera.model.CameraModel`: every pixel's ray is the camera
model's own back-projection of the pixel centre (``pixel_rays_base``), so a
world point projected by OpenCV's ``projectPoints`` lands on the pixel where the
renderer draws it (checked in tests/test_sim_render.py).

Per frame the work is: cull objects by range (NumPy), list the objects each
16 x 16 pixel tile's view cone meets (numba), then ray-cast every pixel against
the ground plane and that short list (numba, parallel over tiles). Static
ground shadows come from a precomputed light raster; objects are shaded by
the sun and sky. Per-frame appearance drift (exposure, white balance), sensor
noise, vignetting, lens blur and optional motion blur make the frames less
tidy than a textbook image.

Usage::

    r = Renderer(world, camera, RenderParams(), sun_az_deg=140, sun_el_deg=38, seed=3)
    bgr, labels = r.render((x, y, roll, pitch, yaw), t_s=12.5, frame_index=60)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .. import _numba  # noqa: F401  (thread settings before numba loads)
from ..camera.model import CameraModel
from ..errors import InputError
from ..frames import rpy_to_matrix
from . import _render_kernels as K
from .world import (GM, B_CX, B_CY, B_HX, B_HY, B_Z0, B_Z1, C_CX, C_CY, C_R, C_Z0, C_Z1, GROUND_CLASS, GROUND_COLOR,
                    S_CX, S_CY, S_CZ, S_RXY, S_RZ, World, ground_raster, shadow_raster, sun_vector)

TILE = 16


@dataclass(frozen=True)
class RenderParams:
    """Renderer settings.

    Attributes
    ----------
    max_range_m : float
        Objects farther than this are not drawn (the ground and sky still are).
    haze_m : float
        Distance at which aerial haze has covered 63 % of a surface's colour.
    noise_sigma : float
        Sensor noise standard deviation (8-bit levels at mid grey).
    blur_sigma_px : float
        Lens blur (Gaussian sigma, pixels); 0 disables it.
    motion_blur : bool
        Blur along the image motion of the frame's exposure time (from the pose rates).
    exposure_s : float
        Exposure time used by the motion blur (s).
    cloud_cover : float
        0 clear .. 1 overcast (sunlight and shadows fade above 0.5).
    saturation : float
        Colour saturation of the camera (1 = as shaded, 0 = gray).
    ground_res_m, shadow_res_m : float
        Resolutions of the ground-material and shadow rasters.
    tile_capacity : int
        Most objects listed per tile (nearest first).
    """

    max_range_m: float = 160.0
    haze_m: float = 900.0
    noise_sigma: float = 2.5
    blur_sigma_px: float = 0.6
    motion_blur: bool = False
    exposure_s: float = 0.012
    cloud_cover: float = 0.45
    saturation: float = 0.85
    ground_res_m: float = 0.05
    shadow_res_m: float = 0.1
    tile_capacity: int = 384


def _tone_lut(n: int = 2048) -> np.ndarray:
    # linear 0..2 -> 8-bit display value: a soft shoulder, then the sRGB-like 1/2.2 power
    x = np.linspace(0.0, 2.0, n)
    y = 1.0 - np.exp(-1.9 * x)
    return (np.clip(y, 0, 1) ** (1 / 2.2) * 255.0).astype(np.float64)


class Renderer:
    """Renders frames of one world through one camera (see module docstring).

    Parameters
    ----------
    world : World
    camera : CameraModel
        Intrinsics, distortion and mount (the mount places the camera on the robot base).
    params : RenderParams
    sun_az_deg, sun_el_deg : float
        Sun azimuth (clockwise from north) and elevation (degrees).
    seed : int
        Seeds the cloud field.
    """

    def __init__(self, world: World, camera: CameraModel, params: RenderParams = RenderParams(), *,
                 sun_az_deg: float = 150.0, sun_el_deg: float = 40.0, seed: int = 0):
        if not 0.0 <= params.cloud_cover <= 1.0:
            raise InputError(f"cloud_cover must be in 0..1, got {params.cloud_cover}")
        self.world = world
        self.camera = camera
        self.params = params
        self.sun = sun_vector(sun_az_deg, sun_el_deg)
        H, W = camera.height, camera.width
        vv, uu = np.mgrid[0:H, 0:W]
        uv = np.stack([uu.ravel(), vv.ravel()], axis=1).astype(np.float64)
        self._cam_t, d = camera.pixel_rays_base(uv)
        self.rays = np.ascontiguousarray(d.reshape(H, W, 3))
        # vignetting: cos^3 of the angle off the optical axis (natural falloff, softened)
        r_bc, _ = camera.mount.base_from_camera()
        axis = r_bc[:, 2]
        cosang = np.clip(self.rays @ axis, 0.05, 1.0)
        self.vig = np.ascontiguousarray(0.25 + 0.75 * cosang ** 3)
        # angular size of one pixel (rad), for texture level-of-detail
        self.pix_ang = 1.0 / max(camera.fx, camera.fy)
        # tiles: pixel ranges, cone axis and half angle (base frame); groups of 4 x 4 tiles cull first
        tiles, axes, halves, parent = [], [], [], []
        SUP = 4 * TILE
        sup_axes, sup_halves = [], []
        nsc = (W + SUP - 1) // SUP
        for r0 in range(0, H, SUP):
            for c0 in range(0, W, SUP):
                a, h = self._cone(r0, min(H, r0 + SUP), c0, min(W, c0 + SUP))
                sup_axes.append(a)
                sup_halves.append(h)
        for r0 in range(0, H, TILE):
            for c0 in range(0, W, TILE):
                r1, c1 = min(H, r0 + TILE), min(W, c0 + TILE)
                tiles.append((r0, r1, c0, c1))
                a, h = self._cone(r0, r1, c0, c1)
                axes.append(a)
                halves.append(h)
                parent.append((r0 // SUP) * nsc + c0 // SUP)
        self.tile_px = np.array(tiles, dtype=np.int64)
        self._cones = (np.array(axes), np.cos(halves), np.sin(halves), np.array(parent, dtype=np.int64))
        self._sup_cones = (np.array(sup_axes), np.cos(sup_halves), np.sin(sup_halves),
                           np.zeros(len(sup_axes), dtype=np.int64))
        self.sup_obj = np.zeros((len(sup_axes), 4 * params.tile_capacity), dtype=np.int32)
        self.sup_n = np.zeros(len(sup_axes), dtype=np.int32)
        self.tile_obj = np.zeros((len(tiles), params.tile_capacity), dtype=np.int32)
        self.tile_n = np.zeros(len(tiles), dtype=np.int32)
        # world rasters
        g = ground_raster(world, res_m=params.ground_res_m)
        self._g = g
        s = shadow_raster(world, self.sun, res_m=params.shadow_res_m)
        self._s = s
        yaw = float(world.meta.get("grid_yaw_rad", 0.0))
        self._grid_cs = (math.cos(yaw), math.sin(yaw))
        gcol = np.array(GROUND_COLOR, dtype=np.float64)
        for name, rgb in world.meta.get("palette", {}).items():  # per-site material colours
            if name in GM:
                gcol[GM[name]] = rgb
        self.gcolor = np.ascontiguousarray(gcol)
        self.gclass = np.ascontiguousarray(GROUND_CLASS)
        overcast = max(0.0, params.cloud_cover - 0.5) / 0.5
        sun_rgb = np.array([1.0, 0.93, 0.82]) * 1.25 * (1.0 - 0.85 * overcast)
        amb_rgb = np.array([0.39, 0.43, 0.49]) * (0.9 + 0.6 * params.cloud_cover) + 0.1 * overcast
        self.light = np.concatenate([sun_rgb, amb_rgb])
        self.p_sky = np.array([params.cloud_cover, 0.0016 * 400.0, float(seed % 100000), params.haze_m])
        self.lut = _tone_lut()
        self.out_bgr = np.zeros((H, W, 3), dtype=np.uint8)
        self.out_lab = np.zeros((H, W), dtype=np.uint8)
        # static object table
        self._static = self._objects(world.boxes, world.cyls, world.spheres)
        self.last_stats: dict = {}

    def _cone(self, r0, r1, c0, c1):
        blk = self.rays[r0:r1, c0:c1].reshape(-1, 3)
        a = blk.mean(axis=0)
        a /= np.linalg.norm(a)
        half = float(np.arccos(np.clip(blk @ a, -1, 1)).max()) + 2.0 * self.pix_ang
        return a, min(half, 1.5)

    @staticmethod
    def _objects(boxes, cyls, sph):
        bs = []
        if len(boxes):
            hz = (boxes[:, B_Z1] - boxes[:, B_Z0]) / 2
            bs.append(np.stack([boxes[:, B_CX], boxes[:, B_CY], boxes[:, B_Z0] + hz,
                                np.sqrt(boxes[:, B_HX] ** 2 + boxes[:, B_HY] ** 2 + hz ** 2)], axis=1))
        if len(cyls):
            hz = (cyls[:, C_Z1] - cyls[:, C_Z0]) / 2
            bs.append(np.stack([cyls[:, C_CX], cyls[:, C_CY], cyls[:, C_Z0] + hz,
                                np.sqrt(cyls[:, C_R] ** 2 + hz ** 2)], axis=1))
        if len(sph):
            bs.append(np.stack([sph[:, S_CX], sph[:, S_CY], sph[:, S_CZ],
                                np.maximum(sph[:, S_RXY], sph[:, S_RZ])], axis=1))
        objs = np.concatenate([np.stack([np.full(len(a), k), np.arange(len(a))], axis=1)
                               for k, a in ((K.OBJ_BOX, boxes), (K.OBJ_CYL, cyls), (K.OBJ_SPH, sph))]).astype(np.int64)
        boxes = np.concatenate([boxes, np.cos(boxes[:, 4:5]), np.sin(boxes[:, 4:5])], axis=1)
        return (np.ascontiguousarray(boxes, dtype=np.float64), np.ascontiguousarray(cyls, dtype=np.float64),
                np.ascontiguousarray(sph, dtype=np.float64), objs,
                np.concatenate(bs) if bs else np.zeros((0, 4)))

    def camera_pose(self, pose) -> tuple[np.ndarray, np.ndarray]:
        """(world_from_base rotation, camera centre in the world) for a base pose (x, y, roll, pitch, yaw)."""
        x, y, roll, pitch, yaw = (float(v) for v in pose)
        r = rpy_to_matrix(roll, pitch, yaw)
        return r, np.array([x, y, 0.0]) + r @ self._cam_t

    def render(self, pose, *, t_s: float = 0.0, frame_index: int = 0, exposure: float = 1.0,
               white_balance=(1.0, 1.0, 1.0), rates=(0.0, 0.0, 0.0), out_bgr=None, out_labels=None):
        """Render one frame.

        Parameters
        ----------
        pose : (x_m, y_m, roll_rad, pitch_rad, yaw_rad)
            Robot base pose in the world (base origin on the ground at (x, y)).
        t_s : float
            Time (s): poses the walkers and drifts the clouds.
        frame_index : int
            Seeds the sensor noise of this frame.
        exposure : float
            Exposure gain (1 = nominal).
        white_balance : (r, g, b)
            Channel gains of the white-balance error.
        rates : (yaw_rate, pitch_rate, forward_speed)
            rad/s, rad/s, m/s: only used for motion blur.
        out_bgr, out_labels : ndarray, optional
            Caller-owned outputs (H, W, 3) and (H, W) uint8; default: internal buffers (overwritten next call).

        Returns
        -------
        bgr : (H, W, 3) uint8
        labels : (H, W) uint8 class indices (tinyloc.classes; sky and dynamic included)
        """
        import cv2

        p = self.params
        R, org = self.camera_pose(pose)
        boxes, cyls, sph, objs, bs = self._static
        wc, ws = self.world.walkers_at(t_s)
        if len(wc):
            near = np.hypot(wc[:, 0] - org[0], wc[:, 1] - org[1]) > 0.6
            wc, ws = wc[near], ws[near]
        if len(wc):
            nc, nsph = len(cyls), len(sph)
            cyls = np.ascontiguousarray(np.concatenate([cyls, wc]))
            sph = np.ascontiguousarray(np.concatenate([sph, ws]))
            extra = np.concatenate([np.stack([np.full(len(wc), K.OBJ_CYL), nc + np.arange(len(wc))], axis=1),
                                    np.stack([np.full(len(ws), K.OBJ_SPH), nsph + np.arange(len(ws))], axis=1)])
            objs = np.concatenate([objs, extra.astype(np.int64)])
            _, _, _, _, bsw = self._objects(np.zeros((0, 14)), wc, ws)
            bs = np.concatenate([bs, bsw])
        # range cull (nearest first so a full tile keeps the objects that matter)
        v = bs[:, :3] - org
        dist = np.sqrt(np.einsum("ij,ij->i", v, v))
        keep = np.nonzero(dist - bs[:, 3] < p.max_range_m)[0]
        cand = keep[np.argsort(dist[keep], kind="stable")].astype(np.int64)
        vc = v[cand]
        dc = np.maximum(dist[cand], 1e-9)
        u_obj = np.zeros((len(bs), 3))
        u_obj[cand] = vc / dc[:, None]
        ratio = np.minimum(bs[cand, 3] / dc, 1.0)
        cos_r = np.full(len(bs), 1.0)
        sin_r = np.zeros(len(bs))
        cos_r[cand] = np.where(ratio >= 0.999, -2.0, np.sqrt(1.0 - ratio ** 2))
        sin_r[cand] = ratio
        root = cand.astype(np.int32).reshape(1, -1)
        if root.shape[1] == 0:
            root = np.zeros((1, 1), np.int32)
        K.cull_cones(*self._sup_cones[:3], R, u_obj, cos_r, sin_r, root, np.array([len(cand)], np.int32),
                     self._sup_cones[3], self.sup_obj, self.sup_n)
        K.cull_cones(*self._cones[:3], R, u_obj, cos_r, sin_r, self.sup_obj, self.sup_n, self._cones[3],
                     self.tile_obj, self.tile_n)
        ob = self.out_bgr if out_bgr is None else out_bgr
        ol = self.out_lab if out_labels is None else out_labels
        gains = np.asarray(white_balance, dtype=np.float64) * float(exposure)
        g, s = self._g, self._s
        K.render_tiles(self.rays, self.vig, R, org, self.tile_obj, self.tile_n, self.tile_px, boxes, cyls, sph, objs,
                       g.data, g.x_min, g.y_max, g.res_m, self.gcolor, self.gclass, s.data, s.x_min, s.y_max,
                       s.res_m, self._grid_cs[0], self._grid_cs[1], self.sun, self.light, self.p_sky, float(t_s),
                       p.max_range_m * 4.0, p.haze_m, self.lut, gains, float(p.saturation), p.noise_sigma,
                       int(frame_index) + 1, self.pix_ang, ob, ol)
        if p.blur_sigma_px > 0:
            cv2.GaussianBlur(ob, (0, 0), p.blur_sigma_px, dst=ob)
        if p.motion_blur:
            yaw_rate, pitch_rate, speed = (float(r) for r in rates)
            dx = yaw_rate * p.exposure_s * self.camera.fx
            dy = pitch_rate * p.exposure_s * self.camera.fy + speed * p.exposure_s * 4.0
            n = int(min(25, max(abs(dx), abs(dy))))
            if n >= 2:
                ker = np.zeros((2 * n + 1, 2 * n + 1), np.float32)
                for k in range(-n, n + 1):
                    ker[n + int(round(k * dy / (2 * n))), n + int(round(k * dx / (2 * n)))] += 1.0
                ker /= ker.sum()
                cv2.filter2D(ob, -1, ker, dst=ob)
        self.last_stats = {"objects_in_range": int(len(cand)), "max_per_tile": int(self.tile_n.max()),
                           "tiles_full": int(np.sum(self.tile_n >= self.tile_obj.shape[1]))}
        return ob, ol

