"""Camera height, pitch and roll from a checkerboard or a marked rectangle lying flat on the ground.

With the intrinsics known, the pose of a planar target (``cv2.solvePnP``) gives the
ground plane in the camera frame: its normal is the world's up direction seen from
the camera, and the camera centre's distance to the plane is the mounting height.
Pitch and roll then follow from the up direction exactly as they do from an
accelerometer's gravity vector (:func:`tinyloc.frames.gravity_to_roll_pitch`).
Yaw and the horizontal offset of the camera cannot be told from a ground target
alone; they keep the values already in the calibration (or those set by hand).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
import math

import cv2
import numpy as np

from ..errors import CalibrationError
from ..frames import FLU_FROM_OPTICAL, gravity_to_roll_pitch
from .calibrate import BoardSpec, CalibrateParams, find_board
from .model import CameraModel, Mount


@dataclass(frozen=True)
class MountFit:
    """A fitted mount and how well the target fits (RMS reprojection error, pixels)."""

    mount: Mount
    rms_px: float
    points: int


def fit_mount_from_points(camera: CameraModel, obj_pts, img_pts) -> MountFit:
    """Mount height/pitch/roll from >= 4 points of a flat target on the ground.

    Parameters
    ----------
    camera : CameraModel
        Calibrated intrinsics and distortion; its mount gives yaw and x/y offsets to keep.
    obj_pts : array_like (N, 2) or (N, 3)
        Target points in the target's own plane (m); z, if given, must be 0.
    img_pts : array_like (N, 2)
        Their pixel positions in the photo.
    """
    obj = np.asarray(obj_pts, dtype=np.float64).reshape(-1, np.shape(obj_pts)[-1])
    if obj.shape[1] == 2:
        obj = np.concatenate([obj, np.zeros((len(obj), 1))], axis=1)
    img = np.asarray(img_pts, dtype=np.float64).reshape(-1, 2)
    if len(obj) < 4 or len(obj) != len(img) or obj.shape[1] != 3:
        raise CalibrationError(f"mount fit needs >= 4 matching target/pixel points, got {len(obj)} and {len(img)}")
    if not (np.all(np.isfinite(obj)) and np.all(np.isfinite(img))):
        raise CalibrationError("mount fit: target and pixel points must be finite")
    if np.max(np.abs(obj[:, 2])) > 1e-9:
        raise CalibrationError("mount fit: target points must lie in their plane (z = 0)")
    k, dist = camera.K, camera.dist_array
    method = cv2.SOLVEPNP_IPPE if len(obj) >= 4 else cv2.SOLVEPNP_ITERATIVE
    ok, rvec, tvec = cv2.solvePnP(obj, img, k, dist, flags=method)
    if not ok:
        raise CalibrationError("mount fit: the target's pose could not be solved (points degenerate?)")
    rvec, tvec = cv2.solvePnPRefineLM(obj, img, k, dist, rvec, tvec)
    proj, _ = cv2.projectPoints(obj, rvec, tvec, k, dist)
    rms = float(np.sqrt(np.mean(np.sum((proj.reshape(-1, 2) - img) ** 2, axis=1))))
    r, _ = cv2.Rodrigues(rvec)
    t = tvec.ravel()
    n = r[:, 2]  # target plane normal in the optical frame
    if np.dot(n, -t) < 0.0:  # make it point from the ground towards the camera: world up
        n = -n
    height = float(np.dot(n, -t))
    if height <= 0.0:
        raise CalibrationError("mount fit: the target is not below the camera")
    roll, pitch = gravity_to_roll_pitch(FLU_FROM_OPTICAL @ n)
    m = replace(camera.mount, height_m=height, pitch_deg=math.degrees(pitch), roll_deg=math.degrees(roll))
    return MountFit(m, rms, len(obj))


def fit_mount_from_board(camera: CameraModel, image: np.ndarray, board: BoardSpec, *,
                         params: CalibrateParams = CalibrateParams(), name: str = "image") -> MountFit:
    """Mount height/pitch/roll from a photo of a checkerboard lying flat on the ground."""
    img = np.asarray(image)
    gray = cv2.cvtColor(img, cv2.COLOR_BGR2GRAY) if img.ndim == 3 else img
    if gray.shape != (camera.height, camera.width):
        raise CalibrationError(f"{name}: photo is {gray.shape[1]}x{gray.shape[0]}, the calibration is for "
                               f"{camera.width}x{camera.height}")
    view = find_board(gray, board, name=name, params=params)
    if not view.ok:
        raise CalibrationError(f"{name}: {view.reason}")
    return fit_mount_from_points(camera, board.object_points(), view.corners.reshape(-1, 2))


def fit_mount_from_rectangle(camera: CameraModel, corners_px, width_m: float, length_m: float) -> MountFit:
    """Mount height/pitch/roll from the four pixel corners of a marked rectangle on the ground.

    Parameters
    ----------
    corners_px : array_like (4, 2)
        Pixel corners in order: near-left, near-right, far-right, far-left (as seen in the photo).
    width_m, length_m : float
        The rectangle's side across (near edge) and along (away from the camera), metres.
    """
    if not (width_m > 0 and length_m > 0 and math.isfinite(width_m) and math.isfinite(length_m)):
        raise CalibrationError("mount fit: rectangle sides must be positive lengths in metres")
    obj = np.array([[0.0, 0.0], [width_m, 0.0], [width_m, length_m], [0.0, length_m]])
    c = np.asarray(corners_px, dtype=np.float64)
    if c.shape != (4, 2):
        raise CalibrationError(f"mount fit: need 4 pixel corners (x, y), got shape {c.shape}")
    return fit_mount_from_points(camera, obj, c)


def set_mount(camera: CameraModel, **values) -> CameraModel:
    """The camera with mount fields set by hand.

    Fields: ``height_m``, ``pitch_deg``, ``roll_deg``, ``yaw_deg``, ``x_m``, ``y_m``.

    ``None`` values are left unchanged; the result is validated like a loaded file.
    """
    changes = {k: float(v) for k, v in values.items() if v is not None}
    unknown = set(changes) - {"height_m", "pitch_deg", "roll_deg", "yaw_deg", "x_m", "y_m"}
    if unknown:
        raise CalibrationError(f"unknown mount field(s): {', '.join(sorted(unknown))}")
    return replace(camera, mount=replace(camera.mount, **changes))
