"""Pinhole camera with OpenCV-model distortion, its mount on the robot, and the calibration file.

Frames: camera optical frame (x right, y down, z forward); robot base frame FLU
(x forward, y left, z up) with its origin on the ground below the base reference
point, so the camera centre sits at ``(x_m, y_m, height_m)`` in the base frame.

Mount angles rotate a camera-aligned FLU frame relative to the base (intrinsic
Z-Y-X: yaw, pitch, roll; see :func:`tinyloc.frames.rpy_to_matrix`): positive
``pitch_deg`` looks down, positive ``yaw_deg`` looks left.

Distortion: OpenCV's model with coefficients (k1, k2, p1, p2, k3).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
import math

import numpy as np

from ..errors import CalibrationError
from ..frames import FLU_FROM_OPTICAL, rpy_to_matrix
from ..tomlio import read_toml, write_toml

FORMAT_NAME = "tinyloc-camera"
FORMAT_VERSION = 1


@dataclass(frozen=True)
class Mount:
    """Where the camera sits on the robot base (metres, degrees)."""

    height_m: float = 0.8
    pitch_deg: float = 10.0
    roll_deg: float = 0.0
    yaw_deg: float = 0.0
    x_m: float = 0.0
    y_m: float = 0.0

    def base_from_camera(self) -> tuple[np.ndarray, np.ndarray]:
        """Rotation (3x3) and translation (3,) taking optical-frame points to the base frame."""
        r = rpy_to_matrix(math.radians(self.roll_deg), math.radians(self.pitch_deg), math.radians(self.yaw_deg))
        return r @ FLU_FROM_OPTICAL, np.array([self.x_m, self.y_m, self.height_m])


@dataclass(frozen=True)
class CameraModel:
    """Intrinsics (pixels), distortion and image size, plus the mount.

    Parameters
    ----------
    width, height : int
        Image size in pixels.
    fx, fy, cx, cy : float
        Pinhole intrinsics in pixels (OpenCV convention: pixel centres at integers).
    dist : tuple of 5 floats
        OpenCV distortion (k1, k2, p1, p2, k3).
    mount : Mount
        The camera's pose on the robot base.
    """

    width: int = 640
    height: int = 480
    fx: float = 500.0
    fy: float = 500.0
    cx: float = 319.5
    cy: float = 239.5
    dist: tuple[float, float, float, float, float] = (0.0, 0.0, 0.0, 0.0, 0.0)
    mount: Mount = field(default_factory=Mount)

    def __post_init__(self):
        vals = (self.fx, self.fy, self.cx, self.cy, *self.dist)
        if len(self.dist) != 5:
            raise CalibrationError(f"distortion needs 5 coefficients (k1, k2, p1, p2, k3), got {len(self.dist)}")
        if not all(math.isfinite(v) for v in vals):
            raise CalibrationError("camera intrinsics and distortion must be finite")
        if self.width < 8 or self.height < 8 or self.width > 20000 or self.height > 20000:
            raise CalibrationError(f"image size {self.width}x{self.height} is out of range")
        if self.fx <= 0 or self.fy <= 0:
            raise CalibrationError("focal lengths fx, fy must be positive")
        m = self.mount
        if not all(math.isfinite(v) for v in (m.height_m, m.pitch_deg, m.roll_deg, m.yaw_deg, m.x_m, m.y_m)):
            raise CalibrationError("mount values must be finite")
        if not 0.05 <= m.height_m <= 10.0:
            raise CalibrationError(f"mount height {m.height_m} m is out of range (0.05 .. 10 m)")

    @property
    def K(self) -> np.ndarray:
        """3x3 intrinsic matrix."""
        return np.array([[self.fx, 0.0, self.cx], [0.0, self.fy, self.cy], [0.0, 0.0, 1.0]])

    @property
    def dist_array(self) -> np.ndarray:
        """Distortion as a float64 array (k1, k2, p1, p2, k3), OpenCV order."""
        return np.asarray(self.dist, dtype=np.float64)

    def with_mount(self, **changes) -> "CameraModel":
        """A copy with some mount fields changed."""
        return replace(self, mount=replace(self.mount, **changes))

    def scaled(self, width: int, height: int) -> "CameraModel":
        """The same camera at another image resolution (intrinsics scaled, distortion kept)."""
        sx, sy = width / self.width, height / self.height
        return replace(self, width=width, height=height, fx=self.fx * sx, fy=self.fy * sy,
                       cx=(self.cx + 0.5) * sx - 0.5, cy=(self.cy + 0.5) * sy - 0.5)

    def distort_normalized(self, xn, yn):
        """Apply OpenCV distortion to normalized image coordinates (x/z, y/z)."""
        k1, k2, p1, p2, k3 = self.dist
        r2 = xn * xn + yn * yn
        radial = 1.0 + r2 * (k1 + r2 * (k2 + r2 * k3))
        xd = xn * radial + 2.0 * p1 * xn * yn + p2 * (r2 + 2.0 * xn * xn)
        yd = yn * radial + p1 * (r2 + 2.0 * yn * yn) + 2.0 * p2 * xn * yn
        return xd, yd

    def project_optical(self, pts_cam) -> np.ndarray:
        """Project (N,3) optical-frame points to (N,2) pixels; points with z <= 1e-6 give NaN."""
        p = np.asarray(pts_cam, dtype=np.float64).reshape(-1, 3)
        z = p[:, 2]
        ok = z > 1e-6
        zs = np.where(ok, z, 1.0)
        xd, yd = self.distort_normalized(p[:, 0] / zs, p[:, 1] / zs)
        uv = np.stack([self.fx * xd + self.cx, self.fy * yd + self.cy], axis=1)
        uv[~ok] = np.nan
        return uv

    def project_base(self, pts_base) -> np.ndarray:
        """Project (N,3) base-frame points (m) to (N,2) pixels; behind the camera -> NaN."""
        r, t = self.mount.base_from_camera()
        p = np.asarray(pts_base, dtype=np.float64).reshape(-1, 3)
        return self.project_optical((p - t) @ r)  # optical = R^T (p - t)

    def undistort_pixels(self, uv) -> np.ndarray:
        """(N,2) pixels -> (N,2) normalized undistorted coordinates (iterative inverse of OpenCV's model)."""
        uv = np.asarray(uv, dtype=np.float64).reshape(-1, 2)
        xd = (uv[:, 0] - self.cx) / self.fx
        yd = (uv[:, 1] - self.cy) / self.fy
        if not any(self.dist):
            return np.stack([xd, yd], axis=1)
        k1, k2, p1, p2, k3 = self.dist
        x, y = xd.copy(), yd.copy()
        for _ in range(20):  # fixed-point iteration, as OpenCV's undistortPoints does
            r2 = x * x + y * y
            radial = 1.0 + r2 * (k1 + r2 * (k2 + r2 * k3))
            dx = 2.0 * p1 * x * y + p2 * (r2 + 2.0 * x * x)
            dy = p1 * (r2 + 2.0 * y * y) + 2.0 * p2 * x * y
            x = (xd - dx) / radial
            y = (yd - dy) / radial
        return np.stack([x, y], axis=1)

    def pixel_rays_base(self, uv) -> tuple[np.ndarray, np.ndarray]:
        """Rays through pixels: (origin (3,), unit directions (N,3)) in the base frame."""
        xy = self.undistort_pixels(uv)
        d = np.concatenate([xy, np.ones((len(xy), 1))], axis=1)
        d /= np.linalg.norm(d, axis=1, keepdims=True)
        r, t = self.mount.base_from_camera()
        return t, d @ r.T


def _num(d: dict, key: str, path, section: str) -> float:
    if key not in d:
        raise CalibrationError(f"{path}: [{section}] is missing '{key}'")
    v = d[key]
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise CalibrationError(f"{path}: [{section}] '{key}' must be a number, got {v!r}")
    return float(v)


def camera_from_dict(doc: dict, path="camera file") -> CameraModel:
    """Build a :class:`CameraModel` from the parsed calibration document."""
    if doc.get("format", FORMAT_NAME) != FORMAT_NAME:
        raise CalibrationError(f"{path}: format is {doc.get('format')!r}, expected {FORMAT_NAME!r}")
    ver = doc.get("version", FORMAT_VERSION)
    if not isinstance(ver, int) or ver > FORMAT_VERSION:
        raise CalibrationError(f"{path}: version {ver!r} is newer than this tinyloc reads ({FORMAT_VERSION})")
    cam = doc.get("camera")
    if not isinstance(cam, dict):
        raise CalibrationError(f"{path}: missing [camera] table")
    dist = cam.get("dist", [0.0] * 5)
    if not isinstance(dist, list) or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in dist):
        raise CalibrationError(f"{path}: [camera] 'dist' must be a list of numbers")
    dist = [float(v) for v in dist] + [0.0] * (5 - len(dist))
    if len(dist) != 5:
        raise CalibrationError(f"{path}: [camera] 'dist' has {len(dist)} coefficients; tinyloc reads k1, k2, p1, p2, k3")
    mt = doc.get("mount", {})
    if not isinstance(mt, dict):
        raise CalibrationError(f"{path}: [mount] must be a table")
    defaults = Mount()
    mount = Mount(**{k: (_num(mt, k, path, "mount") if k in mt else getattr(defaults, k))
                     for k in ("height_m", "pitch_deg", "roll_deg", "yaw_deg", "x_m", "y_m")})
    for k in ("width", "height"):
        if not isinstance(cam.get(k), int) or isinstance(cam.get(k), bool):
            raise CalibrationError(f"{path}: [camera] '{k}' must be an integer number of pixels")
    try:
        return CameraModel(width=cam["width"], height=cam["height"], fx=_num(cam, "fx", path, "camera"),
                           fy=_num(cam, "fy", path, "camera"), cx=_num(cam, "cx", path, "camera"),
                           cy=_num(cam, "cy", path, "camera"), dist=tuple(dist), mount=mount)
    except CalibrationError as e:
        if str(e).startswith(str(path)):
            raise
        raise CalibrationError(f"{path}: {e}") from None


def camera_to_dict(cam: CameraModel, **extra) -> dict:
    """The calibration document for ``cam``; ``extra`` adds a [calibration] table (e.g. rms_px)."""
    m = cam.mount
    doc = {"format": FORMAT_NAME, "version": FORMAT_VERSION,
           "camera": {"width": cam.width, "height": cam.height, "fx": cam.fx, "fy": cam.fy,
                      "cx": cam.cx, "cy": cam.cy, "dist": [float(v) for v in cam.dist]},
           "mount": {"height_m": m.height_m, "pitch_deg": m.pitch_deg, "roll_deg": m.roll_deg,
                     "yaw_deg": m.yaw_deg, "x_m": m.x_m, "y_m": m.y_m}}
    if extra:
        doc["calibration"] = dict(extra)
    return doc


def load_camera(path) -> CameraModel:
    """Read a calibration file (TOML, format documented in docs/camera.md)."""
    return camera_from_dict(read_toml(path, cls=CalibrationError), path)


def save_camera(path, cam: CameraModel, **extra) -> None:
    """Write a calibration file."""
    write_toml(path, camera_to_dict(cam, **extra), header="tinyloc camera calibration (docs/camera.md)")
