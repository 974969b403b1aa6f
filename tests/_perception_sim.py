"""Rendered frames with true labels, and the true world rasterized in the bird's-eye layout (sim helpers).

Outside reference: the simulator's hidden 3D world (tinyloc.sim, a separate stage): its renderer
ray-casts the world to give each pixel's true class, and its ground polygons and building boxes give
each ground cell's true class. Poses lie on the site's streets (road centre, sidewalk centre), facing
along or across them, with a few degrees of base roll/pitch reported as a gravity vector.
"""

import math

import numpy as np

from tinyloc.camera.model import CameraModel, Mount
from tinyloc.classes import BUILDING
from tinyloc.frames import rpy_to_matrix
from tinyloc.sim.render import Renderer
from tinyloc.sim.site import generate_site
from tinyloc.sim.world import B_CLS, B_CX, B_CY, B_HX, B_HY, B_YAW, GROUND_CLASS, ground_raster

G = 9.81


def sim_camera(width=640, height=480):
    return CameraModel(width, height, 0.75 * width, 0.75 * width, (width - 1) / 2, (height - 1) / 2,
                       (-0.05, 0.01, 0.0, 0.0, 0.0), Mount(0.8, 8.0))


def street_poses(world, n, rng, *, tilt_deg=3.0):
    """``n`` (pose, surface): base poses (x, y, roll, pitch, yaw) on the site's streets and what the robot
    stands on ("road" at a road centre, "sidewalk" at a sidewalk centre)."""
    th = world.meta["grid_yaw_rad"]
    st = world.meta["streets"]
    xs, ys = st["xs"], st["ys"]
    c, s = math.cos(th), math.sin(th)
    out = []
    while len(out) < n:
        along_x = rng.random() < 0.5
        k = int(rng.integers(0, len(ys) if along_x else len(xs)))
        sec = (st["sy"] if along_x else st["sx"])[k]
        lane = rng.choice([0.0, 1.0, -1.0])  # road centre or one of the sidewalks
        off = lane * (sec["road"] / 2 + sec["verge"] + sec["walk"] / 2)
        if along_x:
            i = int(rng.integers(0, len(xs) - 1))
            gx = rng.uniform(xs[i] + 12.0, xs[i + 1] - 12.0)
            gy = ys[k] + off
            heading = rng.choice([0.0, math.pi])
        else:
            i = int(rng.integers(0, len(ys) - 1))
            gy = rng.uniform(ys[i] + 12.0, ys[i + 1] - 12.0)
            gx = xs[k] + off
            heading = rng.choice([math.pi / 2, -math.pi / 2])
        heading += math.radians(rng.uniform(-20.0, 20.0))
        roll = math.radians(rng.uniform(-tilt_deg, tilt_deg))
        pitch = math.radians(rng.uniform(-tilt_deg, tilt_deg))
        out.append(((c * gx - s * gy, s * gx + c * gy, roll, pitch, th + heading),
                    "road" if lane == 0.0 else "sidewalk"))
    return out


def gravity_of(pose):
    """Accelerometer specific force (FLU base frame) of a base at rest with the pose's roll and pitch."""
    r = rpy_to_matrix(pose[2], pose[3], 0.0)  # level_from_base
    return r.T @ np.array([0.0, 0.0, G])


def rendered_frames(seed, n, camera, *, pose_seed=None):
    """[(pose, surface, bgr, labels)] for ``n`` street poses of site ``seed``, rendered with the simulator."""
    site = generate_site(seed)
    r = Renderer(site.world, camera, seed=seed, sun_az_deg=100.0 + 37.0 * seed, sun_el_deg=35.0 + 5 * (seed % 4))
    rng = np.random.default_rng(1000 + seed if pose_seed is None else pose_seed)
    out = []
    for k, (pose, surface) in enumerate(street_poses(site.world, n, rng)):
        bgr, lab = r.render(pose, t_s=2.0 * k, frame_index=k)
        out.append((pose, surface, bgr.copy(), lab.copy()))  # the renderer reuses its buffers
    return site, out


class WorldRaster:
    """The true class of ground points: buildings from the world's boxes, else the ground polygons' class."""

    def __init__(self, world, res_m=0.1):
        self.grid = ground_raster(world, res_m=res_m)
        b = world.boxes
        self.bld = b[b[:, B_CLS] == BUILDING]

    def classes_at(self, x, y):
        g = self.grid
        c = np.floor((x - g.x_min) / g.res_m).astype(int)
        r = np.floor((g.y_max - y) / g.res_m).astype(int)
        ok = (r >= 0) & (r < g.data.shape[0]) & (c >= 0) & (c < g.data.shape[1])
        out = np.full(x.shape, 255, np.uint8)
        out[ok] = GROUND_CLASS[g.data[r[ok], c[ok]]]
        for bx in self.bld:
            dx, dy = x - bx[B_CX], y - bx[B_CY]
            cy, sy = math.cos(bx[B_YAW]), math.sin(bx[B_YAW])
            u = cy * dx + sy * dy
            v = -sy * dx + cy * dy
            out[(np.abs(u) <= bx[B_HX]) & (np.abs(v) <= bx[B_HY])] = BUILDING
        return out

    def bev_truth(self, grid, pose):
        """True class of every cell centre of ``grid`` (a BevGrid) with the robot at ``pose``."""
        xf, yl = grid.cell_centres()
        x, y, yaw = pose[0], pose[1], pose[4]
        wx = x + math.cos(yaw) * xf - math.sin(yaw) * yl
        wy = y + math.sin(yaw) * xf + math.cos(yaw) * yl
        return self.classes_at(wx, wy)


def building_poses(world, n, rng, *, dist=(5.0, 12.0)):
    """``n`` (pose, "sidewalk") poses standing ``dist`` metres in front of a building face, facing it
    (+-25 deg), on open ground (not inside any building)."""
    b = world.boxes[world.boxes[:, B_CLS] == BUILDING]
    b = b[(b[:, B_HX] > 3.0) & (b[:, B_HY] > 3.0)]
    truth = WorldRaster(world, res_m=0.25)
    out = []
    tries = 0
    while len(out) < n and tries < 50 * n:
        tries += 1
        bx = b[int(rng.integers(0, len(b)))]
        side = int(rng.integers(0, 4))
        ang = bx[B_YAW] + side * math.pi / 2
        half = bx[B_HX] if side % 2 == 0 else bx[B_HY]
        along = (bx[B_HY] if side % 2 == 0 else bx[B_HX]) * rng.uniform(-0.6, 0.6)
        d = half + rng.uniform(*dist)
        x = bx[B_CX] + math.cos(ang) * d - math.sin(ang) * along
        y = bx[B_CY] + math.sin(ang) * d + math.cos(ang) * along
        # open ground around the robot (2 m) and on the way to the face
        pts = np.array([[x + dx, y + dy] for dx in (-2.0, 0.0, 2.0) for dy in (-2.0, 0.0, 2.0)])
        if np.any(truth.classes_at(pts[:, 0], pts[:, 1]) == BUILDING):
            continue
        yaw = ang + math.pi + math.radians(rng.uniform(-25.0, 25.0))
        out.append(((x, y, 0.0, 0.0, yaw), "sidewalk"))
    return out


def building_frames(seed, n, camera):
    """Like :func:`rendered_frames`, for poses facing buildings (:func:`building_poses`)."""
    site = generate_site(seed)
    r = Renderer(site.world, camera, seed=seed, sun_az_deg=100.0 + 37.0 * seed, sun_el_deg=40.0)
    rng = np.random.default_rng(2000 + seed)
    out = []
    for k, (pose, surface) in enumerate(building_poses(site.world, n, rng)):
        bgr, lab = r.render(pose, t_s=2.0 * k, frame_index=k)
        out.append((pose, surface, bgr.copy(), lab.copy()))
    return site, out
