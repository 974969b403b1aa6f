"""Convert a recorded robot log (ROS 1 bag, ROS 2 sqlite3 or MCAP bag) into a run folder.

One streaming pass over the bag writes the run folder through
:class:`tinyloc.runfolder.RunWriter`; memory stays bounded by one message plus the
bag reader's chunk buffer, whatever the bag's size. Before it, a short look-ahead
reads only what the run folder needs up front: the static transforms, the first
CameraInfo, the first camera and IMU messages.

Time: every sample carries its header stamp (not the record time), as run-folder
seconds ``t = (stamp_ns - time_base_ns) / 1e9``; ``time_base_ns`` (whole seconds of
the first frame's stamp) is stored in run.json so exported results line up with the
original log again. Streams must be monotonic, so messages without a stamp, with a
repeated stamp or going back in time are dropped and reported (topic, message index).

Interrupted or failed imports close the folder with ``"complete": false`` and the
reason in run.json's ``"import"`` entry; a run folder is never silently truncated.
``import_bag(..., resume=True)`` continues such a folder when the bag (fingerprint) and
the options match what run.json recorded: every message is checked again, those the
folder already holds are counted but not written, the rest is appended.
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
import struct
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..camera.model import CameraModel, load_camera
from ..errors import InputError
from ..geo import LocalFrame
from ._rosbags import rosbags, stamp_ns, typestore
from .fingerprint import bag_fingerprint, differing, options_record
from .decode import (COV_UNKNOWN, NAVSAT_NO_FIX, BadMessage, TransformTree, camera_from_info, check_compressed,
                     horizontal_sigma_m, mount_from_transform, quat_to_yaw, raw_image_to_bgr)
from .progress import Progress
from .stamps import NS, StampParams, StampTracker
from .topics import COMPRESSED, POSE, STREAM_FILE, TF_MESSAGE, TF_STATIC, choose_topics, inventory
from .writer import BagRunWriter, FrameQueue, png_bytes

# Consecutive stampless messages at the start of a topic before we stop and suggest --record-time.
MAX_LEADING_STAMPLESS = 20


@dataclass(frozen=True)
class ImportOptions:
    """What to read from the bag and how.

    Parameters
    ----------
    camera_topic, camera_info_topic, imu_topic, odom_topic, gnss_topic, truth_topic : str or None
        Topics to use; None picks by message type (truth is never picked by default).
        The string ``"none"`` leaves that stream out.
    every : int
        Keep every N-th camera frame (other sensors are all kept).
    start_s, end_s : float or None
        Window in seconds from the bag's first message (record time).
    camera_file : str or None
        camera.toml supplying the mount when the bag has no static transform to the camera,
        and the intrinsics when it has no usable CameraInfo.
    base_frame : str or None
        Robot base frame in /tf_static; None tries base_footprint, then base_link.
    origin : (lat, lon, h) or None
        ENU origin of run.json (and of the truth topic's x/y, which requires it).
    record_time : bool
        Use the bag's record time instead of header stamps (for logs without stamps).
    gnss_acc_m : float or None
        1-sigma horizontal accuracy (m) for fixes whose covariance is unknown (else they are dropped).
    stamp_params : StampParams
        Thresholds of the timestamp report.
    progress : bool
        Draw a progress bar on stderr.
    workers : int
        Threads encoding/checking frames (0: up to 4, one per CPU; 1: inline, no thread).
    """

    camera_topic: str | None = None
    camera_info_topic: str | None = None
    imu_topic: str | None = None
    odom_topic: str | None = None
    gnss_topic: str | None = None
    truth_topic: str | None = None
    every: int = 1
    start_s: float | None = None
    end_s: float | None = None
    camera_file: str | None = None
    base_frame: str | None = None
    origin: tuple[float, ...] | None = None
    record_time: bool = False
    gnss_acc_m: float | None = None
    stamp_params: StampParams = field(default_factory=StampParams)
    progress: bool = True
    workers: int = 0


@dataclass
class ImportResult:
    """What an import wrote and saw."""

    path: Path
    complete: bool
    counts: dict
    report: dict
    lines: list


class StopImport(InputError):
    """The bag cannot be read on; the run folder so far is closed as incomplete."""


# ----------------------------------------------------------------------------- opening and listing

_READ_ERRORS: tuple = (OSError, EOFError, struct.error, sqlite3.DatabaseError, ValueError, IndexError, KeyError)


def _reader_errors():
    rb = rosbags()
    return (rb.highlevel.AnyReaderError, rb.rosbag1.ReaderError, rb.rosbag2.ReaderError,
            rb.serde.SerdeError) + _READ_ERRORS


def open_bag(path):
    """Open a bag (``.bag`` file, ROS 2 bag folder, ``.db3`` or ``.mcap`` file) with rosbags' AnyReader.

    Raises
    ------
    InputError
        Missing path, or a file rosbags cannot open (truncated, wrong format); one line naming it.
    """
    rb = rosbags()
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such bag file or folder")
    ros1 = p.is_file() and p.suffix == ".bag"
    if p.is_file() and p.suffix != ".bag":
        with open(p, "rb") as fh:
            if fh.read(13) == b"#ROSBAG V2.0\n":  # a ROS 1 bag under another name (e.g. .bag.active)
                salvaged = _salvage(p)
                if salvaged is None:
                    raise InputError(f"{p}: ROS 1 bag with nothing readable in it")
                return salvaged
    try:
        reader = rb.highlevel.AnyReader([p], default_typestore=typestore(ros1=ros1))
        reader.open()
    except (FileNotFoundError, *_reader_errors()) as e:
        why = _why(e)
        salvaged = _salvage(p)
        if salvaged is not None:
            return salvaged
        if isinstance(e, FileNotFoundError):
            raise InputError(f"{p}: not a bag ({why})") from None
        raise InputError(f"{p}: cannot open as a bag: {why} (truncated or damaged file, or not a ROS bag)") from None
    return reader


def _salvage(p: Path):
    """A reader over the whole records of a cut-short MCAP recording, or None."""
    from .salvage import open_salvage

    try:
        r = open_salvage(p)
    except (InputError, OSError, ValueError, *_reader_errors()):
        return None
    if r is None:
        return None
    if r.message_count == 0:
        r.close()
        return None
    return r


def _why(e: BaseException) -> str:
    text = " ".join(str(a) for a in e.args) if e.args else type(e).__name__
    return text.strip().rstrip(".") or type(e).__name__


def describe_bag(path, opts: ImportOptions | None = None) -> str:
    """The ``--list`` text: what the bag holds and which topic feeds which run-folder file."""
    opts = opts or ImportOptions()
    reader = open_bag(path)
    try:
        rows = inventory(reader)
        dur = max(0, reader.end_time - reader.start_time) / NS if rows else 0.0
        kind = "ROS 1" if not reader.is2 else "ROS 2"
        out = [f"{path}: {kind} bag, {len(rows)} topics, {reader.message_count} messages, "
               f"{dur:.1f} s (record time)"]
        try:
            chosen, notes = choose_topics(rows, opts)
            err = None
        except InputError as e:
            chosen, notes, err = {}, [], str(e)
        use = {v: k for k, v in chosen.items() if v}
        w = max([len(r.topic) for r in rows] + [5])
        tw = max([len(r.msgtype) for r in rows] + [4])
        out.append(f"  {'topic':<{w}}  {'type':<{tw}}  {'count':>7}  {'mean rate':>10}  use")
        for r in rows:
            # Over the whole bag's record span (the import reports header-stamp rates per topic).
            rate = f"{r.count / dur:.2f} Hz" if dur > 0 and r.count > 1 else "-"
            target = use.get(r.topic)
            label = STREAM_FILE[target] if target else ("camera mount" if r.topic == TF_STATIC else "")
            out.append(f"  {r.topic:<{w}}  {r.msgtype:<{tw}}  {r.count:>7}  {rate:>10}  {label}")
        if getattr(reader, "note", None):
            out.append(f"note: {reader.note}")
        out.extend(f"note: {n}" for n in notes)
        if err:
            out.append(f"cannot import with these options: {err}")
        return "\n".join(out)
    finally:
        reader.close()


# ----------------------------------------------------------------------------- writing

def _update_meta(path: Path, updates: dict) -> None:
    p = path / "run.json"
    meta = json.loads(p.read_text(encoding="utf-8"))
    meta.update(updates)
    tmp = p.with_name("run.json.tmp")
    tmp.write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    tmp.replace(p)


# ----------------------------------------------------------------------------- the import

class _Rows:
    """Accepted messages -> run-folder rows and frames, one method per stream (errors raise BadMessage)."""

    def __init__(self, writer: BagRunWriter, frames: FrameQueue, camera: CameraModel, r_base_imu: np.ndarray,
                 frame: LocalFrame | None, opts: ImportOptions):
        self.writer, self.frames, self.camera, self.r_base_imu, self.frame = writer, frames, camera, r_base_imu, frame
        self.opts = opts
        self.counts = {"frames": 0, "imu": 0, "odometry": 0, "gnss": 0, "truth": 0}
        self.gnss_skip = {"no fix": 0, "unknown covariance": 0}
        self.kept_frames = 0
        # True while replaying messages the folder already holds (a resumed import): every check
        # and count runs as before, nothing is written.
        self.dry = False

    def add(self, kind: str, msgtype: str, msg, t: float, topic: str, index: int) -> None:
        getattr(self, "_" + kind)(msgtype, msg, t, topic, index)

    def _camera(self, msgtype, msg, t, topic, index):
        self.kept_frames += 1
        if (self.kept_frames - 1) % self.opts.every:
            return
        cam = self.camera
        if msgtype == COMPRESSED:
            data = msg.data.tobytes() if hasattr(msg.data, "tobytes") else bytes(msg.data)
            if self.dry:
                self.frames.skip(topic, index, lambda d=data: check_compressed(d, cam.width, cam.height))
                return
            self.frames.put(t, topic, index, lambda d=data: (d, check_compressed(d, cam.width, cam.height)[0]))
            return
        img = raw_image_to_bgr(msg.height, msg.width, msg.encoding, msg.step, msg.data)
        if img.shape[0] != cam.height or img.shape[1] != cam.width:
            raise BadMessage(f"image is {img.shape[1]}x{img.shape[0]}, the camera calibration says "
                             f"{cam.width}x{cam.height}")
        if self.dry:
            self.frames.skip(topic, index)
            return
        self.frames.put(t, topic, index, lambda im=img: png_bytes(im))

    def _imu(self, msgtype, msg, t, topic, index):
        if float(msg.linear_acceleration_covariance[0]) == -1.0:
            raise BadMessage("no linear acceleration (covariance[0] = -1 marks it absent)")
        a = msg.linear_acceleration
        f = self.r_base_imu @ np.array([a.x, a.y, a.z], dtype=np.float64)
        if not np.all(np.isfinite(f)):
            raise BadMessage("non-finite linear acceleration")
        if not self.dry:
            self.writer.add_imu(t, f[0], f[1], f[2])
        self.counts["imu"] += 1

    def _odom(self, msgtype, msg, t, topic, index):
        p, q = msg.pose.pose.position, msg.pose.pose.orientation
        yaw = quat_to_yaw(q.x, q.y, q.z, q.w)
        if not all(math.isfinite(v) for v in (p.x, p.y, yaw)):
            raise BadMessage("non-finite odometry pose")
        if not self.dry:
            self.writer.add_odometry(t, p.x, p.y, yaw)
        self.counts["odometry"] += 1

    def _gnss(self, msgtype, msg, t, topic, index):
        if int(msg.status.status) <= NAVSAT_NO_FIX:
            self.gnss_skip["no fix"] += 1
            return
        if int(msg.position_covariance_type) == COV_UNKNOWN:
            if self.opts.gnss_acc_m is None:
                self.gnss_skip["unknown covariance"] += 1
                return
            acc = float(self.opts.gnss_acc_m)
        else:
            acc = horizontal_sigma_m(msg.position_covariance)
        if not (math.isfinite(acc) and acc > 0):
            raise BadMessage("position covariance gives no positive horizontal accuracy")
        lat, lon, h = float(msg.latitude), float(msg.longitude), float(msg.altitude)
        if not (math.isfinite(lat) and math.isfinite(lon) and abs(lat) <= 90 and abs(lon) <= 180):
            raise BadMessage(f"latitude/longitude ({lat}, {lon}) not valid")
        if not self.dry:
            self.writer.add_gnss(t, lat, lon, h if math.isfinite(h) else 0.0, acc)
        self.counts["gnss"] += 1

    def _truth(self, msgtype, msg, t, topic, index):
        pose = msg.pose if msgtype == POSE else msg.pose.pose
        p, q = pose.position, pose.orientation
        yaw = quat_to_yaw(q.x, q.y, q.z, q.w)
        if not all(math.isfinite(v) for v in (p.x, p.y, yaw)):
            raise BadMessage("non-finite truth pose")
        lat, lon = self.frame.to_latlon(p.x, p.y)
        if not self.dry:
            self.writer.add_truth(t, lat, lon, yaw, p.x, p.y)
        self.counts["truth"] += 1


# stream -> run-folder file (without .csv)
_STREAM_TABLE = {"camera": "frames", "imu": "imu", "odom": "odometry", "gnss": "gnss", "truth": "truth"}


class _Importer:
    def __init__(self, bag, out, opts: ImportOptions, resume: bool = False):
        if opts.every < 1:
            raise InputError(f"--every {opts.every}: must be a positive whole number")
        if opts.start_s is not None and opts.start_s < 0:
            raise InputError(f"--start {opts.start_s}: must be >= 0 s")
        if opts.start_s is not None and opts.end_s is not None and opts.end_s <= opts.start_s:
            raise InputError(f"--end {opts.end_s} must be after --start {opts.start_s}")
        if opts.gnss_acc_m is not None and not opts.gnss_acc_m > 0:
            raise InputError(f"--gnss-acc {opts.gnss_acc_m}: must be a positive number of metres")
        self.bag = Path(bag)
        self.out = Path(out)
        self.opts = opts
        self.resume = resume
        self.notes: list[str] = []
        self.bad: dict[str, list] = {}
        self.bad_count: dict[str, int] = {}

    # -- helpers
    def _drop(self, topic: str, index: int, why: str) -> None:
        n = self.bad_count.get(topic, 0)
        self.bad_count[topic] = n + 1
        if n < self.opts.stamp_params.keep_events:
            self.bad.setdefault(topic, []).append(f"{topic} message #{index}: {why}; dropped")

    def _first(self, reader, topic: str, limit: int = 1, stamped: bool = False):
        """Up to ``limit`` deserialised messages of ``topic`` in the window (with a nonzero stamp if asked)."""
        conns = [c for c in reader.connections if c.topic == topic]
        out = []
        idx = 0
        try:
            for c, rec, raw in reader.messages(connections=conns, start=self.start_ns, stop=self.stop_ns):
                try:
                    msg = reader.deserialize(raw, c.msgtype)
                except _reader_errors() as e:
                    raise StopImport(f"{self.bag}: topic {topic} message #{idx} does not deserialize: {_why(e)}") \
                        from None
                if stamped and not self.opts.record_time and stamp_ns(msg.header) <= 0:
                    idx += 1
                    if idx >= MAX_LEADING_STAMPLESS:
                        raise StopImport(
                            f"{self.bag}: topic {topic} messages #0..#{idx - 1} carry no header stamp; "
                            "pass --record-time to use the bag's record time instead")
                    continue
                out.append((idx, rec, msg))
                idx += 1
                if len(out) >= limit:
                    break
        except StopImport:
            raise
        except _reader_errors() as e:
            raise StopImport(f"{self.bag}: reading topic {topic} failed after message #{idx}: {_why(e)}") from None
        if stamped and not out and idx > 0:
            raise StopImport(f"{self.bag}: topic {topic} messages #0..#{idx - 1} carry no header stamp; "
                             "pass --record-time to use the bag's record time instead")
        return out

    def _stamp(self, msg, rec: int) -> int:
        return rec if self.opts.record_time else stamp_ns(msg.header)

    # -- camera calibration and mount
    def _camera(self, reader, chosen) -> CameraModel:
        opts = self.opts
        file_cam = load_camera(opts.camera_file) if opts.camera_file else None
        cam = None
        info_topic = chosen.get("camera_info")
        info_frame = ""
        if info_topic:
            got = self._first(reader, info_topic)
            if not got:
                self.notes.append(f"camera_info: {info_topic} has no message in the window")
            else:
                idx, _, info = got[0]
                info_frame = str(info.header.frame_id)
                try:
                    cam = camera_from_info(info)
                    self.notes.append(f"camera intrinsics from {info_topic} message #{idx} "
                                      f"({info.distortion_model or 'no distortion'})")
                except BadMessage as e:
                    if file_cam is None:
                        raise InputError(f"{self.bag}: topic {info_topic} message #{idx}: {e}") from None
                    self.notes.append(f"{info_topic} message #{idx}: {e}; intrinsics taken from {opts.camera_file}")
        if cam is None:
            if file_cam is None:
                raise InputError(f"{self.bag}: no usable CameraInfo topic; pass --camera camera.toml "
                                 "(or --camera-info-topic)")
            cam = file_cam
            if not info_topic:
                self.notes.append(f"camera intrinsics from {opts.camera_file}")
        elif file_cam is not None:
            diff = max(abs(a - b) for a, b in zip((cam.fx, cam.fy, cam.cx, cam.cy),
                                                   (file_cam.fx, file_cam.fy, file_cam.cx, file_cam.cy)))
            if diff > 1e-6 or (cam.width, cam.height) != (file_cam.width, file_cam.height):
                self.notes.append(f"CameraInfo intrinsics differ from {opts.camera_file} (by up to "
                                  f"{diff:.3g} px); the bag's are used, the file gives the mount only")
        self.cam_frame = info_frame or self.first_image_frame
        mount = None
        if self.tree.parent and self.cam_frame:
            base = self.base_frame
            found = self.tree.lookup(base, self.cam_frame) if base else None
            if found is not None:
                mount = mount_from_transform(*found)
                self.notes.append(f"camera mount from {TF_STATIC}: {base} -> {self.cam_frame}")
                if "optical" not in self.cam_frame:
                    self.notes.append(f"camera frame '{self.cam_frame}' is not named as an optical frame; "
                                      "the mount assumes it is one (REP 103: z forward, x right, y down)")
                if base != "base_footprint":
                    self.notes.append(f"mount height is measured from '{base}'; tinyloc's base origin is on the "
                                      "ground (REP 105 base_footprint): pass --base-frame if they differ")
            else:
                self.notes.append(f"{TF_STATIC} does not connect '{base or 'base_footprint/base_link'}' to "
                                  f"camera frame '{self.cam_frame}'")
        if mount is None:
            if file_cam is None:
                raise InputError(f"{self.bag}: no static transform from the base frame to the camera frame "
                                 f"'{self.cam_frame}'; pass --camera camera.toml with a [mount] table")
            mount = file_cam.mount
            self.notes.append(f"camera mount from {opts.camera_file}")
        try:
            return CameraModel(width=cam.width, height=cam.height, fx=cam.fx, fy=cam.fy, cx=cam.cx, cy=cam.cy,
                               dist=cam.dist, mount=mount)
        except ValueError as e:
            raise InputError(f"{self.bag}: camera mount from {TF_STATIC} is unusable: {e}; "
                             "pass --base-frame or --camera camera.toml") from None

    def _check_resume(self, fingerprint: dict, options: dict) -> dict:
        """The stopped import's run.json ``"import"`` entry, if ``self.out`` may be resumed with this bag."""
        from ..runfolder import read_meta_to_resume

        out = self.out
        p, meta = read_meta_to_resume(out, ", nothing to resume (run without --resume to start an import)")
        prev = meta.get("import")
        if meta.get("complete") is not False:
            raise InputError(f"{out}: the import is complete (run.json \"complete\": true); nothing to resume")
        if not isinstance(prev, dict) or "bag_fingerprint" not in prev or "options" not in prev:
            raise InputError(f"{out}: not written by a resumable 'tinyloc import bag' (no bag fingerprint in "
                             "run.json); import again into a new folder")
        if prev["bag_fingerprint"] != fingerprint:
            raise InputError(f"{out} was imported from {prev.get('bag', 'another bag')}, and {self.bag} is not that "
                             "bag as it was (size, modification time or contents differ); cannot resume")
        diff = differing(prev["options"], options)
        if diff:
            raise InputError(f"{out} was imported with other options (changed: {', '.join(diff)}); resume with the "
                             "same options, or import into a new folder")
        return prev

    def run(self) -> ImportResult:
        if not self.bag.exists():
            raise InputError(f"{self.bag}: no such bag file or folder")
        self.fingerprint = bag_fingerprint(self.bag)
        self.options = options_record(self.opts)
        self.prev = self._check_resume(self.fingerprint, self.options) if self.resume else None
        reader = open_bag(self.bag)
        try:
            return self._run(reader)
        finally:
            try:
                reader.close()
            except Exception:  # closing a damaged bag may fail again; the outcome is already decided
                pass

    def _imu_rotation(self, reader, topic) -> np.ndarray:
        """base_from_imu rotation from /tf_static (identity, with a note, when it cannot be known)."""
        got = self._first(reader, topic)
        imu_frame = str(got[0][2].header.frame_id).lstrip("/") if got else ""
        if imu_frame and self.base_frame and imu_frame != self.base_frame:
            found = self.tree.lookup(self.base_frame, imu_frame)
            if found is not None:
                self.notes.append(f"IMU rotated into '{self.base_frame}' by {TF_STATIC} ({imu_frame})")
                return found[0]
            self.notes.append(f"IMU frame '{imu_frame}' is not connected to '{self.base_frame}' in "
                              f"{TF_STATIC}; samples written as measured (assumes an FLU-aligned IMU)")
        elif imu_frame and not self.base_frame:
            self.notes.append(f"no base frame in {TF_STATIC}; IMU samples written as measured in "
                              f"'{imu_frame}' (assumes it is aligned with the FLU base frame, REP 103)")
        return np.eye(3)

    def _origin(self, reader, chosen) -> tuple[tuple | None, str]:
        """run.json origin: --origin, else the first valid GNSS fix of the window."""
        if self.opts.origin is not None:
            return tuple(self.opts.origin), "--origin"
        if chosen["gnss"]:
            for _, _, fix in self._first(reader, chosen["gnss"], limit=50):
                if int(fix.status.status) > NAVSAT_NO_FIX and math.isfinite(fix.latitude) and \
                        math.isfinite(fix.longitude) and abs(fix.latitude) <= 90 and abs(fix.longitude) <= 180:
                    return (float(fix.latitude), float(fix.longitude),
                            float(fix.altitude) if math.isfinite(fix.altitude) else 0.0), "first GNSS fix"
        return None, ""

    def _lookahead(self, reader, rows, chosen) -> tuple[int, CameraModel, np.ndarray, tuple | None, str]:
        """Static transforms, first frame (its frame id and the time base), calibration, IMU frame, origin."""
        self.tree = TransformTree()
        if any(r.topic == TF_STATIC and r.msgtype == TF_MESSAGE for r in rows):
            conns = [c for c in reader.connections if c.topic == TF_STATIC]
            try:
                for c, _, raw in reader.messages(connections=conns):
                    self.tree.add(reader.deserialize(raw, c.msgtype))
            except _reader_errors() as e:
                self.notes.append(f"{TF_STATIC} could not be read completely: {_why(e)}")
        known = self.tree.frames()
        self.base_frame = self.opts.base_frame or next(
            (f for f in ("base_footprint", "base_link") if f in known), None)
        first = self._first(reader, chosen["camera"], stamped=True)
        if not first:
            raise InputError(f"{self.bag}: camera topic {chosen['camera']} has no message in the window")
        _, rec0, msg0 = first[0]
        self.first_image_frame = str(msg0.header.frame_id)
        base_ns = (self._stamp(msg0, rec0) // NS) * NS
        camera = self._camera(reader, chosen)
        r_base_imu = self._imu_rotation(reader, chosen["imu"]) if chosen["imu"] else np.eye(3)
        origin, origin_note = self._origin(reader, chosen)
        if chosen["truth"] and self.opts.origin is None:
            raise InputError(f"--truth-topic {chosen['truth']}: truth poses are x/y metres in an ENU frame; "
                             "give that frame's origin with --origin LAT,LON[,H]")
        return base_ns, camera, r_base_imu, origin, origin_note

    def _run(self, reader) -> ImportResult:
        opts = self.opts
        rows = inventory(reader)
        chosen, notes = choose_topics(rows, opts)
        if getattr(reader, "note", None):
            self.notes.append(reader.note)
        self.notes.extend(notes)
        t0 = reader.start_time
        self.start_ns = t0 + int(round(opts.start_s * NS)) if opts.start_s is not None else None
        self.stop_ns = t0 + int(round(opts.end_s * NS)) if opts.end_s is not None else None
        win0 = self.start_ns if self.start_ns is not None else t0
        win1 = self.stop_ns if self.stop_ns is not None else reader.end_time
        base_ns, camera, r_base_imu, origin, origin_note = self._lookahead(reader, rows, chosen)

        streams = {chosen[k]: k for k in ("camera", "imu", "odom", "gnss", "truth") if chosen[k]}
        trackers = {t: StampTracker(t, opts.stamp_params) for t in streams}
        conns = [c for c in reader.connections if c.topic in streams]
        info = {"bag": str(self.bag), "topics": {k: v for k, v in chosen.items() if v},
                "time_base_ns": int(base_ns), "time_source": "record" if opts.record_time else "header",
                "every": opts.every, "window_s": [opts.start_s, opts.end_s], "state": "running",
                "bag_fingerprint": self.fingerprint, "options": self.options}
        if getattr(reader, "note", None):
            info["salvaged"] = reader.note
        extra = {"import": info, "time_base_ns": int(base_ns)}
        if origin is not None:
            extra["origin_source"] = origin_note
        skip: dict[str, float] = {}
        if self.prev is not None:
            if self.prev.get("time_base_ns") != int(base_ns):
                raise InputError(f"{self.out}: time base {self.prev.get('time_base_ns')} ns in run.json, the bag "
                                 f"gives {int(base_ns)} ns; cannot resume")
            writer = BagRunWriter.resume(self.out)
            skip = {k: writer.last_t[f] for k, f in _STREAM_TABLE.items() if f in writer.last_t}
            info["resumed"] = int(self.prev.get("resumed", 0)) + 1
            self.notes.append("resumed: " + (", ".join(f"{_STREAM_TABLE[k]} up to t = {v!r} s" for k, v in skip.items())
                                             or "nothing written yet") + " already in the folder")
        else:
            writer = BagRunWriter(self.out, camera=camera, origin=origin, name=self.out.name,
                                  source=f"bag {self.bag.name}", extra=extra)
        workers = opts.workers if opts.workers > 0 else min(4, os.cpu_count() or 1)
        frames = FrameQueue(writer, workers, self._drop)
        rows_out = _Rows(writer, frames, camera, r_base_imu,
                         LocalFrame(*(list(origin) + [0.0])[:3]) if origin is not None else None, opts)
        index = {t: 0 for t in streams}
        progress = Progress(win1 - win0, "import", enabled=opts.progress)
        stop_reason = None
        last = ("", -1)
        it = reader.messages(connections=conns, start=self.start_ns, stop=self.stop_ns)
        errors = _reader_errors()
        complete = False
        try:
            while True:
                try:
                    item = next(it)
                except StopIteration:
                    break
                except errors as e:
                    where = f"after topic {last[0]} message #{last[1]}" if last[1] >= 0 else "before the first message"
                    stop_reason = f"{self.bag}: bag unreadable {where}: {_why(e)}"
                    break
                conn, rec, raw = item
                topic = conn.topic
                i = index[topic]
                index[topic] = i + 1
                last = (topic, i)
                progress.update(rec - win0, len(raw))
                try:
                    msg = reader.deserialize(raw, conn.msgtype)
                except errors as e:
                    self._drop(topic, i, f"does not deserialize ({_why(e)})")
                    continue
                tr = trackers[topic]
                stamp = self._stamp(msg, rec)
                if not tr.check(stamp, rec, i):
                    if tr.accepted == 0 and tr.stampless >= MAX_LEADING_STAMPLESS:
                        stop_reason = (f"{self.bag}: topic {topic} messages #0..#{i} carry no header stamp; "
                                       "pass --record-time to use the bag's record time instead")
                        break
                    continue
                kind = streams[topic]
                t = (stamp - base_ns) / NS
                rows_out.dry = t <= skip.get(kind, -math.inf)
                try:
                    rows_out.add(kind, conn.msgtype, msg, t, topic, i)
                except (BadMessage, AttributeError, TypeError, ValueError) as e:
                    self._drop(topic, i, str(e))
                except OSError as e:  # the run folder cannot be written (disk full, permissions)
                    stop_reason = f"{self.out}: cannot write ({e.strerror or e}) at topic {topic} message #{i}"
                    break
            complete = stop_reason is None
        finally:
            late = None  # Ctrl-C while the last frames are flushed: the run is not complete after all
            try:
                frames.close(flush=True)
            except OSError as e:
                complete = False
                stop_reason = stop_reason or f"{self.out}: cannot write ({e.strerror or e})"
            except BaseException as e:
                complete = False
                late = e
            finally:
                rows_out.counts["frames"] = frames.written
                progress.done()
                writer.close(complete=complete)
            if not complete and stop_reason is None:
                stop_reason = f"interrupted after topic {last[0]} message #{last[1]}"
            report = self._report(trackers, rows_out.counts, rows_out.gnss_skip, stop_reason)
            info.update(state="complete" if complete else "stopped", report=report)
            if stop_reason:
                info["stopped"] = stop_reason
            try:
                _update_meta(self.out, {"import": info})
            except OSError:
                pass
            if late is not None:
                raise late
        lines = self._lines(trackers, rows_out.counts, rows_out.gnss_skip, stop_reason)
        if stop_reason:
            raise StopImport(f"{stop_reason}; {self.out} holds what came before and is marked incomplete")
        return ImportResult(self.out, complete, rows_out.counts, report, lines)

    def _report(self, trackers, counts, gnss_skip, stop_reason) -> dict:
        return {"written": dict(counts), "topics": {t: tr.summary() for t, tr in trackers.items()},
                "dropped": {t: {"count": self.bad_count[t], "first": self.bad.get(t, [])} for t in self.bad_count},
                "gnss_skipped": dict(gnss_skip), "notes": list(self.notes), "stopped": stop_reason}

    def _lines(self, trackers, counts, gnss_skip, stop_reason) -> list[str]:
        out = [f"wrote {self.out}: " + ", ".join(f"{v} {k}" for k, v in counts.items())]
        for tr in trackers.values():
            out.append(f"  {tr.line()}")
            out += [f"    {e}" for e in tr.events[:5]]
            if len(tr.events) > 5:
                out.append(f"    ... {len(tr.events) - 5} more in run.json")
        for t, n in self.bad_count.items():
            out.append(f"  {t}: {n} messages dropped")
            out += [f"    {e}" for e in self.bad.get(t, [])[:5]]
        for k, v in gnss_skip.items():
            if v:
                out.append(f"  gnss: {v} fixes skipped ({k})" +
                           ("; pass --gnss-acc M to keep them" if k == "unknown covariance" else ""))
        out += [f"  note: {n}" for n in self.notes]
        if stop_reason:
            out.append(f"  STOPPED: {stop_reason}")
        return out


def import_bag(bag, out, opts: ImportOptions | None = None, *, resume: bool = False) -> ImportResult:
    """Convert ``bag`` into the run folder ``out`` (which must not exist or be empty).

    Parameters
    ----------
    bag : str or Path
        ROS 1 ``.bag`` file, ROS 2 bag folder, or a single ``.db3`` / ``.mcap`` file.
    out : str or Path
        Run folder to write.
    opts : ImportOptions
        Topic choices and options (defaults pick topics by message type).
    resume : bool
        Continue the stopped import in ``out`` (run.json ``"complete": false``), which must have been
        written from the same bag, unchanged, with the same options. The bag is read again from the
        start; messages at or before the last row (frame) of their stream in the folder are checked
        and counted but not written again; the rest is appended.

    Returns
    -------
    ImportResult
        Counts, the per-topic timestamp report and the report as text lines.

    Raises
    ------
    InputError
        Unreadable bag, missing or ambiguous topics, unusable calibration (nothing written).
    StopImport
        The bag broke off part-way: the run folder holds what came before, with
        ``"complete": false`` and the reason in run.json.
    """
    return _Importer(bag, out, opts or ImportOptions(), resume=resume).run()
