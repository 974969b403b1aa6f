"""Message contents -> tinyloc values: images, camera calibration, static transforms, poses, GNSS accuracy.

Pure functions over deserialised messages (any object with the ROS field names), so
they are testable without a bag. Failures raise :class:`BadMessage`; the importer
adds the topic and message index and decides whether to drop the message or stop.

Frame conventions (REP 103, common practice in ROS): body frames are FLU (x
forward, y left, z up), the same as tinyloc's base frame; camera *optical* frames
are x right, y down, z forward, the same as tinyloc's camera frame; quaternions are
(x, y, z, w) Hamilton. REP 105 names ``base_footprint`` as the robot's projection on
the ground, which is where tinyloc puts the base origin.
"""

from __future__ import annotations

import math

import numpy as np

from ..camera.model import CameraModel, Mount
from ..frames import FLU_FROM_OPTICAL


class BadMessage(ValueError):
    """A message whose content tinyloc cannot use; the text says why (no topic/index: the caller adds them)."""


# ----------------------------------------------------------------------------- images

JPEG_MAGIC = b"\xff\xd8\xff"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"

# Channels per pixel of the 8-bit raw encodings we take (sensor_msgs/image_encodings names).
RAW_CHANNELS = {"bgr8": 3, "rgb8": 3, "mono8": 1, "8UC1": 1, "bgra8": 4, "rgba8": 4,
                "bayer_rggb8": 1, "bayer_bggr8": 1, "bayer_gbrg8": 1, "bayer_grbg8": 1}


def _bayer_codes():
    import cv2

    # The pattern is named by its top-left 2x2 block, read row by row (RGGB: R at (0, 0)).
    # OpenCV's older names count from the second row and column, hence BayerRGGB == BayerBG.
    def code(new, old):
        return getattr(cv2, new, getattr(cv2, old))

    return {"bayer_rggb8": code("COLOR_BayerRGGB2BGR", "COLOR_BayerBG2BGR"),
            "bayer_bggr8": code("COLOR_BayerBGGR2BGR", "COLOR_BayerRG2BGR"),
            "bayer_gbrg8": code("COLOR_BayerGBRG2BGR", "COLOR_BayerGR2BGR"),
            "bayer_grbg8": code("COLOR_BayerGRBG2BGR", "COLOR_BayerGB2BGR")}


def raw_image_to_bgr(height: int, width: int, encoding: str, step: int, data) -> np.ndarray:
    """Decode a ``sensor_msgs/Image`` payload into BGR (H, W, 3) or gray (H, W) uint8.

    Parameters
    ----------
    height, width : int
        Image size (pixels).
    encoding : str
        One of ``RAW_CHANNELS`` (rgb8, bgr8, mono8, rgba8, bgra8, bayer_{rggb,bggr,gbrg,grbg}8).
    step : int
        Bytes per row (may exceed ``width * channels``: rows can be padded).
    data : bytes-like or uint8 array
        The pixel bytes, row-major.

    Raises
    ------
    BadMessage
        Unsupported encoding, or a payload that does not hold ``height * step`` bytes.
    """
    import cv2

    enc = str(encoding)
    if enc not in RAW_CHANNELS:
        raise BadMessage(f"image encoding '{enc}' is not supported (tinyloc reads "
                         f"{', '.join(sorted(RAW_CHANNELS))}, and JPEG/PNG CompressedImage)")
    ch = RAW_CHANNELS[enc]
    h, w, step = int(height), int(width), int(step)
    if h < 1 or w < 1 or h > 20000 or w > 20000:
        raise BadMessage(f"image size {w}x{h} is out of range")
    if step < w * ch:
        raise BadMessage(f"row step {step} bytes is shorter than width x channels = {w * ch}")
    buf = np.frombuffer(data, dtype=np.uint8) if not isinstance(data, np.ndarray) else data.view(np.uint8).ravel()
    if buf.size < h * step:
        raise BadMessage(f"image data holds {buf.size} bytes, {h} rows x step {step} need {h * step}")
    rows = buf[: h * step].reshape(h, step)[:, : w * ch]
    if ch == 1:
        img = np.ascontiguousarray(rows)
        if enc.startswith("bayer_"):
            return cv2.cvtColor(img, _bayer_codes()[enc])
        return img
    img = rows.reshape(h, w, ch)
    if enc == "bgr8":
        return np.ascontiguousarray(img)
    if enc == "rgb8":
        return np.ascontiguousarray(img[:, :, ::-1])
    if enc == "bgra8":
        return np.ascontiguousarray(img[:, :, :3])
    return np.ascontiguousarray(img[:, :, 2::-1])  # rgba8


def compressed_kind(data) -> str:
    """File extension ('.jpg' or '.png') of a ``CompressedImage`` payload, judged by its magic bytes.

    The ``format`` text of the message is informative only (publishers write it in many ways);
    the bytes decide.

    Raises
    ------
    BadMessage
        Neither JPEG nor PNG.
    """
    head = bytes(data[:8])
    if head.startswith(JPEG_MAGIC):
        return ".jpg"
    if head.startswith(PNG_MAGIC):
        return ".png"
    raise BadMessage(f"compressed image is neither JPEG nor PNG (first bytes {head.hex()})")


def check_compressed(data, width: int | None = None, height: int | None = None) -> tuple[str, int, int]:
    """Decode a JPEG/PNG payload once to prove it is whole; returns (extension, width, height).

    Raises
    ------
    BadMessage
        Not decodable, not 8-bit, or not the expected size.
    """
    import cv2

    ext = compressed_kind(data)
    arr = np.frombuffer(bytes(data), dtype=np.uint8) if not isinstance(data, np.ndarray) else data
    img = cv2.imdecode(arr, cv2.IMREAD_UNCHANGED)
    if img is None:
        raise BadMessage(f"compressed {ext[1:].upper()} image does not decode (damaged or cut short)")
    if img.dtype != np.uint8:
        raise BadMessage(f"compressed image is {img.dtype}; frames must be 8-bit")
    h, w = img.shape[:2]
    if width is not None and (w != width or h != height):
        raise BadMessage(f"image is {w}x{h}, the camera calibration says {width}x{height}")
    return ext, w, h


# ----------------------------------------------------------------------------- calibration

def _field(msg, *names):
    for n in names:
        if hasattr(msg, n):
            return getattr(msg, n)
    raise BadMessage(f"message has no field {' or '.join(names)}")


def camera_from_info(info, *, mount: Mount | None = None) -> CameraModel:
    """Map a ``sensor_msgs/CameraInfo`` to tinyloc's camera model (OpenCV k1, k2, p1, p2, k3).

    ``plumb_bob`` (5 coefficients) maps directly. ``rational_polynomial`` (8 coefficients,
    k1 k2 p1 p2 k3 k4 k5 k6) maps exactly when k4 = k5 = k6 = 0 (its radial term is then the
    plumb_bob one); otherwise it is rejected, because dropping the denominator would be wrong
    by many pixels at the image edge and nothing downstream could notice. An empty model
    name with all-zero coefficients means no distortion. Anything else (equidistant fisheye...)
    is rejected.

    Raises
    ------
    BadMessage
        Unsupported model, uncalibrated (K all zero), skewed K, binning or region of interest.
    """
    model = str(info.distortion_model).strip()
    # ROS 2 spells the arrays d, k; ROS 1 spells them D, K.
    d = [float(v) for v in np.asarray(_field(info, "d", "D"), dtype=np.float64).ravel()]
    k = np.asarray(_field(info, "k", "K"), dtype=np.float64).ravel()
    if k.size != 9 or not np.all(np.isfinite(k)) or k[0] <= 0.0 or k[4] <= 0.0:
        raise BadMessage("CameraInfo has no usable intrinsics (K is zero or not finite: an uncalibrated camera)")
    if abs(k[1]) > 1e-9 * k[0]:
        raise BadMessage(f"CameraInfo K has skew {k[1]!r}; tinyloc's pinhole model has none")
    if model == "plumb_bob":
        if len(d) > 5:
            raise BadMessage(f"plumb_bob CameraInfo has {len(d)} coefficients, expected 5")
        dist = (d + [0.0] * 5)[:5]
    elif model == "rational_polynomial":
        if len(d) not in (5, 8, 12, 14):
            raise BadMessage(f"rational_polynomial CameraInfo has {len(d)} coefficients, expected 8")
        extra = d[5:]
        if any(abs(v) > 1e-12 for v in extra):
            raise BadMessage(
                "CameraInfo distortion model 'rational_polynomial' with nonzero k4..k6 ("
                + ", ".join(f"{v:.6g}" for v in extra[:3])
                + ") is not supported: tinyloc's camera file holds k1, k2, p1, p2, k3 only; recalibrate "
                  "with the 5-coefficient model or pass --camera camera.toml")
        dist = d[:5]
    elif model in ("", "none") and not any(d):
        dist = [0.0] * 5
    else:
        raise BadMessage(f"CameraInfo distortion model '{model}' is not supported (tinyloc reads plumb_bob "
                         "and rational_polynomial with k4=k5=k6=0); pass --camera camera.toml instead")
    bx, by = int(getattr(info, "binning_x", 0)), int(getattr(info, "binning_y", 0))
    if bx > 1 or by > 1:
        raise BadMessage(f"CameraInfo binning {bx}x{by} is not supported (publish full-resolution calibration)")
    roi = getattr(info, "roi", None)
    if roi is not None and int(roi.width) and int(roi.height) and (
            int(roi.width) != int(info.width) or int(roi.height) != int(info.height)):
        raise BadMessage(f"CameraInfo region of interest {roi.width}x{roi.height} is not supported")
    try:
        return CameraModel(width=int(info.width), height=int(info.height), fx=float(k[0]), fy=float(k[4]),
                           cx=float(k[2]), cy=float(k[5]), dist=tuple(dist), mount=mount or Mount())
    except ValueError as e:  # CalibrationError from the model's own checks
        raise BadMessage(f"CameraInfo: {e}") from None


# ----------------------------------------------------------------------------- rotations and transforms

def quat_to_matrix(x: float, y: float, z: float, w: float) -> np.ndarray:
    """3x3 rotation matrix of a unit quaternion (x, y, z, w), Hamilton convention as in ROS.

    Raises
    ------
    BadMessage
        Zero or non-finite quaternion.
    """
    n = math.sqrt(x * x + y * y + z * z + w * w)
    if not math.isfinite(n) or n < 1e-9:
        raise BadMessage(f"quaternion ({x}, {y}, {z}, {w}) is zero or not finite")
    x, y, z, w = x / n, y / n, z / n, w / n
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
        [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
        [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])


def quat_to_yaw(x: float, y: float, z: float, w: float) -> float:
    """Yaw (rad, about +z, (-pi, pi]) of the intrinsic Z-Y-X decomposition of a quaternion."""
    return math.atan2(2.0 * (w * z + x * y), 1.0 - 2.0 * (y * y + z * z))


class TransformTree:
    """Static transforms (parent_from_child) collected from ``tf2_msgs/TFMessage`` messages."""

    def __init__(self):
        self.parent: dict[str, tuple[str, np.ndarray, np.ndarray]] = {}

    def add(self, tf_msg) -> None:
        """Add every transform of one TFMessage (later ones replace earlier ones for the same child)."""
        for tr in tf_msg.transforms:
            q = tr.transform.rotation
            p = tr.transform.translation
            child = str(tr.child_frame_id).lstrip("/")
            par = str(tr.header.frame_id).lstrip("/")
            if child and par and child != par:
                self.parent[child] = (par, quat_to_matrix(q.x, q.y, q.z, q.w),
                                      np.array([p.x, p.y, p.z], dtype=np.float64))

    def frames(self) -> set[str]:
        """Every frame name in the tree."""
        return set(self.parent) | {v[0] for v in self.parent.values()}

    def _to_root(self, frame: str) -> tuple[str, np.ndarray, np.ndarray]:
        # (root, root_from_frame R, t): walk parents up; a loop or a very deep chain stops the walk.
        r, t = np.eye(3), np.zeros(3)
        cur, seen = frame, {frame}
        while cur in self.parent and len(seen) < 64:
            par, rp, tp = self.parent[cur]  # par_from_cur
            if par in seen:
                break
            r, t = rp @ r, rp @ t + tp
            cur = par
            seen.add(par)
        return cur, r, t

    def lookup(self, target: str, source: str) -> tuple[np.ndarray, np.ndarray] | None:
        """``target_from_source`` as (R 3x3, t 3), or None when the two frames are not connected."""
        target, source = target.lstrip("/"), source.lstrip("/")
        if target == source:
            return np.eye(3), np.zeros(3)
        root_a, ra, ta = self._to_root(target)
        root_b, rb, tb = self._to_root(source)
        if root_a != root_b:
            return None
        # target_from_source = inv(root_from_target) * root_from_source
        return ra.T @ rb, ra.T @ (tb - ta)


def mount_from_transform(r_base_optical: np.ndarray, t_base_optical: np.ndarray) -> Mount:
    """tinyloc :class:`Mount` of a camera whose optical frame sits at ``base_from_optical`` = (R, t).

    Inverts :meth:`Mount.base_from_camera`: R = Rz(yaw) Ry(pitch) Rx(roll) @ FLU_FROM_OPTICAL.
    """
    r = np.asarray(r_base_optical, dtype=np.float64) @ FLU_FROM_OPTICAL.T
    yaw = math.atan2(r[1, 0], r[0, 0])
    pitch = math.asin(max(-1.0, min(1.0, -r[2, 0])))
    roll = math.atan2(r[2, 1], r[2, 2])
    t = np.asarray(t_base_optical, dtype=np.float64)
    return Mount(height_m=float(t[2]), pitch_deg=math.degrees(pitch), roll_deg=math.degrees(roll),
                 yaw_deg=math.degrees(yaw), x_m=float(t[0]), y_m=float(t[1]))


# ----------------------------------------------------------------------------- GNSS

NAVSAT_NO_FIX = -1
COV_UNKNOWN = 0


def horizontal_sigma_m(position_covariance) -> float:
    """1-sigma horizontal accuracy (m) from a NavSatFix ENU position covariance (row-major 3x3, m^2).

    The square root of the larger eigenvalue of the east-north block: the error standard
    deviation along the worst horizontal direction (conservative for an elongated ellipse).
    """
    c = np.asarray(position_covariance, dtype=np.float64).ravel()
    if c.size != 9 or not np.all(np.isfinite(c[[0, 1, 3, 4]])):
        return math.nan
    a, b, d = c[0], 0.5 * (c[1] + c[3]), c[4]
    lam = 0.5 * (a + d) + math.sqrt(max(0.0, 0.25 * (a - d) ** 2 + b * b))
    return math.sqrt(lam) if lam > 0.0 else math.nan
